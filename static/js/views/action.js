// The action bar, always in view at the bottom of the page: a one-line summary of what will be
// made (recording, route, preset, mask verdict, delivery), the delivery settings beside it, the
// convert button with progress and cancel, and the notices that say what the page just did.

import * as api from '../api.js';
import * as fmt from '../format.js';
import { summaryParts } from '../current.js';
import { rememberExcerpt } from '../settings.js';
import { el, fill, showError, clearErrors, errorSlot, numberOf } from '../ui.js';

const BITS_LABELS = { '': 'like the source', 16: '16-bit PCM', 24: '24-bit PCM', '32f': '32-bit float', '64f': '64-bit float' };
export const DITHER_LABELS = { none: 'none (round)', tpdf: 'TPDF', shaped: 'TPDF, noise shaped' };
const CHANNEL_LABELS = { keep: 'as recorded', mono: 'mono (fold-down)', pick: 'one channel', stereo: 'stereo from mono' };
const ACTIVE = ['queued', 'running'];

/** Show an error beside its control anywhere on the page, and in this bar's own slot. */
function report(root, err) {
  const field = err && err.field;
  const elsewhere = field && !root.querySelector(`[data-error-for="${field}"]`) && document.querySelector(`[data-error-for="${field}"]`);
  if (elsewhere) {
    const section = elsewhere.closest('section');
    if (section) showError(section, err);
    showError(root, { message: `${err.message} (see ${field.replace(/_/g, ' ')})` }, '*');
  } else {
    showError(root, err);
  }
}

function field(id, label, control, unit = null, errorFor = null) {
  return el('div', { class: 'field' }, el('label', { for: id }, label),
    unit ? el('div', { class: 'with-unit' }, control, el('span', { class: 'unit' }, unit)) : control,
    errorFor ? errorSlot(errorFor) : null);
}

