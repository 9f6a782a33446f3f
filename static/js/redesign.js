// The live redesign: each edit of the route or mask asks the server for the order estimate
// first; an extreme design (the server's limits, e.g. more than 100 000 taps) waits for the
// user's word in `designEstimate`, anything else is designed at once. The next edit abandons a
// running redesign (its request is aborted), and so does `designStop`. The estimate (a few
// milliseconds at the server) is asked for at the edit itself, so it is in by the time the
// short pause after the last edit is over and the design starts.

import * as api from './api.js';
import { debounce } from './ui.js';

function keyOf(body) {
  return JSON.stringify([body.recording_id, body.fs_out, body.preset, Object.entries(body.spec).sort()]);
}

/** What a design depends on (the recording only through its rate). */
function designKeyOf(body, fsIn) {
  return JSON.stringify([fsIn, body.fs_out, body.preset, Object.entries(body.spec).sort()]);
}

function bodyOf(s) {
  const rec = s.recording;
  const route = s.route;
  if (!rec || !route || !s.options) return null;
  return { recording_id: rec.id, fs_out: route.fs_out, preset: route.preset, spec: route.spec };
}

export function start(state) {
  let seq = 0;
  let controller = null;
  let allowed = null;            // the key of the extreme design the user chose to run
  let estimating = null;         // { key, promise, controller } of the latest estimate asked for

  function abandon() {
    if (controller) controller.abort();
    controller = null;
    seq += 1;
  }

  /** The estimate for `body`: the one already asked for when it is for the same design. */
  function estimateFor(body) {
    const key = keyOf(body);
    if (estimating && estimating.key === key) return estimating.promise;
    if (estimating) estimating.controller.abort();
    const ask = new AbortController();
    const promise = api.estimate(body, ask.signal);
    // a failure reaches the redesign that waits for it (if any) and is not kept for the next
    promise.catch(() => {
      if (estimating && estimating.promise === promise) estimating = null;
    });
    estimating = { key, promise, controller: ask };
    return promise;
  }

  function forgetEstimate() {
    if (estimating) estimating.controller.abort();
    estimating = null;
  }

  async function redesign() {
    const body = bodyOf(state.get());
    if (!body) return;
    abandon();
    controller = new AbortController();
    const { signal } = controller;
    const mine = seq;
    const key = keyOf(body);
    state.set({ designBusy: true, designEstimate: null, designNote: null });
    try {
      if (key !== allowed) {
        const est = await estimateFor(body);
        if (mine !== seq) return;
        if (est.extreme) {
          state.set({ designBusy: false, designEstimate: { ...est, key } });
          return;
        }
      }
      // plans: false keeps live edits fast; the plans follow once the controls rest
      const d = await api.design({ ...body, plans: false }, signal);
      if (mine !== seq) return;
      shownKey = designKeyOf(body, d.fs_in);
      state.set({ design: d, designError: null, designBusy: false, plans: null });
      plansSoon(d.id);
    } catch (err) {
      if (err && err.name === 'AbortError') return;
      if (mine !== seq) return;
      state.set({ designError: err, designBusy: false });
    }
  }

  let plansController = null;
  const plansSoon = debounce(async (designId) => {
    if (plansController) plansController.abort();
    plansController = new AbortController();
    try {
      const r = await api.designPlans(designId, plansController.signal);
      const d = state.get('design');
      if (d && d.id === designId) state.set({ plans: { design_id: designId, ...r.plans } });
    } catch (err) {
      if (err && err.name === 'AbortError') return;
      const d = state.get('design');
      if (d && d.id === designId) state.set({ plans: { design_id: designId, single: null, options: [], error: { message: err.message } } });
    }
  }, 600);

  // the pause after an edit before designing: short enough that the plots follow the last edit
  // well within a quarter of a second, longer than the 30-40 ms between the repeats of a held
  // key (a design still in flight is aborted by the next one, but the server finishes it)
  const soon = debounce(redesign, 40);
  let designedFor = null;        // a refresh of the same recording's figures is no reason to redesign
  // the key of the design shown; another recording at the same rate has that very design (its
  // id included), so it keeps it rather than asking for it again
  let shownKey = null;
  const stillShown = (s) => {
    const body = bodyOf(s);
    return Boolean(body && s.design && !s.designError && !s.designBusy && !s.designEstimate
      && shownKey === designKeyOf(body, s.recording.rate_hz));
  };
  state.on(['route', 'recording'], (s, keys) => {
    if (keys.includes('recording')) {
      const id = s.recording ? s.recording.id : null;
      if (id === designedFor && !keys.includes('route')) return;
      designedFor = id;
      if (!keys.includes('route') && stillShown(s)) return;
      soon.now();
    } else {
      if (state.get('designBusy')) abandon();   // the next edit abandons the running redesign
      const body = bodyOf(s);
      if (body && keyOf(body) !== allowed) estimateFor(body);   // in during the pause
      soon();
    }
  });
  state.on('designConfirm', (s) => {
    if (!s.designConfirm || !s.designEstimate) return;
    allowed = s.designEstimate.key;
    soon.now();
  });
  state.on('designStop', (s) => {
    if (!s.designStop) return;
    abandon();
    forgetEstimate();
    soon.cancel();
    state.set({ designBusy: false, designEstimate: null, designNote: 'Redesign stopped: the plots show the last design. Edit the mask to design again.' });
  });
}
