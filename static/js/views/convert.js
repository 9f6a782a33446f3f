// Delivery and conversion: a destination (profile) picker, word length, dither, ceiling,
// loudness, limiter and channels; start, progress with ETA,
// cancel; downloads of the file, the design sheet and the recipe; a recipe upload that fills
// the controls.

import * as api from '../api.js';
import * as fmt from '../format.js';
import { el, fill, facts, showError, clearErrors, errorSlot, numberOf } from '../ui.js';

const BITS_LABELS = { '': 'like the source', 16: '16-bit PCM', 24: '24-bit PCM', '32f': '32-bit float', '64f': '64-bit float' };
const DITHER_LABELS = { none: 'none (round)', tpdf: 'TPDF', shaped: 'TPDF, noise shaped' };
const CHANNEL_LABELS = { keep: 'as recorded', mono: 'mono (fold-down)', pick: 'one channel', stereo: 'stereo from mono' };

/** Show an error beside its control anywhere on the page, and in this view's own slot. */
function report(root, err) {
  const field = err && err.field;
  const elsewhere = field && !root.querySelector(`[data-error-for="${field}"]`) && document.querySelector(`[data-error-for="${field}"]`);
  if (elsewhere) {
    const section = elsewhere.closest('section');
    if (section) showError(section, err);
    showError(root, { message: `${err.message} (see ${field.replace(/_/g, ' ')} above)` }, '*');
  } else {
    showError(root, err);
  }
}

