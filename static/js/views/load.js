// Load: drop or pick a file, or choose one from the store; the recording's probe figures,
// loudness and true peak.

import * as api from '../api.js';
import { spectraAhead } from '../current.js';
import * as fmt from '../format.js';
import { el, fill, facts, showError, clearErrors, errorSlot } from '../ui.js';

export function init(root, state) {
  const input = el('input', {
    type: 'file', id: 'file-input', name: 'file', class: 'visually-hidden',
    'aria-describedby': 'file-help',
  });
  const drop = el('div', { class: 'drop', id: 'drop-zone' },
    el('p', {}, 'Drop an audio file here, or '),
    el('label', { for: 'file-input', class: 'button secondary' }, 'Choose a file…'),
    input);
  const help = el('p', { class: 'hint', id: 'file-help' }, '');
  const progress = el('progress', { max: 100, value: 0, hidden: true, 'aria-label': 'upload progress' });
  const status = el('p', { class: 'status', 'aria-live': 'polite' });
  const select = el('select', { name: 'recording_id', id: 'recording-select' });
  const remove = el('button', { type: 'button', class: 'link', hidden: true }, 'Remove this upload');
  const figures = el('div', { class: 'figures', id: 'recording-facts' });

  fill(root,
    el('h2', { id: 'load-h' }, 'Recording'),
    drop, help, progress, status, errorSlot('file'),
    el('label', { for: 'recording-select', class: 'field-label' }, 'Recording to work on'),
    select, errorSlot('recording_id'), remove,
    figures,
    errorSlot('*'));

  let upload = null;

  state.on('options', (s) => {
    const o = s.options;
    if (!o) return;
    input.setAttribute('accept', (o.upload_extensions || []).join(','));
    help.textContent = `Accepted: ${(o.upload_extensions || []).join(' ')} · up to ${fmt.bytes(o.max_upload_bytes)}`;
  });

  state.on(['recordings', 'recording'], (s) => {
    const list = s.recordings || [];
    const current = s.recording;
    select.replaceChildren(...list.map((r) => el('option', { value: r.id },
      `${r.name}${r.demo ? ' (demo)' : ''} · ${fmt.rate(r.rate_hz)} · ${fmt.duration(r.duration_s)}`)));
    if (current) select.value = current.id;
    remove.hidden = !current || current.demo;
    renderFacts(current);
  });

  function renderFacts(r) {
    if (!r) {
      fill(figures, el('p', { class: 'hint' }, 'No recording loaded yet.'));
      return;
    }
    const tpWarn = typeof r.true_peak_dbtp === 'number' && r.true_peak_dbtp > -1.0;
    const pending = r.analysis === 'pending';
    const failed = r.analysis === 'failed';
    const meter = (v, f) => (pending ? 'measuring…' : f(v));
    fill(figures, facts([
      ['Sample rate', fmt.rate(r.rate_hz)],
      ['Channels', fmt.channels(r.channels)],
      ['Length', `${fmt.duration(r.duration_s)} (${fmt.frames(r.frames)})`],
      ['Format', `${r.format || fmt.dash} ${r.subtype ? '· ' + r.subtype.replace(/_/g, ' ') : ''}`],
      ['File size', fmt.bytes(r.size_bytes)],
      ['Integrated loudness', meter(r.integrated_lufs, fmt.lufs)],
      ['Loudness range', meter(r.loudness_range_lu, fmt.lu)],
      ['True peak', meter(r.true_peak_dbtp, fmt.dbtp), tpWarn ? 'warn' : ''],
      ['Sample peak', meter(r.sample_peak_dbfs, fmt.dbfs)],
    ]),
    pending ? el('p', { class: 'hint' }, 'A long file: loudness and true peak are being measured in the background; you can work on it meanwhile.') : null,
    failed ? el('p', { class: 'field-error' }, (r.analysis_error && r.analysis_error.message) || 'The file could not be measured.') : null,
    r.analysis_note ? el('p', { class: 'hint' }, r.analysis_note) : null,
    tpWarn ? el('p', { class: 'hint warn' }, 'True peak above −1 dBTP: set a ceiling under Delivery if the output must stay below it.') : null,
    r.demo ? el('p', { class: 'hint' }, 'Demo recording: invented signals made for trying the tool.') : null);
  }

  // A long upload is measured in the background: ask again until its figures are in.
  let poll = null;
  state.on('recording', (s) => {
    clearTimeout(poll);
    const r = s.recording;
    if (!r || r.analysis !== 'pending') return;
    poll = setTimeout(async () => {
      try {
        const fresh = await api.recording(r.id);
        const now = state.get('recording');
        if (now && now.id === r.id) {
          const recordings = (state.get('recordings') || []).map((x) => (x.id === r.id ? fresh : x));
          state.set({ recordings, recording: fresh });
        }
      } catch (err) {
        showError(root, err, 'recording_id');
      }
    }, 500);
  });

  select.addEventListener('change', async () => {
    clearErrors(root);
    const id = select.value;
    const known = (state.get('recordings') || []).find((r) => r.id === id);
    if (known) state.set({ recording: known });
    try {
      const fresh = await api.recording(id);
      if (state.get('recording') && state.get('recording').id === id) state.set({ recording: fresh });
    } catch (err) {
      showError(root, err, 'recording_id');
    }
  });

  remove.addEventListener('click', async () => {
    const r = state.get('recording');
    if (!r || r.demo) return;
    clearErrors(root);
    try {
      await api.deleteRecording(r.id);
      const { recordings } = await api.recordings();
      state.set({ recordings, recording: recordings[0] || null });
    } catch (err) {
      showError(root, err, 'recording_id');
    }
  });

  function start(file) {
    if (!file) return;
    clearErrors(root);
    const o = state.get('options');
    if (o && o.max_upload_bytes && file.size > o.max_upload_bytes) {
      showError(root, { field: 'file', message: `${file.name} is ${fmt.bytes(file.size)}; the limit is ${fmt.bytes(o.max_upload_bytes)}` });
      return;
    }
    if (upload) upload.abort();
    progress.hidden = false;
    progress.value = 0;
    status.textContent = `Uploading ${file.name} (${fmt.bytes(file.size)})…`;
    const t0 = performance.now();
    // the overview's width and the spectra's route go with the file: the server draws the one
    // and computes the other while it measures
    const columns = state.get('overviewColumns');
    const spectra = spectraAhead(state.get());
    upload = api.uploadRecording(file, (p) => {
      const pct = p.total ? (100 * p.sent) / p.total : 0;
      progress.value = pct;
      if (p.analysing) {
        status.textContent = `Uploaded ${fmt.bytes(file.size)}; measuring loudness and true peak…`;
      } else {
        const elapsed = (performance.now() - t0) / 1000;
        const eta = p.sent > 0 ? elapsed * (p.total - p.sent) / p.sent : NaN;
        status.textContent = `Uploading ${file.name}: ${fmt.percent(pct)} · about ${fmt.duration(eta)} left`;
      }
    }, { columns, spectra });
    upload.promise.then((rec) => {
      progress.hidden = true;
      status.textContent = `Loaded ${rec.name}.`;
      // the recording is shown at once (its overview and spectra are asked for now); the
      // server's list follows, after them. The overview asks for the columns drawn with the
      // upload, even if its width moved since.
      const known = (state.get('recordings') || []).filter((r) => r.id !== rec.id);
      state.set({ recordings: [rec, ...known], recording: rec, overviewColumns: columns });
      setTimeout(async () => {
        try {
          const { recordings } = await api.recordings();
          if (recordings.some((r) => r.id === rec.id)) state.set({ recordings });
        } catch (_) {
          // keep the list the page made
        }
      }, 0);
    }).catch((err) => {
      progress.hidden = true;
      status.textContent = '';
      showError(root, err, 'file');
    }).finally(() => {
      upload = null;
      input.value = '';
    });
  }

  input.addEventListener('change', () => start(input.files[0]));
  for (const type of ['dragenter', 'dragover']) {
    drop.addEventListener(type, (e) => {
      e.preventDefault();
      drop.classList.add('over');
    });
  }
  for (const type of ['dragleave', 'drop']) {
    drop.addEventListener(type, () => drop.classList.remove('over'));
  }
  drop.addEventListener('drop', (e) => {
    e.preventDefault();
    const file = e.dataTransfer && e.dataTransfer.files && e.dataTransfer.files[0];
    start(file);
  });
  // Dropping a file anywhere else must not navigate away from the page.
  window.addEventListener('dragover', (e) => e.preventDefault());
  window.addEventListener('drop', (e) => e.preventDefault());
}
