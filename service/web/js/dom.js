// Small DOM builders. Text always goes in as text nodes, never as HTML, so values
// from the API (alert messages, reasons, tag names) cannot inject markup.

const SVG_NS = 'http://www.w3.org/2000/svg';

function setAttributes(el, attrs) {
  for (const [key, value] of Object.entries(attrs || {})) {
    if (value === null || value === undefined || value === false) continue;
    if (key === 'class') {
      el.setAttribute('class', value);
    } else if (key === 'dataset') {
      for (const [k, v] of Object.entries(value)) {
        if (v !== null && v !== undefined) el.dataset[k] = String(v);
      }
    } else if (key.startsWith('on') && typeof value === 'function') {
      el.addEventListener(key.slice(2), value);
    } else if (value === true) {
      el.setAttribute(key, '');
    } else {
      el.setAttribute(key, String(value));
    }
  }
}

function appendChildren(el, children) {
  for (const child of children.flat(Infinity)) {
    if (child === null || child === undefined || child === false) continue;
    el.append(child instanceof Node ? child : document.createTextNode(String(child)));
  }
}

/** Make an HTML element: h('p', {class: 'x'}, 'text', child). */
export function h(tag, attrs = {}, ...children) {
  const el = document.createElement(tag);
  setAttributes(el, attrs);
  appendChildren(el, children);
  return el;
}

/** Make an SVG element. */
export function s(tag, attrs = {}, ...children) {
  const el = document.createElementNS(SVG_NS, tag);
  setAttributes(el, attrs);
  appendChildren(el, children);
  return el;
}

/** Replace an element's children. */
export function fill(el, ...children) {
  el.replaceChildren();
  appendChildren(el, children);
  return el;
}

let toastTimer = 0;

/** Show a short message at the bottom of the screen. */
export function toast(text, kind = 'info') {
  const el = document.getElementById('toast');
  if (!el) return;
  el.textContent = text;
  el.dataset.kind = kind;
  el.classList.add('show');
  clearTimeout(toastTimer);
  toastTimer = setTimeout(() => el.classList.remove('show'), 6000);
}
