// The only module that talks to the server. Every call returns parsed JSON (or bytes) and throws
// an ApiError {status, message, field} when the answer is not ok, so a view can put the message
// beside the control named by `field`.

let config = null;

export class ApiError extends Error {
  constructor(status, message, field = null) {
    super(message);
    this.name = 'ApiError';
    this.status = status;
    this.field = field;
  }
}

/** Read the config element the server renders into the page. */
export function readConfig(doc = document) {
  const node = doc.getElementById('rateferry-config');
  if (!node) throw new ApiError(0, 'the page has no server configuration; reload it from rateferry serve');
  return JSON.parse(node.textContent);
}

export function configure(cfg) {
  config = cfg;
}

export function urlFor(name, params = {}) {
  const template = config && config.urls && config.urls[name];
  if (!template) throw new ApiError(0, `the server did not give a URL for ${name}`);
  return template.replace(/\{(\w+)\}/g, (_, k) => encodeURIComponent(params[k] ?? ''));
}

function headers(json) {
  const h = { Accept: 'application/json' };
  if (json) h['Content-Type'] = 'application/json';
  if (config && config.token) h['X-Rateferry-Token'] = config.token;
  return h;
}

async function errorFrom(response) {
  let message = `${response.status} ${response.statusText}`.trim();
  let field = null;
  try {
    const body = await response.json();
    if (body && body.error) {
      message = body.error.message || message;
      field = body.error.field || null;
    }
  } catch (_) {
    // not JSON: keep the status line
  }
  return new ApiError(response.status, message, field);
}

async function call(method, url, { body, signal, form } = {}) {
  let response;
  try {
    response = await fetch(url, {
      method,
      headers: form ? headers(false) : headers(body !== undefined),
      body: form || (body !== undefined ? JSON.stringify(body) : undefined),
      signal,
      credentials: 'same-origin',
      cache: 'no-store',
    });
  } catch (err) {
    if (err && err.name === 'AbortError') throw err;
    throw new ApiError(0, 'the server did not answer; is rateferry serve still running?');
  }
  if (!response.ok) throw await errorFrom(response);
  if (response.status === 204) return null;
  return response.json();
}

const get = (url, opts) => call('GET', url, opts);
const post = (url, body, opts = {}) => call('POST', url, { ...opts, body });

// ------------------------------------------------------------------ endpoints

export const options = () => get(urlFor('options'));
export const recordings = () => get(urlFor('recordings'));
export const recording = (id) => get(urlFor('recording', { id }));
export const deleteRecording = (id) => call('DELETE', urlFor('recording', { id }));
export const design = (body, signal) => post(urlFor('designs'), body, { signal });
export const estimate = (body, signal) => post(urlFor('design_estimate'), body, { signal });
export const overview = (id, columns, signal) => get(`${urlFor('recording_overview', { id })}?columns=${encodeURIComponent(columns)}`, { signal });
export const designPlans = (id, signal) => get(config.urls.design_plans ? urlFor('design_plans', { id }) : `${urlFor('design', { id })}/plans`, { signal });
export const audit = (body, signal) => post(urlFor('audits'), body, { signal });
export const spectra = (body, signal) => post(urlFor('spectra'), body, { signal });
export const startConversion = (body) => post(urlFor('conversions'), body);
export const conversion = (id) => get(urlFor('conversion', { id }));
export const conversions = () => get(urlFor('conversions'));
export const cancelConversion = (id) => post(urlFor('conversion_cancel', { id }), {});
export const blindTrials = (id) => get(urlFor('blind_trials', { id }));
export const postBlindTrials = (id, body) => post(urlFor('blind_trials', { id }), body);
export const rendition = (body, signal) => post(urlFor('renditions'), body, { signal });
export const drift = (body, signal) => post(urlFor('drift'), body, { signal });
export const driftListen = (body, signal) => post(urlFor('drift_listen'), body, { signal });
export const startDriftConversion = (body) => post(urlFor('drift_conversions'), body);
export const clearOld = (days) => post(urlFor('clear'), { older_than_days: days });
export const startBatch = (body) => post(urlFor('batches'), body);
export const batch = (id) => get(urlFor('batch', { id }));
export const batches = () => get(urlFor('batches'));
export const cancelBatch = (id) => post(urlFor('batch_cancel', { id }), {});

export function uploadRecipe(file) {
  const form = new FormData();
  form.append('file', file, file.name);
  return call('POST', urlFor('recipes'), { form });
}

