// Time base: two recordings of one event (a reference and a track from another recorder).
// Measure the track's start offset and clock drift, see the offset against time with the fitted
// line and its residuals, listen to both summed before and after the correction (misalignment
// is heard as comb filtering and echo; playback starts quiet), and convert the track onto the
// reference's clock like any other conversion (progress, downloads, history).

import * as api from '../api.js';
import * as fmt from '../format.js';
import * as plots from '../plots.js';
import { Player, parseWav } from '../player.js';
import { el, fill, facts, showError, clearErrors, errorSlot, numberOf } from '../ui.js';

export const TAB = 'timebase';
const START_VOLUME_DB = -24;
const LISTEN_S = 10;

export function init(root, state) {
  const refSel = el('select', { id: 'clock-reference', name: 'reference_id' });
  const trkSel = el('select', { id: 'clock-track', name: 'track_id' });
  const measureBtn = el('button', { type: 'button', id: 'clock-measure' }, 'Measure drift');
  const status = el('p', { class: 'status', id: 'clock-status', 'aria-live': 'polite' });
  const figures = el('div', { class: 'figures', id: 'clock-facts' });
  const plot = el('div', { class: 'plot tall', id: 'plot-timebase', role: 'img', 'aria-label': 'track offset against time with the fitted line and the residuals' });

  const startIn = el('input', { type: 'number', id: 'clock-listen-start', name: 'start_s', min: 0, step: 'any', value: 20 });
  const listenBtn = el('button', { type: 'button', id: 'clock-listen-prepare', disabled: true }, 'Prepare the excerpts');
  const beforeBtn = el('button', { type: 'button', id: 'clock-before', class: 'secondary', disabled: true, 'aria-pressed': 'true' }, 'Before: as recorded');
  const afterBtn = el('button', { type: 'button', id: 'clock-after', class: 'secondary', disabled: true, 'aria-pressed': 'false' }, 'After: corrected');
  const playBtn = el('button', { type: 'button', id: 'clock-play', disabled: true }, 'Play');
  const volume = el('input', { type: 'range', id: 'clock-volume', min: -60, max: 0, step: 1, value: START_VOLUME_DB });
  const volumeValue = el('output', { id: 'clock-volume-value', for: 'clock-volume' }, fmt.db(START_VOLUME_DB, 0));
  const listenStatus = el('p', { class: 'hint', id: 'clock-listen-status', 'aria-live': 'polite' });

  const convertBtn = el('button', { type: 'button', id: 'clock-convert', disabled: true }, 'Convert the track onto the reference’s clock');
  const progress = el('progress', { id: 'clock-progress', max: 100, value: 0, hidden: true, 'aria-label': 'corrected conversion progress' });
  const convStatus = el('p', { class: 'status', id: 'clock-convert-status', 'aria-live': 'polite' });
  const downloads = el('div', { class: 'downloads', id: 'clock-downloads', hidden: true });

  fill(root,
    el('div', { class: 'view-head' }, el('h2', { id: 'timebase-h' }, 'Time base: two recorders, one clock')),
    el('p', { class: 'hint' }, 'Pick the recording whose clock the other should follow (the reference) and the track from the other recorder. '
      + 'Drift is positive when the track’s clock runs fast; the offset is positive when the track’s content comes late.'),
    el('div', { class: 'pair' },
      el('div', { class: 'field' }, el('label', { for: 'clock-reference' }, 'Reference'), refSel, errorSlot('reference_id')),
      el('div', { class: 'field' }, el('label', { for: 'clock-track' }, 'Track'), trkSel, errorSlot('track_id'))),
    el('div', { class: 'buttons' }, measureBtn), status, errorSlot('min_peak_ratio_db'), errorSlot('*'),
    figures,
    el('figure', {}, el('figcaption', {}, 'Track offset against reference time: windows, fitted line, residuals'), plot),
    el('h3', {}, 'Listen: both recordings summed'),
    el('p', { class: 'caution' }, el('strong', {}, 'Playback starts quiet. '),
      `Volume begins at ${fmt.db(START_VOLUME_DB, 0)}; raise it slowly. Before the correction the two recorders are out of step, heard as an echo or a hollow, phasey sound; after it they should sound as one.`),
    el('div', { class: 'pair' },
      el('div', { class: 'field' }, el('label', { for: 'clock-listen-start' }, 'Excerpt start (reference time)'),
        el('div', { class: 'with-unit' }, startIn, el('span', { class: 'unit' }, 's')), errorSlot('start_s')),
      el('div', { class: 'field' }, el('label', { for: 'clock-volume' }, 'Volume'), el('div', { class: 'with-unit' }, volume, volumeValue))),
    el('div', { class: 'buttons' }, listenBtn, beforeBtn, afterBtn, playBtn), listenStatus,
    el('h3', {}, 'Corrected track'),
    el('p', { class: 'hint' }, 'Converted by the measured ratio, shifted by the offset and delivered at the reference’s rate and length, with the mask of the route and the delivery options set under “Delivery and conversion”.'),
    el('div', { class: 'buttons' }, convertBtn), progress, convStatus, errorSlot('delivery'), downloads);

  let report = null;
  let player = null;
  let stopFollowing = null;

  // ---------------------------------------------------------------- choosing the pair

  function options(select, list, chosen) {
    select.replaceChildren(...list.map((r) => el('option', { value: r.id }, `${r.name} · ${fmt.rate(r.rate_hz)} · ${fmt.duration(r.duration_s)}`)));
    if (chosen && list.some((r) => r.id === chosen)) select.value = chosen;
  }

  state.on('recordings', (s) => {
    const list = s.recordings || [];
    const pair = (s.config && s.config.demo_pair) || {};
    options(refSel, list, refSel.value || pair.reference_id);
    options(trkSel, list, trkSel.value || pair.track_id || (list[1] && list[1].id));
    measureBtn.disabled = list.length < 2;
  });

  const pairBody = () => ({ reference_id: refSel.value, track_id: trkSel.value });

  function forget() {
    report = null;
    figures.replaceChildren();
    plots.clear(plot);
    listenBtn.disabled = true;
    convertBtn.disabled = true;
    setPlayable(false);
  }
  refSel.addEventListener('change', forget);
  trkSel.addEventListener('change', forget);

  // ---------------------------------------------------------------- measuring

  function showReport(r) {
    fill(figures, facts([
      ['Drift', `${fmt.num(r.drift_ppm, 3)} ppm`],
      [`Interval (${fmt.percent(r.confidence * 100)})`, `${fmt.num(r.drift_ppm_low, 3)} to ${fmt.num(r.drift_ppm_high, 3)} ppm`],
      ['Offset at the start', fmt.ms(r.offset_ms, 3)],
      ['Offset at the end', fmt.ms(r.offset_end_ms, 3)],
      ['Residual', `${fmt.ms(r.residual_rms_ms, 4)} rms, ${fmt.ms(r.residual_worst_ms, 4)} worst`],
      ['Windows used', `${r.windows_used} of ${r.windows_total} (${fmt.percent(r.used_share * 100)})`],
    ], 'facts compact'));
    plots.timeBase(plot, r);
  }

  measureBtn.addEventListener('click', async () => {
    clearErrors(root);
    forget();
    measureBtn.disabled = true;
    status.textContent = 'Measuring: correlating windows across both recordings…';
    try {
      report = await api.drift(pairBody());
      status.textContent = `Measured ${report.track} against ${report.reference}.`;
      root.dataset.measured = 'true';
      showReport(report);
      listenBtn.disabled = false;
      convertBtn.disabled = false;
    } catch (err) {
      status.textContent = '';
      showError(root, err);
    } finally {
      measureBtn.disabled = false;
    }
  });

  // ---------------------------------------------------------------- listening

  function setPlayable(on) {
    for (const b of [beforeBtn, afterBtn, playBtn]) b.disabled = !on;
    if (!on && player) player.stop();
  }

  function select(key) {
    if (!player || !player.loaded) return;
    player.select(key);
    beforeBtn.setAttribute('aria-pressed', String(key === 'A'));
    afterBtn.setAttribute('aria-pressed', String(key === 'B'));
  }

  listenBtn.addEventListener('click', async () => {
    clearErrors(root);
    listenBtn.disabled = true;
    listenStatus.textContent = 'Preparing the summed excerpts…';
    try {
      const body = { ...pairBody(), start_s: numberOf(startIn) ?? 0, length_s: LISTEN_S };
      const r = await api.driftListen(body);
      const [a, b] = await Promise.all([api.bytes(r.before.url), api.bytes(r.after.url)]);
      if (!player) {
        player = new Player();
        player.setVolumeDb(Number(volume.value));
        player.onchange = (p) => { playBtn.textContent = p.playing ? 'Pause' : 'Play'; };
      }
      player.load({ A: parseWav(a), B: parseWav(b) });
      select('A');
      setPlayable(true);
      root.dataset.listenReady = 'true';
      listenStatus.textContent = `${fmt.duration(r.length_s)} from ${fmt.num(r.start_s, 1)} s. Before: the track ${fmt.ms(r.misalignment_before_ms, 1)} out of step. Switch while playing; the playhead stays.`;
    } catch (err) {
      listenStatus.textContent = '';
      showError(root, err);
    } finally {
      listenBtn.disabled = !report;
    }
  });
  beforeBtn.addEventListener('click', () => select('A'));
  afterBtn.addEventListener('click', () => select('B'));
  playBtn.addEventListener('click', () => player && player.toggle());
  volume.addEventListener('input', () => {
    const v = Number(volume.value);
    volumeValue.textContent = fmt.db(v, 0);
    if (player) player.setVolumeDb(v);
  });

  // ---------------------------------------------------------------- the corrected conversion

  function showDone(c) {
    const u = c.urls || {};
    const base = c.download_name.replace(/\.[^.]+$/, '');
    fill(downloads,
      el('a', { class: 'button', id: 'clock-download-file', href: u.download, download: c.download_name }, `Corrected track (${c.download_name})`),
      el('a', { class: 'button secondary', id: 'clock-download-sheet', href: u.sheet, download: `${base}_sheet.html` }, 'Design sheet (HTML)'),
      el('a', { class: 'button secondary', id: 'clock-download-recipe', href: u.recipe, download: `${base}_recipe.json` }, 'Recipe (JSON)'));
    downloads.hidden = false;
  }

  convertBtn.addEventListener('click', async () => {
    clearErrors(root);
    const s = state.get();
    const route = s.route || {};
    convertBtn.disabled = true;
    downloads.hidden = true;
    convStatus.textContent = 'Starting…';
    try {
      const c = await api.startDriftConversion({ ...pairBody(), preset: route.preset, spec: route.spec || {}, format: s.format, delivery: s.delivery });
      state.set({ conversionsStale: Date.now() });
      progress.hidden = false;
      progress.value = 0;
      if (stopFollowing) stopFollowing();
      stopFollowing = api.followConversion(c.id, (update, err) => {
        if (err) {
          showError(root, err);
          return;
        }
        const p = update.progress || {};
        if (['queued', 'running'].includes(update.status)) {
          progress.value = p.percent ?? 0;
          convStatus.textContent = update.status === 'queued' ? 'Waiting for a free worker…' : `Converting: ${fmt.percent(p.percent, 0)}, about ${fmt.duration(p.eta_s)} left`;
          return;
        }
        convertBtn.disabled = false;
        state.set({ conversionsStale: Date.now() });
        if (update.status === 'done') {
          progress.value = 100;
          convStatus.textContent = `Done: ${fmt.frames(update.figures.frames_out)} at ${fmt.rate(update.fs_out)}, the reference’s length.`;
          showDone(update);
        } else {
          progress.hidden = true;
          convStatus.textContent = update.status === 'cancelled' ? 'Cancelled; no file was left behind.' : 'The conversion failed.';
          if (update.error) showError(root, update.error);
        }
      });
    } catch (err) {
      convStatus.textContent = '';
      showError(root, err);
      convertBtn.disabled = false;
    }
  });

  state.on('activeTab', (s) => { if (s.activeTab === TAB) plots.resize(plot); });
}
