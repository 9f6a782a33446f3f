// DOM helpers shared by the views. Text from the server always goes in as text nodes.

/**
 * Build an element: el('p', {class: 'note'}, 'text', child).
 * Attribute keys starting with "on" attach listeners; `dataset` takes an object; strings become
 * text nodes (never parsed as markup).
 */
export function el(tag, attrs = {}, ...children) {
  const node = document.createElement(tag);
  for (const [key, value] of Object.entries(attrs || {})) {
    if (value === undefined || value === null || value === false) continue;
    if (key.startsWith('on') && typeof value === 'function') {
      node.addEventListener(key.slice(2), value);
    } else if (key === 'dataset') {
      Object.assign(node.dataset, value);
    } else if (key === 'class') {
      node.className = value;
    } else if (value === true) {
      node.setAttribute(key, '');
    } else {
      node.setAttribute(key, String(value));
    }
  }
  append(node, children);
  return node;
}

function append(node, children) {
  for (const child of children.flat()) {
    if (child === undefined || child === null || child === false) continue;
    node.append(child instanceof Node ? child : document.createTextNode(String(child)));
  }
}

/** Replace the children of `node`. */
export function fill(node, ...children) {
  node.replaceChildren();
  append(node, children);
  return node;
}

/** A definition list of [term, value] pairs (values are text or nodes). */
export function facts(pairs, cls = 'facts') {
  const dl = el('dl', { class: cls });
  for (const [term, value, extra] of pairs) {
    dl.append(el('div', { class: 'fact' + (extra ? ' ' + extra : '') }, el('dt', {}, term), el('dd', {}, value)));
  }
  return dl;
}

/**
 * Show an error next to the control that caused it: the element
 * `[data-error-for="<field>"]` inside `root`, else the view's general slot
 * `[data-error-for="*"]`. The control itself is marked aria-invalid.
 */
export function showError(root, err, fallbackField = '*') {
  const field = (err && err.field) || fallbackField;
  const message = (err && err.message) || String(err);
  let slot = root.querySelector(`[data-error-for="${cssEscape(field)}"]`);
  if (!slot) slot = root.querySelector('[data-error-for="*"]');
  if (!slot) {
    console.error(message);
    return null;
  }
  slot.textContent = message;
  slot.hidden = false;
  const control = root.querySelector(`[name="${cssEscape(field)}"]`);
  if (control) control.setAttribute('aria-invalid', 'true');
  return slot;
}

export function clearErrors(root) {
  for (const slot of root.querySelectorAll('[data-error-for]')) {
    slot.textContent = '';
    slot.hidden = true;
  }
  for (const c of root.querySelectorAll('[aria-invalid="true"]')) c.removeAttribute('aria-invalid');
}

function cssEscape(s) {
  return window.CSS && CSS.escape ? CSS.escape(s) : String(s).replace(/"/g, '\\"');
}

/** An error slot to put beside a control. */
export function errorSlot(field) {
  return el('p', { class: 'field-error', role: 'alert', hidden: true, dataset: { errorFor: field } });
}

export function debounce(fn, waitMs) {
  let timer = null;
  const debounced = (...args) => {
    clearTimeout(timer);
    timer = setTimeout(() => fn(...args), waitMs);
  };
  debounced.cancel = () => clearTimeout(timer);
  debounced.now = (...args) => {
    clearTimeout(timer);
    fn(...args);
  };
  return debounced;
}

/** Numeric value of an input, or null when it is empty (NaN when it is not a number). */
export function numberOf(input) {
  const raw = input.value.trim();
  if (raw === '') return null;
  return Number(raw);
}

/** True when keyboard shortcuts must leave the key to the focused control. */
export function typingTarget(target) {
  if (!target || !target.tagName) return false;
  const tag = target.tagName.toLowerCase();
  if (tag === 'textarea' || tag === 'select' || target.isContentEditable) return true;
  if (tag === 'input') {
    const type = (target.type || 'text').toLowerCase();
    return !['button', 'checkbox', 'radio', 'range', 'submit', 'reset', 'file'].includes(type);
  }
  return false;
}
