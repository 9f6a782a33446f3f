// Route and mask: the target rate, a preset by use (its word length too, when it states one),
// every spec field. Edits go to the state; redesign.js designs, verdict.js shows the verdict.

import * as fmt from '../format.js';
import { el, fill, showError, clearErrors, errorSlot, numberOf } from '../ui.js';

export const CHOICE_LABELS = {
  phase: { linear: 'linear', minimum: 'minimum' },
  method: {
    auto: 'automatic', kaiser: 'Kaiser window', equiripple: 'equiripple (Parks-McClellan)',
    'least-squares': 'least squares',
  },
  arithmetic: { float32: 'float32', float64: 'float64' },
  stages: { single: 'one stage', auto: 'multistage when cheaper' },
};

// The numeric fields: [name, label, unit, step, hint]
const NUMBER_FIELDS = [
  ['ripple_db', 'Passband ripple, at most ±', 'dB', 'any', ''],
  ['attenuation_db', 'Stopband rejection, at least', 'dB', 'any', ''],
  ['passband_hz', 'Passband edge', 'Hz', 'any', 'empty: automatic'],
  ['passband_fraction', 'Automatic passband edge, fraction of the lower Nyquist', '×', 'any', ''],
  ['stopband_hz', 'Stopband edge', 'Hz', 'any', 'empty: automatic'],
];
const NULLABLE = new Set(['passband_hz', 'stopband_hz']);

function id(name) {
  return `spec-${name.replace(/_/g, '-')}`;
}

