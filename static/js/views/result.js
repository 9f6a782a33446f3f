// The result of the conversion on show: its figures, the downloads (file, design sheet, recipe,
// under the names the server gives), the design sheet's texts, and a mark when the controls no
// longer describe it. Also loading a recipe into the controls.

import * as api from '../api.js';
import * as fmt from '../format.js';
import { differences } from '../current.js';
import { el, fill, facts, showError, clearErrors, errorSlot } from '../ui.js';
import { DITHER_LABELS } from './action.js';

export function init(root, state) {
  const body = el('div', { class: 'result', id: 'convert-result', hidden: true });
  const empty = el('p', { class: 'hint', id: 'result-empty' }, 'Nothing converted yet: the Convert button stays at the bottom of the page.');
  const stale = el('p', { class: 'stale', id: 'result-stale', role: 'status', hidden: true });
  const title = el('input', { type: 'text', name: 'sheet_title', id: 'sheet-title', placeholder: 'e.g. Episode 12, video edit' });
  const author = el('input', { type: 'text', name: 'sheet_author', id: 'sheet-author' });
  const note = el('textarea', { name: 'sheet_note', id: 'sheet-note', rows: 2 });
  const recipeInput = el('input', { type: 'file', name: 'recipe_file', id: 'recipe-file', accept: '.json,application/json', class: 'visually-hidden' });
  const recipeStatus = el('p', { class: 'hint', id: 'recipe-status', 'aria-live': 'polite' });
  const sheetFields = el('fieldset', { class: 'sheet-fields' },
    el('legend', {}, 'For the design sheet'),
    el('div', { class: 'pair' },
      el('div', { class: 'field' }, el('label', { for: 'sheet-title' }, 'Title'), title),
      el('div', { class: 'field' }, el('label', { for: 'sheet-author' }, 'Author'), author)),
    el('div', { class: 'field' }, el('label', { for: 'sheet-note' }, 'Note for the reader'), note));

  fill(root,
    el('div', { class: 'view-head' },
      el('h2', { id: 'result-h' }, 'Result'),
      el('div', { class: 'buttons' },
        el('label', { for: 'recipe-file', class: 'button secondary' }, 'Load a recipe…'), recipeInput)),
    empty, stale, body, recipeStatus, errorSlot('file'), errorSlot('*'));

  function links(c) {
    const u = c.urls || {};
    const q = new URLSearchParams();
    if (title.value.trim()) q.set('title', title.value.trim());
    if (author.value.trim()) q.set('author', author.value.trim());
    if (note.value.trim()) q.set('note', note.value.trim());
    const sheet = (u.sheet || api.urlFor('conversion_sheet', { id: c.id })) + (q.toString() ? `?${q}` : '');
    return [
      el('a', { class: 'button', id: 'download-file', href: u.download || api.urlFor('conversion_download', { id: c.id }), download: c.download_name }, `Converted file (${c.download_name})`),
      el('a', { class: 'button secondary', id: 'download-sheet', href: sheet, download: c.sheet_name }, 'Design sheet (HTML)'),
      el('a', { class: 'button secondary', id: 'download-recipe', href: u.recipe || api.urlFor('conversion_recipe', { id: c.id }), download: c.recipe_name }, `Recipe (${c.recipe_name})`),
    ];
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

  function show(c) {
    const f = c.figures;
    const o = (f && f.output) || {};
    const src = (f && f.source) || {};
    fill(body,
      f ? facts([
        ['File', c.download_name],
        ['Rate and length', `${fmt.rate(f.fs_out)}, ${fmt.frames(f.frames_out)} (${fmt.duration(f.frames_out / f.fs_out)})`],
        ['Format', `${f.output_format} · ${String(f.output_subtype || '').replace(/_/g, ' ')}`],
        ['Gain', `${fmt.db(f.gain_db, 2)}${f.gain_reason ? ` (${f.gain_reason})` : ''}`],
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

  let shown = null;
  state.on(['conversion', 'recording', 'route', 'delivery', 'format', 'options'], (s) => {
    const c = s.conversion;
    const done = c && c.status === 'done';
    body.hidden = !done;
    empty.hidden = !!done;
    if (done && (!shown || shown.id !== c.id || shown.status !== c.status)) show(c);
    shown = done ? c : null;
    // the result stays, marked, when the controls describe something else
    const diff = done ? differences(s, c) : [];
    stale.hidden = !diff.length;
    root.classList.toggle('is-stale', diff.length > 0);
    body.dataset.stale = String(diff.length > 0);
    stale.textContent = diff.length
      ? `This result was made with other settings (${diff.join(', ')}). Convert again for the current ones, or open it from the list below to bring its settings back.`
      : '';
  });

  for (const c of [title, author, note]) {
    c.addEventListener('input', () => {
      const conv = state.get('conversion');
      const a = body.querySelector('#download-sheet');
      if (conv && conv.status === 'done' && a) a.replaceWith(links(conv)[1]);
    });
  }

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
