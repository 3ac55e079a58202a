// One train: its cascade with the newest estimate, its alerts, trend charts over a
// chosen window and the readings its gate set aside. Follows the live stream.

import { api, ApiError, followStream, trainPath } from './api.js';
import { cascadeSvg } from './cascade.js';
import { h, fill } from './dom.js';
import {
  ACTIVE_STATES, PRIORITIES, STALE_AFTER, STATES, age, fixed, glyph, localTime,
  priorityGlyph, unitText, utcTime,
} from './format.js';
import { POINTS_PER_WINDOW, Trends } from './trends.js';

/** Trend windows offered, in seconds. */
export const WINDOWS = { '1h': 3600, '6h': 6 * 3600, '24h': 86400, '7d': 7 * 86400, '30d': 30 * 86400 };
const WINDOW_WORDS = { '1h': '1 h', '6h': '6 h', '24h': '24 h', '7d': '7 d', '30d': '30 d' };
const GATED_SHOWN = 30;

const LIVE_WORDS = {
  connecting: 'connecting…',
  live: 'live',
  retrying: 'reconnecting…',
  stopped: 'not live',
};

/** Render one train's page into main; returns dispose(). */
export function renderTrain(main, name, params) {
  const controller = new AbortController();
  const signal = controller.signal;
  let windowKey = WINDOWS[params.get('window')] ? params.get('window') : '24h';
  let train = null;
  let latest = null;
  let alerts = [];
  let stream = null;
  let trends = null;
  let disposed = false;
  const timers = new Set();
  let cascadeFrame = 0;

  const title = h('h1', {}, name);
  const meta = h('p', { class: 'muted' });
  const stamp = h('p', { class: 'stamp' });
  const live = h('span', { class: 'live-pill', dataset: { live: 'connecting' }, role: 'status' }, LIVE_WORDS.connecting);
  const cascadeBox = h('div', { class: 'cascade-scroll', id: 'cascade' });
  const side = h('aside', { class: 'side-figures', id: 'train-side' });
  const alertBox = h('div', { id: 'train-alerts' });
  const windowButtons = h('div', { class: 'segmented', role: 'group', 'aria-label': 'Trend window' },
    Object.keys(WINDOWS).map((key) => h('button', {
      type: 'button', class: 'btn btn-seg', dataset: { window: key }, 'aria-pressed': String(key === windowKey),
      onclick: () => chooseWindow(key),
    }, WINDOW_WORDS[key])));
  const trendBox = h('div', { class: 'trend-charts', id: 'trends' });
  const gatedBox = h('div', { id: 'gated' });
  const error = h('p', { class: 'error', role: 'alert', hidden: true });

  fill(main,
    h('section', { class: 'page-head area-head' },
      h('p', { class: 'crumbs' }, h('a', { href: '#/' }, 'Trains'), ' / ', name),
      h('div', { class: 'head-row' }, title, live),
      meta, stamp, error),
    h('section', { class: 'panel cascade-panel area-cascade', 'aria-label': 'Cascade' }, cascadeBox, side),
    h('section', { class: 'panel area-alerts', 'aria-labelledby': 'alerts-title' },
      h('div', { class: 'panel-head' }, h('h2', { id: 'alerts-title' }, 'Alerts on this train'),
        h('a', { href: `#/alerts?train=${encodeURIComponent(name)}` }, 'Acknowledge or shelve on the Alerts page')),
      alertBox),
    h('section', { class: 'panel area-trends', 'aria-labelledby': 'trends-title' },
      h('div', { class: 'panel-head' }, h('h2', { id: 'trends-title' }, 'Trends'), windowButtons),
      trendBox),
    h('section', { class: 'panel area-gated', 'aria-labelledby': 'gated-title' },
      h('h2', { id: 'gated-title' }, 'Readings set aside by the gate'), gatedBox));

  function later(fn, ms) {
    const id = setTimeout(() => {
      timers.delete(id);
      fn();
    }, ms);
    timers.add(id);
    return id;
  }

  function showError(err) {
    if (signal.aborted) return;
    error.hidden = false;
    error.textContent = err instanceof ApiError ? `The service answered ${err.status}: ${err.detail}` : String(err.message || err);
  }

  function renderStamp() {
    if (!latest) {
      fill(stamp, h('span', { class: 'muted' }, 'No estimate yet: the train has not had its inputs.'));
      return;
    }
    const stale = Date.now() / 1000 - latest.time > STALE_AFTER;
    fill(stamp, 'Estimate of ',
      h('time', { dataset: { field: 'time', value: latest.time }, datetime: latest.time_utc, title: utcTime(latest.time) },
        localTime(latest.time)),
      ' · age ', h('span', { class: 'age', dataset: { since: latest.time } }, age(latest.time)),
      stale ? h('span', { class: 'flag flag-stale' }, glyph('ring-dashed'), 'stale') : null);
  }

  function renderSide() {
    if (!latest) {
      fill(side);
      return;
    }
    const a = latest.activity;
    const gauge = Math.max(0, Math.min(1, a.value / 1.25));
    fill(side,
      h('div', { class: 'figure big' },
        h('span', { class: 'figure-label' }, 'Catalyst activity'),
        h('span', { class: 'figure-value' },
          h('span', { dataset: { field: 'activity', value: a.value } }, fixed(a.value, 3)),
          h('small', {}, ' ± ', h('span', { dataset: { field: 'activity.std', value: a.std } }, fixed(a.std, 3)))),
        h('span', { class: 'gauge', role: 'img', 'aria-label': `activity ${fixed(a.value, 3)} of design 1` },
          h('span', { class: 'gauge-fill', style: `width:${(gauge * 100).toFixed(1)}%` }),
          h('span', { class: 'gauge-design', style: `left:${(100 / 1.25).toFixed(1)}%`, title: 'design activity 1' })),
        h('small', { class: 'muted' }, '1 = design; the tick marks it')),
      h('div', { class: 'figure' },
        h('span', { class: 'figure-label' }, 'Active alerts'),
        h('span', { class: 'figure-value' }, String(alerts.filter((x) => ACTIVE_STATES.has(x.state)).length))));
  }

  function renderCascade() {
    cascadeFrame = 0;
    if (!train) return;
    fill(cascadeBox, cascadeSvg(train, latest, alerts));
    renderStamp();
    renderSide();
  }

  function scheduleCascade() {
    if (!cascadeFrame) cascadeFrame = requestAnimationFrame(renderCascade);
  }

  function renderAlertList() {
    if (!alerts.length) {
      fill(alertBox, h('p', { class: 'muted' }, 'No alert other than normal.'));
      return;
    }
    fill(alertBox, h('ul', { class: 'alert-list' }, alerts.map((a) => h('li', { dataset: { alertId: a.alert_id, state: a.state } },
      h('span', { class: 'prio', dataset: { priority: a.priority } }, priorityGlyph(a.priority), PRIORITIES[a.priority]?.word || a.priority),
      h('span', { class: 'alert-title' }, a.title),
      h('span', { class: 'muted' }, a.subject),
      h('span', { class: 'state' }, glyph(STATES[a.state]?.shape), STATES[a.state]?.word || a.state)))));
  }

  let alertTimer = 0;
  async function refreshAlerts() {
    alertTimer = 0;
    try {
      alerts = (await api(trainPath(name, 'alerts'), { signal })).data;
      renderAlertList();
      scheduleCascade();
    } catch (err) {
      showError(err);
    }
  }

  function scheduleAlerts() {
    if (!alertTimer) alertTimer = later(refreshAlerts, 400);
  }

  let gatedTimer = 0;
  async function refreshGated() {
    gatedTimer = 0;
    try {
      const rows = (await api(trainPath(name, 'gated'), { signal, query: { start: trends.start } })).data;
      renderGated(rows);
    } catch (err) {
      showError(err);
    }
  }

  function scheduleGated() {
    if (!gatedTimer) gatedTimer = later(refreshGated, 5000);
  }

  function renderGated(rows) {
    if (!rows.length) {
      fill(gatedBox, h('p', { class: 'muted' }, 'None in this window: every reading passed the gate.'));
      return;
    }
    const newest = rows.slice().sort((a, b) => b.time - a.time).slice(0, GATED_SHOWN);
    fill(gatedBox,
      h('p', { class: 'muted' }, `${rows.length} in this window${rows.length > GATED_SHOWN ? `, newest ${GATED_SHOWN} shown` : ''}. `
        + 'Rejected readings are kept with their reason; a run of them on one side is taken as a real step.'),
      h('div', { class: 'table-scroll' }, h('table', { class: 'data-table' },
        h('thead', {}, h('tr', {}, ['Sample time', 'Tag', 'Value', 'Predicted', 'Unit', 'NIS', 'Decision', 'Reason'].map((c) => h('th', { scope: 'col' }, c)))),
        h('tbody', {}, newest.map((g) => h('tr', { dataset: { decision: g.decision } },
          h('td', { title: utcTime(g.sample_time) }, localTime(g.sample_time)),
          h('td', {}, g.tag),
          h('td', { class: 'num' }, fixed(g.value, 2)),
          h('td', { class: 'num' }, fixed(g.predicted, 2)),
          h('td', {}, unitText(g.unit)),
          h('td', { class: 'num' }, fixed(g.nis, 1)),
          h('td', {}, glyph(g.decision === 'step' ? 'square' : 'slashed'), g.decision === 'step' ? 'taken as step' : 'rejected'),
          h('td', {}, g.reason)))))));
  }

  async function loadWindow() {
    const width = WINDOWS[windowKey];
    const end = latest ? latest.time : Date.now() / 1000;
    trends.setWindow(end - width, end);
    const query = { start: end - width, end: end + 1, every: width / POINTS_PER_WINDOW };
    const [history, events, gated] = await Promise.all([
      api(trainPath(name, 'estimates'), { signal, query }),
      api(trainPath(name, 'alerts', 'events'), { signal, query: { start: end - width } }),
      api(trainPath(name, 'gated'), { signal, query: { start: end - width } }),
    ]);
    trends.setHistory(history.data);
    if (latest) trends.addEstimate(latest);
    trends.setMarkers(events.data);
    renderGated(gated.data);
  }

  function chooseWindow(key) {
    windowKey = key;
    for (const b of windowButtons.querySelectorAll('button')) b.setAttribute('aria-pressed', String(b.dataset.window === key));
    window.history.replaceState(null, '', `#/train/${encodeURIComponent(name)}?window=${key}`);
    loadWindow().catch(showError);
  }

  function onLive(kind, data) {
    if (disposed) return;
    if (kind === 'estimate') {
      if (!latest || data.time >= latest.time) {
        latest = data;
        scheduleCascade();
      }
      trends.addEstimate(data);
      scheduleGated();
    } else if (kind === 'alert') {
      trends.addMarker(data);
      scheduleAlerts();
    }
  }

  function onLiveState(state, detail) {
    if (disposed) return;
    live.dataset.live = state;
    live.textContent = LIVE_WORDS[state] || state;
    live.title = detail ? String(detail) : '';
  }

  (async () => {
    try {
      train = await api(trainPath(name), { signal });
      title.textContent = train.title || train.name;
      meta.textContent = `${train.name} · version ${train.version} · ${train.vessels.length} vessels in series · tags ${train.tags.join(', ')}`;
      try {
        latest = await api(trainPath(name, 'estimates', 'latest'), { signal });
      } catch (err) {
        if (!(err instanceof ApiError && err.status === 404)) throw err;
      }
      alerts = (await api(trainPath(name, 'alerts'), { signal })).data;
      renderCascade();
      renderAlertList();
      trends = new Trends(trendBox, train);
      await loadWindow();
      if (disposed) return;
      stream = followStream(name, {
        lastEventId: latest ? String(latest.time) : null,
        onEvent: onLive,
        onState: onLiveState,
      });
    } catch (err) {
      showError(err);
      onLiveState('stopped');
    }
  })();

  const ticker = setInterval(() => {
    for (const el of main.querySelectorAll('.age[data-since]')) el.textContent = age(Number(el.dataset.since));
  }, 1000);

  return () => {
    disposed = true;
    controller.abort();
    clearInterval(ticker);
    for (const id of timers) clearTimeout(id);
    cancelAnimationFrame(cascadeFrame);
    if (stream) stream.close();
    if (trends) trends.destroy();
  };
}
