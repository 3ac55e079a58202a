// Numbers, times, colours and symbols shared by the pages.
//
// Colours come from the Okabe-Ito palette, which stays distinguishable with the
// common colour-vision deficiencies; every colour also comes with a shape, a dash
// pattern or a word, so nothing is told by colour alone.

import { s } from './dom.js';

/** Vessel series: colour and dash pattern, by position in the train. */
export const VESSEL_STYLES = [
  { colour: '#0072B2', dash: [] },
  { colour: '#009E73', dash: [9, 4] },
  { colour: '#CC79A7', dash: [2, 3] },
  { colour: '#E69F00', dash: [10, 3, 2, 3] },
  { colour: '#56B4E9', dash: [5, 5] },
  { colour: '#D55E00', dash: [14, 4] },
];

export function vesselStyle(index) {
  return VESSEL_STYLES[index % VESSEL_STYLES.length];
}

/** Alert priorities: word, colour and shape (triangle, diamond, circle). */
export const PRIORITIES = {
  high: { word: 'High', colour: '#D55E00', shape: 'triangle', rank: 0 },
  warning: { word: 'Warning', colour: '#E69F00', shape: 'diamond', rank: 1 },
  advisory: { word: 'Advisory', colour: '#56B4E9', shape: 'circle', rank: 2 },
};

/** Alert states (ISA-18.2 / IEC 62682) in words, with a shape each. */
export const STATES = {
  active_unacknowledged: { word: 'Active, unacknowledged', shape: 'square-filled' },
  active_acknowledged: { word: 'Active, acknowledged', shape: 'square' },
  cleared_unacknowledged: { word: 'Cleared, unacknowledged', shape: 'ring-dashed' },
  shelved: { word: 'Shelved', shape: 'bars' },
  out_of_service: { word: 'Out of service', shape: 'slashed' },
  normal: { word: 'Normal', shape: 'dash' },
};

/** States in which an alert's condition holds and nobody has set it aside. */
export const ACTIVE_STATES = new Set(['active_unacknowledged', 'active_acknowledged']);

const SHAPES = {
  triangle: (c) => [s('path', { d: 'M8 1.5 15 14.5H1z', fill: c, stroke: 'currentColor', 'stroke-width': 1 })],
  diamond: (c) => [s('path', { d: 'M8 1 15 8 8 15 1 8z', fill: c, stroke: 'currentColor', 'stroke-width': 1 })],
  circle: (c) => [s('circle', { cx: 8, cy: 8, r: 6.5, fill: c, stroke: 'currentColor', 'stroke-width': 1 })],
  'square-filled': () => [s('rect', { x: 2, y: 2, width: 12, height: 12, fill: 'currentColor' })],
  square: () => [s('rect', { x: 2.5, y: 2.5, width: 11, height: 11, fill: 'none', stroke: 'currentColor', 'stroke-width': 2 })],
  'ring-dashed': () => [s('circle', { cx: 8, cy: 8, r: 5.5, fill: 'none', stroke: 'currentColor', 'stroke-width': 2, 'stroke-dasharray': '3 2' })],
  bars: () => [
    s('rect', { x: 3, y: 2, width: 3.5, height: 12, fill: 'currentColor' }),
    s('rect', { x: 9.5, y: 2, width: 3.5, height: 12, fill: 'currentColor' }),
  ],
  slashed: () => [
    s('circle', { cx: 8, cy: 8, r: 6, fill: 'none', stroke: 'currentColor', 'stroke-width': 2 }),
    s('path', { d: 'M3.8 12.2 12.2 3.8', stroke: 'currentColor', 'stroke-width': 2 }),
  ],
  dash: () => [s('path', { d: 'M3 8h10', stroke: 'currentColor', 'stroke-width': 2 })],
};

/** A 16 x 16 symbol as an inline SVG element. */
export function glyph(shape, colour = 'currentColor', label = null) {
  const attrs = { class: 'glyph', viewBox: '0 0 16 16', width: 16, height: 16 };
  if (label) {
    attrs.role = 'img';
    attrs['aria-label'] = label;
  } else {
    attrs['aria-hidden'] = 'true';
  }
  return s('svg', attrs, (SHAPES[shape] || SHAPES.dash)(colour));
}

export function priorityGlyph(priority) {
  const p = PRIORITIES[priority] || PRIORITIES.advisory;
  return glyph(p.shape, p.colour);
}

