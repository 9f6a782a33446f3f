// Sample-locked A/B playback with Web Audio. All renditions start together at the same offset,
// each through its own gain; switching ramps the gains over a few milliseconds, so the playhead
// never moves and the switch does not click.

const FADE_S = 0.005;       // crossfade length
const SAFETY_CEILING = 0.5; // boosted difference never leaves the page above -6 dBFS

/** Parse a PCM (16/24/32-bit integer) or IEEE float (32/64-bit) WAV into planar Float32Arrays. */
export function parseWav(bytes) {
  const view = new DataView(bytes);
  const tag = (o) => String.fromCharCode(view.getUint8(o), view.getUint8(o + 1), view.getUint8(o + 2), view.getUint8(o + 3));
  if (bytes.byteLength < 12 || (tag(0) !== 'RIFF' && tag(0) !== 'RF64') || tag(8) !== 'WAVE') return null;
  let offset = 12;
  let fmt = null;
  let data = null;
  while (offset + 8 <= bytes.byteLength) {
    const id = tag(offset);
    let size = view.getUint32(offset + 4, true);
    const body = offset + 8;
    if (id === 'fmt ') {
      let format = view.getUint16(body, true);
      const channels = view.getUint16(body + 2, true);
      const rate = view.getUint32(body + 4, true);
      const bits = view.getUint16(body + 14, true);
      if (format === 0xfffe && size >= 40) format = view.getUint16(body + 24, true);
      fmt = { format, channels, rate, bits };
    } else if (id === 'data') {
      if (size === 0xffffffff || body + size > bytes.byteLength) size = bytes.byteLength - body;
      data = { offset: body, size };
      break;
    }
    offset = body + size + (size & 1);
  }
  if (!fmt || !data) return null;
  const { format, channels, rate, bits } = fmt;
  const width = bits / 8;
  const frames = Math.floor(data.size / (width * channels));
  const out = Array.from({ length: channels }, () => new Float32Array(frames));
  let p = data.offset;
  for (let i = 0; i < frames; i++) {
    for (let c = 0; c < channels; c++) {
      let v;
      if (format === 3 && bits === 32) v = view.getFloat32(p, true);
      else if (format === 3 && bits === 64) v = view.getFloat64(p, true);
      else if (format === 1 && bits === 16) v = view.getInt16(p, true) / 32768;
      else if (format === 1 && bits === 24) {
        const b = view.getUint8(p) | (view.getUint8(p + 1) << 8) | (view.getInt8(p + 2) << 16);
        v = b / 8388608;
      } else if (format === 1 && bits === 32) v = view.getInt32(p, true) / 2147483648;
      else return null;
      out[c][i] = v;
      p += width;
    }
  }
  return { rate, channels, frames, data: out };
}

function dbToGain(db) {
  return Math.pow(10, db / 20);
}

export class Player {
  constructor() {
    const Ctx = window.AudioContext || window.webkitAudioContext;
    this.ctx = new Ctx({ latencyHint: 'interactive' });
    this.master = this.ctx.createGain();
    this.master.connect(this.ctx.destination);
    this.buffers = {};
    this.gains = {};
    this.sources = [];
    this.selected = 'A';
    this.route = { A: 'A', B: 'B', D: 'D' };   // what each button plays (X maps in blind trials)
    this.playing = false;
    this.offset = 0;          // position when paused, s
    this.startedAt = 0;       // ctx time of the last start
    this.startOffset = 0;
    this.loop = { on: false, start: 0, end: 0 };
    this.volumeDb = -24;
    this.diffGainDb = 0;
    this.starts = 0;
    this.lastSwitch = null;
    this.onchange = null;
    this.master.gain.value = dbToGain(this.volumeDb);
    // The difference path: its own boost, then a hard ceiling as a last safeguard.
    this.diffBoost = this.ctx.createGain();
    this.ceiling = this.ctx.createWaveShaper();
    const n = 4097;
    const curve = new Float32Array(n);
    for (let i = 0; i < n; i++) {
      const x = (i / (n - 1)) * 2 - 1;
      curve[i] = Math.max(-SAFETY_CEILING, Math.min(SAFETY_CEILING, x));
    }
    this.ceiling.curve = curve;
    this.diffBoost.connect(this.ceiling);
    this.ceiling.connect(this.master);
  }

  get deviceRate() {
    return this.ctx.sampleRate;
  }

  get duration() {
    const b = this.buffers.A || this.buffers.B;
    return b ? b.duration : 0;
  }

  /** Install decoded renditions {A, B, D}: objects from parseWav, or AudioBuffers. */
  load(renditions) {
    this.stop();
    this.buffers = {};
    for (const [key, r] of Object.entries(renditions)) {
      if (!r) continue;
      if (r instanceof AudioBuffer) {
        this.buffers[key] = r;
        continue;
      }
      const buf = this.ctx.createBuffer(r.channels, r.frames, r.rate);
      r.data.forEach((ch, c) => buf.copyToChannel(ch, c));
      this.buffers[key] = buf;
    }
    this.offset = 0;
    this.loop = { on: this.loop.on, start: 0, end: this.duration };
    this.changed();
  }

  get loaded() {
    return !!(this.buffers.A && this.buffers.B);
  }

