// The verdict and the cost of the design for the current route and mask; before an extreme
// design, its estimate and a question; while a design runs, a way to stop it.

import * as fmt from '../format.js';
import { el, fill, facts } from '../ui.js';
import { CHOICE_LABELS } from './route.js';

function headlineOf(v) {
  if (v.meets_mask) return 'Meets the mask';
  const parts = [];
  if (v.attenuation_margin_db < 0) parts.push(`rejection short by ${fmt.db(-v.attenuation_margin_db)}`);
  if (v.ripple_margin_db < 0) parts.push(`ripple over by ${fmt.ripple(-v.ripple_margin_db)}`);
  return `Does not meet the mask${parts.length ? `: ${parts.join(', ')}` : ''}`;
}

export function init(root, state) {
  const verdict = el('div', { class: 'verdict', id: 'verdict', role: 'status', 'aria-live': 'polite' });
  const ask = el('div', { class: 'callout estimate', id: 'design-estimate', role: 'alertdialog', 'aria-labelledby': 'design-estimate-h', hidden: true });
  const stop = el('button', { type: 'button', class: 'secondary', id: 'design-stop', hidden: true }, 'Stop this design');
  const note = el('p', { class: 'hint', id: 'design-note', 'aria-live': 'polite' });
  const cost = el('div', { class: 'figures', id: 'design-cost' });
  fill(root,
    el('h2', { id: 'verdict-h' }, 'Verdict'),
    verdict, ask, el('div', { class: 'buttons' }, stop), note,
    el('h3', {}, 'Cost of the design'),
    cost);

  stop.addEventListener('click', () => state.set({ designStop: Date.now() }));

  function showEstimate(e) {
    ask.hidden = !e;
    if (!e) return;
    const latency = e.latency_ms === null ? '' : `, about ${fmt.ms(e.latency_ms, 0)} of delay`;
    fill(ask,
      el('strong', { id: 'design-estimate-h' }, 'This design would be very long'),
      el('span', {}, `The mask needs about ${fmt.count(e.numtaps, 'taps')} at ${fmt.rate(e.filter_rate_hz)}${latency} (the page asks above ${fmt.grouped(e.limits.numtaps)} taps or ${fmt.ms(e.limits.latency_ms, 0)}). Designing it can take many seconds.`),
      el('span', { class: 'hint' }, 'A wider transition band (a lower passband edge or a higher stopband edge) makes it much shorter.'),
      el('div', { class: 'buttons' },
        el('button', { type: 'button', id: 'design-anyway', onclick: () => state.set({ designConfirm: Date.now() }) }, 'Design it anyway'),
        el('button', { type: 'button', class: 'secondary', id: 'design-keep', onclick: () => state.set({ designEstimate: null, designNote: 'Kept the last design; the plots show it.' }) }, 'Keep the last design')));
  }

  function showCost(d) {
    const f = d.figures;
    const pathText = f.path === 'polyphase'
      ? `polyphase, up ${f.up} / down ${f.down}`
      : `arbitrary ratio, ${fmt.grouped(f.phases)} phases`;
    fill(cost, facts([
      ['Path', pathText],
      ['Method', (CHOICE_LABELS.method[f.method]) || f.method],
      ['Filter length', `${fmt.count(f.numtaps, 'taps')} at ${fmt.rate(f.filter_rate_hz)} (estimate ${fmt.grouped(f.numtaps_estimate)})`],
      ['Taps per phase', fmt.grouped(f.taps_per_phase)],
      ['Work per output sample', `${fmt.num(f.macs_per_output_sample, 1)} multiply-adds`],
      ['Work per second', `${fmt.num(f.mmac_per_second, 2)} MMAC/s per channel`],
      ['Latency', fmt.ms(f.latency_ms)],
      ['Pre-ringing', fmt.ms(f.prering_ms)],
      ['Design time', `${fmt.ms(d.timing && d.timing.total_ms, 0)}${d.timing && d.timing.cached ? ' (cached)' : ''}`],
    ], 'facts compact'), f.method_reason ? el('p', { class: 'hint' }, `Why this method: ${f.method_reason}.`) : null);
  }

  state.on(['design', 'designError', 'designBusy', 'designEstimate', 'designNote'], (s) => {
    const d = s.design;
    const err = s.designError;
    showEstimate(s.designEstimate);
    stop.hidden = !s.designBusy;
    note.textContent = s.designNote || '';
    verdict.classList.toggle('busy', !!s.designBusy);
    if (err) {
      verdict.className = 'verdict fail';
      fill(verdict,
        el('strong', {}, 'No design for this mask'),
        el('span', {}, err.message),
        d ? el('span', { class: 'hint' }, 'The plots still show the last design that could be built.') : null);
      return;
    }
    if (!d) {
      fill(verdict, el('span', { class: 'hint' }, s.designBusy ? 'Designing…' : 'Load a recording to design its filter.'));
      return;
    }
    const v = d.verdict;
    const m = d.figures.measured;
    verdict.className = `verdict ${v.meets_mask ? 'pass' : 'fail'}${s.designBusy ? ' busy' : ''}`;
    fill(verdict,
      el('strong', { id: 'verdict-headline' }, headlineOf(v)),
      facts([
        ['Passband ripple', `${fmt.ripple(m.passband_ripple_db)} (limit ${fmt.ripple(d.mask.ripple_db)})`, v.ripple_margin_db < 0 ? 'bad' : ''],
        ['Stopband rejection', `${fmt.db(m.stopband_attenuation_db)} (needs ${fmt.db(d.mask.attenuation_db, 0)})`, v.attenuation_margin_db < 0 ? 'bad' : ''],
        ['Margin', `${fmt.db(v.attenuation_margin_db)} rejection, ${fmt.ripple(v.ripple_margin_db)} ripple`],
        ['Worst stopband point', fmt.hz(m.worst_stopband_hz)],
      ], 'facts compact'));
    showCost(d);
  });
}
