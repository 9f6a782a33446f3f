// The page's entry: read the server's config, build the store, start every view, load the demo.

import * as api from './api.js';
import { createStore } from './state.js';
import * as topbar from './views/topbar.js';
import * as load from './views/load.js';
import * as route from './views/route.js';
import * as convert from './views/convert.js';
import * as spectra from './views/spectra.js';
import * as filter from './views/filter.js';
import * as audit from './views/audit.js';
import * as listen from './views/listen.js';
import * as history from './views/history.js';
import * as timebase from './views/timebase.js';
import * as batch from './views/batch.js';

const TABS = ['spectra', 'filter', 'audit', 'listen', 'timebase'];

function fatal(message) {
  const node = document.getElementById('app-status');
  node.textContent = message;
  node.hidden = false;
}

function setupTabs(state) {
  const tabs = [...document.querySelectorAll('[role="tab"]')];
  const panels = [...document.querySelectorAll('[role="tabpanel"]')];
  const show = (name) => {
    for (const t of tabs) {
      const on = t.dataset.tab === name;
      t.setAttribute('aria-selected', String(on));
      t.tabIndex = on ? 0 : -1;
    }
    for (const p of panels) p.hidden = p.dataset.tab !== name;
    state.set({ activeTab: name });
  };
  for (const t of tabs) {
    t.addEventListener('click', () => show(t.dataset.tab));
    t.addEventListener('keydown', (e) => {
      if (e.key !== 'ArrowRight' && e.key !== 'ArrowLeft') return;
      const i = TABS.indexOf(t.dataset.tab);
      const next = TABS[(i + (e.key === 'ArrowRight' ? 1 : TABS.length - 1)) % TABS.length];
      show(next);
      document.getElementById(`tab-${next}`).focus();
      e.preventDefault();
    });
  }
  show(state.get('activeTab'));
}

function defaultTarget(rateHz) {
  return rateHz === 48000 ? 44100 : 48000;
}

async function boot() {
  let config;
  try {
    config = api.readConfig();
  } catch (err) {
    fatal(err.message);
    return;
  }
  api.configure(config);
  const state = createStore({
    config,
    options: null,
    recordings: [],
    recording: null,
    route: null,
    design: null,
    designError: null,
    designBusy: false,
    plans: null,
    spectra: null,
    delivery: { bits: '24', dither: 'tpdf', dither_seed: 0, ceiling_dbtp: null, loudness_lufs: null },
    format: 'flac',
    conversion: null,
    conversions: [],
    activeTab: 'spectra',
  });
  window.rateferry = { state };   // for the console and the browser tests: read-only use

  topbar.init(document.getElementById('topbar'), state);
  load.init(document.getElementById('load-view'), state);
  route.init(document.getElementById('route-view'), state);
  convert.init(document.getElementById('convert-view'), state);
  spectra.init(document.getElementById('panel-spectra'), state);
  filter.init(document.getElementById('panel-filter'), state);
  audit.init(document.getElementById('panel-audit'), state);
  listen.init(document.getElementById('panel-listen'), state);
  timebase.init(document.getElementById('panel-timebase'), state);
  history.init(document.getElementById('history-view'), state);
  batch.init(document.getElementById('batch-view'), state);
  setupTabs(state);

  // A new recording keeps the route unless it would convert to its own rate.
  state.on('recording', (s) => {
    const r = s.route;
    if (s.recording && r && r.fs_out === s.recording.rate_hz) {
      state.set({ route: { ...r, fs_out: defaultTarget(s.recording.rate_hz) } });
    }
  });

  try {
    const [options, list] = await Promise.all([api.options(), api.recordings()]);
    state.set({ options });
    const recordings = list.recordings || [];
    const first = recordings.find((r) => r.id === config.demo_recording_id) || recordings[0] || null;
    state.set({
      route: { fs_out: defaultTarget(first ? first.rate_hz : 44100), preset: options.default_preset, spec: {} },
      recordings,
    });
    state.set({ recording: first });
    document.body.dataset.ready = 'true';
  } catch (err) {
    fatal(`The page could not start: ${err.message}`);
  }
}

boot();