/** Draw a priority's shape on a canvas, centred at (x, y), r pixels across half. */
export function drawShape(ctx, shape, x, y, r) {
  ctx.beginPath();
  if (shape === 'triangle') {
    ctx.moveTo(x, y - r);
    ctx.lineTo(x + r, y + r * 0.8);
    ctx.lineTo(x - r, y + r * 0.8);
    ctx.closePath();
  } else if (shape === 'diamond') {
    ctx.moveTo(x, y - r);
    ctx.lineTo(x + r, y);
    ctx.lineTo(x, y + r);
    ctx.lineTo(x - r, y);
    ctx.closePath();
  } else {
    ctx.arc(x, y, r * 0.85, 0, 2 * Math.PI);
  }
}

/** The same shapes as an SVG path, centred at (x, y). */
export function drawShapePath(shape, x, y, r) {
  if (shape === 'triangle') return `M${x} ${y - r}L${x + r} ${y + r * 0.8}H${x - r}Z`;
  if (shape === 'diamond') return `M${x} ${y - r}L${x + r} ${y}L${x} ${y + r}L${x - r} ${y}Z`;
  const q = r * 0.85;
  return `M${x - q} ${y}a${q} ${q} 0 1 0 ${2 * q} 0a${q} ${q} 0 1 0 ${-2 * q} 0Z`;
}

/** A number with fixed decimals; an en dash for a missing one. */
export function fixed(value, digits) {
  return Number.isFinite(value) ? value.toFixed(digits) : '–';
}

/** A fraction as per cent with one decimal: 0.4123 -> "41.2". */
export function percent(value, digits = 1) {
  return Number.isFinite(value) ? (value * 100).toFixed(digits) : '–';
}

/** Flow: m^3/s in the API, m^3/h on screen. */
export function flowPerHour(value) {
  return Number.isFinite(value) ? (value * 3600).toFixed(2) : '–';
}

function pad(n) {
  return String(n).padStart(2, '0');
}

/** Epoch seconds as local date and time, "2025-03-01 14:05:09". */
export function localTime(seconds) {
  if (!Number.isFinite(seconds)) return '–';
  const d = new Date(seconds * 1000);
  return `${d.getFullYear()}-${pad(d.getMonth() + 1)}-${pad(d.getDate())} `
    + `${pad(d.getHours())}:${pad(d.getMinutes())}:${pad(d.getSeconds())}`;
}

/** Epoch seconds as UTC ISO 8601 text (for tooltips). */
export function utcTime(seconds) {
  return Number.isFinite(seconds) ? new Date(seconds * 1000).toISOString() : '';
}

/** A duration in seconds in words: "42 s", "7 min", "3 h 05 min", "2 d 4 h". */
export function duration(seconds) {
  if (!Number.isFinite(seconds)) return '–';
  const sign = seconds < 0 ? '−' : '';
  let t = Math.abs(seconds);
  if (t < 60) return `${sign}${Math.floor(t)} s`;
  t = Math.floor(t / 60);
  if (t < 60) return `${sign}${t} min`;
  const hours = Math.floor(t / 60);
  if (hours < 48) return `${sign}${hours} h ${pad(t % 60)} min`;
  return `${sign}${Math.floor(hours / 24)} d ${hours % 24} h`;
}

/** Age of an estimate time, from now. */
export function age(seconds) {
  return duration(Date.now() / 1000 - seconds);
}

/** Estimates older than this are flagged as stale on screen [s]. */
export const STALE_AFTER = 15 * 60;

/** Subscripts and superscripts for units: "m^3/h" -> "m³/h". */
export function unitText(unit) {
  return (unit || '').replace(/\^3/g, '³').replace(/\^2/g, '²').replace(/\^-1/g, '⁻¹');
}

/** Hex colour with an alpha, as rgba(). */
export function withAlpha(hex, alpha) {
  const n = parseInt(hex.slice(1), 16);
  return `rgba(${(n >> 16) & 255}, ${(n >> 8) & 255}, ${n & 255}, ${alpha})`;
}

/** The vessel with the largest shortfall (design minus estimated conversion). */
export function worstShortfall(estimate) {
  let worst = null;
  for (const v of estimate?.vessels || []) {
    if (worst === null || v.shortfall > worst.shortfall) worst = v;
  }
  return worst;
}
