// The bar along the top: the recording, the route and the verdict, always in sight.

import * as fmt from '../format.js';
import { el, fill } from '../ui.js';

export function init(root, state) {
  const recording = el('span', { class: 'tb-recording', id: 'tb-recording' }, 'no recording');
  const route = el('span', { class: 'tb-route', id: 'tb-route' });
  const chip = el('span', { class: 'chip', id: 'tb-verdict', role: 'status', 'aria-live': 'polite' });
  const cost = el('span', { class: 'tb-cost', id: 'tb-cost' });
  fill(root.querySelector('.tb-body'), recording, route, chip, cost);

  state.on(['recording', 'route', 'design', 'designError', 'designBusy'], (s) => {
    const rec = s.recording;
    recording.textContent = rec ? rec.name : 'no recording';
    recording.title = rec ? `${fmt.rate(rec.rate_hz)}, ${fmt.channels(rec.channels)}, ${fmt.duration(rec.duration_s)}` : '';
    const r = s.route;
    const d = s.design;
    if (rec && r) {
      const ratio = d && d.fs_in === rec.rate_hz && d.fs_out === r.fs_out && d.figures.path === 'polyphase'
        ? `  (×${d.figures.up}/${d.figures.down})` : '';
      route.textContent = `${fmt.rate(rec.rate_hz)} → ${typeof r.fs_out === 'number' ? fmt.rate(r.fs_out) : fmt.dash}${ratio}`;
    } else {
      route.textContent = '';
    }
    if (s.designError) {
      chip.className = 'chip fail';
      chip.textContent = 'no design: see Route and mask';
      cost.textContent = '';
    } else if (d) {
      const v = d.verdict;
      chip.className = `chip ${v.meets_mask ? 'pass' : 'fail'}`;
      chip.textContent = v.meets_mask
        ? `meets the mask · ${fmt.db(v.attenuation_margin_db)} to spare`
        : `misses the mask${v.attenuation_margin_db < 0 ? ` by ${fmt.db(-v.attenuation_margin_db)}` : ' (ripple)'}`;
      const f = d.figures;
      cost.textContent = `${fmt.count(f.numtaps, 'taps')} · ${fmt.num(f.mmac_per_second, 1)} MMAC/s · latency ${fmt.ms(f.latency_ms)}`;
    } else {
      chip.className = 'chip';
      chip.textContent = s.designBusy ? 'designing…' : '';
      cost.textContent = '';
    }
    chip.classList.toggle('busy', !!s.designBusy);
  });
}
