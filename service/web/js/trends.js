// Trend charts of a train's estimates (uPlot, vendored): conversion after each
// vessel against its design expectation, concentrations for one species, and the
// catalyst activity, each with its 2-sigma band, and alert markers on all three.
//
// The history comes downsampled from the API (about one row per window/720); live
// estimates are appended at the same spacing, and the newest one always shows.

import { h, s, fill } from './dom.js';
import {
  PRIORITIES, drawShape, drawShapePath, localTime, vesselStyle, withAlpha,
} from './format.js';

export const POINTS_PER_WINDOW = 720;
const SYNC_KEY = 'stagewatch-trends';

function cssVar(name, fallback) {
  const v = getComputedStyle(document.documentElement).getPropertyValue(name).trim();
  return v || fallback;
}

function chartHeight() {
  return Math.round(Math.max(170, Math.min(640, window.innerHeight * 0.24)));
}

/** The root font size [px]: it grows with the screen, and the charts' text with it. */
function remPx() {
  return parseFloat(getComputedStyle(document.documentElement).fontSize) || 15;
}

function sample(colour, dash, kind = 'line') {
  const attrs = { class: 'legend-sample', viewBox: '0 0 28 10', width: 28, height: 10, 'aria-hidden': 'true' };
  if (kind === 'band') {
    return s('svg', attrs, s('rect', { x: 0, y: 1, width: 28, height: 8, fill: withAlpha(colour, 0.25) }));
  }
  return s('svg', attrs, s('path', {
    d: 'M1 5H27', stroke: colour, 'stroke-width': kind === 'design' ? 2 : 3,
    'stroke-dasharray': dash.length ? dash.join(' ') : null, fill: 'none',
  }));
}

/** Columns of the estimates in the window, oldest first. */
class Columns {
  constructor(train) {
    this.train = train;
    this.clear();
  }

  clear() {
    const n = this.train.vessels.length;
    this.t = [];
    this.x = Array.from({ length: n }, () => []);
    this.xs = Array.from({ length: n }, () => []);
    this.xd = Array.from({ length: n }, () => []);
    this.c = Array.from({ length: n }, () => Object.fromEntries(this.train.species.map((sp) => [sp, []])));
    this.cs = Array.from({ length: n }, () => Object.fromEntries(this.train.species.map((sp) => [sp, []])));
    this.feed = Object.fromEntries(this.train.species.map((sp) => [sp, []]));
    this.a = [];
    this.as = [];
  }

  *arrays() {
    yield this.t; yield this.a; yield this.as;
    yield* this.x; yield* this.xs; yield* this.xd;
    for (const per of [this.c, this.cs]) for (const v of per) yield* Object.values(v);
    yield* Object.values(this.feed);
  }

  write(k, e) {
    this.t[k] = e.time;
    this.a[k] = e.activity.value;
    this.as[k] = e.activity.std;
    this.train.vessels.forEach((name, i) => {
      const v = e.vessels.find((x) => x.name === name) || e.vessels[i];
      this.x[i][k] = v.conversion.value;
      this.xs[i][k] = v.conversion.std;
      this.xd[i][k] = v.design_conversion;
      for (const sp of this.train.species) {
        this.c[i][sp][k] = v.concentration[sp]?.value ?? null;
        this.cs[i][sp][k] = v.concentration[sp]?.std ?? null;
      }
    });
    for (const sp of this.train.species) this.feed[sp][k] = e.feed?.[sp] ?? null;
  }

  /** Add an estimate; spacing at least `every` seconds except for the newest. */
  add(e, every) {
    const n = this.t.length;
    if (n && e.time < this.t[n - 1]) {
      // A revision after a late reading: replace the row with the same time, if shown.
      const k = this.t.lastIndexOf(e.time);
      if (k >= 0) this.write(k, e);
      return;
    }
    if (n && e.time === this.t[n - 1]) this.write(n - 1, e);
    else if (n >= 2 && e.time - this.t[n - 2] < every) this.write(n - 1, e);
    else this.write(n, e);
  }

  /** Drop rows before `start`. */
  trim(start) {
    let k = 0;
    while (k < this.t.length && this.t[k] < start) k += 1;
    if (k) for (const arr of this.arrays()) arr.splice(0, k);
  }
}

/** The three trend charts of one train. */
export class Trends {
  constructor(container, train) {
    this.train = train;
    this.cols = new Columns(train);
    this.species = train.species[0];
    this.start = 0;
    this.end = 0;
    this.every = 60;
    this.markers = [];
    this.charts = [];
    this.frame = 0;
    this.container = container;
    this.build();
  }

  setWindow(start, end) {
    this.start = start;
    this.end = end;
    this.every = (end - start) / POINTS_PER_WINDOW;
  }

  setHistory(estimates) {
    this.cols.clear();
    for (const e of estimates) this.cols.add(e, 0);
    this.schedule();
  }

  /** A live estimate: the window follows it when it is the newest. */
  addEstimate(e) {
    const width = this.end - this.start;
    if (e.time > this.end) this.setWindow(e.time - width, e.time);
    this.cols.add(e, this.every);
    this.cols.trim(this.start);
    this.schedule();
  }

