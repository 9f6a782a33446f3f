// Last-used settings, remembered per browser (localStorage): route, mask, delivery, format,
// listening excerpt and recording. Read once at start (checked against the server's options,
// so a value the server no longer offers is dropped) and written whenever one of them changes.
// The excerpt each conversion was made with is kept too, so reopening it brings it back.

import { debounce } from './ui.js';

const KEY = 'rateferry.settings.v1';
const EXCERPTS = 'rateferry.excerpts.v1';
const MAX_EXCERPTS = 200;

function read(key) {
  try {
    return JSON.parse(window.localStorage.getItem(key) || 'null');
  } catch (_) {
    return null;      // storage off or a damaged entry: start from the defaults
  }
}

function write(key, value) {
  try {
    window.localStorage.setItem(key, JSON.stringify(value));
  } catch (_) {
    // storage full or off: the page works without memory
  }
}

const isNumber = (v) => typeof v === 'number' && Number.isFinite(v);

/** The saved settings, with anything the server's options do not allow dropped; or null. */
export function load(options) {
  const saved = read(KEY);
  if (!saved || typeof saved !== 'object') return null;
  const out = {};
  const r = saved.route;
  if (r && options.presets[r.preset] && isNumber(r.fs_out) && r.spec && typeof r.spec === 'object') {
    const spec = {};
    for (const [k, v] of Object.entries(r.spec)) if (k in options.spec_fields) spec[k] = v;
    out.route = { fs_out: r.fs_out, preset: r.preset, spec };
  }
  const d = saved.delivery;
  if (d && (d.bits === null || options.word_lengths.includes(d.bits)) && options.dithers.includes(d.dither)) {
    out.delivery = {
      ...options.default_delivery, bits: d.bits, dither: d.dither,
      dither_seed: Number.isInteger(d.dither_seed) ? d.dither_seed : options.default_delivery.dither_seed,
      ceiling_dbtp: isNumber(d.ceiling_dbtp) ? d.ceiling_dbtp : null,
      loudness_lufs: isNumber(d.loudness_lufs) ? d.loudness_lufs : null,
    };
  }
  if (options.output_formats.includes(saved.format)) out.format = saved.format;
  const e = saved.excerpt;
  if (e && isNumber(e.start_s) && isNumber(e.length_s)) out.excerpt = { start_s: e.start_s, length_s: e.length_s };
  if (typeof saved.recording_id === 'string') out.recording_id = saved.recording_id;
  return Object.keys(out).length ? out : null;
}

/** Keep the settings in storage as they change. */
export function remember(state) {
  const save = debounce(() => {
    const s = state.get();
    if (!s.route) return;
    write(KEY, {
      route: s.route, delivery: s.delivery, format: s.format, excerpt: s.excerpt,
      recording_id: s.recording ? s.recording.id : null,
    });
  }, 250);
  state.on(['route', 'delivery', 'format', 'excerpt', 'recording'], () => save());
}

/** Remember the excerpt a conversion was started with. */
export function rememberExcerpt(conversionId, excerpt) {
  const all = read(EXCERPTS) || {};
  all[conversionId] = { ...excerpt, at: Date.now() };
  const ids = Object.keys(all).sort((a, b) => all[b].at - all[a].at).slice(0, MAX_EXCERPTS);
  write(EXCERPTS, Object.fromEntries(ids.map((k) => [k, all[k]])));
}

/** The excerpt a conversion was started with in this browser, or null. */
export function excerptFor(conversionId) {
  const e = (read(EXCERPTS) || {})[conversionId];
  return e && isNumber(e.start_s) && isNumber(e.length_s) ? { start_s: e.start_s, length_s: e.length_s } : null;
}