/** Bytes of an audio file (a rendition), for Web Audio decoding. */
export async function bytes(url, signal) {
  let response;
  try {
    response = await fetch(url, { signal, credentials: 'same-origin' });
  } catch (err) {
    if (err && err.name === 'AbortError') throw err;
    throw new ApiError(0, 'the server did not answer; is rateferry serve still running?');
  }
  if (!response.ok) throw await errorFrom(response);
  return response.arrayBuffer();
}

/**
 * Upload a recording with progress. fetch() cannot report upload progress, so this one call
 * uses XMLHttpRequest; the browser streams the File from disk, so an hour-long WAV does not
 * freeze the page. Returns {promise, abort}.
 *
 * `columns` (optional): the overview's width, so the server draws the overview in the same
 * read of the file as its loudness and true peak. `spectra` (optional): the body the page will
 * post to /api/spectra for the new recording (without recording_id), so the server computes
 * those spectra while it measures the file.
 */
export function uploadRecording(file, onProgress, { columns, spectra } = {}) {
  const xhr = new XMLHttpRequest();
  const promise = new Promise((resolve, reject) => {
    xhr.open('POST', urlFor('recordings'));
    xhr.setRequestHeader('Accept', 'application/json');
    if (config && config.token) xhr.setRequestHeader('X-Rateferry-Token', config.token);
    xhr.responseType = 'text';
    xhr.upload.onprogress = (e) => {
      if (onProgress) onProgress({ sent: e.loaded, total: e.lengthComputable ? e.total : file.size });
    };
    xhr.upload.onload = () => onProgress && onProgress({ sent: file.size, total: file.size, analysing: true });
    xhr.onerror = () => reject(new ApiError(0, 'the upload was interrupted; is rateferry serve still running?', 'file'));
    xhr.onabort = () => reject(new ApiError(0, 'upload cancelled', 'file'));
    xhr.onload = () => {
      let body = null;
      try {
        body = JSON.parse(xhr.responseText);
      } catch (_) {
        body = null;
      }
      if (xhr.status >= 200 && xhr.status < 300 && body) {
        resolve(body);
      } else {
        const e = body && body.error;
        reject(new ApiError(xhr.status, (e && e.message) || `upload failed (${xhr.status})`, (e && e.field) || 'file'));
      }
    };
    const form = new FormData();
    if (columns) form.append('columns', String(columns));
    if (spectra) form.append('spectra', JSON.stringify(spectra));
    form.append('file', file, file.name);
    xhr.send(form);
  });
  return { promise, abort: () => xhr.abort() };
}

/**
 * Follow a conversion until it ends: Server-Sent Events when they work, polling otherwise.
 * onUpdate(conversion) is called with each state; the last call carries the final one.
 * Returns a function that stops following.
 */
export function followConversion(id, onUpdate, { pollMs = 400 } = {}) {
  let stopped = false;
  let source = null;
  let timer = null;
  const final = (c) => c && ['done', 'failed', 'cancelled'].includes(c.status);

  const stop = () => {
    stopped = true;
    if (source) source.close();
    clearTimeout(timer);
  };

  let ending = false;
  const finish = async () => {
    // The final event may omit figures; fetch the full record once.
    if (ending) return;
    ending = true;
    if (source) source.close();
    try {
      const full = await conversion(id);
      if (!stopped) onUpdate(full);
    } catch (err) {
      if (!stopped) onUpdate(null, err);
    }
    stop();
  };

  const poll = async () => {
    if (stopped) return;
    try {
      const c = await conversion(id);
      if (stopped) return;
      if (final(c)) {
        onUpdate(c);
        stop();
        return;
      }
      onUpdate(c);
    } catch (err) {
      if (!stopped) onUpdate(null, err);
    }
    timer = setTimeout(poll, pollMs);
  };

  if (window.EventSource && config.urls.conversion_events) {
    source = new EventSource(urlFor('conversion_events', { id }));
    source.onmessage = (e) => {
      try {
        const c = JSON.parse(e.data);
        if (final(c)) finish(); else onUpdate(c);
      } catch (_) { /* ignore a malformed event */ }
    };
    source.addEventListener('end', () => finish());
    source.onerror = () => {
      if (stopped || ending) return;
      source.close();
      source = null;
      poll();
    };
  } else {
    poll();
  }
  return stop;
}