export function init(root, state) {
  const rateSelect = el('select', { name: 'fs_out', id: 'fs-out' });
  const rateCustom = el('input', {
    type: 'number', name: 'fs_out_custom', id: 'fs-out-custom', min: 1000, max: 768000, step: 1,
    inputmode: 'numeric', hidden: true, 'aria-label': 'other target rate in Hz',
  });
  const routeLine = el('p', { class: 'hint', id: 'route-line', 'aria-live': 'polite' });
  const presetSelect = el('select', { name: 'preset', id: 'preset' });
  const presetAbout = el('p', { class: 'hint', id: 'preset-about' });
  const resetBtn = el('button', { type: 'button', class: 'link', id: 'reset-spec' }, 'Back to the preset values');

  const inputs = {};
  const resolvedHints = {};
  const fieldRows = [];
  for (const [name, label, unit, step, placeholder] of NUMBER_FIELDS) {
    const input = el('input', {
      type: 'number', name, id: id(name), step, placeholder, inputmode: 'decimal',
      'aria-describedby': `${id(name)}-hint`,
    });
    inputs[name] = input;
    resolvedHints[name] = el('span', { class: 'hint', id: `${id(name)}-hint` });
    const row = el('div', { class: 'field' },
      el('label', { for: id(name) }, label),
      el('div', { class: 'with-unit' }, input, el('span', { class: 'unit' }, unit)),
      resolvedHints[name], errorSlot(name));
    if (name === 'attenuation_db') {
      const slider = el('input', {
        type: 'range', id: 'attenuation-slider', min: 20, max: 200, step: 1,
        'aria-label': 'stopband rejection slider, dB', tabindex: 0,
      });
      slider.addEventListener('input', () => {
        input.value = slider.value;
        edited('attenuation_db');
      });
      input.addEventListener('input', () => {
        if (input.value !== '') slider.value = input.value;
      });
      inputs._slider = slider;
      row.insertBefore(slider, row.querySelector('.with-unit').nextSibling);
    }
    fieldRows.push(row);
  }
  const selects = {};
  for (const name of ['phase', 'method', 'arithmetic', 'stages']) {
    selects[name] = el('select', { name, id: id(name) });
  }
  const aliasBox = el('input', { type: 'checkbox', name: 'allow_transition_aliasing', id: id('allow_transition_aliasing') });


  fill(root,
    el('h2', { id: 'route-h' }, 'Route and mask'),
    el('div', { class: 'field' },
      el('label', { for: 'fs-out' }, 'Target sample rate'),
      el('div', { class: 'row' }, rateSelect, el('div', { class: 'with-unit' }, rateCustom, el('span', { class: 'unit', hidden: true, id: 'fs-out-unit' }, 'Hz'))),
      routeLine, errorSlot('fs_out'), errorSlot('fs_in')),
    el('div', { class: 'field' },
      el('label', { for: 'preset' }, 'Preset (by use)'),
      presetSelect, presetAbout, errorSlot('preset')),
    el('fieldset', { class: 'spec' },
      el('legend', {}, 'The mask the filter must meet'),
      ...fieldRows.slice(0, 2),
      el('div', { class: 'pair' }, fieldRows[2], fieldRows[4]),
      fieldRows[3],
      el('div', { class: 'field check' }, aliasBox,
        el('label', { for: id('allow_transition_aliasing') }, 'Let aliases fall into the transition band only (automatic stopband edge = lower rate − passband edge)'),
        errorSlot('allow_transition_aliasing')),
      el('div', { class: 'pair' },
        el('div', { class: 'field' }, el('label', { for: id('phase') }, 'Phase'), selects.phase, errorSlot('phase')),
        el('div', { class: 'field' }, el('label', { for: id('method') }, 'Design method'), selects.method, errorSlot('method'))),
      el('div', { class: 'pair' },
        el('div', { class: 'field' }, el('label', { for: id('arithmetic') }, 'Arithmetic'), selects.arithmetic, errorSlot('arithmetic')),
        el('div', { class: 'field' }, el('label', { for: id('stages') }, 'Stages'), selects.stages, errorSlot('stages'))),
      el('p', { class: 'hint' }, 'Linear phase: constant delay (removed by the converter), rings before transients. Minimum phase: no pre-ringing, delay varies with frequency. float32 is faster and good to about 125 dB of rejection.'),
      resetBtn, errorSlot('spec')),
    errorSlot('*'));

  // ---------------------------------------------------------------- controls from options

  state.on('options', (s) => {
    const o = s.options;
    if (!o) return;
    rateSelect.replaceChildren(
      ...o.common_rates_hz.map((r) => el('option', { value: r }, fmt.rate(r))),
      el('option', { value: 'other' }, 'Other rate…'));
    rateCustom.min = o.rate_limits_hz.min;
    rateCustom.max = o.rate_limits_hz.max;
    presetSelect.replaceChildren(...Object.entries(o.presets).map(([key, p]) => el('option', { value: key }, p.label)));
    for (const [name, select] of Object.entries(selects)) {
      const choices = (o.spec_fields[name] && o.spec_fields[name].choices) || [];
      select.replaceChildren(...choices.map((c) => el('option', { value: c }, (CHOICE_LABELS[name] || {})[c] || c)));
    }
    for (const [name] of NUMBER_FIELDS) {
      const meta = o.spec_fields[name] || {};
      if (meta.min !== undefined) inputs[name].min = meta.min;
      if (meta.max !== undefined) inputs[name].max = meta.max;
    }
    showRoute(s);
  });

  // ---------------------------------------------------------------- state -> controls

  function baseSpec(s) {
    const o = s.options;
    const route = s.route;
    if (!o || !route) return {};
    const p = o.presets[route.preset] || o.presets[o.default_preset];
    return { ...(p ? p.spec : {}), ...route.spec };
  }

  function showRoute(s) {
    const route = s.route;
    const o = s.options;
    if (!route || !o) return;
    const common = o.common_rates_hz.includes(route.fs_out);
    rateSelect.value = common ? String(route.fs_out) : 'other';
    rateCustom.hidden = common;
    root.querySelector('#fs-out-unit').hidden = common;
    if (!common && document.activeElement !== rateCustom) rateCustom.value = route.fs_out ?? '';
    presetSelect.value = route.preset;
    const p = o.presets[route.preset];
    const changed = Object.keys(route.spec).length;
    presetAbout.textContent = p ? `${p.about}${changed ? ` (${changed} field${changed > 1 ? 's' : ''} changed)` : ''}` : '';
    resetBtn.hidden = !changed;
    const spec = baseSpec(s);
    for (const [name] of NUMBER_FIELDS) {
      const input = inputs[name];
      if (document.activeElement === input) continue;   // don't fight the user's typing
      const v = spec[name];
      input.value = v === null || v === undefined ? '' : String(v);
      input.closest('.field').classList.toggle('changed', name in route.spec);
    }
    inputs._slider.value = spec.attenuation_db ?? 120;
    for (const [name, select] of Object.entries(selects)) {
      select.value = spec[name];
      select.closest('.field').classList.toggle('changed', name in route.spec);
    }
    aliasBox.checked = !!spec.allow_transition_aliasing;
  }

  state.on('route', showRoute);

  // ---------------------------------------------------------------- controls -> state

  function setRoute(patch) {
    state.set({ route: { ...state.get('route'), ...patch } });
  }

  function edited(name) {
    const route = state.get('route');
    const o = state.get('options');
    const presetSpec = (o.presets[route.preset] || {}).spec || {};
    const spec = { ...route.spec };
    let value;
    if (name in inputs) {
      value = numberOf(inputs[name]);
      if (value === null && !NULLABLE.has(name)) {
        delete spec[name];                  // empty: back to the preset's value
        setRoute({ spec });
        return;
      }
      if (Number.isNaN(value)) value = inputs[name].value;   // let the server name the rule
    } else if (name in selects) {
      value = selects[name].value;
    } else if (name === 'allow_transition_aliasing') {
      value = aliasBox.checked;
    }
    if (presetSpec[name] === value) delete spec[name]; else spec[name] = value;
    setRoute({ spec });
  }

  for (const [name] of NUMBER_FIELDS) {
    inputs[name].addEventListener('input', () => edited(name));
  }
  for (const name of Object.keys(selects)) {
    selects[name].addEventListener('change', () => edited(name));
  }
  aliasBox.addEventListener('change', () => edited('allow_transition_aliasing'));

  rateSelect.addEventListener('change', () => {
    if (rateSelect.value === 'other') {
      rateCustom.hidden = false;
      root.querySelector('#fs-out-unit').hidden = false;
      rateCustom.focus();
      return;
    }
    setRoute({ fs_out: Number(rateSelect.value) });
  });
  rateCustom.addEventListener('input', () => {
    const v = numberOf(rateCustom);
    if (v === null) return;
    setRoute({ fs_out: Number.isNaN(v) ? rateCustom.value : v });
  });
  presetSelect.addEventListener('change', () => {
    // a preset that states a word length sets it (spoken word: 16 bit)
    const bits = state.get('options').presets[presetSelect.value].bits;
    const patch = { route: { ...state.get('route'), preset: presetSelect.value, spec: {} } };
    if (bits) patch.delivery = { ...state.get('delivery'), bits };
    state.set(patch);
  });
  resetBtn.addEventListener('click', () => setRoute({ spec: {} }));

  // ---------------------------------------------------------------- errors and resolved edges

  state.on(['design', 'designError'], (s) => {
    clearErrors(root);
    const d = s.design;
    if (s.designError) {
      showError(root, s.designError);
      for (const hint of Object.values(resolvedHints)) hint.textContent = '';
      return;
    }
    if (!d) return;
    resolvedHints.passband_hz.textContent = `now ${fmt.hz(d.mask.passband_hz)}`;
    resolvedHints.stopband_hz.textContent = `now ${fmt.hz(d.mask.stopband_hz)}`;
    resolvedHints.passband_fraction.textContent = `lower Nyquist ${fmt.hz(d.mask.lower_nyquist_hz)}`;
  });

  state.on(['route', 'recording', 'design'], (s) => {
    const rec = s.recording;
    const route = s.route;
    if (!rec || !route) {
      routeLine.textContent = '';
      return;
    }
    const d = s.design;
    const ratio = d && d.fs_out === route.fs_out && d.fs_in === rec.rate_hz && d.figures.path === 'polyphase'
      ? ` · ×${d.figures.up}/${d.figures.down}` : '';
    routeLine.textContent = `${fmt.rate(rec.rate_hz)} → ${typeof route.fs_out === 'number' ? fmt.rate(route.fs_out) : fmt.dash}${ratio}`;
  });
}
