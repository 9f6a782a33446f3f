// A small state store: one plain object, shallow updates, listeners per key.
// Views read with get(), write with set(), and react with on(keys, fn).

export function createStore(initial = {}) {
  const state = { ...initial };
  const listeners = new Map();   // key -> Set of functions
  let queue = null;              // keys changed during one set() burst

  function notify(keys) {
    const called = new Set();
    for (const key of keys) {
      const fns = listeners.get(key);
      if (!fns) continue;
      for (const fn of [...fns]) {
        if (called.has(fn)) continue;
        called.add(fn);
        try {
          fn(state, keys);
        } catch (err) {
          console.error('state listener failed', err);
        }
      }
    }
  }

  return {
    get(key) {
      return key === undefined ? state : state[key];
    },
    set(patch) {
      const changed = [];
      for (const [key, value] of Object.entries(patch)) {
        if (state[key] !== value) {
          state[key] = value;
          changed.push(key);
        }
      }
      if (!changed.length) return;
      if (queue) {                // a listener set more keys: fold them into the burst
        changed.forEach((k) => queue.add(k));
        return;
      }
      queue = new Set(changed);
      try {
        while (queue.size) {
          const keys = [...queue];
          queue.clear();
          notify(keys);
        }
      } finally {
        queue = null;
      }
    },
    on(keys, fn) {
      const list = Array.isArray(keys) ? keys : [keys];
      for (const key of list) {
        if (!listeners.has(key)) listeners.set(key, new Set());
        listeners.get(key).add(fn);
      }
      return () => list.forEach((key) => listeners.get(key)?.delete(fn));
    },
  };
}
