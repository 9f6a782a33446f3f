// Batch: pick or drop several files (or a folder), convert them all with the current route,
// mask and delivery. Each file is uploaded, then the batch is queued on the server's worker
// pool; the panel shows each file's state and progress, cancels, and offers every output as one
// zip. Earlier batches stay listed with their zip.

import * as api from '../api.js';
import * as fmt from '../format.js';
import { el, fill, showError, clearErrors, errorSlot } from '../ui.js';

const POLL_MS = 500;

const nFiles = (n) => `${fmt.grouped(n)} file${n === 1 ? '' : 's'}`;

function stateText(c) {
  if (!c) return 'waiting';
  if (c.status === 'running' && c.progress) return `converting ${fmt.percent(c.progress.percent)}`;
  if (c.status === 'queued') return 'queued';
  return c.status;
}

export function init(root, state) {
  const input = el('input', { type: 'file', id: 'batch-files', name: 'batch_files', multiple: true, class: 'visually-hidden' });
  const folder = el('input', { type: 'file', id: 'batch-folder', name: 'batch_folder', webkitdirectory: true, class: 'visually-hidden' });
  const drop = el('div', { class: 'drop', id: 'batch-drop' },
    el('p', {}, 'Drop several files here, or '),
    el('label', { for: 'batch-files', class: 'button secondary' }, 'Choose files…'), input, ' ',
    el('label', { for: 'batch-folder', class: 'button secondary' }, 'Choose a folder…'), folder);
  const startBtn = el('button', { type: 'button', id: 'batch-start', disabled: true }, 'Convert all');
  const cancelBtn = el('button', { type: 'button', id: 'batch-cancel', class: 'danger', hidden: true }, 'Cancel the batch');
  const clearBtn = el('button', { type: 'button', id: 'batch-clear', class: 'link', hidden: true }, 'Clear the list');
  const summary = el('p', { class: 'hint', id: 'batch-summary' });
  const progress = el('progress', { id: 'batch-progress', max: 100, value: 0, hidden: true, 'aria-label': 'batch progress' });
  const status = el('p', { class: 'status', id: 'batch-status', 'aria-live': 'polite' });
  const table = el('table', { class: 'batch-table', id: 'batch-table', hidden: true });
  const downloads = el('div', { class: 'downloads', id: 'batch-downloads' });
  const earlier = el('ul', { class: 'history-list', id: 'batch-history' });

  fill(root,
    el('h2', { id: 'batch-h' }, 'Batch: many files, one design'),
    el('p', { class: 'hint' }, 'Every file is converted with the route, mask and delivery chosen above; each source rate gets its own design, shared by its files.'),
    drop, summary,
    el('div', { class: 'buttons' }, startBtn, cancelBtn, clearBtn),
    progress, status, errorSlot('recording_ids'), errorSlot('file'), errorSlot('*'),
    table, downloads,
    el('h3', {}, 'Earlier batches'), earlier);

  let files = [];        // {file, upload: {sent,total}|null, recording, error}
  let batch = null;      // the server's batch
  let uploads = [];      // running upload handles
  let stopped = false;
  let timer = null;

  const busy = () => uploads.length > 0 || (batch && batch.status === 'running');

  function settings() {
    const s = state.get();
    return s.route ? `${fmt.rate(s.route.fs_out)} · ${s.route.preset} · ${String(s.format).toUpperCase()}` : '';
  }

  function render() {
    startBtn.disabled = !files.length || busy() || !state.get('route');
    cancelBtn.hidden = !busy();
    clearBtn.hidden = !files.length || busy();
    summary.textContent = files.length
      ? `${nFiles(files.length)} (${fmt.bytes(files.reduce((n, f) => n + f.file.size, 0))}) → ${settings()}`
      : 'No files chosen yet.';
    table.hidden = !files.length;
    const members = batch ? batch.conversions : [];
    fill(table,
      el('thead', {}, el('tr', {}, ...['File', 'State', 'Progress', 'Output'].map((h) => el('th', { scope: 'col' }, h)))),
      el('tbody', {}, ...files.map((f, i) => {
        const c = members[i];
        let text = 'waiting';
        let pct = 0;
        if (f.error) text = `failed: ${f.error}`;
        else if (c) { text = stateText(c); pct = c.status === 'done' ? 100 : (c.progress && c.progress.percent) || 0; }
        else if (f.recording) text = 'uploaded';
        else if (f.upload) { text = `uploading ${fmt.percent(f.upload.total ? 100 * f.upload.sent / f.upload.total : 0)}`; }
        const err = c && c.error ? c.error.message : '';
        return el('tr', { dataset: { status: c ? c.status : (f.error ? 'failed' : 'waiting') } },
          el('td', { class: 'name', title: f.file.name }, f.file.webkitRelativePath || f.file.name),
          el('td', { class: `status-${c ? c.status : ''}` }, text, err ? el('div', { class: 'hint' }, err) : null),
          el('td', {}, el('progress', { max: 100, value: pct, 'aria-label': `progress of ${f.file.name}` })),
          el('td', {}, c && c.status === 'done' && c.urls.download
            ? el('a', { href: c.urls.download, download: c.download_name }, c.download_name) : (c ? c.download_name : '')));
      })));
    if (batch) {
      const p = batch.progress;
      progress.hidden = false;
      progress.value = p.percent;
      fill(downloads, batch.urls && batch.urls.zip
        ? el('a', { class: 'button', id: 'batch-zip', href: batch.urls.zip, download: '' }, `All converted files (zip, ${nFiles(p.files_done)})`)
        : null);
    } else {
      fill(downloads);
    }
  }

  function choose(list) {
    if (busy()) return;
    const o = state.get('options') || {};
    const known = (o.upload_extensions || []).map((e) => e.toLowerCase());
    const picked = [...list].filter((f) => !known.length || known.some((e) => f.name.toLowerCase().endsWith(e)));
    clearErrors(root);
    if (!picked.length) {
      showError(root, { field: 'file', message: 'none of those files is audio this tool reads' });
      return;
    }
    files = picked.map((file) => ({ file, upload: null, recording: null, error: null }));
    batch = null;
    progress.hidden = true;
    status.textContent = '';
    render();
  }

  async function uploadAll() {
    for (const f of files) {
      if (stopped) return false;
      if (f.recording) continue;
      const handle = api.uploadRecording(f.file, (p) => { f.upload = p; render(); });
      uploads = [handle];
      try {
        f.recording = await handle.promise;
      } catch (err) {
        f.error = err.message;
        showError(root, err, 'file');
        return false;
      } finally {
        uploads = [];
      }
      render();
    }
    return true;
  }

  async function poll() {
    if (!batch) return;
    try {
      batch = await api.batch(batch.id);
    } catch (err) {
      showError(root, err);
      return;
    }
    render();
    if (batch.status === 'running') {
      const p = batch.progress;
      status.textContent = `Converting: ${p.files_done} of ${p.files_total} files done · ${fmt.percent(p.percent)} of the audio`;
      timer = setTimeout(poll, POLL_MS);
      return;
    }
    const c = batch.counts;
    status.textContent = batch.status === 'done' ? `Done: ${nFiles(c.done || 0)} converted.`
      : `Finished: ${c.done || 0} done, ${c.failed || 0} failed, ${c.cancelled || 0} cancelled.`;
    state.set({ conversionsStale: Date.now() });
    loadEarlier();
  }

  startBtn.addEventListener('click', async () => {
    clearErrors(root);
    const s = state.get();
    if (!s.route || !files.length) return;
    stopped = false;
    for (const f of files) f.error = null;
    status.textContent = 'Uploading…';
    render();
    if (!(await uploadAll())) {
      status.textContent = stopped ? 'Cancelled before the conversions started.' : 'An upload failed; nothing was converted.';
      render();
      return;
    }
    try {
      const { recordings } = await api.recordings();
      state.set({ recordings });
    } catch (_) { /* the list refreshes later */ }
    try {
      batch = await api.startBatch({
        recording_ids: files.map((f) => f.recording.id), fs_out: s.route.fs_out, preset: s.route.preset,
        spec: s.route.spec, format: s.format, delivery: s.delivery,
      });
    } catch (err) {
      status.textContent = '';
      showError(root, err);
      render();
      return;
    }
    render();
    poll();
  });

  cancelBtn.addEventListener('click', async () => {
    stopped = true;
    for (const u of uploads) u.abort();
    if (batch && batch.status === 'running') {
      try {
        batch = await api.cancelBatch(batch.id);
        status.textContent = 'Cancelling: running files stop at their next block.';
      } catch (err) {
        showError(root, err);
      }
    }
    render();
  });

  clearBtn.addEventListener('click', () => {
    files = [];
    batch = null;
    clearTimeout(timer);
    progress.hidden = true;
    status.textContent = '';
    render();
  });

  async function loadEarlier() {
    try {
      const { batches } = await api.batches();
      if (!batches.length) {
        fill(earlier, el('li', { class: 'hint' }, 'No batches yet.'));
        return;
      }
      fill(earlier, ...batches.map((b) => el('li', { dataset: { id: b.id, status: b.status } },
        el('span', { class: 'name' }, `${nFiles(b.progress.files_total)} → ${fmt.rate(b.fs_out)} ${String(b.format).toUpperCase()}`),
        el('span', { class: `status-${b.status === 'finished' ? 'failed' : b.status}` }, `${b.status} · ${b.counts.done || 0} done`),
        el('span', {}, fmt.when(new Date(b.created * 1000).toISOString())),
        el('span', { class: 'links' }, b.urls.zip ? el('a', { href: b.urls.zip, download: '' }, 'zip') : ''))));
    } catch (err) {
      showError(root, err);
    }
  }

  input.addEventListener('change', () => { choose(input.files); input.value = ''; });
  folder.addEventListener('change', () => { choose(folder.files); folder.value = ''; });
  for (const type of ['dragenter', 'dragover']) {
    drop.addEventListener(type, (e) => { e.preventDefault(); drop.classList.add('over'); });
  }
  for (const type of ['dragleave', 'drop']) drop.addEventListener(type, () => drop.classList.remove('over'));
  drop.addEventListener('drop', (e) => {
    e.preventDefault();
    if (e.dataTransfer && e.dataTransfer.files) choose(e.dataTransfer.files);
  });
  state.on(['route', 'format', 'delivery'], render);

  render();
  loadEarlier();
}
