// The train drawn as its vessels in series (SVG): the feed, each stirred vessel
// with its estimated concentrations, and under each a conversion strip showing the
// estimate, its 2-sigma whisker and the design expectation.
//
// Every number carries data-field (what it is) and data-value (the API's number,
// unrounded), so a reader or a test can tie what is shown to the API.

import { s } from './dom.js';
import {
  ACTIVE_STATES, PRIORITIES, drawShapePath, fixed, flowPerHour, vesselStyle,
} from './format.js';

const VESSEL_W = 190;
const GAP = 78;
const FEED_W = 170;
const PRODUCT_W = 110;
const MARGIN = 16;
const TOP = 52; // tank top
const PIPE_Y = TOP + 22;
const ROW = 44; // one species' lines inside a tank

function num(field, value, digits, scale = 1) {
  return s('tspan', { class: 'v', dataset: { field, value } },
    Number.isFinite(value) ? (value * scale).toFixed(digits) : '–');
}

function tankPath(x, y, w, height, r) {
  return `M${x} ${y} V${y + height - r} Q${x} ${y + height} ${x + r} ${y + height} `
    + `H${x + w - r} Q${x + w} ${y + height} ${x + w} ${y + height - r} V${y}`;
}

function liquidPath(x, y, w, height, r, level) {
  const top = y + level;
  return `M${x} ${top} V${y + height - r} Q${x} ${y + height} ${x + r} ${y + height} `
    + `H${x + w - r} Q${x + w} ${y + height} ${x + w} ${y + height - r} V${top} `
    + `Q${x + w * 0.75} ${top - 4} ${x + w / 2} ${top} T${x} ${top} Z`;
}

function badge(x, y, alert) {
  const p = PRIORITIES[alert.priority] || PRIORITIES.advisory;
  return s('g', { class: 'vessel-badge', dataset: { alertId: alert.alert_id } },
    s('path', { d: drawShapePath(p.shape, x, y - 5, 7), fill: p.colour, class: 'badge-shape' }),
    s('text', { x: x + 11, y, class: 'badge-text' }, p.word.toLowerCase()));
}

function vessel(i, name, estimate, species, alerts, x, tankH) {
  const style = vesselStyle(i);
  const v = estimate?.vessels.find((e) => e.name === name);
  const g = s('g', { class: 'vessel', dataset: { vessel: name }, style: `--vessel:${style.colour}` });
  g.append(
    s('text', { x, y: TOP - 14, class: 'vessel-name' }, name),
    s('path', { d: liquidPath(x, TOP, VESSEL_W, tankH, 26, 22), class: 'liquid' }),
    s('path', { d: tankPath(x, TOP - 6, VESSEL_W, tankH + 6, 26), class: 'tank' }),
    s('path', { d: `M${x + VESSEL_W / 2} ${TOP - 14} V${TOP + tankH - 30}`, class: 'shaft' }),
    s('path', {
      d: `M${x + VESSEL_W / 2 - 26} ${TOP + tankH - 30} h52 M${x + VESSEL_W / 2 - 26} ${TOP + tankH - 36} v12 M${x + VESSEL_W / 2 + 26} ${TOP + tankH - 36} v12`,
      class: 'shaft',
    }),
  );
  const active = alerts.filter((a) => a.subject === name && ACTIVE_STATES.has(a.state))
    .sort((a, b) => PRIORITIES[a.priority].rank - PRIORITIES[b.priority].rank);
  if (active.length) g.append(badge(x + VESSEL_W - 72, TOP - 14, active[0]));

  species.forEach((sp, j) => {
    const y = TOP + 46 + j * ROW;
    const c = v?.concentration[sp];
    g.append(
      s('text', { x: x + 14, y, class: 'label halo' }, `${sp}, mol/m³`),
      s('text', { x: x + 14, y: y + 20, class: 'reading halo' },
        num(`${name}.c.${sp}`, c?.value, 1), s('tspan', { class: 'pm' }, ' ± '),
        num(`${name}.c.${sp}.std`, c?.std, 1)),
    );
  });

  // Conversion strip: track, estimate bar, 2-sigma whisker, design marker.
  const y0 = TOP + tankH + 26;
  const clamp = (f) => Math.max(0, Math.min(1, f));
  g.append(s('rect', { x, y: y0, width: VESSEL_W, height: 12, class: 'track' }));
  if (v) {
    const X = v.conversion.value;
    const sd = v.conversion.std;
    const lo = x + VESSEL_W * clamp(X - 2 * sd);
    const hi = x + VESSEL_W * clamp(X + 2 * sd);
    const xd = x + VESSEL_W * clamp(v.design_conversion);
    g.append(
      s('rect', { x, y: y0, width: VESSEL_W * clamp(X), height: 12, class: 'bar' }),
      s('path', { d: `M${lo} ${y0 + 6}H${hi}M${lo} ${y0 + 1}v10M${hi} ${y0 + 1}v10`, class: 'whisker' }),
      s('path', { d: `M${xd - 6} ${y0 - 10}h12l-6 8z`, class: 'design-mark' }),
      s('path', { d: `M${xd} ${y0 - 2}v16`, class: 'design-tick' }),
    );
  }
  const sf = v?.shortfall;
  g.append(
    s('text', { x, y: y0 + 34, class: 'conversion' },
      s('tspan', {}, 'X '), num(`${name}.x`, v?.conversion.value, 1, 100), s('tspan', {}, ' %'),
      s('tspan', { class: 'pm' }, ' ± '), num(`${name}.x.std`, v?.conversion.std, 1, 100)),
    s('text', { x, y: y0 + 54, class: 'label' },
      s('tspan', {}, 'design '), num(`${name}.xd`, v?.design_conversion, 1, 100), s('tspan', {}, ' %')),
    s('text', { x, y: y0 + 74, class: Number.isFinite(sf) && sf > 0 ? 'label shortfall below' : 'label shortfall' },
      s('tspan', {}, Number.isFinite(sf) && sf <= 0 ? 'above design by ' : 'shortfall '),
      num(`${name}.shortfall`, Number.isFinite(sf) ? Math.abs(sf) : sf, 2, 100), s('tspan', {}, ' pt')),
  );
  return g;
}

