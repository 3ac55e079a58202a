// The dashboard's entry point: the key dialog, the header and a hash router.
//
//   #/                 every train at a glance (overview.js)
//   #/train/<name>     one train: its cascade, trends and alerts (train.js)
//   #/alerts?train=..  alerts of one or every train, with operator actions (alerts.js)
//
// Each page is a function render(main, params) returning a dispose() that stops
// its timers and streams when the page is left.

import { authEvents, getKey, setKey } from './api.js';
import { h, fill } from './dom.js';
import { renderOverview } from './overview.js';
import { renderTrain } from './train.js';
import { renderAlerts } from './alerts.js';

const main = document.getElementById('main');
let dispose = null;

function parseHash() {
  const raw = window.location.hash.replace(/^#/, '') || '/';
  const [path, query = ''] = raw.split('?');
  const parts = path.split('/').filter(Boolean).map(decodeURIComponent);
  return { parts, params: new URLSearchParams(query) };
}

function route() {
  if (dispose) {
    dispose();
    dispose = null;
  }
  const { parts, params } = parseHash();
  let page = 'trains';
  try {
    if (parts[0] === 'train' && parts[1]) {
      page = 'train';
      dispose = renderTrain(main, parts[1], params);
    } else if (parts[0] === 'alerts') {
      page = 'alerts';
      dispose = renderAlerts(main, params);
    } else if (parts.length === 0) {
      dispose = renderOverview(main);
    } else {
      fill(main, h('section', { class: 'panel' }, h('h1', {}, 'Not found'),
        h('p', {}, 'No page here. ', h('a', { href: '#/' }, 'All trains'))));
    }
  } catch (err) {
    fill(main, h('p', { class: 'error' }, `The page failed: ${err.message}`));
  }
  document.body.dataset.page = page;
  for (const link of document.querySelectorAll('[data-nav]')) {
    const current = link.dataset.nav === (page === 'train' ? 'trains' : page);
    if (current) link.setAttribute('aria-current', 'page');
    else link.removeAttribute('aria-current');
  }
}

function showKeyState() {
  const key = getKey();
  document.getElementById('key-state').textContent = key ? `key …${key.slice(-4)}` : 'no key';
}

const keyDialog = document.getElementById('key-dialog');
const keyInput = document.getElementById('key-input');
const keyError = document.getElementById('key-error');

function openKeyDialog(message = '') {
  keyError.textContent = message;
  if (keyDialog.open) return; // a later refusal must not wipe what is being typed
  keyInput.value = '';
  keyDialog.showModal();
  keyInput.focus();
}

document.getElementById('key-form').addEventListener('submit', (event) => {
  event.preventDefault();
  const key = keyInput.value.trim();
  if (!key) {
    keyError.textContent = 'Enter a key, or ask an administrator for one (stagewatch keys create).';
    return;
  }
  setKey(key);
  keyDialog.close();
  showKeyState();
  route();
});
document.getElementById('key-cancel').addEventListener('click', () => keyDialog.close());
document.getElementById('key-forget').addEventListener('click', () => {
  setKey('');
  keyDialog.close();
  showKeyState();
  route();
});
document.getElementById('key-change').addEventListener('click', () => openKeyDialog());

authEvents.addEventListener('needkey', (event) => {
  const had = getKey();
  openKeyDialog(had ? `The service refused the key: ${event.detail}` : 'This service needs an API key.');
});

window.addEventListener('hashchange', route);
showKeyState();
route();
