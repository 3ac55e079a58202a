// The service's REST API and its live stream, with the API key of this tab.
//
// The key lives in sessionStorage (this tab only, gone when it closes) and goes out
// as `Authorization: Bearer`. The live stream is read with fetch() and a stream
// reader rather than EventSource, because EventSource cannot send that header.

const KEY_ITEM = 'stagewatch.apiKey';
export const API = '/api/v1';

/** Fired with type 'needkey' when the service answers 401. */
export const authEvents = new EventTarget();

export function getKey() {
  return sessionStorage.getItem(KEY_ITEM) || '';
}

export function setKey(key) {
  if (key) sessionStorage.setItem(KEY_ITEM, key);
  else sessionStorage.removeItem(KEY_ITEM);
}

/** An answer other than 2xx, with the service's words. */
export class ApiError extends Error {
  constructor(status, detail) {
    super(`${status}: ${detail}`);
    this.status = status;
    this.detail = detail;
  }
}

/** The service's `detail` (text, or a list of {loc, msg}) as one line of text. */
export function detailText(detail) {
  if (detail === null || detail === undefined) return '';
  if (typeof detail === 'string') return detail;
  if (Array.isArray(detail)) {
    return detail
      .map((d) => {
        if (d && typeof d === 'object' && 'msg' in d) {
          const loc = Array.isArray(d.loc) ? d.loc.filter((p) => p !== 'body').join('.') : '';
          return loc ? `${loc}: ${d.msg}` : String(d.msg);
        }
        return JSON.stringify(d);
      })
      .join('; ');
  }
  return JSON.stringify(detail);
}

function headers(extra = {}) {
  const out = { Accept: 'application/json', ...extra };
  const key = getKey();
  if (key) out.Authorization = `Bearer ${key}`;
  return out;
}

function url(path, query) {
  const u = new URL(API + path, window.location.origin);
  for (const [name, value] of Object.entries(query || {})) {
    if (value === null || value === undefined || value === '') continue;
    for (const v of Array.isArray(value) ? value : [value]) u.searchParams.append(name, String(v));
  }
  return u;
}

async function failure(res) {
  let detail = res.statusText;
  try {
    detail = detailText((await res.json()).detail) || detail;
  } catch {
    // Not JSON: keep the status text.
  }
  if (res.status === 401) authEvents.dispatchEvent(new CustomEvent('needkey', { detail }));
  return new ApiError(res.status, detail);
}

/**
 * Call the API: api('/trains'), api('/trains/x/alerts', {query: {state: [...]}}),
 * api(path, {method: 'POST', body}). Resolves to the parsed JSON answer.
 */
export async function api(path, { method = 'GET', body, query, signal } = {}) {
  const init = { method, headers: headers(), cache: 'no-store', signal };
  if (body !== undefined) {
    init.headers['Content-Type'] = 'application/json';
    init.body = JSON.stringify(body);
  }
  const res = await fetch(url(path, query), init);
  if (!res.ok) throw await failure(res);
  if (res.status === 204) return null;
  return res.json();
}

/** Path of a train's resource; names and alert ids are escaped. */
export function trainPath(name, ...rest) {
  return ['/trains', encodeURIComponent(name), ...rest].join('/');
}

/**
 * Parse text/event-stream chunks. Calls onEvent({event, data, id}) per event.
 * Returns a function taking the next chunk of text.
 */
export function sseParser(onEvent) {
  let buffer = '';
  let event = { event: 'message', data: [], id: null };
  return (chunk) => {
    buffer += chunk;
    const lines = buffer.split(/\r\n|\r|\n/);
    buffer = lines.pop();
    for (const line of lines) {
      if (line === '') {
        if (event.data.length) onEvent({ event: event.event, data: event.data.join('\n'), id: event.id });
        event = { event: 'message', data: [], id: null };
        continue;
      }
      if (line.startsWith(':')) continue;
      const colon = line.indexOf(':');
      const field = colon < 0 ? line : line.slice(0, colon);
      let value = colon < 0 ? '' : line.slice(colon + 1);
      if (value.startsWith(' ')) value = value.slice(1);
      if (field === 'event') event.event = value;
      else if (field === 'data') event.data.push(value);
      else if (field === 'id') event.id = value;
    }
  };
}

/**
 * Follow a train's live stream until closed; reconnect after a break, resuming
 * after the last estimate seen (Last-Event-ID).
 *
 * onEvent(kind, data) gets 'estimate' and 'alert' events, parsed;
 * onState(state, detail) gets 'connecting', 'live', 'retrying' or 'stopped'.
 * Returns {close()}.
 */
export function followStream(name, { lastEventId = null, onEvent, onState }) {
  const controller = new AbortController();
  let lastId = lastEventId;
  let closed = false;
  const delays = [1000, 2000, 5000, 10000, 20000];

  async function once() {
    const extra = { Accept: 'text/event-stream' };
    if (lastId !== null) extra['Last-Event-ID'] = lastId;
    const res = await fetch(url(trainPath(name, 'stream')), {
      headers: headers(extra),
      cache: 'no-store',
      signal: controller.signal,
    });
    if (!res.ok) throw await failure(res);
    onState('live');
    const reader = res.body.pipeThrough(new TextDecoderStream()).getReader();
    const feed = sseParser((ev) => {
      if (ev.event === 'estimate' && ev.id !== null) lastId = ev.id;
      let data;
      try {
        data = JSON.parse(ev.data);
      } catch {
        return;
      }
      onEvent(ev.event, data);
    });
    for (;;) {
      const { value, done } = await reader.read();
      if (done) return;
      feed(value);
    }
  }

  (async () => {
    let attempt = 0;
    while (!closed) {
      onState(attempt ? 'retrying' : 'connecting');
      try {
        await once();
        attempt = 0;
      } catch (err) {
        if (closed) break;
        if (err instanceof ApiError && (err.status === 401 || err.status === 403 || err.status === 404)) {
          onState('stopped', err.detail);
          return;
        }
      }
      if (closed) break;
      const wait = delays[Math.min(attempt, delays.length - 1)];
      attempt += 1;
      onState('retrying');
      await new Promise((resolve) => setTimeout(resolve, wait));
    }
    onState('stopped');
  })();

  return {
    close() {
      closed = true;
      controller.abort();
    },
  };
}