export function init(root, state) {
  const format = el('select', { name: 'format', id: 'out-format' });
  const bits = el('select', { name: 'bits', id: 'out-bits' });
  const dither = el('select', { name: 'dither', id: 'out-dither' });
  const seed = el('input', { type: 'number', name: 'dither_seed', id: 'out-seed', min: 0, step: 1 });
  const ceiling = el('input', { type: 'number', name: 'ceiling_dbtp', id: 'out-ceiling', min: -60, max: 0, step: 'any', placeholder: 'none', title: 'Empty: the true peak is only reported.' });
  const profile = el('select', { name: 'profile', id: 'out-profile', title: 'A destination fills the rate, format, channels, loudness, ceiling and limiter from its profile; every control stays editable.' });
  const profileFacts = el('ul', { class: 'hint', id: 'out-profile-sources' });
  const limiter = el('input', { type: 'checkbox', name: 'limiter', id: 'out-limiter', title: 'The look-ahead true-peak limiter holds the ceiling so the loudness target is met.' });
  const channels = el('select', { name: 'channel_layout', id: 'out-channels' });
  const loudness = el('input', { type: 'number', name: 'loudness_lufs', id: 'out-loudness', min: -70, max: 0, step: 'any', placeholder: 'keep', title: 'Empty: the loudness is kept. With a ceiling or a target the file is measured first, then written with the gain that satisfies both.' });

  const summary = el('p', { class: 'action-summary', id: 'action-summary', 'aria-live': 'polite' });
  const notice = el('p', { class: 'action-note', id: 'action-note', role: 'status' });
  const startBtn = el('button', { type: 'button', id: 'convert-start', disabled: true }, 'Convert');
  const cancelBtn = el('button', { type: 'button', id: 'convert-cancel', class: 'danger', hidden: true }, 'Cancel');
  const progress = el('progress', { id: 'convert-progress', max: 100, value: 0, hidden: true, 'aria-label': 'conversion progress' });
  const status = el('p', { class: 'status', id: 'convert-status', 'aria-live': 'polite' });

  fill(root,
    el('h2', { id: 'action-h' }, 'Convert'),
    summary,
    el('div', { class: 'action-go' }, startBtn, cancelBtn),
    el('div', { class: 'delivery-row', role: 'group', 'aria-label': 'delivery' },
      field('out-profile', 'Destination', profile, null, 'profile'),
      field('out-format', 'File format', format, null, 'format'),
      field('out-bits', 'Word length', bits, null, 'bits'),
      field('out-dither', 'Dither', dither, null, 'dither'),
      field('out-seed', 'Dither seed', seed, null, 'dither_seed'),
      field('out-ceiling', 'True-peak ceiling', ceiling, 'dBTP', 'ceiling_dbtp'),
      field('out-loudness', 'Loudness target', loudness, 'LUFS', 'loudness_lufs'),
      field('out-channels', 'Channels', channels, null, 'channel_layout'),
      el('div', { class: 'field' }, el('label', { for: 'out-limiter' }, limiter, ' Limiter'), errorSlot('limiter'))),
    profileFacts,
    el('div', { class: 'action-progress' }, progress, status,
      errorSlot('recording_id'), errorSlot('delivery'), errorSlot('*')),
    notice);

  // ---------------------------------------------------------------- delivery

  state.on('options', (s) => {
    const o = s.options;
    if (!o) return;
    format.replaceChildren(...o.output_formats.map((f) => el('option', { value: f }, f.toUpperCase())));
    bits.replaceChildren(el('option', { value: '' }, BITS_LABELS['']), ...o.word_lengths.map((b) => el('option', { value: b }, BITS_LABELS[b] || b)));
    dither.replaceChildren(...o.dithers.map((d) => el('option', { value: d }, DITHER_LABELS[d] || d)));
    profile.replaceChildren(el('option', { value: '' }, 'my own settings'),
      ...Object.values(o.profiles || {}).map((p) => el('option', { value: p.name }, p.label)));
    channels.replaceChildren(...(o.channel_layouts || []).map((c) => el('option', { value: c }, CHANNEL_LABELS[c] || c)));
    showDelivery(s);
  });

  function showDelivery(s) {
    const d = s.delivery;
    if (!d) return;
    format.value = s.format;
    bits.value = d.bits ?? '';
    dither.value = d.dither;
    seed.value = String(d.dither_seed);
    if (document.activeElement !== ceiling) ceiling.value = d.ceiling_dbtp ?? '';
    if (document.activeElement !== loudness) loudness.value = d.loudness_lufs ?? '';
    limiter.checked = Boolean(d.limiter);
    channels.value = d.channel_layout || 'keep';
    dither.disabled = bits.value === '32f' || bits.value === '64f';
  }
  state.on(['delivery', 'format'], showDelivery);

  function readDelivery() {
    const value = (input) => {
      const v = numberOf(input);
      return Number.isNaN(v) ? input.value : v;
    };
    return {
      ...state.get('delivery'),
      limiter: limiter.checked,
      channel_layout: channels.value || 'keep',
      mp3_kbps: format.value === 'mp3' ? (state.get('delivery').mp3_kbps ?? null) : null,
      bits: bits.value === '' ? null : bits.value,
      dither: dither.value,
      dither_seed: value(seed) ?? 0,
      ceiling_dbtp: value(ceiling),
      loudness_lufs: value(loudness),
    };
  }
  for (const c of [bits, dither, seed, ceiling, loudness, limiter, channels]) {
    c.addEventListener('change', () => state.set({ delivery: readDelivery() }));
  }
  format.addEventListener('change', () => state.set({ format: format.value }));

  // A destination fills the delivery, the format, the target rate and the filter preset from
  // its profile (every control stays editable); each number is listed with its source.
  profile.addEventListener('change', () => {
    const s = state.get();
    const p = (s.options.profiles || {})[profile.value];
    profileFacts.replaceChildren();
    if (!p) return;
    const delivery = { ...s.options.default_delivery };
    for (const k of Object.keys(delivery)) if (k in p) delivery[k] = p[k];
    const patch = { delivery, format: p.container };
    if (s.route) {
      const fsOut = p.rate_hz ?? (s.recording ? s.recording.rate_hz : s.route.fs_out);
      patch.route = { ...s.route, fs_out: fsOut, preset: p.preset, spec: {} };
    }
    state.set(patch);
    profileFacts.replaceChildren(...Object.entries(p.sources || {}).map(([k, text]) =>
      el('li', {}, `${k.replace(/_/g, ' ')} ${p[k] ?? 'none'}: ${text}`)));
  });

  // ---------------------------------------------------------------- summary and notices

  state.on(['recording', 'route', 'options', 'design', 'designError', 'designBusy', 'designEstimate', 'delivery', 'format'], (s) => {
    const parts = summaryParts(s);
    fill(summary, ...parts.flatMap(([text, cls], i) => [i ? ' · ' : null, el('span', { class: cls || null }, text)]));
    summary.title = parts.map((p) => p[0]).join(' · ');
  });
  state.on('notice', (s) => { notice.textContent = s.notice || ''; });
  // an edit after a notice about restored settings makes the notice old news
  state.on(['route', 'delivery', 'format'], (s, keys) => {
    if (s.notice && !keys.includes('notice')) state.set({ notice: '' });
  });

  state.on(['recording', 'route', 'design', 'designError', 'conversion'], (s) => {
    const busy = s.conversion && ACTIVE.includes(s.conversion.status);
    startBtn.disabled = !s.recording || !s.route || busy;
    startBtn.title = s.design && !s.design.verdict.meets_mask ? 'The design misses the mask; the server will refuse to convert with it.' : '';
  });

  // ---------------------------------------------------------------- conversion and its progress

  let following = null;         // {id, stop}

  function showProgress(c) {
    const p = c.progress || {};
    progress.hidden = false;
    progress.value = p.percent ?? 0;
    if (c.status === 'queued') {
      status.textContent = 'Waiting for a free worker…';
    } else {
      status.textContent = `Converting: ${fmt.percent(p.percent, 0)} · ${fmt.grouped(p.frames_done)} of ${fmt.grouped(p.frames_total)} frames read · `
        + `about ${fmt.duration(p.eta_s)} left (${fmt.duration(p.elapsed_s)} so far)`;
    }
  }

  function showEnd(c) {
    cancelBtn.hidden = true;
    if (c.status === 'done') {
      progress.hidden = false;
      progress.value = 100;
      status.textContent = `Done in ${fmt.duration(c.progress && c.progress.elapsed_s)}: ${c.download_name}.`;
    } else if (c.status === 'cancelled') {
      progress.hidden = true;
      status.textContent = 'Cancelled; no file was left behind.';
    } else {
      progress.hidden = true;
      status.textContent = 'The conversion failed.';
      if (c.error) report(root, c.error);
    }
  }

  function follow(c) {
    if (following && following.id === c.id) return;
    if (following) following.stop();
    cancelBtn.hidden = false;
    showProgress(c);
    const stop = api.followConversion(c.id, (update, err) => {
      if (err) {
        showError(root, err);
        return;
      }
      // the one source of progress: the status line and the list both read state.conversion
      if (state.get('conversion') && state.get('conversion').id === update.id) state.set({ conversion: update });
      if (!ACTIVE.includes(update.status)) {
        following = null;
        state.set({ conversionsStale: Date.now() });
      }
    });
    following = { id: c.id, stop };
  }

  state.on('conversion', (s) => {
    const c = s.conversion;
    if (!c) {
      progress.hidden = true;
      cancelBtn.hidden = true;
      status.textContent = '';
      return;
    }
    if (ACTIVE.includes(c.status)) {
      follow(c);
      showProgress(c);
    } else {
      if (following && following.id !== c.id) {
        following.stop();
        following = null;
      }
      showEnd(c);
    }
  });

  startBtn.addEventListener('click', async () => {
    clearErrors(root);
    const s = state.get();
    if (!s.recording || !s.route) return;
    const body = {
      recording_id: s.recording.id, fs_out: s.route.fs_out, preset: s.route.preset, spec: s.route.spec,
      format: format.value, delivery: readDelivery(),
    };
    startBtn.disabled = true;
    status.textContent = 'Starting…';
    try {
      const c = await api.startConversion(body);
      if (s.excerpt) rememberExcerpt(c.id, s.excerpt);
      state.set({ conversion: c, conversionsStale: Date.now(), notice: '' });
    } catch (err) {
      status.textContent = '';
      report(root, err);
      startBtn.disabled = false;
    }
  });

  cancelBtn.addEventListener('click', async () => {
    const c = state.get('conversion');
    if (!c) return;
    cancelBtn.disabled = true;
    try {
      await api.cancelConversion(c.id);
      status.textContent = 'Cancelling at the next block…';
    } catch (err) {
      report(root, err);
    } finally {
      cancelBtn.disabled = false;
    }
  });
}
