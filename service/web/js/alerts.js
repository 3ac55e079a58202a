// Alerts of one train or of all: filter, read the log, and act (acknowledge, shelve,
// unshelve; out of service and back for administrators). The API checks the key's
// role on every action; a refusal is shown in the service's own words.

import { api, ApiError, trainPath } from './api.js';
import { h, fill, toast } from './dom.js';
import {
  PRIORITIES, STATES, duration, fixed, glyph, localTime, priorityGlyph, unitText, utcTime,
} from './format.js';

const POLL_MS = 15000;

/** Operator actions: API path, words, and in which states they apply. */
const ACTIONS = {
  acknowledge: {
    path: 'acknowledge', word: 'Acknowledge', role: 'ingest',
    when: (a) => a.state === 'active_unacknowledged' || a.state === 'cleared_unacknowledged',
  },
  shelve: {
    path: 'shelve', word: 'Shelve…', role: 'ingest',
    when: (a) => !['shelved', 'out_of_service', 'normal'].includes(a.state),
  },
  unshelve: { path: 'unshelve', word: 'Unshelve', role: 'ingest', when: (a) => a.state === 'shelved' },
  remove: {
    path: 'remove-from-service', word: 'Out of service…', role: 'admin',
    when: (a) => a.state !== 'out_of_service',
  },
  restore: {
    path: 'return-to-service', word: 'Return to service', role: 'admin',
    when: (a) => a.state === 'out_of_service',
  },
};

function figureText(a) {
  if (a.figure === null || a.figure === undefined) return '–';
  const unit = unitText(a.unit);
  const digits = Math.abs(a.figure) >= 100 ? 1 : 4;
  const limit = a.threshold === null || a.threshold === undefined ? '' : ` (limit ${fixed(a.threshold, digits)})`;
  return `${fixed(a.figure, digits)}${unit ? ` ${unit}` : ''}${limit}`;
}

