// Every train at a glance: estimate age, activity, worst conversion shortfall and
// active alerts. Polls the API; the ages tick every second in between.

import { api, ApiError, trainPath } from './api.js';
import { h, fill } from './dom.js';
import {
  ACTIVE_STATES, PRIORITIES, STALE_AFTER, age, fixed, glyph, localTime, percent,
  priorityGlyph, utcTime, vesselStyle, worstShortfall,
} from './format.js';

const POLL_MS = 10000;

async function loadTrain(train, signal) {
  const [latest, alerts] = await Promise.all([
    api(trainPath(train.name, 'estimates', 'latest'), { signal }).catch((err) => {
      if (err instanceof ApiError && err.status === 404) return null;
      throw err;
    }),
    api(trainPath(train.name, 'alerts'), { signal }),
  ]);
  return { train, latest, alerts: alerts.data };
}

function figure(name, label, ...value) {
  return h('div', { class: 'figure', dataset: { figure: name } }, h('dt', {}, label), h('dd', {}, ...value));
}

function ageFigure(latest) {
  if (!latest) return figure('age', 'Estimate age', h('span', { class: 'muted' }, 'no estimate yet'));
  const stale = Date.now() / 1000 - latest.time > STALE_AFTER;
  return figure('age', 'Estimate age',
    h('span', { class: 'age', dataset: { since: latest.time }, title: `estimate of ${utcTime(latest.time)}` },
      age(latest.time)),
    stale ? h('span', { class: 'flag flag-stale' }, glyph('ring-dashed'), 'stale') : null,
    h('small', { class: 'block muted' }, localTime(latest.time)));
}

function activityFigure(latest) {
  if (!latest) return figure('activity', 'Activity', '–');
  return figure('activity', 'Activity',
    h('span', { class: 'num', dataset: { value: latest.activity.value } }, fixed(latest.activity.value, 3)),
    h('small', { class: 'muted' }, ` ± ${fixed(latest.activity.std, 3)}`));
}

function shortfallFigure(latest) {
  const worst = worstShortfall(latest);
  if (!worst) return figure('shortfall', 'Worst shortfall', '–');
  const below = worst.shortfall > 0;
  return figure('shortfall', 'Worst shortfall',
    h('span', { class: 'num', dataset: { value: worst.shortfall } }, `${percent(worst.shortfall, 2)} pt`),
    h('small', { class: 'muted' }, ` ${worst.name}`),
    h('small', { class: 'block muted' },
      below ? 'below design expectation' : 'every vessel at or above design'));
}

function alertsFigure(name, alerts) {
  const active = alerts.filter((a) => ACTIVE_STATES.has(a.state));
  const unack = alerts.filter((a) => a.state.endsWith('_unacknowledged')).length;
  const counts = {};
  for (const a of active) counts[a.priority] = (counts[a.priority] || 0) + 1;
  const parts = Object.keys(PRIORITIES)
    .filter((p) => counts[p])
    .map((p) => h('span', { class: 'count-chip', title: PRIORITIES[p].word },
      priorityGlyph(p), `${counts[p]} ${PRIORITIES[p].word.toLowerCase()}`));
  return figure('alerts', 'Active alerts',
    h('a', { class: 'num', href: `#/alerts?train=${encodeURIComponent(name)}`, dataset: { value: active.length } },
      String(active.length)),
    unack ? h('small', { class: 'muted' }, ` ${unack} to acknowledge`) : null,
    parts.length ? h('span', { class: 'block' }, parts) : null);
}

function vesselStrip(train, latest, alerts) {
  const flagged = new Set(alerts.filter((a) => ACTIVE_STATES.has(a.state)).map((a) => a.subject));
  const chips = train.vessels.map((name, i) => {
    const v = latest?.vessels.find((x) => x.name === name);
    return h('li', { class: 'vessel-chip', style: `--vessel:${vesselStyle(i).colour}` },
      h('span', { class: 'vessel-dot', 'aria-hidden': 'true' }),
      h('span', {}, name),
      v ? h('span', { class: 'muted' }, ` X ${percent(v.conversion.value)} %`) : null,
      flagged.has(name) ? h('span', { class: 'flag', title: 'an alert is active on this vessel' }, glyph('square-filled'), 'alert') : null);
  });
  return h('ol', { class: 'vessel-strip', 'aria-label': 'Vessels in flow order' }, chips);
}

function card({ train, latest, alerts }) {
  return h('article', { class: 'train-card', dataset: { train: train.name } },
    h('header', {},
      h('h2', {}, h('a', { href: `#/train/${encodeURIComponent(train.name)}` }, train.title || train.name)),
      h('p', { class: 'muted' }, `${train.name} · version ${train.version} · ${train.vessels.length} vessels · ${train.species.join(', ')}`)),
    vesselStrip(train, latest, alerts),
    h('dl', { class: 'figures' },
      ageFigure(latest), activityFigure(latest), shortfallFigure(latest), alertsFigure(train.name, alerts)));
}

/** Render the overview into main; returns dispose(). */
export function renderOverview(main) {
  const controller = new AbortController();
  const grid = h('div', { class: 'card-grid', id: 'train-cards', 'aria-live': 'polite' });
  const summary = h('p', { class: 'summary muted' }, 'Loading trains…');
  fill(main, h('section', { class: 'page-head' }, h('h1', {}, 'Trains'), summary), grid);

  let timer = 0;
  async function refresh() {
    try {
      const trains = (await api('/trains', { signal: controller.signal })).data;
      const rows = await Promise.all(trains.map((t) => loadTrain(t, controller.signal)));
      const active = rows.reduce((n, r) => n + r.alerts.filter((a) => ACTIVE_STATES.has(a.state)).length, 0);
      fill(summary, `${rows.length} train${rows.length === 1 ? '' : 's'} · ${active} active alert${active === 1 ? '' : 's'}`
        + ` · updated ${localTime(Date.now() / 1000)}`);
      if (rows.length === 0) {
        fill(grid, h('p', { class: 'panel' }, 'No trains yet. An administrator registers one with POST /api/v1/trains or stagewatch serve --train.'));
      } else {
        fill(grid, rows.map(card));
      }
    } catch (err) {
      if (controller.signal.aborted) return;
      fill(summary, h('span', { class: 'error' }, `Could not load the trains: ${err.detail || err.message}`));
      if (err instanceof ApiError && err.status === 401) return; // wait for a key: app.js re-renders
    }
    if (!controller.signal.aborted) timer = setTimeout(refresh, POLL_MS);
  }
  refresh();

  const ticker = setInterval(() => {
    for (const el of grid.querySelectorAll('.age[data-since]')) el.textContent = age(Number(el.dataset.since));
  }, 1000);

  return () => {
    controller.abort();
    clearTimeout(timer);
    clearInterval(ticker);
  };
}
