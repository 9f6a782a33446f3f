// History: earlier conversions from the store, newest first, with their downloads; opening one
// brings back every setting that made it (current.js restore); the running one shows the same
// progress as the status line (both read state.conversion); clearing old files.

import * as api from '../api.js';
import * as fmt from '../format.js';
import { restore } from '../current.js';
import { el, fill, showError, clearErrors, errorSlot } from '../ui.js';

const FINAL = ['done', 'failed', 'cancelled'];

function when(value) {
  if (typeof value === 'number') return fmt.when(new Date(value < 1e11 ? value * 1000 : value).toISOString());
  return fmt.when(value);
}

export function init(root, state) {
  const list = el('ul', { class: 'history-list', id: 'history-list' });
  const days = el('input', { type: 'number', name: 'older_than_days', id: 'clear-days', min: 0, step: 'any', value: 7 });
  const clearBtn = el('button', { type: 'button', class: 'secondary', id: 'clear-old' }, 'Clear old files');
  const clearStatus = el('span', { class: 'hint', 'aria-live': 'polite' });
  const filterBox = el('input', { type: 'checkbox', id: 'history-this', checked: true });

  fill(root,
    el('div', { class: 'view-head' },
      el('h2', { id: 'history-h' }, 'Conversions'),
      el('div', { class: 'inline' }, filterBox, el('label', { for: 'history-this' }, 'this recording only')),
      el('div', { class: 'inline' },
        el('label', { for: 'clear-days' }, 'Remove uploads, outputs and renditions older than'),
        el('span', { class: 'with-unit' }, days, el('span', { class: 'unit' }, 'days')),
        clearBtn, clearStatus)),
    errorSlot('older_than_days'), errorSlot('*'),
    list);

  async function reload() {
    try {
      const { conversions } = await api.conversions();
      state.set({ conversions });
    } catch (err) {
      showError(root, err);
    }
  }

  function render(s) {
    const rec = s.recording;
    const live = s.conversion;
    const rows = (s.conversions || [])
      .map((c) => (live && live.id === c.id ? { ...c, ...live } : c))
      .filter((c) => !filterBox.checked || !rec || c.recording_id === rec.id);
    if (!rows.length) {
      fill(list, el('li', { class: 'hint' }, filterBox.checked ? 'No conversions of this recording yet.' : 'No conversions yet.'));
      return;
    }
    fill(list, ...rows.map((c) => {
      const u = c.urls || {};
      const bits = c.delivery && c.delivery.bits ? ` · ${c.delivery.bits}${/f$/.test(c.delivery.bits) ? '' : '-bit'}` : '';
      const linksBox = el('span', { class: 'links' });
      if (c.status === 'done') {
        linksBox.append(
          el('a', { href: u.download, download: c.download_name }, 'file'),
          el('a', { href: u.sheet, download: '' }, 'sheet'),
          el('a', { href: u.recipe, download: '' }, 'recipe'));
      }
      const pick = el('button', {
        type: 'button', class: 'link', 'aria-label': `open ${c.download_name} with its settings`,
        onclick: () => open(c.id),
      }, 'open');
      linksBox.append(pick);
      return el('li', { dataset: { id: c.id, status: c.status, percent: String(Math.round((c.progress && c.progress.percent) || 0)) } },
        el('span', { class: 'name', title: c.download_name }, c.download_name),
        el('span', {}, `${fmt.rate(c.fs_in)} → ${fmt.rate(c.fs_out)} · ${String(c.format).toUpperCase()}${bits}`),
        el('span', { class: `status-${c.status}` },
          c.status === 'running' && c.progress ? `running ${fmt.percent(c.progress.percent, 0)}` : c.status,
          ' · ', when(c.finished || c.created)),
        linksBox);
    }));
  }

  async function open(id) {
    clearErrors(root);
    try {
      await restore(state, await api.conversion(id));
    } catch (err) {
      showError(root, err);
    }
  }

  state.on(['conversions', 'recording', 'conversion'], render);
  filterBox.addEventListener('change', () => render(state.get()));
  state.on('conversionsStale', reload);
  state.on('conversion', (s) => {
    const c = s.conversion;
    if (!c) return;
    const known = (s.conversions || []).find((x) => x.id === c.id);
    if (!known || (known.status !== c.status && FINAL.includes(c.status))) reload();
  });

  clearBtn.addEventListener('click', async () => {
    clearErrors(root);
    const n = Number(days.value);
    try {
      const r = await api.clearOld(Number.isFinite(n) && days.value !== '' ? n : days.value);
      clearStatus.textContent = `Removed ${fmt.grouped(r.removed_files)} file${r.removed_files === 1 ? '' : 's'}.`;
      reload();
    } catch (err) {
      showError(root, err, 'older_than_days');
    }
  });

  reload();
}
