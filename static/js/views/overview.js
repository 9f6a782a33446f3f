// The whole recording over time: waveform envelope, short-term loudness, and where samples reach
// full scale or the true peak goes over. A click picks the listening excerpt there.

import * as api from '../api.js';
import * as fmt from '../format.js';
import * as plots from '../plots.js';
import { el, fill, showError, clearErrors, errorSlot } from '../ui.js';

export function init(root, state) {
  const plot = el('div', { class: 'plot overview-plot', id: 'plot-overview', role: 'img', 'aria-label': 'the whole recording over time' });
  const summary = el('p', { class: 'hint', id: 'overview-summary', 'aria-live': 'polite' });
  fill(root,
    el('div', { class: 'view-head' },
      el('h2', { id: 'overview-h' }, 'The whole recording'),
      el('p', { class: 'hint' }, 'Click to listen from there (the excerpt is shaded).')),
    plot, summary, errorSlot('*'));

  let data = null;
  let controller = null;
  let clickable = false;

  function draw() {
    if (!data) return;
    plots.overview(plot, data, state.get('excerpt'));
    plot.classList.remove('waiting');
    if (!clickable) {
      clickable = true;
      plots.onClick(plot, (t) => {
        if (!data) return;
        const e = state.get('excerpt') || { start_s: 0, length_s: 10 };
        const length = Math.min(e.length_s, data.duration_s);
        const start = Math.max(0, Math.min(Math.round(t * 10) / 10, data.duration_s - length));
        state.set({ excerpt: { start_s: Math.round(start * 1000) / 1000, length_s: length } });
      });
    }
  }

  async function load(rec) {
    if (controller) controller.abort();
    controller = new AbortController();
    clearErrors(root);
    summary.textContent = `Reading ${rec.name}…`;
    const columns = state.get('overviewColumns') || columnsNow();
    try {
      const o = await api.overview(rec.id, columns, controller.signal);
      if (!state.get('recording') || state.get('recording').id !== rec.id) return;
      data = o;
      root.dataset.recording = rec.id;
      const fs = o.full_scale.total;
      const ov = o.overs.total;
      summary.textContent = `${fmt.duration(o.duration_s)} · ${fs ? `${fmt.grouped(fs)} samples at full scale` : 'no sample at full scale'} · `
        + `${ov ? `${fmt.grouped(ov)} true-peak overs above ${fmt.dbtp(o.over_threshold_dbtp)}` : `no true-peak over above ${fmt.dbtp(o.over_threshold_dbtp)}`} · read in ${fmt.ms(o.seconds * 1000, 0)}${o.cached ? ' earlier' : ''}.`;
      draw();
    } catch (err) {
      if (err && err.name === 'AbortError') return;
      summary.textContent = '';
      showError(root, err);
    }
  }

  // one column per pixel of the plot; kept in the state, so an upload can ask the server for
  // the overview while it measures the file
  function columnsNow() {
    return Math.max(200, Math.min(4000, Math.round(plot.clientWidth || 1000)));
  }
  const measureWidth = () => {
    const n = columnsNow();
    if (n !== state.get('overviewColumns')) state.set({ overviewColumns: n });
  };
  measureWidth();
  if (window.ResizeObserver) new ResizeObserver(measureWidth).observe(plot);

  let shownFor = null;
  state.on('recording', (s) => {
    const rec = s.recording;
    if (!rec || rec.id === shownFor) return;
    shownFor = rec.id;
    data = null;
    // the last recording's picture is hidden, not purged: the next one is drawn over the same
    // plot (a plot drawn afresh costs about twice as much)
    plot.classList.add('waiting');
    load(rec);
  });
  state.on('excerpt', draw);
}
