// Filter: the magnitude response against the mask, the passband at ripple scale, the impulse
// response with its pre-ringing, the group delay, and the multistage plans with their cost.

import * as fmt from '../format.js';
import * as plots from '../plots.js';
import { el, fill, facts } from '../ui.js';

export const TAB = 'filter';

export function init(root, state) {
  const logBox = el('input', { type: 'checkbox', id: 'filter-log', name: 'filter_log' });
  const fitBox = el('input', { type: 'checkbox', id: 'filter-fit', name: 'filter_fit' });
  const head = el('div', { class: 'figures', id: 'filter-facts' });
  const stale = el('p', { class: 'stale', hidden: true });
  const mag = el('div', { class: 'plot', id: 'plot-magnitude', role: 'img', 'aria-label': 'magnitude response against the mask' });
  const pb = el('div', { class: 'plot', id: 'plot-passband', role: 'img', 'aria-label': 'passband close-up at ripple scale' });
  const imp = el('div', { class: 'plot', id: 'plot-impulse', role: 'img', 'aria-label': 'impulse response with pre-ringing marked' });
  const gd = el('div', { class: 'plot', id: 'plot-group-delay', role: 'img', 'aria-label': 'group delay' });
  const plansBox = el('div', { id: 'plans', class: 'table-scroll' });
  const planPlot = el('div', { class: 'plot short', id: 'plot-plan-cost', role: 'img', 'aria-label': 'cost of each plan' });

  fill(root,
    el('div', { class: 'view-head' },
      el('h2', { id: 'filter-h' }, 'Filter'),
      el('div', { class: 'inline' }, logBox, el('label', { for: 'filter-log' }, 'log frequency axis')),
      el('div', { class: 'inline' }, fitBox, el('label', { for: 'filter-fit' }, 'passband fitted to the measured ripple'))),
    head, stale,
    el('div', { class: 'grid2' },
      el('figure', {}, el('figcaption', {}, 'Magnitude response against the mask'), mag),
      el('figure', {}, el('figcaption', {}, 'Passband close-up at ripple scale'), pb),
      el('figure', {}, el('figcaption', {}, 'Impulse response (pre-ringing in amber)'), imp),
      el('figure', {}, el('figcaption', {}, 'Group delay up to the stopband edge'), gd)),
    el('h3', {}, 'Plans side by side'),
    el('p', { class: 'hint' }, 'One stage against cascades of smaller stages. Each cascade is measured as a whole against the same mask; the cheapest one that meets it is used when Stages is “multistage when cheaper” and it saves at least a fifth of the work.'),
    plansBox, planPlot);

  let dirty = false;
  const visible = () => state.get('activeTab') === TAB;

  function draw() {
    const d = state.get('design');
    if (!d) return;
    if (!visible()) {
      dirty = true;
      return;
    }
    dirty = false;
    plots.magnitude(mag, d, { logX: logBox.checked });
    plots.passband(pb, d, { fit: fitBox.checked });
    plots.impulse(imp, d);
    plots.groupDelay(gd, d);
    drawPlans(d);
  }

  function describe(d) {
    const f = d.figures;
    const im = d.impulse;
    const g = d.group_delay;
    fill(head, facts([
      ['Length', `${fmt.count(f.numtaps, 'taps')} at ${fmt.rate(f.filter_rate_hz)}`],
      ['Phase', d.spec.phase === 'minimum' ? 'minimum' : 'linear'],
      ['Latency', fmt.ms(f.latency_ms)],
      ['Group delay', d.spec.phase === 'linear' ? `${fmt.ms(g.latency_ms)} (constant; removed by the converter)` : `${fmt.ms(g.latency_ms)} (varies with frequency)`],
      ['Pre-ringing', im.prering_ms > 0 ? `${fmt.ms(im.prering_ms)} before the peak (above −60 dB)` : 'none above −60 dB'],
      ['Passband ripple', `${fmt.ripple(f.measured.passband_ripple_db)} measured`],
      ['Rejection', `${fmt.db(f.measured.stopband_attenuation_db)} measured`],
    ], 'facts row'));
  }

  function drawPlans(d) {
    const p = state.get('plans');
    if (!p || p.design_id !== d.id) {
      fill(plansBox, el('p', { class: 'hint', id: 'plans-wait' }, 'Working out the multistage plans for this design…'));
      return;
    }
    if (!p.single) {
      fill(plansBox, el('p', { class: 'hint' }, p && p.error ? `No plans: ${p.error.message}` : 'No plans computed for this design.'));
      plots.clear(planPlot);
      return;
    }
    const s = p.single;
    const methods = { kaiser: 'Kaiser window', equiripple: 'equiripple', 'least-squares': 'least squares' };
    const plans = [{
      ...s, name: `one stage ×${s.up}/${s.down}`, detail: `${s.path}, ${methods[s.method] || s.method}`,
      chosen: p.chosen === 'single', numtaps: fmt.grouped(s.numtaps),
    }];
    for (const o of p.options) {
      plans.push({
        ...o, name: o.label, chosen: p.chosen === o.label,
        detail: (o.rates || []).map((r) => fmt.rate(r)).join(' → '),
        numtaps: `${fmt.grouped(o.numtaps)} (${o.stages.map((st) => fmt.grouped(st.numtaps)).join(' + ')})`,
      });
    }
    const head = ['Plan', 'Rates', 'Taps', 'Multiply-adds per output sample', 'Cost', 'Latency', 'Rejection', 'Verdict'];
    const rows = plans.map((o) => el('tr', { class: o.chosen ? 'chosen' : '' },
      el('th', { scope: 'row' }, o.name, o.chosen ? el('span', { class: 'badge' }, 'used') : null),
      el('td', { class: 'hint' }, o.detail),
      el('td', { class: 'num' }, o.numtaps),
      el('td', { class: 'num' }, fmt.num(o.macs_per_output_sample, 1)),
      el('td', { class: 'num' }, `${fmt.num(o.mmac_per_second, 2)} MMAC/s`),
      el('td', { class: 'num' }, fmt.ms(o.latency_ms)),
      el('td', { class: 'num' }, fmt.db(o.measured.stopband_attenuation_db)),
      el('td', {}, el('span', { class: o.meets_mask ? 'ok' : 'bad' }, o.meets_mask ? 'meets' : 'misses'))));
    fill(plansBox,
      el('table', { class: 'audit plans-table' },
        el('thead', {}, el('tr', {}, ...head.map((h) => el('th', { scope: 'col' }, h)))),
        el('tbody', {}, ...rows)),
      p.options.length ? null : el('p', { class: 'hint' }, `No useful cascade: up ${s.up} / down ${s.down} does not split into cheaper stages here.`));
    plots.planCost(planPlot, plans);
  }

  state.on('design', (s) => {
    if (!s.design) return;
    describe(s.design);
    draw();
  });
  state.on('plans', (s) => {
    if (s.design && visible()) drawPlans(s.design);
    else if (s.design) dirty = true;
  });
  state.on('designError', (s) => {
    stale.hidden = !s.designError;
    stale.textContent = s.designError ? 'These plots belong to the last design that could be built.' : '';
  });
  state.on('activeTab', () => {
    if (!visible()) return;
    if (dirty) draw(); else [mag, pb, imp, gd, planPlot].forEach(plots.resize);
  });
  fitBox.addEventListener('change', () => {
    const d = state.get('design');
    if (d && visible()) plots.passband(pb, d, { fit: fitBox.checked });
  });
  logBox.addEventListener('change', () => {
    const d = state.get('design');
    if (d && visible()) plots.magnitude(mag, d, { logX: logBox.checked });
  });
}