  position() {
    if (!this.playing) return this.offset;
    const raw = this.startOffset + (this.ctx.currentTime - this.startedAt);
    const { on, start, end } = this.loop;
    if (on && end > start && this.startOffset < end && raw >= end) {
      return start + ((raw - end) % (end - start));
    }
    return Math.min(raw, this.duration);
  }

  async play() {
    if (!this.loaded || this.playing) return;
    if (this.ctx.state !== 'running') await this.ctx.resume();
    const t = this.ctx.currentTime + 0.03;
    let offset = this.offset;
    if (offset >= this.duration - 0.001) offset = this.loop.on ? this.loop.start : 0;
    this.sources = [];
    this.gains = {};
    for (const key of ['A', 'B', 'D']) {
      const buffer = this.buffers[key];
      if (!buffer) continue;
      const src = this.ctx.createBufferSource();
      src.buffer = buffer;
      if (this.loop.on && this.loop.end > this.loop.start) {
        src.loop = true;
        src.loopStart = this.loop.start;
        src.loopEnd = this.loop.end;
      }
      const g = this.ctx.createGain();
      g.gain.value = 0;
      src.connect(g);
      g.connect(key === 'D' ? this.diffBoost : this.master);
      this.gains[key] = g;
      src.start(t, offset);
      this.sources.push(src);
    }
    // fade the selected one in from silence: no click at the start
    const live = this.route[this.selected] || this.selected;
    for (const [key, g] of Object.entries(this.gains)) {
      g.gain.setValueAtTime(0, t);
      g.gain.linearRampToValueAtTime(key === live ? 1 : 0, t + FADE_S);
    }
    const first = this.sources[0];
    first.onended = () => {
      if (this.sources[0] === first && this.playing) {
        this.playing = false;
        this.offset = 0;
        this.changed();
      }
    };
    this.diffBoost.gain.value = dbToGain(this.diffGainDb);
    this.startedAt = t;
    this.startOffset = offset;
    this.playing = true;
    this.starts += 1;
    this.changed();
  }

  pause() {
    if (!this.playing) return;
    const pos = this.position();
    const t = this.ctx.currentTime;
    for (const g of Object.values(this.gains)) {
      g.gain.cancelScheduledValues(t);
      g.gain.setValueAtTime(g.gain.value, t);
      g.gain.linearRampToValueAtTime(0, t + FADE_S);
    }
    const old = this.sources;
    this.sources = [];
    for (const s of old) {
      s.onended = null;
      s.stop(t + FADE_S + 0.005);
    }
    this.playing = false;
    this.offset = pos;
    this.changed();
  }

  stop() {
    if (this.playing) this.pause();
    this.offset = 0;
  }

  toggle() {
    return this.playing ? this.pause() : this.play();
  }

  seek(seconds) {
    const wasPlaying = this.playing;
    if (wasPlaying) this.pause();
    this.offset = Math.max(0, Math.min(seconds, this.duration));
    if (wasPlaying) this.play();
    this.changed();
  }

  /** Switch to 'A', 'B', 'X' or 'D' at the same playhead, with a short crossfade. */
  select(name) {
    if (name === this.selected) return;
    const at = this.position();
    this.selected = name;
    if (this.playing) {
      const live = this.route[name] || name;
      const t = this.ctx.currentTime;
      for (const [key, g] of Object.entries(this.gains)) {
        g.gain.cancelScheduledValues(t);
        g.gain.setValueAtTime(g.gain.value, t);
        g.gain.linearRampToValueAtTime(key === live ? 1 : 0, t + FADE_S);
      }
    }
    this.lastSwitch = { to: name, at_s: at, playing: this.playing };
    this.changed();
  }

  /** In a blind trial X plays A or B; outside one X is unused. */
  setX(target) {
    this.route.X = target;
    if (this.playing && this.selected === 'X') {
      const t = this.ctx.currentTime;
      for (const [key, g] of Object.entries(this.gains)) {
        g.gain.cancelScheduledValues(t);
        g.gain.setValueAtTime(g.gain.value, t);
        g.gain.linearRampToValueAtTime(key === target ? 1 : 0, t + FADE_S);
      }
    }
  }

  setLoop(on, start, end) {
    const s = Math.max(0, Math.min(start, this.duration));
    const e = Math.max(s, Math.min(end, this.duration));
    this.loop = { on: !!on && e - s >= 0.05, start: s, end: e };
    if (this.playing) {
      // restart at the same position so every source takes the new region together
      const pos = this.position();
      this.pause();
      this.offset = this.loop.on && (pos < s || pos >= e) ? s : pos;
      this.play();
    }
    this.changed();
  }

  setVolumeDb(db) {
    this.volumeDb = db;
    const t = this.ctx.currentTime;
    this.master.gain.cancelScheduledValues(t);
    this.master.gain.setValueAtTime(this.master.gain.value, t);
    this.master.gain.linearRampToValueAtTime(db <= -80 ? 0 : dbToGain(db), t + 0.02);
  }

  setDiffGainDb(db) {
    this.diffGainDb = db;
    const t = this.ctx.currentTime;
    this.diffBoost.gain.cancelScheduledValues(t);
    this.diffBoost.gain.setValueAtTime(this.diffBoost.gain.value, t);
    this.diffBoost.gain.linearRampToValueAtTime(dbToGain(db), t + 0.02);
  }

  changed() {
    if (this.onchange) this.onchange(this);
  }
}