  setMarkers(events) {
    this.markers = events.filter(isMarker);
    this.schedule();
  }

  addMarker(event) {
    if (isMarker(event)) {
      this.markers.push(event);
      this.schedule();
    }
  }

  schedule() {
    if (!this.frame) this.frame = requestAnimationFrame(() => {
      this.frame = 0;
      this.redraw();
    });
  }

  build() {
    const { train } = this;
    this.speciesButtons = h('div', { class: 'segmented', role: 'group', 'aria-label': 'Species' },
      train.species.map((sp) => h('button', {
        type: 'button', class: 'btn btn-seg', 'aria-pressed': String(sp === this.species), dataset: { species: sp },
        onclick: () => this.chooseSpecies(sp),
      }, sp)));
    this.specs = [
      { key: 'conversion', title: 'Conversion after each vessel', unit: '%', extra: null },
      { key: 'concentration', title: 'Concentration in each vessel', unit: 'mol/m³', extra: this.speciesButtons },
      { key: 'activity', title: 'Catalyst activity', unit: '1 = design', extra: null },
    ];
    fill(this.container, this.specs.map((spec) => {
      spec.legend = h('ul', { class: 'legend' });
      spec.plot = h('div', { class: 'plot', dataset: { chart: spec.key } });
      return h('figure', { class: 'chart-card', dataset: { chart: spec.key } },
        h('figcaption', {}, h('span', { class: 'chart-title' }, spec.title), h('span', { class: 'muted' }, ` ${spec.unit}`), spec.extra),
        spec.legend, spec.plot);
    }));
    this.create();
    this.resizer = new ResizeObserver(() => this.resize());
    this.resizer.observe(this.container);
    // Colours and type are read when a chart is made: remake them when the system
    // switches between light and dark.
    this.scheme = window.matchMedia('(prefers-color-scheme: dark)');
    this.onScheme = () => this.rebuild();
    this.scheme.addEventListener('change', this.onScheme);
  }

  chooseSpecies(sp) {
    this.species = sp;
    for (const b of this.speciesButtons.querySelectorAll('button')) b.setAttribute('aria-pressed', String(b.dataset.species === sp));
    const spec = this.specs[1];
    spec.chart.destroy();
    spec.chart = this.makeChart(spec);
    this.redraw();
  }

  seriesOf(spec) {
    const { train } = this;
    const out = [];
    if (spec.key === 'activity') {
      const colour = cssVar('--ink', '#1f2328');
      out.push({ label: 'activity', colour, dash: [], band: true, value: () => this.cols.a, std: () => this.cols.as, digits: 3, scale: 1 });
      return out;
    }
    train.vessels.forEach((name, i) => {
      const { colour, dash } = vesselStyle(i);
      if (spec.key === 'conversion') {
        out.push({ label: name, colour, dash, band: true, value: () => this.cols.x[i], std: () => this.cols.xs[i], digits: 1, scale: 100 });
        out.push({ label: `${name} design`, colour, dash: [2, 4], design: true, value: () => this.cols.xd[i], digits: 1, scale: 100 });
      } else {
        out.push({ label: name, colour, dash, band: true, value: () => this.cols.c[i][this.species], std: () => this.cols.cs[i][this.species], digits: 1, scale: 1 });
      }
    });
    if (spec.key === 'concentration') {
      out.push({ label: 'feed', colour: cssVar('--muted', '#5d6470'), dash: [1, 3], design: true, value: () => this.cols.feed[this.species], digits: 1, scale: 1 });
    }
    return out;
  }

  makeChart(spec) {
    const rem = remPx();
    const lines = this.seriesOf(spec);
    spec.lines = lines;
    const ink = cssVar('--ink', '#1f2328');
    const grid = cssVar('--grid', '#e4e0d8');
    const series = [{}];
    const bands = [];
    fill(spec.legend, lines.map((line) => {
      line.out = h('span', { class: 'lv' });
      return h('li', {}, sample(line.colour, line.dash, line.design ? 'design' : 'line'), h('span', {}, line.label), line.out);
    }), lines.some((l) => l.band) ? h('li', { class: 'muted' }, sample(ink, [], 'band'), '± 2σ') : null,
    h('li', { class: 'muted' }, 'alert raised ', markerKey('high'), markerKey('warning'), markerKey('advisory')));
    for (const line of lines) {
      const idx = series.length;
      series.push({
        label: line.label, stroke: line.colour, width: (line.design ? 1.5 : 2) * Math.max(1, rem / 16), dash: line.dash,
        points: { show: false }, spanGaps: true,
      });
      line.index = idx;
      if (line.band) {
        const edge = { stroke: withAlpha(line.colour, 0.35), width: 1, points: { show: false }, spanGaps: true };
        series.push({ ...edge, label: `${line.label} +2σ` }, { ...edge, label: `${line.label} −2σ` });
        bands.push({ series: [idx + 1, idx + 2], fill: withAlpha(line.colour, 0.14) });
      }
    }
    const font = `${Math.round(rem * 0.8)}px system-ui, "DejaVu Sans", sans-serif`;
    const axis = {
      stroke: ink, font, grid: { stroke: grid, width: 1 }, ticks: { stroke: grid, width: 1, size: rem * 0.4 },
    };
    const opts = {
      width: Math.max(200, spec.plot.clientWidth || this.container.clientWidth || 600),
      height: chartHeight(),
      series,
      bands,
      legend: { show: false },
      cursor: { sync: { key: SYNC_KEY }, points: { show: false }, drag: { x: false, y: false } },
      scales: { x: { time: true, range: () => [this.start, this.end] } },
      axes: [{ ...axis, size: rem * 3.2 }, { ...axis, size: rem * 4.4 }],
      hooks: {
        draw: [(u) => this.drawMarkers(u)],
        setCursor: [(u) => this.showValues(spec, u.cursor.idx)],
      },
    };
    return new window.uPlot(opts, this.dataOf(spec), spec.plot);
  }

