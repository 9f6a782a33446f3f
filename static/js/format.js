// Numbers with their units, the same way everywhere on the page.
// A missing or non-finite value shows as an en dash, never as "NaN" or "null".

const DASH = '\u2013';
const MINUS = '\u2212';
const THIN = '\u202f';           // narrow no-break space: thousands separator and before units

function ok(v) {
  return typeof v === 'number' && Number.isFinite(v);
}

function signed(text) {
  if (!text.startsWith('-')) return text;
  // "-0.00" is zero: no sign
  return Number(text) === 0 ? text.slice(1) : MINUS + text.slice(1);
}

/** Group thousands with a narrow space: 441000 -> "441 000". */
export function grouped(n, digits = 0) {
  if (!ok(n)) return DASH;
  const fixed = Math.abs(n).toFixed(digits);
  const [int, frac] = fixed.split('.');
  const g = int.replace(/\B(?=(\d{3})+(?!\d))/g, THIN);
  const sign = n < 0 && Number(fixed) !== 0 ? MINUS : '';
  return sign + g + (frac ? '.' + frac : '');
}

/** A plain number with up to `digits` significant decimals, minus sign typographic. */
export function num(n, digits = 2) {
  if (!ok(n)) return DASH;
  return signed(String(Number(n.toFixed(digits))));
}

/** A rate: 44100 -> "44.1 kHz", 8000 -> "8 kHz", 7056000 -> "7.056 MHz". */
export function rate(hz) {
  if (!ok(hz)) return DASH;
  if (hz >= 1e6) return `${num(hz / 1e6, 4)}${THIN}MHz`;
  if (hz >= 1000) return `${num(hz / 1000, 4)}${THIN}kHz`;
  return `${num(hz, 2)}${THIN}Hz`;
}

/** A frequency edge, exact to the hertz: 19845 -> "19 845 Hz". */
export function hz(v, digits = 0) {
  if (!ok(v)) return DASH;
  return `${grouped(v, digits)}${THIN}Hz`;
}

export function db(v, digits = 1, unit = 'dB') {
  if (!ok(v)) return DASH;
  return `${signed(v.toFixed(digits))}${THIN}${unit}`;
}

/** A small ripple figure keeps enough decimals to be read: 0.0061 -> "0.0061 dB". */
export function ripple(v) {
  if (!ok(v)) return DASH;
  const a = Math.abs(v);
  const digits = a >= 0.1 ? 2 : a >= 0.01 ? 3 : a >= 0.001 ? 4 : 5;
  return `${signed(v.toFixed(digits))}${THIN}dB`;
}

export function lufs(v) { return db(v, 1, 'LUFS'); }
export function lu(v) { return db(v, 1, 'LU'); }
export function dbtp(v) { return db(v, 1, 'dBTP'); }
export function dbfs(v) { return db(v, 1, 'dBFS'); }

export function ms(v, digits = 2) {
  if (!ok(v)) return DASH;
  return `${signed(v.toFixed(digits))}${THIN}ms`;
}

export function seconds(v, digits = 1) {
  if (!ok(v)) return DASH;
  return `${signed(v.toFixed(digits))}${THIN}s`;
}

/** A duration for people: 75.2 -> "1 min 15 s", 3.4 -> "3.4 s". */
export function duration(v) {
  if (!ok(v)) return DASH;
  if (v < 60) return `${v.toFixed(1)}${THIN}s`;
  const h = Math.floor(v / 3600);
  const m = Math.floor((v % 3600) / 60);
  const s = Math.round(v % 60);
  return h ? `${h}${THIN}h ${m}${THIN}min ${s}${THIN}s` : `${m}${THIN}min ${s}${THIN}s`;
}

export function bytes(n) {
  if (!ok(n)) return DASH;
  if (n >= 1e9) return `${num(n / 1e9, 2)}${THIN}GB`;
  if (n >= 1e6) return `${num(n / 1e6, 1)}${THIN}MB`;
  if (n >= 1e3) return `${num(n / 1e3, 0)}${THIN}kB`;
  return `${n}${THIN}B`;
}

export function percent(v, digits = 0) {
  if (!ok(v)) return DASH;
  return `${v.toFixed(digits)}${THIN}%`;
}

export function frames(n) {
  if (!ok(n)) return DASH;
  return `${grouped(n)} frames`;
}

export function count(n, word) {
  if (!ok(n)) return DASH;
  return `${grouped(n)} ${word}`;
}

/** A p-value: 0.0384 -> "0.038", 0.00001 -> "< 0.0001". */
export function pvalue(p) {
  if (!ok(p)) return DASH;
  if (p < 1e-4) return '< 0.0001';
  if (p < 0.01) return p.toFixed(4);
  return p.toFixed(3);
}

export function channels(n) {
  if (!ok(n)) return DASH;
  if (n === 1) return '1 (mono)';
  if (n === 2) return '2 (stereo)';
  return String(n);
}

export function when(iso) {
  if (!iso) return DASH;
  const d = new Date(iso);
  if (Number.isNaN(d.getTime())) return String(iso);
  return d.toLocaleString(undefined, { dateStyle: 'medium', timeStyle: 'short' });
}

export const dash = DASH;
