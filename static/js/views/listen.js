// Listening: A/B of the original and the converted audio at the same playhead, a loop region,
// blind trials (X is A or B at random) with a running score and its binomial p-value, and
// difference listening with a gain control behind a hearing caution. Playback starts quiet.

import * as api from '../api.js';
import * as fmt from '../format.js';
import { Player, parseWav } from '../player.js';
import { el, fill, facts, showError, clearErrors, errorSlot, numberOf, typingTarget } from '../ui.js';

export const TAB = 'listen';
const START_VOLUME_DB = -24;
const MAX_BOOST_DB = 80;

/** One-sided binomial tail: P(at least `correct` right of `trials` by guessing, p = 1/2). */
export function binomialTail(correct, trials) {
  if (trials <= 0) return 1;
  // log-space terms keep large trial counts exact enough
  const lnC = (n, k) => lgamma(n + 1) - lgamma(k + 1) - lgamma(n - k + 1);
  let sum = 0;
  for (let k = correct; k <= trials; k++) sum += Math.exp(lnC(trials, k) - trials * Math.LN2);
  return Math.min(1, sum);
}

function lgamma(n) {
  // n is a positive integer here: ln((n-1)!) summed directly
  let s = 0;
  for (let i = 2; i < n; i++) s += Math.log(i);
  return s;
}

function randomAB() {
  const a = new Uint8Array(1);
  crypto.getRandomValues(a);
  return a[0] & 1 ? 'A' : 'B';
}

function stableKey(obj) {
  if (obj === null || typeof obj !== 'object') return JSON.stringify(obj);
  return `{${Object.keys(obj).sort().map((k) => `${JSON.stringify(k)}:${stableKey(obj[k])}`).join(',')}}`;
}