/**
 * Draw a train's cascade.
 *
 * train: TrainPublic; estimate: EstimatePublic or null; alerts: AlertPublic[].
 */
export function cascadeSvg(train, estimate, alerts) {
  const n = train.vessels.length;
  const species = train.species;
  const tankH = Math.max(150, 70 + species.length * ROW);
  const width = MARGIN * 2 + FEED_W + GAP + n * VESSEL_W + (n - 1) * GAP + PRODUCT_W;
  const height = TOP + tankH + 26 + 86;
  const svg = s('svg', {
    class: 'cascade',
    viewBox: `0 0 ${width} ${height}`,
    role: 'group',
    'aria-label': `${train.name}: ${n} vessels in series`,
    style: `min-width:${Math.round(n * 230 + 260)}px`,
  });
  svg.append(s('defs', {},
    s('marker', { id: 'flow-arrow', viewBox: '0 0 10 10', refX: 9, refY: 5, markerWidth: 7, markerHeight: 7, orient: 'auto' },
      s('path', { d: 'M0 0 10 5 0 10z', class: 'arrow-head' }))));

  // Feed.
  const fx = MARGIN;
  const feed = s('g', { class: 'feed' },
    s('text', { x: fx, y: TOP - 14, class: 'vessel-name' }, 'Feed'),
    s('rect', { x: fx, y: TOP - 6, width: FEED_W, height: tankH + 6, rx: 10, class: 'feed-box' }),
    s('text', { x: fx + 12, y: TOP + 20, class: 'label' }, 'flow, m³/h'),
    s('text', { x: fx + 12, y: TOP + 40, class: 'reading' },
      s('tspan', { class: 'v', dataset: { field: 'flow', value: estimate?.flow } }, flowPerHour(estimate?.flow))));
  species.forEach((sp, j) => {
    const y = TOP + 66 + j * ROW;
    const value = estimate?.feed?.[sp];
    feed.append(
      s('text', { x: fx + 12, y, class: 'label' }, `${sp}, mol/m³`),
      s('text', { x: fx + 12, y: y + 20, class: 'reading' },
        s('tspan', { class: 'v', dataset: { field: `feed.${sp}`, value } }, fixed(value, 1))));
  });
  svg.append(feed);

  let x = fx + FEED_W;
  svg.append(s('path', { d: `M${x} ${PIPE_Y}H${x + GAP - 2}`, class: 'pipe', 'marker-end': 'url(#flow-arrow)' }));
  x += GAP;
  train.vessels.forEach((name, i) => {
    svg.append(vessel(i, name, estimate, species, alerts, x, tankH));
    const end = x + VESSEL_W;
    const next = i < n - 1 ? end + GAP - 2 : end + PRODUCT_W - 30;
    svg.append(s('path', { d: `M${end} ${PIPE_Y}H${next}`, class: 'pipe', 'marker-end': 'url(#flow-arrow)' }));
    if (i === n - 1) svg.append(s('text', { x: end + 8, y: PIPE_Y - 10, class: 'label' }, 'product'));
    x += VESSEL_W + GAP;
  });
  return svg;
}
