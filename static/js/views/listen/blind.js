// Blind trials: X is A or B at random; the listener says which. A running score with its
// one-sided binomial p-value, or (on request) every answer hidden until the end. Results go to
// the conversion's design sheet.

import * as api from '../../api.js';
import * as fmt from '../../format.js';
import { el, fill, showError } from '../../ui.js';

/** One-sided binomial tail: P(at least `correct` right of `trials` by guessing, p = 1/2). */
export function binomialTail(correct, trials) {
  if (trials <= 0) return 1;
  const lnC = (n, k) => lnFactorial(n) - lnFactorial(k) - lnFactorial(n - k);
  let sum = 0;
  for (let k = correct; k <= trials; k++) sum += Math.exp(lnC(trials, k) - trials * Math.LN2);
  return Math.min(1, sum);
}

function lnFactorial(n) {
  let s = 0;
  for (let i = 2; i <= n; i++) s += Math.log(i);
  return s;
}

function randomAB() {
  const a = new Uint8Array(1);
  crypto.getRandomValues(a);
  return a[0] & 1 ? 'A' : 'B';
}

export function stableKey(obj) {
  if (obj === null || typeof obj !== 'object') return JSON.stringify(obj);
  return `{${Object.keys(obj).sort().map((k) => `${JSON.stringify(k)}:${stableKey(obj[k])}`).join(',')}}`;
}

export function init(root, state, ctx) {
  let blind = null;          // {total, hidden, answers: [{x, answer}], x}
  const pending = [];        // results waiting for a conversion of the same route

  const trials = el('select', { id: 'blind-count', name: 'blind_trials' });
  const hide = el('input', { type: 'checkbox', id: 'blind-hide', name: 'blind_hide' });
  const blindStart = el('button', { type: 'button', id: 'blind-start', disabled: true }, 'Start a blind trial');
  const blindStop = el('button', { type: 'button', id: 'blind-stop', class: 'secondary', hidden: true }, 'Finish now');
  const answerA = el('button', { type: 'button', id: 'blind-answer-a', hidden: true }, 'X is A');
  const answerB = el('button', { type: 'button', id: 'blind-answer-b', hidden: true }, 'X is B');
  const blindTitle = el('p', { id: 'blind-trial', 'aria-live': 'polite' });
  const score = el('p', { class: 'score', id: 'blind-score', 'aria-live': 'polite' });
  const blindNote = el('p', { class: 'hint', id: 'blind-note', 'aria-live': 'polite' });
  const trialList = el('ol', { class: 'trials', id: 'blind-list' });

  fill(root,
    el('h3', { id: 'blind-h' }, 'Blind trial'),
    el('p', { class: 'hint' }, 'A is the original, B the converted audio. In each trial X is A or B at random; listen to all three as often as you like (keys A, B, X) and say which one X is. The p-value is the chance of scoring at least this well by guessing.'),
    el('div', { class: 'buttons' }, trials,
      el('span', { class: 'inline' }, hide, el('label', { for: 'blind-hide' }, 'Hide the answers until the end')),
      blindStart, answerA, answerB, blindStop),
    blindTitle, score, blindNote, trialList);

  state.on('options', (s) => {
    const o = s.options;
    if (!o) return;
    trials.replaceChildren(...o.blind_trial_counts.map((n) => el('option', { value: n, selected: n === o.blind_trial_default }, `${n} trials`)));
  });

  const right = (answers) => answers.filter((a) => a.x === a.answer).length;

  function showScore(final = false) {
    const n = blind ? blind.answers.length : 0;
    const k = blind ? right(blind.answers) : 0;
    const p = binomialTail(k, n);
    if (blind && blind.hidden && !final) {
      score.textContent = n ? `${n} of ${blind.total} answered; the answers show at the end` : 'No answers yet';
      delete score.dataset.correct;
      delete score.dataset.pValue;
      score.dataset.answered = String(n);
      return;
    }
    score.textContent = n ? `${k} of ${n} right · p = ${fmt.pvalue(p)}` : 'No answers yet';
    score.dataset.correct = String(k);
    score.dataset.answered = String(n);
    score.dataset.pValue = String(p);
  }

  function listItem(item) {
    return el('li', {}, `X was ${item.x}; you said ${item.answer}: ${item.x === item.answer ? 'right' : 'wrong'}`);
  }

  function nextX() {
    blind.x = randomAB();
    ctx.player().setX(blind.x);
  }

  function start() {
    const player = ctx.player();
    if (!player || !player.loaded) return;
    blind = { total: Number(trials.value), hidden: hide.checked, answers: [], x: null };
    nextX();
    trialList.replaceChildren();
    blindNote.textContent = '';
    answerA.hidden = answerB.hidden = blindStop.hidden = false;
    hide.disabled = trials.disabled = true;
    blindTitle.textContent = `Trial 1 of ${blind.total}: is X A or B?`;
    showScore();
    if (player.selected === 'D') player.select('A');
    ctx.refresh();
  }

  function answer(choice) {
    if (!blind) return;
    const item = { x: blind.x, answer: choice };
    blind.answers.push(item);
    const i = blind.answers.length;
    if (!blind.hidden) trialList.append(listItem(item));
    showScore();
    if (i >= blind.total) {
      end(true);
      return;
    }
    nextX();
    blindTitle.textContent = `Trial ${i + 1} of ${blind.total}: is X A or B?`;
  }

  async function end(save) {
    const done = blind;
    if (done && done.hidden) {
      trialList.replaceChildren(...done.answers.map(listItem));   // every answer, now
    }
    if (done) showScore(true);
    blind = null;
    answerA.hidden = answerB.hidden = blindStop.hidden = true;
    hide.disabled = trials.disabled = false;
    const player = ctx.player();
    if (player && player.selected === 'X') player.select('A');
    ctx.refresh();
    if (!done || !save || !done.answers.length) {
      blindTitle.textContent = done ? 'Blind trial stopped.' : '';
      return;
    }
    // the score line above says how it went; the title only says that it is over
    blindTitle.textContent = `Finished after ${done.answers.length} trial${done.answers.length === 1 ? '' : 's'}.`;
    const result = { trials: done.answers.length, correct: right(done.answers), answers: done.answers };
    const r = ctx.rendition();
    if (r && r.conversion_id) {
      await post(r.conversion_id, result);
    } else {
      pending.push({ key: r && r.key, result });
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

  blindStart.addEventListener('click', start);
  blindStop.addEventListener('click', () => end(true));
  answerA.addEventListener('click', () => answer('A'));
  answerB.addEventListener('click', () => answer('B'));

  ctx.blindActive = () => !!blind;
  ctx.onRefresh((player) => {
    blindStart.disabled = !(player && player.loaded) || !!blind;
  });
  ctx.onRendition(() => { if (blind) end(false); });
  ctx.onReset(() => { if (blind) end(false); });

  state.on('conversion', (s) => {
    const c = s.conversion;
    if (!c || c.status !== 'done' || !pending.length) return;
    const key = stableKey({ recording_id: c.recording_id, fs_out: c.fs_out, spec: c.spec });
    for (let i = pending.length - 1; i >= 0; i--) {
      if (pending[i].key === key) {
        const [item] = pending.splice(i, 1);
        post(c.id, item.result);
      }
    }
  });
}