export function init(root, state) {
  const format = el('select', { name: 'format', id: 'out-format' });
  const bits = el('select', { name: 'bits', id: 'out-bits' });
  const dither = el('select', { name: 'dither', id: 'out-dither' });
  const seed = el('input', { type: 'number', name: 'dither_seed', id: 'out-seed', min: 0, step: 1, value: 0 });
  const ceiling = el('input', { type: 'number', name: 'ceiling_dbtp', id: 'out-ceiling', min: -60, max: 0, step: 'any', placeholder: 'none' });
  const loudness = el('input', { type: 'number', name: 'loudness_lufs', id: 'out-loudness', min: -70, max: 0, step: 'any', placeholder: 'keep' });
  const profile = el('select', { name: 'profile', id: 'out-profile' });
  const profileFacts = el('ul', { class: 'hint', id: 'out-profile-sources' });
  const limiter = el('input', { type: 'checkbox', name: 'limiter', id: 'out-limiter' });
  const channels = el('select', { name: 'channel_layout', id: 'out-channels' });

  const startBtn = el('button', { type: 'button', id: 'convert-start', disabled: true }, 'Convert');
  const cancelBtn = el('button', { type: 'button', id: 'convert-cancel', class: 'danger', hidden: true }, 'Cancel');
  const progress = el('progress', { id: 'convert-progress', max: 100, value: 0, hidden: true, 'aria-label': 'conversion progress' });
  const status = el('p', { class: 'status', id: 'convert-status', 'aria-live': 'polite' });
  const result = el('div', { class: 'result', id: 'convert-result', hidden: true });

  const title = el('input', { type: 'text', name: 'sheet_title', id: 'sheet-title', placeholder: 'e.g. Episode 12, video edit' });
  const author = el('input', { type: 'text', name: 'sheet_author', id: 'sheet-author' });
  const note = el('textarea', { name: 'sheet_note', id: 'sheet-note', rows: 2 });
  const recipeInput = el('input', { type: 'file', name: 'recipe_file', id: 'recipe-file', accept: '.json,application/json', class: 'visually-hidden' });
  const recipeStatus = el('p', { class: 'hint', id: 'recipe-status', 'aria-live': 'polite' });

  fill(root,
    el('h2', { id: 'convert-h' }, 'Delivery and conversion'),
    el('div', { class: 'field' }, el('label', { for: 'out-profile' }, 'Destination'), profile, errorSlot('profile')),
    profileFacts,
    el('div', { class: 'pair' },
      el('div', { class: 'field' }, el('label', { for: 'out-format' }, 'File format'), format, errorSlot('format')),
      el('div', { class: 'field' }, el('label', { for: 'out-bits' }, 'Word length'), bits, errorSlot('bits'))),
    el('div', { class: 'pair' },
      el('div', { class: 'field' }, el('label', { for: 'out-dither' }, 'Dither'), dither, errorSlot('dither')),
      el('div', { class: 'field' }, el('label', { for: 'out-seed' }, 'Dither seed'), seed, errorSlot('dither_seed'))),
    el('div', { class: 'pair' },
      el('div', { class: 'field' }, el('label', { for: 'out-ceiling' }, 'True-peak ceiling'),
        el('div', { class: 'with-unit' }, ceiling, el('span', { class: 'unit' }, 'dBTP')), errorSlot('ceiling_dbtp')),
      el('div', { class: 'field' }, el('label', { for: 'out-loudness' }, 'Loudness target'),
        el('div', { class: 'with-unit' }, loudness, el('span', { class: 'unit' }, 'LUFS')), errorSlot('loudness_lufs'))),
    el('div', { class: 'pair' },
      el('div', { class: 'field' }, el('label', { for: 'out-channels' }, 'Channels'), channels, errorSlot('channel_layout')),
      el('div', { class: 'field' }, el('label', { for: 'out-limiter' }, limiter, ' Limiter holds the ceiling'), errorSlot('limiter'))),
    el('p', { class: 'hint' }, 'Empty ceiling: the true peak is only reported. Empty target: the loudness is kept. With either set the file is measured first, then written with the gain that satisfies both; with the limiter the loudness target is met and the limiter keeps the peaks under the ceiling. Every written file is measured again.'),
    el('div', { class: 'buttons' }, startBtn, cancelBtn),
    progress, status, errorSlot('recording_id'), errorSlot('delivery'), errorSlot('*'),
    result,
    el('div', { class: 'buttons' },
      el('label', { for: 'recipe-file', class: 'button secondary' }, 'Load a recipe…'), recipeInput,
      el('span', { class: 'hint' }, 'fills the route, mask and delivery from a recipe JSON')),
    recipeStatus, errorSlot('file'));

  const sheetFields = el('fieldset', { class: 'sheet-fields' },
    el('legend', {}, 'For the design sheet'),
    el('div', { class: 'field' }, el('label', { for: 'sheet-title' }, 'Title'), title),
    el('div', { class: 'pair' },
      el('div', { class: 'field' }, el('label', { for: 'sheet-author' }, 'Author'), author),
      el('div', { class: 'field' }, el('label', { for: 'sheet-note' }, 'Note for the reader'), note)));

  // ---------------------------------------------------------------- options and delivery state

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
    format.value = s.format;
    bits.value = d.bits ?? '';
    dither.value = d.dither;
    seed.value = String(d.dither_seed);
    ceiling.value = d.ceiling_dbtp ?? '';
    loudness.value = d.loudness_lufs ?? '';
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
    const fields = Object.keys(s.options.delivery_defaults || {});
    const delivery = { ...s.options.delivery_defaults };
    for (const k of fields) if (k in p) delivery[k] = p[k];
    const patch = { delivery, format: p.container };
    if (s.route) {
      const fsOut = p.rate_hz ?? (s.recording ? s.recording.rate_hz : s.route.fs_out);
      patch.route = { ...s.route, fs_out: fsOut, preset: p.preset, spec: {} };
    }
    state.set(patch);
    profileFacts.replaceChildren(...Object.entries(p.sources || {}).map(([k, text]) =>
      el('li', {}, `${k.replace(/_/g, ' ')} ${p[k] ?? 'none'}: ${text}`)));
  });

  state.on(['recording', 'design', 'designError', 'conversion'], (s) => {
    const busy = s.conversion && ['queued', 'running'].includes(s.conversion.status);
    startBtn.disabled = !s.recording || !s.route || busy;
    startBtn.title = s.design && !s.design.verdict.meets_mask ? 'The design misses the mask; the server will refuse to convert with it.' : '';
  });

  // ---------------------------------------------------------------- conversion

  let stopFollowing = null;

  function links(c) {
    const u = c.urls || {};
    const q = new URLSearchParams();
    if (title.value.trim()) q.set('title', title.value.trim());
    if (author.value.trim()) q.set('author', author.value.trim());
    if (note.value.trim()) q.set('note', note.value.trim());
    const sheet = (u.sheet || api.urlFor('conversion_sheet', { id: c.id })) + (q.toString() ? `?${q}` : '');
    const base = c.download_name.replace(/\.[^.]+$/, '');
    return [
      el('a', { class: 'button', id: 'download-file', href: u.download || api.urlFor('conversion_download', { id: c.id }), download: c.download_name }, `Converted file (${c.download_name})`),
      el('a', { class: 'button secondary', id: 'download-sheet', href: sheet, download: `${base}_sheet.html` }, 'Design sheet (HTML)'),
      el('a', { class: 'button secondary', id: 'download-recipe', href: u.recipe || api.urlFor('conversion_recipe', { id: c.id }), download: `${base}_recipe.json` }, 'Recipe (JSON)'),
    ];
  }

  function showProgress(c) {
    const p = c.progress || {};
    progress.hidden = false;
    progress.value = p.percent ?? 0;
    if (c.status === 'queued') {
      status.textContent = 'Waiting for a free worker…';
    } else if (c.status === 'running') {
      status.textContent = `Converting: ${fmt.percent(p.percent, 0)} · ${fmt.grouped(p.frames_done)} of ${fmt.grouped(p.frames_total)} frames read · `
        + `about ${fmt.duration(p.eta_s)} left (${fmt.duration(p.elapsed_s)} so far)`;
    }
  }

  function showResult(c) {
    const f = c.figures;
    const o = (f && f.output) || {};
    const src = (f && f.source) || {};
    result.hidden = false;
    fill(result,
      el('h3', {}, 'Result'),
      f ? facts([
        ['File', c.download_name],
        ['Rate and length', `${fmt.rate(f.fs_out)}, ${fmt.frames(f.frames_out)} (${fmt.duration(f.frames_out / f.fs_out)})`],
        ['Format', `${f.output_format} · ${String(f.output_subtype || '').replace(/_/g, ' ')}`],
        ['Gain', `${fmt.db(f.gain_db, 2)}${f.gain_reason ? ' — ' + f.gain_reason : ''}`],
        ['Loudness', `${fmt.lufs(o.integrated_lufs)} (source ${fmt.lufs(src.integrated_lufs)})`],
        ['True peak', `${fmt.dbtp(o.true_peak_dbtp)} (source ${fmt.dbtp(src.true_peak_dbtp)})`],
        ['Clipped samples', fmt.grouped(f.clipped_samples), f.clipped_samples > 0 ? 'bad' : ''],
        ['Dither', `${DITHER_LABELS[f.delivery.dither] || f.delivery.dither}, seed ${f.delivery.dither_seed}`],
        ['Passes', String(f.passes)],
        ...deliveryFacts(f),
        ['Output sha256', el('span', { class: 'mono' }, f.output_sha256 || fmt.dash)],
      ], 'facts compact') : null,
      el('div', { class: 'downloads' }, ...links(c)),
      sheetFields);
  }

  function deliveryFacts(f) {
    const r = f.delivery_report || {};
    const rows = [];
    if (r.met === true || r.met === false) {
      rows.push(['Delivery', r.met ? `met (verified on ${r.verified_on})` : `NOT met: ${(r.notes || []).join('; ')}`, r.met ? '' : 'bad']);
    }
    if (r.limiter) rows.push(['Limiter', `largest reduction ${fmt.db(r.limiter.max_gain_reduction_db, 2)}, limiting ${r.limiter.limited_s.toFixed(2)} s`]);
    if (r.write_passes > 1) rows.push(['Write passes', String(r.write_passes)]);
    if (r.filter_applied === false) rows.push(['Filter', 'none: same rate in and out']);
    return rows;
  }

  function follow(c) {
    if (stopFollowing) stopFollowing();
    state.set({ conversion: c });
    cancelBtn.hidden = false;
    showProgress(c);
    stopFollowing = api.followConversion(c.id, (update, err) => {
      if (err) {
        showError(root, err);
        return;
      }
      state.set({ conversion: update });
      if (['queued', 'running'].includes(update.status)) {
        showProgress(update);
        return;
      }
      cancelBtn.hidden = true;
      if (update.status === 'done') {
        progress.value = 100;
        const secs = update.progress && update.progress.elapsed_s;
        status.textContent = `Done in ${fmt.duration(secs)}.`;
        showResult(update);
      } else if (update.status === 'cancelled') {
        progress.hidden = true;
        status.textContent = 'Cancelled; no file was left behind.';
      } else {
        progress.hidden = true;
        status.textContent = 'The conversion failed.';
        if (update.error) report(root, update.error);
      }
      state.set({ conversionsStale: Date.now() });
    });
  }

  startBtn.addEventListener('click', async () => {
    clearErrors(root);
    const s = state.get();
    if (!s.recording || !s.route) return;
    result.hidden = true;
    const body = {
      recording_id: s.recording.id, fs_out: s.route.fs_out, preset: s.route.preset, spec: s.route.spec,
      format: format.value, delivery: readDelivery(),
    };
    startBtn.disabled = true;
    status.textContent = 'Starting…';
    try {
      const c = await api.startConversion(body);
      follow(c);
      state.set({ conversionsStale: Date.now() });
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

  for (const c of [title, author, note]) {
    c.addEventListener('input', () => {
      const conv = state.get('conversion');
      const a = result.querySelector('#download-sheet');
      if (conv && conv.status === 'done' && a) a.replaceWith(links(conv)[1]);
    });
  }

  // A conversion chosen in the history list shows here too.
  state.on('conversionPicked', (s) => {
    const c = s.conversionPicked;
    if (!c) return;
    if (['queued', 'running'].includes(c.status)) {
      follow(c);
      return;
    }
    state.set({ conversion: c });
    progress.hidden = true;
    cancelBtn.hidden = true;
    status.textContent = c.status === 'done' ? `Showing ${c.download_name} from the history.` : `That conversion ${c.status}.`;
    if (c.status === 'done') showResult(c); else result.hidden = true;
  });

  // ---------------------------------------------------------------- recipes

  recipeInput.addEventListener('change', async () => {
    const file = recipeInput.files[0];
    if (!file) return;
    clearErrors(root);
    recipeStatus.textContent = `Reading ${file.name}…`;
    try {
      const r = await api.uploadRecipe(file);
      const s = state.get();
      const presetSpec = (s.options.presets[s.route.preset] || {}).spec || {};
      const overrides = {};
      for (const [k, v] of Object.entries(r.spec)) if (presetSpec[k] !== v) overrides[k] = v;
      state.set({
        route: { ...s.route, fs_out: r.fs_out, spec: overrides },
        delivery: { ...s.delivery, ...r.delivery },
      });
      const rec = s.recording;
      const mismatch = rec && r.fs_in && rec.rate_hz !== r.fs_in;
      recipeStatus.textContent = `Recipe loaded: ${fmt.rate(r.fs_in)} → ${fmt.rate(r.fs_out)}, its mask and delivery are in the controls. `
        + `It was made from ${r.source_name || 'a source'} (sha256 ${String(r.source_sha256 || '').slice(0, 12)}…); `
        + (mismatch ? `the loaded recording is at ${fmt.rate(rec.rate_hz)}, so load that source to reproduce it.` : 'convert that same source to reproduce the output bit for bit.');
    } catch (err) {
      recipeStatus.textContent = '';
      showError(root, err, 'file');
    } finally {
      recipeInput.value = '';
    }
  });
}