export function init(root, state) {
  let player = null;
  let rendition = null;
  let blind = null;          // {total, answers: [{x, answer}], x}
  const pending = [];        // blind results waiting for a conversion of the same route
  let boostAllowed = false;

  // ---------------------------------------------------------------- controls

  const fromConversion = el('input', { type: 'radio', name: 'listen_source', id: 'listen-from-conversion', value: 'conversion' });
  const fromDesign = el('input', { type: 'radio', name: 'listen_source', id: 'listen-from-design', value: 'design', checked: true });
  const conversionLabel = el('label', { for: 'listen-from-conversion' }, 'the finished conversion');
  const start = el('input', { type: 'number', name: 'start_s', id: 'listen-start', min: 0, step: 'any', value: 0 });
  const length = el('input', { type: 'number', name: 'length_s', id: 'listen-length', min: 0.5, max: 60, step: 'any', value: 10 });
  const prepare = el('button', { type: 'button', id: 'listen-prepare' }, 'Prepare renditions');
  const prepStatus = el('p', { class: 'status', id: 'listen-status', 'aria-live': 'polite' });
  const device = el('p', { class: 'hint', id: 'listen-device' });
  const cards = el('div', { class: 'listen-grid', id: 'renditions' });

  const playBtn = el('button', { type: 'button', class: 'play', id: 'listen-play', disabled: true, 'aria-keyshortcuts': 'Space' }, 'Play');
  const sel = {};
  for (const [key, label, keyHint] of [['A', 'A', 'A'], ['B', 'B', 'B'], ['X', 'X', 'X'], ['D', 'Difference', 'D']]) {
    sel[key] = el('button', {
      type: 'button', id: `listen-${key.toLowerCase()}`, 'aria-pressed': key === 'A' ? 'true' : 'false',
      disabled: true, 'aria-keyshortcuts': keyHint, title: `${label} (key ${keyHint})`,
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

  const diffGain = el('input', { type: 'range', id: 'listen-diff-gain', min: 0, max: 60, step: 1, value: 0, disabled: true, 'aria-describedby': 'listen-diff-value listen-caution' });
  const diffValue = el('output', { id: 'listen-diff-value', for: 'listen-diff-gain' }, '+0 dB');
  const caution = el('p', { class: 'caution', id: 'listen-caution', hidden: true });
  const dialog = el('div', { class: 'dialog', id: 'boost-dialog', role: 'alertdialog', 'aria-labelledby': 'boost-dialog-h', hidden: true });

  const trials = el('select', { id: 'blind-count', name: 'blind_trials' }, ...[6, 8, 10, 12, 16, 20].map((n) => el('option', { value: n, selected: n === 10 }, `${n} trials`)));
  const blindStart = el('button', { type: 'button', id: 'blind-start', disabled: true }, 'Start a blind trial');
  const blindStop = el('button', { type: 'button', id: 'blind-stop', class: 'secondary', hidden: true }, 'Finish now');
  const answerA = el('button', { type: 'button', id: 'blind-answer-a', hidden: true }, 'X is A');
  const answerB = el('button', { type: 'button', id: 'blind-answer-b', hidden: true }, 'X is B');
  const blindTitle = el('p', { class: 'score', id: 'blind-trial', 'aria-live': 'polite' });
  const score = el('p', { class: 'score', id: 'blind-score', 'aria-live': 'polite' });
  const blindNote = el('p', { class: 'hint', id: 'blind-note', 'aria-live': 'polite' });
  const trialList = el('ol', { class: 'trials', id: 'blind-list' });

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
      prepStatus, device),
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
    el('section', { class: 'blind', 'aria-labelledby': 'blind-h' },
      el('h3', { id: 'blind-h' }, 'Blind trial'),
      el('p', { class: 'hint' }, 'A is the original, B the converted audio. In each trial X is A or B at random; listen to all three as often as you like (keys A, B, X) and say which one X is. The p-value is the chance of scoring at least this well by guessing.'),
      el('div', { class: 'buttons' }, trials, blindStart, answerA, answerB, blindStop),
      blindTitle, score, blindNote, trialList),
    el('section', { class: 'blind', 'aria-labelledby': 'diff-h' },
      el('h3', { id: 'diff-h' }, 'Difference listening'),
      el('p', { class: 'hint' }, 'The difference is converted minus original, both level matched and time aligned: what the conversion changed. It is usually very quiet, so a boost is offered.'),
      caution,
      el('label', { for: 'listen-diff-gain' }, 'Boost of the difference'),
      el('div', { class: 'with-unit' }, diffGain, diffValue),
      dialog),
    errorSlot('*'));

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
    if (rec && document.activeElement !== length) {
      length.max = Math.min(60, rec.duration_s);
      if (Number(length.value) > rec.duration_s) length.value = Math.max(0.5, Math.floor(rec.duration_s * 10) / 10);
    }
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
      ], [r.alignment.text ? r.alignment.text[0].toUpperCase() + r.alignment.text.slice(1) + '.' : '']));
  }

  function refresh() {
    const p = player;
    const loaded = p && p.loaded;
    playBtn.disabled = !loaded;
    seek.disabled = !loaded;
    playBtn.textContent = p && p.playing ? 'Pause' : 'Play';
    playBtn.setAttribute('aria-label', p && p.playing ? 'Pause (space)' : 'Play (space)');
    sel.A.disabled = sel.B.disabled = !loaded;
    sel.X.disabled = !loaded || !blind;
    sel.D.disabled = !loaded || !!blind || !(p && p.buffers.D);
    for (const [key, b] of Object.entries(sel)) b.setAttribute('aria-pressed', String(!!p && p.selected === key));
    blindStart.disabled = !loaded || !!blind;
    diffGain.disabled = !loaded || !(p && p.buffers.D);
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
    const s = state.get();
    const rec = s.recording;
    if (!rec) return;
    const p = ensurePlayer();
    if (controller) controller.abort();
    controller = new AbortController();
    const body = { start_s: numberOf(start) ?? 0, length_s: numberOf(length) ?? 10, rate_hz: p.deviceRate };
    if (fromConversion.checked && usable(s.conversion, rec)) {
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
      rendition.key = r.conversion_id ? null : stableKey({ recording_id: rec.id, fs_out: s.design && s.design.fs_out, spec: s.design && s.design.spec });
      if (blind) endBlind(false);
      p.load(wavs);
      p.select('A');
      renderCards(wavs);
      loopStart.value = '0';
      loopEnd.value = p.duration.toFixed(3);
      loopStart.max = loopEnd.max = p.duration.toFixed(3);
      setupDifference();
      prepStatus.textContent = `Ready: ${fmt.seconds(r.length_s, 2)} from ${fmt.seconds(r.start_s, 3)}${r.conversion_id ? ' of the converted file' : ', converted with the current design'}. Press space to play.`;
      root.dataset.rendition = r.id;
    } catch (err) {
      if (err && err.name === 'AbortError') return;
      prepStatus.textContent = '';
      showError(root, err);
    } finally {
      prepare.disabled = false;
      refresh();
    }
  }

  function setupDifference() {
    const d = rendition.difference;
    const max = Math.max(0, Math.min(MAX_BOOST_DB, Math.floor(d.max_boost_db ?? 0)));
    diffGain.max = String(max);
    diffGain.value = '0';
    diffValue.textContent = '+0 dB';
    player.setDiffGainDb(0);
    boostAllowed = false;
    dialog.hidden = true;
    caution.hidden = false;
    const text = d.caution_text || 'Boosting the difference also boosts any sudden loud part; keep the volume low.';
    caution.replaceChildren(el('strong', {}, 'Hearing caution. '), text.replace(/^Hearing caution:\s*/i, ''),
      ` A boost of up to ${fmt.db(max, 0)} brings its peak to full scale; the page never lets the boosted difference out above −6 dBFS.`);
  }

  function askForBoost(requested) {
    fill(dialog,
      el('h4', { id: 'boost-dialog-h' }, 'Before boosting the difference'),
      el('p', {}, rendition && rendition.difference.caution_text ? rendition.difference.caution_text : 'Boosting the difference also boosts any sudden loud part.'),
      el('p', {}, `You asked for ${fmt.db(requested, 0)}. Turn your system volume down first; raise it slowly once the difference plays.`),
      el('div', { class: 'buttons' },
        el('button', {
          type: 'button', id: 'boost-allow',
          onclick: () => {
            boostAllowed = true;
            dialog.hidden = true;
            diffGain.value = String(requested);
            applyBoost();
            diffGain.focus();
          },
        }, 'I have turned it down: allow the boost'),
        el('button', { type: 'button', class: 'secondary', id: 'boost-cancel', onclick: () => { dialog.hidden = true; diffGain.focus(); } }, 'Keep it at +0 dB')));
    dialog.hidden = false;
    dialog.querySelector('#boost-allow').focus();
  }

  function applyBoost() {
    const v = Number(diffGain.value);
    diffValue.textContent = `+${v} dB`;
    if (player) player.setDiffGainDb(v);
    refresh();
  }

  diffGain.addEventListener('input', () => {
    const v = Number(diffGain.value);
    if (v > 0 && !boostAllowed) {
      diffGain.value = '0';
      askForBoost(v);
      return;
    }
    applyBoost();
  });

  // ---------------------------------------------------------------- transport

  function choose(key) {
    if (!player || !player.loaded) return;
    if (key === 'X' && !blind) return;
    if (key === 'D' && (blind || !player.buffers.D)) return;
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

  // ---------------------------------------------------------------- blind trials

  function nextX() {
    blind.x = randomAB();
    player.setX(blind.x);
  }

  function showScore() {
    const n = blind ? blind.answers.length : 0;
    const right = blind ? blind.answers.filter((a) => a.x === a.answer).length : 0;
    const p = binomialTail(right, n);
    score.textContent = n ? `${right} of ${n} right · p = ${fmt.pvalue(p)}` : 'No answers yet';
    score.dataset.correct = String(right);
    score.dataset.answered = String(n);
    score.dataset.pValue = String(p);
    return { n, right, p };
  }

  function startBlind() {
    if (!player || !player.loaded) return;
    blind = { total: Number(trials.value), answers: [], x: null };
    nextX();
    trialList.replaceChildren();
    blindNote.textContent = '';
    answerA.hidden = answerB.hidden = blindStop.hidden = false;
    blindTitle.textContent = `Trial 1 of ${blind.total}: is X A or B?`;
    showScore();
    if (player.selected === 'D') player.select('A');
    refresh();
  }

  function answer(choice) {
    if (!blind) return;
    const item = { x: blind.x, answer: choice };
    blind.answers.push(item);
    const i = blind.answers.length;
    trialList.append(el('li', {}, `X was ${item.x}; you said ${item.answer}: ${item.x === item.answer ? 'right' : 'wrong'}`));
    showScore();
    if (i >= blind.total) {
      endBlind(true);
      return;
    }
    nextX();
    blindTitle.textContent = `Trial ${i + 1} of ${blind.total}: is X A or B?`;
  }

  async function endBlind(save) {
    const done = blind;
    blind = null;
    answerA.hidden = answerB.hidden = blindStop.hidden = true;
    if (player && player.selected === 'X') player.select('A');
    refresh();
    if (!done || !save || !done.answers.length) {
      blindTitle.textContent = done ? 'Blind trial stopped.' : '';
      return;
    }
    const right = done.answers.filter((a) => a.x === a.answer).length;
    const result = { trials: done.answers.length, correct: right, answers: done.answers };
    blindTitle.textContent = `Finished: ${right} of ${result.trials} right, p = ${fmt.pvalue(binomialTail(right, result.trials))}.`;
    if (rendition && rendition.conversion_id) {
      await post(rendition.conversion_id, result);
    } else {
      pending.push({ key: rendition && rendition.key, result });
      blindNote.textContent = 'Kept on this page: the results go to the design sheet of the next conversion of this same route and mask.';
    }
  }

  async function post(conversionId, result) {
    try {
      const saved = await api.postBlindTrials(conversionId, result);
      blindNote.textContent = `Saved with the conversion for its design sheet (p = ${fmt.pvalue(saved.p_value)} as the server computes it).`;
      blindNote.dataset.saved = saved.id;
    } catch (err) {
      showError(root, err);
    }
  }

  blindStart.addEventListener('click', startBlind);
  blindStop.addEventListener('click', () => endBlind(true));
  answerA.addEventListener('click', () => answer('A'));
  answerB.addEventListener('click', () => answer('B'));

  // ---------------------------------------------------------------- state

  state.on(['conversion', 'recording'], (s, keys) => {
    refreshSource();
    const c = s.conversion;
    if (keys.includes('conversion') && c && c.status === 'done' && pending.length) {
      const key = stableKey({ recording_id: c.recording_id, fs_out: c.fs_out, spec: c.spec });
      for (let i = pending.length - 1; i >= 0; i--) {
        if (pending[i].key === key) {
          const [item] = pending.splice(i, 1);
          post(c.id, item.result);
        }
      }
    }
  });
  let recordingId = null;
  state.on('recording', (s) => {
    const id = s.recording ? s.recording.id : null;
    if (id === recordingId) return;          // the same recording with fresh figures
    recordingId = id;
    if (player) player.stop();
    rendition = null;
    if (blind) endBlind(false);
    cards.replaceChildren();
    prepStatus.textContent = 'Choose an excerpt and press “Prepare renditions” to listen.';
    if (player) player.load({});
    refresh();
  });
  state.on('activeTab', (s) => {
    if (s.activeTab === TAB) ensurePlayer();
  });
  prepare.addEventListener('click', prepareRenditions);
  refreshSource();
}
