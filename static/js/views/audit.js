// Audit: the real converter run on test signals, its measured figures beside the design's
// predictions and the mask's limits; plots of the alias (or image) level against the input
// tone and of the deviation across the passband.

import * as api from '../api.js';
import * as fmt from '../format.js';
import * as plots from '../plots.js';
import { el, fill, showError, clearErrors, errorSlot, debounce } from '../ui.js';

export const TAB = 'audit';

function fmtUnit(v, unit) {
  if (v === null || v === undefined) return fmt.dash;
  switch (unit) {
    case 'dB': return Math.abs(v) < 0.1 ? fmt.ripple(v) : fmt.db(v);
    case 'output samples': return `${fmt.num(v, 6)} samples`;
    default: return `${fmt.num(v, 3)} ${unit}`;
  }
}

export function init(root, state) {
  const run = el('button', { type: 'button', id: 'audit-run', class: 'secondary' }, 'Run the audit again');
  const dither = el('select', { name: 'dither', id: 'audit-dither' },
    el('option', { value: 'none' }, 'no dither (the converter alone)'),
    el('option', { value: 'tpdf' }, 'TPDF dither at 16 bit'),
    el('option', { value: 'shaped' }, 'noise-shaped dither at 16 bit'));
  const auto = el('input', { type: 'checkbox', id: 'audit-auto', checked: true });
  const fit = el('input', { type: 'checkbox', id: 'audit-fit' });
  const status = el('p', { class: 'summary', id: 'audit-status', 'aria-live': 'polite' });
  const stale = el('p', { class: 'stale', id: 'audit-stale', hidden: true });
  const verdict = el('div', { id: 'audit-verdict' });
  const table = el('div', { id: 'audit-table', class: 'table-scroll' });
  const artefacts = el('div', { class: 'plot', id: 'plot-audit-artefacts', role: 'img', 'aria-label': 'measured alias or image level against the input tone frequency' });
  const deviation = el('div', { class: 'plot', id: 'plot-audit-deviation', role: 'img', 'aria-label': 'measured passband deviation against frequency' });
  const impulse = el('div', { class: 'plot short', id: 'plot-audit-impulse', role: 'img', 'aria-label': 'measured output impulse in dB' });
  const artefactCaption = el('figcaption', {}, 'Alias level against the input tone');

  fill(root,
    el('div', { class: 'view-head' },
      el('h2', { id: 'audit-h' }, 'Audit'),
      el('div', { class: 'inline' }, el('label', { for: 'audit-dither' }, 'Low-level signals:'), dither),
      el('div', { class: 'inline' }, auto, el('label', { for: 'audit-auto' }, 'audit every design')),
      run),
    el('p', { class: 'hint' }, 'The converter that will run is fed test signals made at the source rate — passband tones, tones above the target Nyquist, a 997 Hz tone at −1 dBFS and at −60 dBFS (AES17 style), an impulse, a log sweep, silence — and its real output is measured. The design predicts each figure from its taps; both are shown.'),
    status, stale, errorSlot('dither'), errorSlot('*'),
    verdict, table,
    el('div', { class: 'grid2' },
      el('figure', {}, artefactCaption, artefacts),
      el('figure', {},
        el('figcaption', {}, 'Deviation across the passband ',
          el('span', { class: 'inline' }, fit, el('label', { for: 'audit-fit' }, 'fit to the values'))),
        deviation)),
    el('figure', {}, el('figcaption', {}, 'Measured output impulse (dB re peak)'), impulse));

  let data = null;
  let forDesign = null;
  let dirty = false;
  let seq = 0;
  let controller = null;
  const visible = () => state.get('activeTab') === TAB;

  async function audit() {
    const d = state.get('design');
    if (!d) return;
    clearErrors(root);
    if (controller) controller.abort();
    controller = new AbortController();
    const mine = ++seq;
    root.classList.add('busy');
    status.textContent = `Running the converter on test signals for ${fmt.rate(d.fs_in)} → ${fmt.rate(d.fs_out)}…`;
    try {
      const a = await api.audit({ design_id: d.id, dither: dither.value }, controller.signal);
      if (mine !== seq) return;
      data = a;
      forDesign = d;
      stale.hidden = true;
      status.textContent = `Audited the ${fmt.grouped(d.figures.numtaps)}-tap design for ${fmt.rate(d.fs_in)} → ${fmt.rate(d.fs_out)} in ${fmt.ms(a.timing.audit_ms, 0)}${a.timing.cached ? ' (kept from an earlier run)' : ''}.`;
      draw();
    } catch (err) {
      if (err && err.name === 'AbortError') return;
      if (mine !== seq) return;
      status.textContent = '';
      showError(root, err);
    } finally {
      if (mine === seq) root.classList.remove('busy');
    }
  }

  function draw() {
    if (!data) return;
    if (!visible()) {
      dirty = true;
      return;
    }
    dirty = false;
    const f = data.figures;
    const d = forDesign;
    const kind = f.direction === 'up' ? 'image' : 'alias';
    const passes = f.passes;
    fill(verdict, el('div', { class: `verdict ${passes ? 'pass' : 'fail'}` },
      el('strong', { id: 'audit-headline' }, passes ? 'The converter meets the mask on its real output' : 'The converter misses the mask on its real output'),
      el('span', {}, f.verdict.map((r) => `${r.figure} ${r.passes ? 'passes' : 'fails'}`).join(' · '))));

    const head = el('tr', {}, ...['Figure', 'Measured on the output', 'Predicted by the design', 'Limit', 'Verdict'].map((h) => el('th', { scope: 'col' }, h)));
    const rows = [];
    const vrow = (name) => f.verdict.find((r) => r.figure === name || r.figure.endsWith(name));
    const add = (name, measured, predicted, limitRow, note) => {
      rows.push(el('tr', { class: 'figure-row' },
        el('th', { scope: 'row' }, name),
        el('td', { class: 'num' }, measured),
        el('td', { class: 'num' }, predicted),
        el('td', { class: 'num' }, limitRow ? fmtUnit(limitRow.limit, limitRow.unit) : fmt.dash),
        el('td', {}, limitRow ? el('span', { class: limitRow.passes ? 'ok' : 'bad' }, limitRow.passes ? 'pass' : 'fail') : '')));
      const text = note || (limitRow ? limitRow.rule : '');
      if (text) rows.push(el('tr', { class: 'rule-row' }, el('td', { colspan: 5, class: 'hint' }, text)));
    };
    add('Passband deviation', fmt.ripple(f.passband_deviation_db), fmt.ripple(f.passband_deviation_predicted_db), vrow('passband deviation'));
    if (f.worst_alias_db !== null) {
      add(`Worst ${kind}`, `${fmt.db(f.worst_alias_db)} (tone ${fmt.hz(f.worst_alias_input_hz)} → ${fmt.hz(f.worst_alias_output_hz)})`,
        `${fmt.db(f.worst_alias_predicted_db)} (design's stopband ${fmt.db(f.design_stopband_db)})`, vrow(`worst ${kind}`));
    }
    add('THD+N', `${fmt.db(f.thd_n_db)} at ${fmt.hz(f.fundamental_hz)}`, fmt.dash, vrow('THD+N'));
    add('Noise floor', fmt.dbfs(f.noise_floor_dbfs), fmt.dash, null, `997 Hz at −60 dBFS, fundamental notched; dynamic range ${fmt.db(f.dynamic_range_db)}`);
    if (f.idle_noise_dbfs !== null) {
      add('Idle noise', fmt.dbfs(f.idle_noise_dbfs), fmt.dash, null, `dithered silence after conversion (whole band ${fmt.dbfs(f.idle_noise_full_dbfs)}; before ${fmt.dbfs(f.source_idle_noise_dbfs)})`);
    }
    add('Group delay', fmt.ms(f.group_delay_ms, 4), fmt.ms(f.group_delay_predicted_ms, 4), null, `residual delay at the output ${fmt.ms(f.residual_delay_ms, 4)}`);
    add('Pre-ringing', fmt.ms(f.prering_ms), fmt.ms(f.prering_predicted_ms), null, 'impulse energy above −60 dB before the peak');
    add('Time alignment error', `${fmt.num(f.alignment_error_samples, 6)} samples (${fmt.num(f.alignment_error_us, 4)} µs)`, '0 samples', vrow('time alignment'), `log sweep gives ${fmt.num(f.sweep_alignment_samples, 6)} samples`);
    fill(table, el('table', { class: 'audit' }, el('thead', {}, head), el('tbody', {}, ...rows)));

    artefactCaption.textContent = kind === 'image'
      ? 'Image level against the input tone (upsampling: copies of in-band tones above the source Nyquist)'
      : 'Alias level against the input tone (downsampling: tones above the target Nyquist folding back)';
    const mask = d.mask;
    plots.auditArtefacts(artefacts, f.curves.alias, {
      kind, attenuationDb: mask.attenuation_db, edgeHz: kind === 'alias' ? mask.stopband_hz : null,
    });
    plots.auditPassband(deviation, f.curves.deviation, fit.checked ? {} : { rippleDb: mask.ripple_db, edgeHz: mask.passband_hz });
    plots.auditImpulse(impulse, f.curves.impulse, { prering_ms: f.prering_ms });
  }

  const soon = debounce(audit, 400);
  state.on('design', () => {
    if (visible() && auto.checked) soon();
    else if (data) {
      stale.hidden = false;
      stale.textContent = 'The design changed: the audit below belongs to the previous one. Run it again to measure the new one.';
    }
  });
  state.on('designError', (s) => {
    if (s.designError && data) {
      stale.hidden = false;
      stale.textContent = 'No design for the current mask: the audit below belongs to the last design that could be built.';
    }
  });
  state.on('activeTab', () => {
    if (!visible()) return;
    const d = state.get('design');
    if (d && (!forDesign || forDesign.id !== d.id) && auto.checked) soon.now();
    else if (dirty) draw();
    else [artefacts, deviation, impulse].forEach(plots.resize);
  });
  run.addEventListener('click', () => audit());
  dither.addEventListener('change', () => audit());
  fit.addEventListener('change', () => draw());
}
