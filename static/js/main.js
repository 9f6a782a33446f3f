// The page's entry: read the server's config, build the store from the server's options (and
// this browser's last-used settings), start every view, load the demo.

import * as api from './api.js';
import * as plots from './plots.js';
import * as settings from './settings.js';
import * as redesign from './redesign.js';
import { createStore } from './state.js';
import * as topbar from './views/topbar.js';
import * as load from './views/load.js';
import * as route from './views/route.js';
import * as verdict from './views/verdict.js';
import * as action from './views/action.js';
import * as result from './views/result.js';
import * as overview from './views/overview.js';
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

/** The first of the server's default targets that differs from the recording's rate. */
function defaultTarget(options, rateHz) {
  return options.default_targets_hz.find((r) => r !== rateHz) || options.default_targets_hz[0];
}

/** The delivery a preset starts with: the server's default, with the preset's word length. */
function presetDelivery(options, presetName) {
  const bits = options.presets[presetName] && options.presets[presetName].bits;
  return { ...options.default_delivery, ...(bits ? { bits } : {}) };
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
    designEstimate: null,
    plans: null,
    spectra: null,
    delivery: null,
    format: null,
    excerpt: { start_s: 0, length_s: 10 },
    conversion: null,
    conversions: [],
    notice: '',
    activeTab: 'spectra',
  });
  window.rateferry = { state };   // for the console and the browser tests: read-only use

  topbar.init(document.getElementById('topbar'), state);
  load.init(document.getElementById('load-view'), state);
  route.init(document.getElementById('route-view'), state);
  verdict.init(document.getElementById('verdict-view'), state);
  action.init(document.getElementById('action-view'), state);
  overview.init(document.getElementById('overview-view'), state);
  spectra.init(document.getElementById('panel-spectra'), state);
  filter.init(document.getElementById('panel-filter'), state);
  audit.init(document.getElementById('panel-audit'), state);
  listen.init(document.getElementById('panel-listen'), state);
  result.init(document.getElementById('result-view'), state);
  timebase.init(document.getElementById('panel-timebase'), state);
  history.init(document.getElementById('history-view'), state);
  redesign.start(state);
  batch.init(document.getElementById('batch-view'), state);
  setupTabs(state);

  // A new recording keeps the route unless it would convert to its own rate.
  state.on('recording', (s) => {
    const r = s.route;
    if (s.recording && r && r.fs_out === s.recording.rate_hz) {
      state.set({ route: { ...r, fs_out: defaultTarget(s.options, s.recording.rate_hz) } });
    }
  });

  try {
    const [options, list] = await Promise.all([api.options(), api.recordings()]);
    plots.setPalette(options.palette);
    const recordings = list.recordings || [];
    const saved = settings.load(options);
    const first = recordings.find((r) => saved && r.id === saved.recording_id)
      || recordings.find((r) => r.id === config.demo_recording_id) || recordings[0] || null;
    const presetName = saved && saved.route ? saved.route.preset : options.default_preset;
    state.set({ options, format: (saved && saved.format) || options.default_format });
    state.set({
      route: (saved && saved.route) || { fs_out: defaultTarget(options, first ? first.rate_hz : 44100), preset: presetName, spec: {} },
      delivery: (saved && saved.delivery) || presetDelivery(options, presetName),
      excerpt: (saved && saved.excerpt) || { start_s: 0, length_s: 10 },
      recordings,
      notice: saved ? 'Your last settings in this browser are back: route, mask, delivery and listening excerpt.' : '',
    });
    state.set({ recording: first });
    settings.remember(state);
    document.body.dataset.ready = 'true';
  } catch (err) {
    fatal(`The page could not start: ${err.message}`);
  }
}

boot();
