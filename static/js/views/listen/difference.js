// Difference listening: converted minus original, level matched and time aligned, with a boost
// that stays at +0 dB until the hearing caution is acknowledged.

import * as fmt from '../../format.js';
import { el, fill } from '../../ui.js';

const MAX_BOOST_DB = 80;
const CAUTION_DEFAULT = 'Boosting the difference also boosts any sudden loud part; keep the volume low.';

/** "hearing caution: the difference ..." -> "The difference ...": the sentence after the label. */
function sentence(text) {
  const body = String(text || CAUTION_DEFAULT).replace(/^\s*hearing caution\s*[:.]\s*/i, '').trim();
  return body.charAt(0).toUpperCase() + body.slice(1);
}

export function init(root, state, ctx) {
  const diffGain = el('input', { type: 'range', id: 'listen-diff-gain', min: 0, max: 60, step: 1, value: 0, disabled: true, 'aria-describedby': 'listen-diff-value listen-caution' });
  const diffValue = el('output', { id: 'listen-diff-value', for: 'listen-diff-gain' }, '+0 dB');
  const caution = el('p', { class: 'caution', id: 'listen-caution', hidden: true });
  const dialog = el('div', { class: 'dialog', id: 'boost-dialog', role: 'alertdialog', 'aria-labelledby': 'boost-dialog-h', hidden: true });
  let boostAllowed = false;

  fill(root,
    el('h3', { id: 'diff-h' }, 'Difference listening'),
    el('p', { class: 'hint' }, 'The difference is the converted audio minus the original, both level matched and time aligned: what the conversion changed. It is usually very quiet, so a boost is offered.'),
    caution,
    el('label', { for: 'listen-diff-gain' }, 'Boost of the difference'),
    el('div', { class: 'with-unit' }, diffGain, diffValue),
    dialog);

  ctx.onRendition((rendition, player) => {
    const d = rendition.difference;
    const max = Math.max(0, Math.min(MAX_BOOST_DB, Math.floor(d.max_boost_db ?? 0)));
    diffGain.max = String(max);
    diffGain.value = '0';
    diffValue.textContent = '+0 dB';
    player.setDiffGainDb(0);
    boostAllowed = false;
    dialog.hidden = true;
    caution.hidden = false;
    caution.replaceChildren(el('strong', {}, 'Hearing caution. '), `${sentence(d.caution_text)}`,
      ` A boost of up to ${fmt.db(max, 0)} brings its peak to full scale; the page never lets the boosted difference out above −6 dBFS.`);
  });
  ctx.onRefresh((player) => {
    diffGain.disabled = !(player && player.loaded && player.buffers.D) || ctx.blindActive();
  });

  function askForBoost(requested) {
    const r = ctx.rendition();
    fill(dialog,
      el('h4', { id: 'boost-dialog-h' }, 'Before boosting the difference'),
      el('p', {}, sentence(r && r.difference.caution_text)),
      el('p', {}, `You asked for ${fmt.db(requested, 0)}. Turn your system volume down first, then raise it slowly once the difference plays.`),
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
    const player = ctx.player();
    if (player) player.setDiffGainDb(v);
    ctx.refresh();
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
}