  dataOf(spec) {
    const data = [this.cols.t];
    for (const line of spec.lines) {
      const values = line.value().map((v) => (v === null ? null : v * line.scale));
      data.push(values);
      if (line.band) {
        const std = line.std();
        data.push(values.map((v, k) => (v === null || std[k] === null ? null : v + 2 * std[k] * line.scale)));
        data.push(values.map((v, k) => (v === null || std[k] === null ? null : v - 2 * std[k] * line.scale)));
      }
    }
    return data;
  }

  showValues(spec, idx) {
    const n = this.cols.t.length;
    const k = idx === null || idx === undefined ? n - 1 : idx;
    for (const line of spec.lines) {
      const v = k >= 0 ? line.value()[k] : null;
      line.out.textContent = v === null || v === undefined ? '' : ` ${(v * line.scale).toFixed(line.digits)}`;
    }
    if (spec.key === 'conversion') {
      this.container.dataset.cursorTime = k >= 0 ? String(this.cols.t[k]) : '';
      this.container.title = k >= 0 ? `at ${localTime(this.cols.t[k])}` : '';
    }
  }

  drawMarkers(u) {
    const ctx = u.ctx;
    const { left, top, width, height } = u.bbox;
    const r = remPx() * 0.42 * (window.devicePixelRatio || 1);
    ctx.save();
    for (const m of this.markers) {
      const x = u.valToPos(m.time, 'x', true);
      if (x < left || x > left + width) continue;
      const p = PRIORITIES[m.priority] || PRIORITIES.advisory;
      ctx.strokeStyle = p.colour;
      ctx.lineWidth = 1.5 * (window.devicePixelRatio || 1);
      ctx.setLineDash([4 * r / 6, 3 * r / 6]);
      ctx.beginPath();
      ctx.moveTo(x, top + 2 * r);
      ctx.lineTo(x, top + height);
      ctx.stroke();
      ctx.setLineDash([]);
      drawShape(ctx, p.shape, x, top + r, r);
      ctx.fillStyle = p.colour;
      ctx.fill();
      ctx.strokeStyle = cssVar('--ink', '#1f2328');
      ctx.lineWidth = 1;
      ctx.stroke();
    }
    ctx.restore();
  }

  create() {
    this.rem = remPx();
    this.container.dataset.scheme = window.matchMedia('(prefers-color-scheme: dark)').matches ? 'dark' : 'light';
    for (const spec of this.specs) spec.chart = this.makeChart(spec);
  }

  rebuild() {
    for (const spec of this.specs) spec.chart.destroy();
    this.create();
    this.redraw();
  }

  redraw() {
    for (const spec of this.specs) {
      spec.chart.setData(this.dataOf(spec));
      this.showValues(spec, spec.chart.cursor.idx);
    }
    this.container.dataset.points = String(this.cols.t.length);
    this.container.dataset.markers = String(this.markers.filter((m) => m.time >= this.start && m.time <= this.end).length);
  }

  resize() {
    if (remPx() !== this.rem) {
      this.rebuild(); // the type grew or shrank with the window
      return;
    }
    for (const spec of this.specs) {
      const width = spec.plot.clientWidth;
      if (width > 0) spec.chart.setSize({ width, height: chartHeight() });
    }
  }

  destroy() {
    cancelAnimationFrame(this.frame);
    this.resizer.disconnect();
    this.scheme.removeEventListener('change', this.onScheme);
    for (const spec of this.specs) spec.chart.destroy();
  }
}

/** Alert events drawn as markers: raised by the rules (not by an operator). */
function isMarker(event) {
  return event.who === 'stagewatch' && event.to_state === 'active_unacknowledged';
}

function markerKey(priority) {
  const p = PRIORITIES[priority];
  return h('span', { class: 'marker-key' }, s('svg', { viewBox: '0 0 16 16', width: 12, height: 12, 'aria-hidden': 'true' },
    s('path', { d: drawShapePath(p.shape, 8, 8, 6.5), fill: p.colour, stroke: 'currentColor' })),
  ` ${p.word.toLowerCase()} `);
}