/** Render the alerts page into main; returns dispose(). */
export function renderAlerts(main, params) {
  const controller = new AbortController();
  const signal = controller.signal;
  let trains = [];
  let rows = [];
  let timer = 0;
  let disposed = false;
  const openLogs = new Set();

  const trainSelect = h('select', { id: 'filter-train', name: 'train' }, h('option', { value: '' }, 'All trains'));
  const stateBoxes = Object.entries(STATES).map(([key, st]) => h('label', { class: 'chip' },
    h('input', { type: 'checkbox', name: 'state', value: key }), glyph(st.shape), st.word));
  const priorityBoxes = Object.entries(PRIORITIES).map(([key, p]) => h('label', { class: 'chip' },
    h('input', { type: 'checkbox', name: 'priority', value: key }), priorityGlyph(key), p.word));
  const subjectInput = h('input', { id: 'filter-subject', name: 'subject', type: 'search', placeholder: 'vessel, tag or train', value: params.get('subject') || '' });
  const summary = h('p', { class: 'muted', id: 'alerts-summary' }, 'Loading alerts…');
  const tableBox = h('div', { id: 'alerts-table' });

  const form = h('form', { class: 'filters panel', 'aria-label': 'Filter alerts', onsubmit: (e) => { e.preventDefault(); refresh(); } },
    h('div', { class: 'field' }, h('label', { for: 'filter-train' }, 'Train'), trainSelect),
    h('fieldset', {}, h('legend', {}, 'State (none ticked: all but normal)'), stateBoxes),
    h('fieldset', {}, h('legend', {}, 'Priority (none ticked: all)'), priorityBoxes),
    h('div', { class: 'field' }, h('label', { for: 'filter-subject' }, 'Subject'), subjectInput),
    h('button', { type: 'submit', class: 'btn' }, 'Apply'));
  form.addEventListener('change', () => refresh());

  fill(main,
    h('section', { class: 'page-head' }, h('h1', {}, 'Alerts'), summary,
      h('p', { class: 'notice' },
        glyph('ring-dashed'),
        'These alerts come from a monitoring aid, not a safety system. They do not replace the plant\'s alarms '
        + 'or interlocks; act on them under your site procedures, local codes and licensed engineering practice.')),
    form,
    h('section', { class: 'panel' }, tableBox));

  function filters() {
    const checked = (boxes) => boxes.map((l) => l.querySelector('input')).filter((i) => i.checked).map((i) => i.value);
    return {
      train: trainSelect.value,
      query: {
        state: checked(stateBoxes),
        priority: checked(priorityBoxes),
        subject: subjectInput.value.trim() || null,
      },
    };
  }

  async function refresh() {
    clearTimeout(timer);
    try {
      if (!trains.length) {
        trains = (await api('/trains', { signal })).data;
        const wanted = params.get('train') || '';
        for (const t of trains) trainSelect.append(h('option', { value: t.name }, t.title ? `${t.name} — ${t.title}` : t.name));
        trainSelect.value = trains.some((t) => t.name === wanted) ? wanted : '';
      }
      const { train, query } = filters();
      const names = train ? [train] : trains.map((t) => t.name);
      const lists = await Promise.all(names.map((n) => api(trainPath(n, 'alerts'), { signal, query })
        .then((r) => r.data.map((a) => ({ ...a, train: n })))));
      rows = lists.flat().sort((a, b) => (PRIORITIES[a.priority]?.rank ?? 9) - (PRIORITIES[b.priority]?.rank ?? 9)
        || (a.activated_at ?? Infinity) - (b.activated_at ?? Infinity));
      const unack = rows.filter((a) => a.state.endsWith('_unacknowledged')).length;
      fill(summary, `${rows.length} alert${rows.length === 1 ? '' : 's'} shown · ${unack} to acknowledge · updated ${localTime(Date.now() / 1000)}`);
      await renderTable();
    } catch (err) {
      if (signal.aborted) return;
      fill(summary, h('span', { class: 'error' }, `Could not load the alerts: ${err.detail || err.message}`));
      if (err instanceof ApiError && err.status === 401) return; // wait for a key: app.js re-renders
    }
    if (!disposed) timer = setTimeout(refresh, POLL_MS);
  }

  async function renderTable() {
    if (!rows.length) {
      fill(tableBox, h('p', { class: 'muted' }, 'No alert matches.'));
      return;
    }
    const body = h('tbody');
    for (const a of rows) {
      body.append(row(a));
      const key = `${a.train}|${a.alert_id}`;
      if (openLogs.has(key)) body.append(await logRow(a));
    }
    fill(tableBox, h('div', { class: 'table-scroll' }, h('table', { class: 'data-table alert-table' },
      h('thead', {}, h('tr', {}, ['Priority', 'Alert', 'Train', 'Subject', 'State', 'Since', 'Figure', 'Note', 'Actions']
        .map((c) => h('th', { scope: 'col' }, c)))),
      body)));
  }

  function row(a) {
    const st = STATES[a.state] || { word: a.state, shape: 'dash' };
    const since = a.since ?? a.activated_at;
    const buttons = Object.entries(ACTIONS).filter(([, act]) => act.when(a)).map(([key, act]) => h('button', {
      type: 'button', class: key === 'acknowledge' ? 'btn btn-primary' : 'btn', dataset: { action: key },
      title: `needs a key with role ${act.role} or higher`,
      onclick: () => openAction(a, key),
    }, act.word));
    const logKey = `${a.train}|${a.alert_id}`;
    buttons.push(h('button', {
      type: 'button', class: 'btn btn-quiet', dataset: { action: 'log' }, 'aria-expanded': String(openLogs.has(logKey)),
      onclick: () => {
        if (openLogs.has(logKey)) openLogs.delete(logKey);
        else openLogs.add(logKey);
        renderTable();
      },
    }, 'Log'));
    return h('tr', { dataset: { alertId: a.alert_id, train: a.train, state: a.state, priority: a.priority } },
      h('td', { class: 'prio', dataset: { priority: a.priority } }, priorityGlyph(a.priority), PRIORITIES[a.priority]?.word || a.priority),
      h('td', {}, h('strong', {}, a.title), h('small', { class: 'block muted' }, a.alert_id), h('small', { class: 'block' }, a.message)),
      h('td', {}, h('a', { href: `#/train/${encodeURIComponent(a.train)}` }, a.train)),
      h('td', {}, a.subject),
      h('td', { class: 'state-cell', dataset: { field: 'state' } }, glyph(st.shape), st.word,
        a.state === 'shelved' && a.shelved_until ? h('small', { class: 'block muted' }, `until ${localTime(a.shelved_until)}`) : null),
      h('td', { class: 'nowrap', title: utcTime(since) }, localTime(since).slice(0, 16),
        h('small', { class: 'block muted' }, Number.isFinite(since) ? `${duration(Date.now() / 1000 - since)} ago` : '')),
      h('td', { class: 'num' }, figureText(a)),
      h('td', {}, a.note || ''),
      h('td', {}, h('div', { class: 'action-buttons' }, buttons)));
  }

  async function logRow(a) {
    let events = [];
    try {
      events = (await api(trainPath(a.train, 'alerts', 'events'), { signal, query: { alert_id: a.alert_id } })).data;
    } catch (err) {
      return h('tr', { class: 'log-row' }, h('td', { colspan: 9, class: 'error' }, `Could not load the log: ${err.detail || err.message}`));
    }
    return h('tr', { class: 'log-row' }, h('td', { colspan: 9 },
      h('ol', { class: 'event-log' }, events.slice(-20).reverse().map((e) => h('li', {},
        h('span', { class: 'muted', title: e.time_utc }, localTime(e.time)), ' ',
        `${STATES[e.from_state]?.word || e.from_state} → ${STATES[e.to_state]?.word || e.to_state}`,
        ` · ${e.who}: ${e.why}`)))));
  }

  // The action dialog (in index.html): one at a time.
  const dialog = document.getElementById('action-dialog');
  const dialogForm = document.getElementById('action-form');
  const reason = document.getElementById('action-reason');
  const dialogError = document.getElementById('action-error');
  const shelveField = document.getElementById('shelve-field');
  const shelveFor = document.getElementById('shelve-for');
  let pending = null;

  function openAction(alert, key) {
    pending = { alert, key };
    document.getElementById('action-title').textContent = `${ACTIONS[key].word.replace('…', '')}: ${alert.title}`;
    document.getElementById('action-subject').textContent = `${alert.train} · ${alert.alert_id} · ${STATES[alert.state]?.word || alert.state}`;
    shelveField.hidden = key !== 'shelve';
    dialogError.textContent = '';
    reason.value = '';
    dialog.showModal();
    reason.focus();
  }

  async function submitAction(event) {
    event.preventDefault();
    if (!pending) return;
    const text = reason.value.trim();
    if (!text) {
      dialogError.textContent = 'Give a reason: it is logged with the action.';
      return;
    }
    const { alert, key } = pending;
    const body = { reason: text };
    if (key === 'shelve') body.until = Date.now() / 1000 + Number(shelveFor.value);
    try {
      const result = await api(trainPath(alert.train, 'alerts', encodeURIComponent(alert.alert_id), ACTIONS[key].path), { method: 'POST', body });
      dialog.close();
      pending = null;
      toast(`${alert.alert_id}: ${STATES[result.event.from_state]?.word} → ${STATES[result.event.to_state]?.word} (by ${result.event.who})`);
      refresh();
    } catch (err) {
      const refused = err.status === 403 ? 'Your key may not do this. ' : '';
      dialogError.textContent = `${refused}The service answered ${err.status || ''}: ${err.detail || err.message}`;
    }
  }

  function cancel() {
    pending = null;
    dialog.close();
  }

  dialogForm.addEventListener('submit', submitAction);
  const cancelButton = document.getElementById('action-cancel');
  cancelButton.addEventListener('click', cancel);

  refresh();

  return () => {
    disposed = true;
    controller.abort();
    clearTimeout(timer);
    dialogForm.removeEventListener('submit', submitAction);
    cancelButton.removeEventListener('click', cancel);
    if (dialog.open) dialog.close();
  };
}
