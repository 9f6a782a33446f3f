// The page's settings as one thing: the spec the controls describe, what a conversion was made
// with against what the controls say now (so stale results are marked), the one-line summary
// beside the convert action, and restoring every setting of a past conversion.

import * as api from './api.js';
import * as fmt from './format.js';
import { excerptFor } from './settings.js';

const SPEC_WORDS = {
  passband_hz: 'passband edge', passband_fraction: 'automatic passband edge', stopband_hz: 'stopband edge',
  allow_transition_aliasing: 'transition aliasing', ripple_db: 'ripple', attenuation_db: 'rejection',
  phase: 'phase', method: 'method', arithmetic: 'arithmetic', stages: 'stages',
};
const DELIVERY_WORDS = {
  bits: 'word length', dither: 'dither', dither_seed: 'dither seed', ceiling_dbtp: 'ceiling', loudness_lufs: 'loudness target',
};

/** The full spec the controls describe: the preset's values with the edited fields over them. */
export function currentSpec(s) {
  const o = s.options;
  if (!o || !s.route) return null;
  const p = o.presets[s.route.preset] || o.presets[o.default_preset];
  return { ...(p ? p.spec : {}), ...s.route.spec };
}

/**
 * The spectra the page asks for with the route (POST /api/spectra without recording_id): the
 * route and the spectra view's options. An upload carries it, so the server computes the new
 * recording's spectra while it measures the file. Null without a route.
 */
export function spectraAhead(s) {
  const r = s.route;
  if (!r) return null;
  return { fs_out: r.fs_out, preset: r.preset, spec: r.spec, ...(s.spectraOptions || { log_axis: false }) };
}

const same = (a, b) => (a ?? null) === (b ?? null);

/** What differs between conversion `c` and the controls now, in plain words ([] when nothing). */
export function differences(s, c) {
  if (!c || !s.route) return [];
  const out = [];
  if (s.recording && c.recording_id !== s.recording.id) out.push('another recording');
  if (c.fs_out !== s.route.fs_out) out.push(`target ${fmt.rate(c.fs_out)} (now ${typeof s.route.fs_out === 'number' ? fmt.rate(s.route.fs_out) : fmt.dash})`);
  const spec = currentSpec(s) || {};
  for (const [k, word] of Object.entries(SPEC_WORDS)) if (!same(c.spec[k], spec[k])) out.push(word);
  for (const [k, word] of Object.entries(DELIVERY_WORDS)) if (!same(c.delivery[k], s.delivery[k])) out.push(word);
  if (c.format !== s.format) out.push('file format');
  return out;
}

function bitsText(bits) {
  if (!bits) return 'word length of the source';
  return /f$/.test(bits) ? `${bits.replace('f', '')}-bit float` : `${bits}-bit`;
}

/** The parts of the one-line summary beside the convert action: [text, class] pairs. */
export function summaryParts(s) {
  const rec = s.recording;
  const r = s.route;
  if (!rec || !r || !s.options) return [['Load a recording to convert it.', '']];
  const parts = [[`${rec.name}: ${fmt.rate(rec.rate_hz)} → ${typeof r.fs_out === 'number' ? fmt.rate(r.fs_out) : fmt.dash}`, '']];
  const p = s.options.presets[r.preset];
  const edited = Object.keys(r.spec).length;
  parts.push([`${p ? p.label : r.preset}${edited ? ` (${edited} field${edited > 1 ? 's' : ''} changed)` : ''}`, '']);
  const d = s.design;
  if (s.designError) parts.push(['no design for this mask', 'fail']);
  else if (s.designEstimate) parts.push(['waiting: the design would be very long', 'fail']);
  else if (s.designBusy || !d) parts.push(['designing…', '']);
  else if (d.verdict.meets_mask) parts.push([`meets the mask, ${fmt.db(d.verdict.attenuation_margin_db)} to spare`, 'pass']);
  else parts.push(['misses the mask', 'fail']);
  const dl = s.delivery;
  const extra = [];
  if (dl.bits !== '32f' && dl.bits !== '64f') extra.push(dl.dither === 'none' ? 'no dither' : `${dl.dither === 'shaped' ? 'shaped ' : ''}TPDF dither`);
  if (dl.ceiling_dbtp !== null && dl.ceiling_dbtp !== undefined) extra.push(`ceiling ${fmt.dbtp(dl.ceiling_dbtp)}`);
  if (dl.loudness_lufs !== null && dl.loudness_lufs !== undefined) extra.push(`target ${fmt.lufs(dl.loudness_lufs)}`);
  parts.push([`${String(s.format).toUpperCase()} ${bitsText(dl.bits)}${extra.length ? `, ${extra.join(', ')}` : ''}`, '']);
  return parts;
}

/** The preset closest to `spec` (fewest differing fields) and the fields that differ from it. */
function nearestPreset(options, spec, preferred) {
  let best = null;
  for (const [name, p] of Object.entries(options.presets)) {
    const diff = {};
    for (const [k, v] of Object.entries(spec)) if (!same(p.spec[k], v)) diff[k] = v;
    const n = Object.keys(diff).length;
    if (!best || n < best.n || (n === best.n && name === preferred)) best = { name, diff, n };
  }
  return best;
}

/**
 * Bring back everything that made conversion `c`: its recording, route, mask, method, delivery,
 * file format and (when this browser started it) its listening excerpt; say so in `notice`.
 */
export async function restore(state, c) {
  const s = state.get();
  let rec = s.recording;
  if (!rec || rec.id !== c.recording_id) {
    rec = (s.recordings || []).find((r) => r.id === c.recording_id) || await api.recording(c.recording_id);
  }
  const near = nearestPreset(s.options, c.spec, s.route && s.route.preset);
  const excerpt = excerptFor(c.id);
  const patch = {
    recording: rec,
    route: { fs_out: c.fs_out, preset: near.name, spec: near.diff },
    delivery: { ...s.delivery, ...c.delivery },
    format: c.format,
    conversion: c,
  };
  if (excerpt) patch.excerpt = excerpt;
  const what = ['recording', 'route', 'mask', 'method', 'delivery', 'file format'].concat(excerpt ? ['listening excerpt'] : []);
  patch.notice = `Opened ${c.download_name}: its ${what.slice(0, -1).join(', ')} and ${what[what.length - 1]} are back in the controls.`;
  state.set(patch);
}
