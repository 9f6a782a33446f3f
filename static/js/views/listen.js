// Listening: A/B of the original and the converted audio at the same playhead, a loop region,
// and the excerpt they are cut from (state.excerpt, also set by a click on the overview).
// Blind trials (listen/blind.js) and difference listening (listen/difference.js) share the
// player through `ctx`. Playback starts quiet.

import * as api from '../api.js';
import * as fmt from '../format.js';
import { Player, parseWav } from '../player.js';
import { currentSpec } from '../current.js';
import { el, fill, facts, showError, clearErrors, errorSlot, numberOf, typingTarget } from '../ui.js';
import * as blindView from './listen/blind.js';
import * as differenceView from './listen/difference.js';

export const TAB = 'listen';
const START_VOLUME_DB = -24;

/** The hooks the listening parts share: the player, the rendition, refresh, events. */
function makeContext() {
  const hooks = { rendition: [], refresh: [], reset: [] };
  return {
    hooks,
    player: () => null,
    rendition: () => null,
    refresh: () => {},
    blindActive: () => false,
    onRendition: (fn) => hooks.rendition.push(fn),
    onRefresh: (fn) => hooks.refresh.push(fn),
    onReset: (fn) => hooks.reset.push(fn),
  };
}

export function init(root, state) {
  let player = null;
  let rendition = null;
  let madeFor = null;          // what the design rendition was made from: {recording, fs_out, spec}
  const ctx = makeContext();
  ctx.player = () => player;
  ctx.rendition = () => rendition;

  // ---------------------------------------------------------------- controls

  const fromConversion = el('input', { type: 'radio', name: 'listen_source', id: 'listen-from-conversion', value: 'conversion' });
  const fromDesign = el('input', { type: 'radio', name: 'listen_source', id: 'listen-from-design', value: 'design', checked: true });
  const conversionLabel = el('label', { for: 'listen-from-conversion' }, 'the finished conversion');
  const start = el('input', { type: 'number', name: 'start_s', id: 'listen-start', min: 0, step: 'any', value: 0 });
  const length = el('input', { type: 'number', name: 'length_s', id: 'listen-length', min: 0.5, max: 60, step: 'any', value: 10 });
  const prepare = el('button', { type: 'button', id: 'listen-prepare' }, 'Prepare renditions');
  const prepStatus = el('p', { class: 'status', id: 'listen-status', 'aria-live': 'polite' });
  const staleNote = el('p', { class: 'stale', id: 'listen-stale', hidden: true });
  const device = el('p', { class: 'hint', id: 'listen-device' });
  const cards = el('div', { class: 'listen-grid', id: 'renditions' });

  const playBtn = el('button', { type: 'button', class: 'play', id: 'listen-play', disabled: true, 'aria-keyshortcuts': 'Space' }, 'Play');
  const sel = {};
  for (const [key, label] of [['A', 'A'], ['B', 'B'], ['X', 'X'], ['D', 'Difference']]) {
    sel[key] = el('button', {
      type: 'button', id: `listen-${key.toLowerCase()}`, 'aria-pressed': key === 'A' ? 'true' : 'false',
      disabled: true, 'aria-keyshortcuts': key, title: `${label} (key ${key})`,
    }, label);
  }
  const playhead = el('output', { class: 'playhead', id: 'playhead', 'aria-live': 'off', for: 'listen-play' }, '0.000 s');
  const nowPlaying = el('p', { class: 'hint', id: 'now-playing', 'aria-live': 'polite' });
  const seek = el('input', { type: 'range', id: 'listen-seek', min: 0, max: 1000, step: 1, value: 0, 'aria-label': 'playhead position', disabled: true });
  const loopBox = el('input', { type: 'checkbox', id: 'listen-loop', name: 'loop' });
  const loopStart = el('input', { type: 'number', id: 'listen-loop-start', name: 'loop_start_s', min: 0, step: 'any', value: 0, 'aria-label': 'loop start, s' });
  const loopEnd = el('input', { type: 'number', id: 'listen-loop-end', name: 'loop_end_s', min: 0, step: 'any', value: 10 });
  const volume = el('input', { type: 'range', id: 'listen-volume', min: -60, max: 0, step: 1, value: START_VOLUME_DB, 'aria-describedby': 'listen-volume-value' });
  const volumeValue = el('output', { id: 'listen-volume-value', for: 'listen-volume' }, fmt.db(START_VOLUME_DB, 0));
  const blindRoot = el('section', { class: 'blind', 'aria-labelledby': 'blind-h' });
  const diffRoot = el('section', { class: 'blind', 'aria-labelledby': 'diff-h' });

  fill(root,
    el('div', { class: 'view-head' }, el('h2', { id: 'listen-h' }, 'Listening')),
    el('p', { class: 'caution' }, el('strong', {}, 'Playback starts quiet. '),
      `Volume begins at ${fmt.db(START_VOLUME_DB, 0)}; raise it slowly, and keep your system volume moderate.`),
    el('fieldset', {},
      el('legend', {}, 'What to listen to'),
      el('div', { class: 'inline' },
        fromDesign, el('label', { for: 'listen-from-design' }, 'the current design, converting the excerpt now'),
        fromConversion, conversionLabel),
      el('div', { class: 'inline' },
        el('label', { for: 'listen-start' }, 'Excerpt from'),
        el('span', { class: 'with-unit' }, start, el('span', { class: 'unit' }, 's')),
        el('label', { for: 'listen-length' }, 'lasting'),
        el('span', { class: 'with-unit' }, length, el('span', { class: 'unit' }, 's')),
        prepare),
      errorSlot('start_s'), errorSlot('length_s'), errorSlot('rate_hz'), errorSlot('conversion_id'),
      prepStatus, staleNote, device),
    cards,
    el('div', { class: 'transport' },
      playBtn,
      el('div', { class: 'switch', role: 'group', 'aria-label': 'what plays' }, sel.A, sel.B, sel.X, sel.D),
      playhead),
    seek,
    nowPlaying,
    el('div', { class: 'listen-grid' },
      el('div', {},
        el('label', { for: 'listen-volume' }, 'Volume'),
        el('div', { class: 'with-unit' }, volume, volumeValue)),
      el('div', {},
        el('div', { class: 'inline' }, loopBox, el('label', { for: 'listen-loop' }, 'Loop from'),
          el('span', { class: 'with-unit' }, loopStart, el('span', { class: 'unit' }, 's')),
          el('label', { for: 'listen-loop-end' }, 'to'),
          el('span', { class: 'with-unit' }, loopEnd, el('span', { class: 'unit' }, 's'))),
        errorSlot('loop'))),
    blindRoot,
    diffRoot,
    errorSlot('*'));

  blindView.init(blindRoot, state, ctx);
  differenceView.init(diffRoot, state, ctx);

  // ---------------------------------------------------------------- the excerpt (shared state)

  function excerptFromInputs() {
    const e = state.get('excerpt') || { start_s: 0, length_s: 10 };
    const s = numberOf(start);
    const l = numberOf(length);
    state.set({ excerpt: { start_s: Number.isFinite(s) ? s : e.start_s, length_s: Number.isFinite(l) ? l : e.length_s } });
  }
  start.addEventListener('change', excerptFromInputs);
  length.addEventListener('change', excerptFromInputs);
  state.on('excerpt', (s) => {
    const e = s.excerpt;
    if (!e) return;
    if (document.activeElement !== start) start.value = String(e.start_s);
    if (document.activeElement !== length) length.value = String(e.length_s);
    markStale(s);
  });

  // ---------------------------------------------------------------- helpers

  function ensurePlayer() {
    if (!player) {
      player = new Player();
      player.onchange = refresh;
      player.setVolumeDb(Number(volume.value));
      device.textContent = `This device plays at ${fmt.rate(player.deviceRate)} (the browser's audio rate); renditions are prepared at that rate so the browser does not resample them.`;
    }
    return player;
  }

  function usable(c, rec) {
    return c && c.status === 'done' && rec && c.recording_id === rec.id;
  }

  function refreshSource() {
    const c = state.get('conversion');
    const rec = state.get('recording');
    const ok = usable(c, rec);
    fromConversion.disabled = !ok;
    conversionLabel.textContent = ok ? `the finished conversion (${c.download_name})` : 'the finished conversion (none yet)';
    if (ok && !rendition) fromConversion.checked = true;
    if (!ok && fromConversion.checked) fromDesign.checked = true;
    if (rec && document.activeElement !== length) length.max = Math.min(60, rec.duration_s);
  }

  /** Renditions made from a design the controls no longer describe are marked. */
  function markStale(s) {
    let why = '';
    if (rendition && madeFor && s.route) {
      const spec = currentSpec(s);
      if (madeFor.fs_out !== s.route.fs_out) why = `target ${fmt.rate(madeFor.fs_out)}`;
      else if (JSON.stringify(madeFor.spec) !== JSON.stringify(spec)) why = 'another mask';
    }
    const e = s.excerpt;
    if (rendition && e && (Math.abs(rendition.start_s - e.start_s) > 1e-3 || Math.abs(rendition.length_s - e.length_s) > 1e-3)) {
      why = why ? `${why} and another excerpt` : 'another excerpt';
    }
    staleNote.hidden = !why;
    staleNote.textContent = why ? `These renditions were prepared for ${why}; press “Prepare renditions” to hear the current settings.` : '';
    for (const card of cards.querySelectorAll('.rendition')) card.classList.toggle('stale', !!why);
    root.dataset.renditionsStale = String(!!why);
  }

  function rateLine(kind, r, wav) {
    const dev = player.deviceRate;
    const made = kind === 'original' ? 'Recorded at' : 'Converted to';
    const prepared = r.resampled_for_playback
      ? `, brought to ${fmt.rate(rendition.rate_hz)} for playback by Rateferry's own converter (${rendition.playback_preset ? rendition.playback_preset.replace(/_/g, ' ') : 'archival'} preset)`
      : ', played at that rate as it is';
    const browser = wav.rate === dev
      ? `Plays at ${fmt.rate(wav.rate)}: the browser does not resample it.`
      : `Plays at ${fmt.rate(dev)}: the browser resamples it from ${fmt.rate(wav.rate)}, so its converter is heard too.`;
    return [`${made} ${fmt.rate(r.source_rate_hz)}${prepared}.`, browser];
  }

  function renderCards(wavs) {
    const r = rendition;
    const lm = r.level_match;
    const unit = lm.unit || 'LUFS';
    const card = (title, kind, figs, lines) => el('article', { class: 'rendition', dataset: { kind } },
      el('h4', {}, title), ...lines.map((t) => el('p', { class: 'hint' }, t)), facts(figs, 'facts compact'));
    const [oa, ob] = rateLine('original', r.original, wavs.A);
    const [ca, cb] = rateLine('converted', r.converted, wavs.B);
    const align = r.alignment.text ? `${r.alignment.text.charAt(0).toUpperCase()}${r.alignment.text.slice(1).replace(/\.$/, '')}.` : '';
    fill(cards,
      card('A · original', 'original', [
        ['Playback rate', fmt.rate(wavs.A.rate)],
        ['Level', `${fmt.lufs(r.original.integrated_lufs)}, gain ${fmt.db(r.original.gain_db, 2)}`],
      ], [oa, ob]),
      card('B · converted', 'converted', [
        ['Playback rate', fmt.rate(wavs.B.rate)],
        ['Level', `${fmt.lufs(r.converted.integrated_lufs)}, gain ${fmt.db(r.converted.gain_db, 2)}`],
        ['Taken from', r.converted.from_output_file ? 'the converted file' : 'the excerpt, converted now'],
      ], [ca, cb]),
      card('Matching', 'matching', [
        ['Excerpt', `${fmt.seconds(r.start_s, 3)} to ${fmt.seconds(r.start_s + r.length_s, 3)} (${fmt.frames(r.frames)})`],
        ['Level match', lm.method === 'none' ? 'none (silent excerpt)' : `${lm.method === 'integrated_loudness' ? 'integrated loudness' : 'RMS'} to ${fmt.db(lm.target, 1, unit)}`],
        ['Time alignment', `${fmt.ms(r.alignment.shift_ms, 3)} shift`],
        ['Difference', `${fmt.db(r.difference.level_db)} re original, peak ${fmt.dbfs(r.difference.peak_dbfs)}`],
      ], [align]));
  }

  function refresh() {
    const p = player;
    const loaded = p && p.loaded;
    const blind = ctx.blindActive();
    playBtn.disabled = !loaded;
    seek.disabled = !loaded;
    playBtn.textContent = p && p.playing ? 'Pause' : 'Play';
    playBtn.setAttribute('aria-label', p && p.playing ? 'Pause (space)' : 'Play (space)');
    sel.A.disabled = sel.B.disabled = !loaded;
    sel.X.disabled = !loaded || !blind;
    sel.D.disabled = !loaded || blind || !(p && p.buffers.D);
    for (const [key, b] of Object.entries(sel)) b.setAttribute('aria-pressed', String(!!p && p.selected === key));
    for (const fn of ctx.hooks.refresh) fn(p);
    if (p) {
      const what = { A: 'A, the original', B: 'B, the converted audio', X: 'X (A or B, hidden)', D: 'the difference' }[p.selected];
      nowPlaying.textContent = `${p.playing ? 'Playing' : 'Paused on'} ${what}${p.selected === 'D' ? `, boosted ${fmt.db(p.diffGainDb, 0)}` : ''}.`;
      if (p.lastSwitch) {
        playhead.dataset.switchedTo = p.lastSwitch.to;
        playhead.dataset.switchedAt = p.lastSwitch.at_s.toFixed(4);
      }
      playhead.dataset.starts = String(p.starts);
    }
    tick();
  }
  ctx.refresh = refresh;

  let raf = 0;
  function tick() {
    cancelAnimationFrame(raf);
    if (!player) return;
    const pos = player.position();
    playhead.textContent = `${pos.toFixed(3)} s / ${player.duration.toFixed(3)} s`;
    playhead.dataset.seconds = pos.toFixed(4);
    playhead.dataset.playing = String(player.playing);
    if (document.activeElement !== seek && player.duration > 0) seek.value = String(Math.round((1000 * pos) / player.duration));
    if (player.playing) raf = requestAnimationFrame(tick);
  }

  // ---------------------------------------------------------------- renditions

  let controller = null;
  async function prepareRenditions() {
    clearErrors(root);
    excerptFromInputs();
    const s = state.get();
    const rec = s.recording;
    if (!rec) return;
    const p = ensurePlayer();
    if (controller) controller.abort();
    controller = new AbortController();
    const e = s.excerpt || { start_s: 0, length_s: 10 };
    const body = { start_s: e.start_s, length_s: e.length_s, rate_hz: p.deviceRate };
    const fromFile = fromConversion.checked && usable(s.conversion, rec);
    if (fromFile) {
      body.conversion_id = s.conversion.id;
    } else if (s.route) {
      Object.assign(body, { recording_id: rec.id, fs_out: s.route.fs_out, preset: s.route.preset, spec: s.route.spec });
    }
    prepare.disabled = true;
    prepStatus.textContent = `Preparing the excerpt at ${fmt.rate(p.deviceRate)}…`;
    try {
      const r = await api.rendition(body, controller.signal);
      const [a, b, d] = await Promise.all(['original', 'converted', 'difference'].map((k) => api.bytes(r[k].url, controller.signal)));
      const wavs = { A: parseWav(a), B: parseWav(b), D: parseWav(d) };
      if (!wavs.A || !wavs.B) throw new Error('the renditions are not WAV files this page can read');
      rendition = r;
      rendition.key = r.conversion_id ? null : blindView.stableKey({ recording_id: rec.id, fs_out: s.design && s.design.fs_out, spec: s.design && s.design.spec });
      madeFor = fromFile ? null : { fs_out: s.route.fs_out, spec: currentSpec(s) };
      p.load(wavs);
      p.select('A');
      renderCards(wavs);
      loopStart.value = '0';
      loopEnd.value = p.duration.toFixed(3);
      loopStart.max = loopEnd.max = p.duration.toFixed(3);
      for (const fn of ctx.hooks.rendition) fn(rendition, p);
      prepStatus.textContent = `Ready: ${fmt.seconds(r.length_s, 2)} from ${fmt.seconds(r.start_s, 3)}${r.conversion_id ? ' of the converted file' : ', converted with the current design'}. Press space to play.`;
      root.dataset.rendition = r.id;
      markStale(state.get());
    } catch (err) {
      if (err && err.name === 'AbortError') return;
      prepStatus.textContent = '';
      showError(root, err);
    } finally {
      prepare.disabled = false;
      refresh();
    }
  }

  // ---------------------------------------------------------------- transport

  function choose(key) {
    if (!player || !player.loaded) return;
    if (key === 'X' && !ctx.blindActive()) return;
    if (key === 'D' && (ctx.blindActive() || !player.buffers.D)) return;
    player.select(key);
  }

  playBtn.addEventListener('click', () => player && player.toggle());
  for (const [key, b] of Object.entries(sel)) b.addEventListener('click', () => choose(key));
  seek.addEventListener('change', () => player && player.seek((Number(seek.value) / 1000) * player.duration));
  volume.addEventListener('input', () => {
    const v = Number(volume.value);
    volumeValue.textContent = fmt.db(v, 0);
    if (player) player.setVolumeDb(v);
  });
  const loopChanged = () => {
    if (!player) return;
    const a = numberOf(loopStart) ?? 0;
    const b = numberOf(loopEnd) ?? player.duration;
    clearErrors(root);
    if (loopBox.checked && !(b - a >= 0.05)) {
      showError(root, { field: 'loop', message: `the loop must end at least 0.05 s after it starts; got ${fmt.seconds(a, 3)} to ${fmt.seconds(b, 3)}` });
      return;
    }
    player.setLoop(loopBox.checked, a, b);
  };
  for (const c of [loopBox, loopStart, loopEnd]) c.addEventListener('change', loopChanged);

  document.addEventListener('keydown', (e) => {
    if (e.defaultPrevented || e.ctrlKey || e.metaKey || e.altKey || typingTarget(e.target)) return;
    if (!player || !player.loaded) return;
    const k = e.key.toLowerCase();
    if (e.key === ' ' || e.code === 'Space') {
      e.preventDefault();
      if (!e.repeat) player.toggle();
    } else if (k === 'a' || k === 'b' || k === 'x' || k === 'd') {
      e.preventDefault();
      choose(k.toUpperCase());
    }
  });
  // A focused button would also "click" on the space key-up: space belongs to play/pause.
  document.addEventListener('keyup', (e) => {
    if ((e.key === ' ' || e.code === 'Space') && player && player.loaded && !typingTarget(e.target)) e.preventDefault();
  });

  // ---------------------------------------------------------------- state

  state.on(['conversion', 'recording'], refreshSource);
  state.on(['route', 'options'], markStale);
  let recordingId = null;
  state.on('recording', (s) => {
    const id = s.recording ? s.recording.id : null;
    if (id === recordingId) return;          // the same recording with fresh figures
    recordingId = id;
    if (player) player.stop();
    rendition = null;
    madeFor = null;
    for (const fn of ctx.hooks.reset) fn();
    cards.replaceChildren();
    markStale(s);
    prepStatus.textContent = 'Choose an excerpt (or click the overview) and press “Prepare renditions” to listen.';
    if (player) player.load({});
    refresh();
  });
  state.on('activeTab', (s) => {
    if (s.activeTab === TAB) ensurePlayer();
  });
  prepare.addEventListener('click', prepareRenditions);
  refreshSource();
}
