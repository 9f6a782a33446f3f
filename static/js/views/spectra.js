// Spectra: source and target on one frequency axis, both Nyquist limits, the mask with its
// attenuation floor, and the part of the source above the target Nyquist.

import * as api from '../api.js';
import * as fmt from '../format.js';
import * as plots from '../plots.js';
import { spectraAhead } from '../current.js';
import { el, fill, showError, clearErrors, errorSlot, debounce, numberOf } from '../ui.js';

export const TAB = 'spectra';

export function init(root, state) {
  const linear = el('input', { type: 'radio', name: 'spectra_axis', id: 'spectra-linear', value: 'linear', checked: true });
  const log = el('input', { type: 'radio', name: 'spectra_axis', id: 'spectra-log', value: 'log' });
  const excerptBox = el('input', { type: 'checkbox', id: 'spectra-excerpt', name: 'spectra_excerpt' });
  const start = el('input', { type: 'number', name: 'start_s', id: 'spectra-start', min: 0, step: 'any', value: 0, disabled: true, 'aria-label': 'excerpt start, s' });
  const length = el('input', { type: 'number', name: 'length_s', id: 'spectra-length', min: 0.5, max: 60, step: 'any', value: 5, disabled: true });
  const summary = el('p', { class: 'summary', id: 'spectra-summary', 'aria-live': 'polite' });
  const aliasNote = el('p', { class: 'callout', id: 'spectra-alias', hidden: true });
  const stale = el('p', { class: 'stale', hidden: true });
  const plot = el('div', { class: 'plot tall', id: 'plot-spectra', role: 'img', 'aria-label': 'source and target spectra with Nyquist limits and the mask' });

  fill(root,
    el('div', { class: 'view-head' },
      el('h2', { id: 'spectra-h' }, 'Spectra'),
      el('fieldset', { class: 'inline' },
        el('legend', {}, 'Frequency axis'),
        linear, el('label', { for: 'spectra-linear' }, 'linear'),
        log, el('label', { for: 'spectra-log' }, 'log')),
      el('div', { class: 'inline' },
        excerptBox, el('label', { for: 'spectra-excerpt' }, 'one excerpt from'),
        el('span', { class: 'with-unit' }, start, el('span', { class: 'unit' }, 's')),
        el('label', { for: 'spectra-length' }, 'lasting'),
        el('span', { class: 'with-unit' }, length, el('span', { class: 'unit' }, 's')))),
    errorSlot('start_s'), errorSlot('length_s'),
    summary, aliasNote, stale, plot,
    el('p', { class: 'hint' },
      'Left axis: power spectral density of the source (blue) and of the converted audio (orange). ',
      'Right axis: the filter gain and its mask — green passband, grey transition band, red stopband with the attenuation floor. ',
      'The amber area is source content above the target Nyquist: it would fold back as aliases without the filter.'),
    errorSlot('*'));

  let data = null;
  let dirty = false;
  let seq = 0;
  let controller = null;

  const visible = () => state.get('activeTab') === TAB;
  const logX = () => log.checked;

  function draw() {
    if (!data) return;
    if (!visible()) {
      dirty = true;
      return;
    }
    dirty = false;
    const d = state.get('design');
    const response = d && d.fs_in === data.source.rate_hz && d.fs_out === data.target.rate_hz ? d.response : null;
    plots.spectra(plot, data, { logX: logX(), response });
  }

  // A newly loaded recording's spectra are asked for with the route, beside its first design
  // (the server designs the filter once for both); later ones name the design.
  let byRoute = false;
  async function load({ route = false } = {}) {
    const s = state.get();
    const d = s.design;
    const rec = s.recording;
    let body;
    if (route) {
      const ahead = spectraAhead(s);
      if (!rec || !ahead) return;
      body = { recording_id: rec.id, ...ahead };
    } else {
      if (!d || !rec || d.fs_in !== rec.rate_hz) return;
      body = { recording_id: rec.id, design_id: d.id, ...s.spectraOptions };
    }
    clearErrors(root);
    if (controller) controller.abort();
    controller = new AbortController();
    const mine = ++seq;
    byRoute = route;
    root.classList.add('busy');
    summary.textContent = 'Analysing…';
    try {
      const sp = await api.spectra(body, controller.signal);
      if (mine !== seq) return;
      data = sp;
      state.set({ spectra: sp });
      describe(sp);
      draw();
      const now = state.get('design');
      if (route && now && now.id !== sp.design_id) soon();   // the route moved meanwhile
    } catch (err) {
      if (err && err.name === 'AbortError') return;
      if (mine !== seq) return;
      if (route) {                       // the design will tell what is wrong; try with it
        byRoute = false;
        soon();
        return;
      }
      summary.textContent = '';
      showError(root, err);
    } finally {
      if (mine === seq) {
        root.classList.remove('busy');
        byRoute = false;
      }
    }
  }

  function describe(sp) {
    const a = sp.analysis;
    const where = a.mode === 'whole' ? 'the whole recording'
      : a.mode === 'excerpt' ? `one excerpt (${fmt.seconds(a.excerpts[0][0])} to ${fmt.seconds(a.excerpts[0][0] + a.excerpts[0][1])})`
        : `${a.excerpts.length} excerpts spread over the recording`;
    summary.textContent = `Welch spectra (Hann window) of ${where}: ${fmt.seconds(a.seconds_analysed)} analysed, resolution ${fmt.hz(a.resolution_hz, 1)}. `
      + `Source Nyquist ${fmt.rate(sp.source.nyquist_hz)}, target Nyquist ${fmt.rate(sp.target.nyquist_hz)}.`;
    const above = sp.above_target_nyquist;
    if (above && above.applies) {
      aliasNote.hidden = false;
      aliasNote.textContent = `Source energy between ${fmt.rate(above.from_hz)} and ${fmt.rate(above.to_hz)}: `
        + `${fmt.db(above.source_db)} relative to the whole source — it would alias without the filter. `
        + `After the filter: ${fmt.db(above.after_filter_db)}.`;
    } else {
      aliasNote.hidden = false;
      aliasNote.textContent = `The target rate is not lower than the source rate: nothing can alias; the filter removes the images above ${fmt.rate(sp.source.nyquist_hz)}.`;
    }
  }

  // during live edits the spectra wait until the design has rested
  const soon = debounce(load, 150);
  let analysedFor = null;
  state.on('recording', (s) => {
    const rec = s.recording;
    if (!rec || rec.id === analysedFor) return;      // a refresh of the same recording
    analysedFor = rec.id;
    queueMicrotask(() => load({ route: true }));    // once the route has settled for it
  });
  state.on('design', (s) => {
    const d = s.design;
    if (byRoute) return;                 // the spectra on their way belong to the route
    if (d && data && data.design_id === d.id) {
      draw();                            // these spectra are this design's: add its gain
      return;
    }
    soon();
  });
  state.on('designError', (s) => {
    stale.hidden = !s.designError;
    stale.textContent = s.designError ? 'These spectra belong to the last design that could be built.' : '';
  });
  state.on('activeTab', () => {
    if (!visible()) return;
    if (dirty) draw(); else plots.resize(plot);
  });
  // what the spectra are asked for beside the route (the axis, one excerpt): in the state, so
  // an upload can carry it and the server computes the new recording's spectra while it reads
  const publish = () => state.set({
    spectraOptions: {
      log_axis: logX(),
      ...(excerptBox.checked ? { start_s: numberOf(start), length_s: numberOf(length) } : {}),
    },
  });
  publish();
  for (const radio of [linear, log]) radio.addEventListener('change', () => { publish(); load(); });
  excerptBox.addEventListener('change', () => {
    start.disabled = length.disabled = !excerptBox.checked;
    publish();
    load();
  });
  for (const input of [start, length]) {
    input.addEventListener('change', () => {
      publish();
      if (excerptBox.checked) load();
    });
  }
}
