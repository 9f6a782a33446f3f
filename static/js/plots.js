// The only module that calls plotly (window.Plotly, loaded as a classic script before main.js).
// Each function takes a plot element and the server's figures and draws or updates the plot
// with Plotly.react. Colours are Rateferry's own.

import * as fmt from './format.js';

// The server's palette (GET /api/options "palette"), set once at start by main.js.
let colours = {};

/** Use the server's palette for every plot drawn from now on. */
export function setPalette(palette) {
  colours = { ...palette };
}

const FONT_FAMILY = 'system-ui, -apple-system, "Segoe UI", Roboto, sans-serif';
const font = () => ({ family: FONT_FAMILY, size: 12, color: colours.ink });

const CONFIG = {
  displaylogo: false,
  responsive: true,
  modeBarButtonsToRemove: ['select2d', 'lasso2d', 'toggleSpikelines'],
  toImageButtonOptions: { format: 'png', scale: 2 },
};

function Plotly() {
  if (!window.Plotly) throw new Error('plotly.js did not load; the plots cannot be drawn');
  return window.Plotly;
}

function axis(title, extra = {}) {
  return {
    title: { text: title, standoff: 6 },
    gridcolor: colours.grid,
    zerolinecolor: colours.grid,
    linecolor: colours.axis,
    ticks: 'outside',
    tickcolor: colours.axis,
    automargin: true,
    ...extra,
  };
}

function baseLayout(extra = {}) {
  return {
    font: font(),
    paper_bgcolor: colours.paper,
    plot_bgcolor: colours.paper,
    margin: { l: 64, r: 24, t: 12, b: 48 },
    hovermode: 'x',
    legend: { orientation: 'h', x: 0, xanchor: 'left', y: -0.2, yanchor: 'top', yref: 'paper', bgcolor: colours.label_bg, font: { size: 11 } },
    ...extra,
  };
}

function react(el, data, layout) {
  return Plotly().react(el, data, layout, CONFIG);
}

/** Re-fit a plot to its box (after its tab became visible). */
export function resize(el) {
  if (window.Plotly && el && el.data) window.Plotly.Plots.resize(el);
}

export function clear(el) {
  if (window.Plotly && el && el.data) window.Plotly.purge(el);
}

// ------------------------------------------------------------------ shared pieces

function vline(x, name, colour, label, { dash = 'dash', row = 0 } = {}) {
  return {
    shape: {
      type: 'line', name, xref: 'x', yref: 'paper', x0: x, x1: x, y0: 0, y1: 1,
      line: { color: colour, width: 1.6, dash },
    },
    // the label sits inside the plot, just left of its line; `row` stacks labels of close lines
    annotation: {
      name, xref: 'x', yref: 'paper', x, y: 1, yanchor: 'top', xanchor: 'right', xshift: -3,
      yshift: -2 - 17 * row, showarrow: false, text: label, font: { size: 11, color: colour },
      bgcolor: colours.label_bg,
    },
  };
}

function hline(y, name, colour, label, yref = 'y') {
  return {
    shape: {
      type: 'line', name, xref: 'paper', yref, x0: 0, x1: 1, y0: y, y1: y,
      line: { color: colour, width: 1.2, dash: 'dot' },
    },
    annotation: {
      name, xref: 'paper', yref, x: 1, y, xanchor: 'right', yanchor: 'bottom', showarrow: false,
      text: label, font: { size: 11, color: colour },
    },
  };
}

function kindStyle(kind) {
  const styles = {
    allowed: { fill: colours.passband_fill, line: colours.passband_line, label: 'passband (allowed)' },
    transition: { fill: colours.transition_fill, line: colours.transition_line, label: 'transition band' },
    forbidden: { fill: colours.stopband_fill, line: colours.mask, label: 'stopband (forbidden)' },
  };
  return styles[kind] || styles.transition;
}

/** Mask polygons as filled traces; `yaxis` picks the axis they live on. */
function maskTraces(mask, { yaxis = 'y', floorDb = null, showlegend = true } = {}) {
  const traces = [];
  for (const poly of (mask && mask.polygons) || []) {
    const style = kindStyle(poly.kind);
    const y = poly.y_db.map((v) => (floorDb !== null && v < floorDb ? floorDb : v));
    traces.push({
      type: 'scatter', mode: 'lines', x: poly.x_hz, y, yaxis, fill: 'toself',
      fillcolor: style.fill, line: { color: style.line, width: 1 },
      name: poly.name, meta: `mask_${poly.name}`,
      hoverinfo: 'skip', showlegend,
    });
  }
  return traces;
}

function hzTickFormat(logX) {
  return logX ? { type: 'log', tickformat: '~s', ticksuffix: 'Hz' } : { type: 'linear', tickformat: '~s', ticksuffix: 'Hz' };
}

function xRange(maxHz, logX, minHz = 20) {
  return logX ? [Math.log10(minHz), Math.log10(maxHz)] : [0, maxHz];
}

function finiteRange(values, { floor = -Infinity, pad = 5, span = 160 } = {}) {
  let lo = Infinity;
  let hi = -Infinity;
  for (const v of values) {
    if (typeof v === 'number' && Number.isFinite(v)) {
      if (v < lo) lo = v;
      if (v > hi) hi = v;
    }
  }
  if (!Number.isFinite(lo)) return [-140, 0];
  lo = Math.max(lo, hi - span, floor);
  return [lo - pad, hi + pad];
}

function nyquistLines(sourceNyq, targetNyq) {
  return [
    vline(sourceNyq, 'source_nyquist', colours.source, `source Nyquist ${fmt.rate(sourceNyq)}`, { row: 0 }),
    vline(targetNyq, 'target_nyquist', colours.output, `target Nyquist ${fmt.rate(targetNyq)}`, { row: 1 }),
  ];
}

// ------------------------------------------------------------------ spectra

/**
 * Source and target spectra on one frequency axis, both Nyquist limits, the mask (right axis,
 * filter gain) with its attenuation floor, and the source band above the target Nyquist.
 */
export function spectra(el, sp, { logX = false, response = null } = {}) {
  const src = sp.source;
  const tgt = sp.target;
  const mask = sp.mask;
  const srcNyq = src.nyquist_hz;
  const tgtNyq = tgt.nyquist_hz;
  const maxHz = Math.max(srcNyq, tgtNyq) * 1.03;
  const yr = finiteRange([...src.psd_db, ...tgt.psd_db], { span: 150 });
  const data = [];

  // The part of the source above the target Nyquist: what would alias without the filter.
  const above = sp.above_target_nyquist;
  if (above && above.applies) {
    const xs = [];
    const ys = [];
    src.freqs_hz.forEach((f, i) => {
      if (f >= tgtNyq && f <= srcNyq && Number.isFinite(src.psd_db[i])) {
        xs.push(f);
        ys.push(Math.max(src.psd_db[i], yr[0]));
      }
    });
    if (xs.length) {
      data.push({
        type: 'scatter', mode: 'lines', x: [...xs, xs[xs.length - 1], xs[0]],
        y: [...ys, yr[0], yr[0]], fill: 'toself', fillcolor: colours.alias_fill,
        line: { width: 0 }, hoverinfo: 'skip', meta: 'above_target_nyquist',
        name: 'source above the target Nyquist',
      });
    }
  }

  data.push({
    type: 'scatter', mode: 'lines', x: src.freqs_hz, y: src.psd_db, name: `source ${fmt.rate(src.rate_hz)}`,
    meta: 'source_psd', line: { color: colours.source, width: 1.4 },
    hovertemplate: '%{x:.0f} Hz<br>%{y:.1f} dB/Hz<extra>source</extra>',
  });
  data.push({
    type: 'scatter', mode: 'lines', x: tgt.freqs_hz, y: tgt.psd_db, name: `target ${fmt.rate(tgt.rate_hz)}`,
    meta: 'target_psd', line: { color: colours.output, width: 1.4 },
    hovertemplate: '%{x:.0f} Hz<br>%{y:.1f} dB/Hz<extra>target</extra>',
  });

  const att = mask ? mask.attenuation_db : 120;
  const y2min = -(att + 25);
  // On the spectra the ±ripple passband would be a hairline: show it as a band of the whole height.
  const bands = mask ? {
    ...mask,
    polygons: mask.polygons.map((p) => (p.kind === 'allowed'
      ? { ...p, y_db: p.y_db.map((v) => (v < 0 ? y2min : 8)) } : p)),
  } : null;
  data.push(...maskTraces(bands, { yaxis: 'y2', floorDb: y2min }));
  if (response) {
    data.push({
      type: 'scatter', mode: 'lines', x: response.freqs_hz, y: response.magnitude_db.map((v) => Math.max(v, y2min)),
      yaxis: 'y2', name: 'filter gain', meta: 'filter_gain', line: { color: colours.filter_faint, width: 1 },
      hovertemplate: '%{x:.0f} Hz<br>%{y:.2f} dB<extra>filter</extra>',
    });
  }

  const lines = nyquistLines(srcNyq, tgtNyq);
  if (mask) lines.push(hline(-att, 'attenuation_floor', colours.mask, `attenuation floor ${fmt.db(-att, 0)} (right axis)`, 'y2'));

  const layout = baseLayout({
    uirevision: `${src.rate_hz}-${tgt.rate_hz}-${logX}`,
    margin: { l: 64, r: 64, t: 12, b: 48 },
    xaxis: axis('frequency', { ...hzTickFormat(logX), range: xRange(maxHz, logX) }),
    yaxis: axis('power spectral density, dB re full scale per Hz', { range: yr }),
    yaxis2: axis('filter gain, dB', { overlaying: 'y', side: 'right', range: [y2min, 8], showgrid: false, zeroline: false, tickmode: 'linear', tick0: 0, dtick: 20 }),
    shapes: lines.map((l) => l.shape),
    annotations: lines.map((l) => l.annotation),
    meta: { source_nyquist_hz: srcNyq, target_nyquist_hz: tgtNyq },
  });
  return react(el, data, layout);
}

// ------------------------------------------------------------------ filter views

/** Magnitude response against the mask, in dB, over the whole response span. */
export function magnitude(el, d, { logX = false } = {}) {
  const mask = d.mask;
  const att = mask.attenuation_db;
  const floor = -(att + 40);
  const data = [
    ...maskTraces(mask, { floorDb: floor }),
    {
      type: 'scatter', mode: 'lines', x: d.response.freqs_hz, y: d.response.magnitude_db.map((v) => Math.max(v, floor)),
      name: 'filter response', meta: 'response', line: { color: colours.filter, width: 1.3 },
      hovertemplate: '%{x:.0f} Hz<br>%{y:.2f} dB<extra></extra>',
    },
  ];
  const lines = nyquistLines(mask.fs_in_nyquist_hz, mask.fs_out_nyquist_hz);
  lines.push(hline(-att, 'attenuation_floor', colours.mask, `required rejection ${fmt.db(-att, 0)}`));
  const maxHz = d.response.span_hz || Math.max(mask.fs_in_nyquist_hz, mask.fs_out_nyquist_hz) * 2;
  const layout = baseLayout({
    uirevision: `${d.fs_in}-${d.fs_out}-${logX}`,
    xaxis: axis('frequency', { ...hzTickFormat(logX), range: xRange(maxHz, logX) }),
    yaxis: axis('gain, dB', { range: [floor, 10] }),
    shapes: lines.map((l) => l.shape),
    annotations: lines.map((l) => l.annotation),
  });
  return react(el, data, layout);
}

/** The passband at ripple scale: the gain must stay between the two limit lines. */
export function passband(el, d, { fit = false } = {}) {
  const pb = d.passband;
  const r = pb.ripple_db;
  const measured = d.figures && d.figures.measured ? d.figures.measured.passband_ripple_db : null;
  const m = Number.isFinite(measured) ? Math.abs(measured) : 0;
  const half = (fit && m > 0 ? m : Math.max(r, m)) * (fit ? 1.3 : 1.8);
  const edge = pb.passband_hz;
  const data = [
    {
      type: 'scatter', mode: 'lines', x: [0, edge, edge, 0, 0], y: [r, r, -r, -r, r], fill: 'toself',
      fillcolor: colours.passband_fill, line: { color: colours.passband_line, width: 1, dash: 'dot' },
      name: `allowed ±${fmt.ripple(r)}`, meta: 'ripple_limits', hoverinfo: 'skip',
    },
    {
      type: 'scatter', mode: 'lines', x: pb.freqs_hz, y: pb.magnitude_db, name: 'filter gain',
      meta: 'passband', line: { color: colours.filter, width: 1.3 },
      hovertemplate: '%{x:.0f} Hz<br>%{y:.5f} dB<extra></extra>',
    },
  ];
  const layout = baseLayout({
    uirevision: `${d.fs_in}-${d.fs_out}-${fit}`,
    xaxis: axis('frequency', { tickformat: '~s', ticksuffix: 'Hz', range: [0, edge * 1.01] }),
    yaxis: axis(fit ? 'gain, dB (fitted to the measured ripple)' : 'gain, dB (mask ripple scale)', { range: [-half, half], exponentformat: 'power' }),
  });
  return react(el, data, layout);
}

/** The impulse response around its main peak, with the pre-ringing marked. */
export function impulse(el, d) {
  const im = d.impulse;
  const [t0, t1] = im.window_ms || [im.time_ms[0], im.time_ms[im.time_ms.length - 1]];
  const shapes = [];
  const annotations = [];
  if (Number.isFinite(im.prering_ms) && im.prering_ms > 0) {
    shapes.push({
      type: 'rect', name: 'prering', xref: 'x', yref: 'paper', x0: im.prering_start_ms, x1: 0, y0: 0, y1: 1,
      fillcolor: colours.prering, line: { width: 0 }, layer: 'below',
    });
    annotations.push({
      name: 'prering', xref: 'x', yref: 'paper', x: (im.prering_start_ms) / 2, y: 1, yanchor: 'bottom',
      showarrow: false, text: `pre-ringing ${fmt.ms(im.prering_ms)} before the peak`,
      font: { size: 11, color: colours.prering_text },
    });
  } else {
    annotations.push({
      name: 'prering', xref: 'paper', yref: 'paper', x: 0, y: 1, xanchor: 'left', yanchor: 'bottom', showarrow: false,
      text: 'no pre-ringing above −60 dB (minimum phase)', font: { size: 11, color: colours.muted },
    });
  }
  shapes.push({ type: 'line', name: 'peak', xref: 'x', yref: 'paper', x0: 0, x1: 0, y0: 0, y1: 1, line: { color: colours.muted, width: 1, dash: 'dot' } });
  const data = [{
    type: 'scatter', mode: 'lines', x: im.time_ms, y: im.amplitude, name: 'impulse response',
    meta: 'impulse', line: { color: colours.filter, width: 1.2 },
    hovertemplate: '%{x:.3f} ms<br>%{y:.4g}<extra></extra>',
  }];
  const layout = baseLayout({
    uirevision: `${d.fs_in}-${d.fs_out}`,
    showlegend: false,
    xaxis: axis('time from the main peak, ms', { range: [t0, t1] }),
    yaxis: axis('amplitude (unit DC gain)'),
    shapes, annotations,
  });
  return react(el, data, layout);
}

/** Group delay across the passband and transition band. */
export function groupDelay(el, d) {
  const gd = d.group_delay;
  const stop = d.mask.stopband_hz;
  const xs = [];
  const ys = [];
  gd.freqs_hz.forEach((f, i) => {
    if (f <= stop && Number.isFinite(gd.delay_ms[i])) {
      xs.push(f);
      ys.push(gd.delay_ms[i]);
    }
  });
  const lines = [
    vline(d.mask.passband_hz, 'passband_edge', colours.passband_line, `passband edge ${fmt.hz(d.mask.passband_hz)}`),
  ];
  const layout = baseLayout({
    uirevision: `${d.fs_in}-${d.fs_out}`,
    showlegend: false,
    xaxis: axis('frequency', { tickformat: '~s', ticksuffix: 'Hz', range: [0, stop] }),
    yaxis: axis('group delay, ms'),
    shapes: lines.map((l) => l.shape),
    annotations: lines.map((l) => l.annotation),
  });
  return react(el, [{
    type: 'scatter', mode: 'lines', x: xs, y: ys, name: 'group delay', meta: 'group_delay',
    line: { color: colours.source, width: 1.3 }, hovertemplate: '%{x:.0f} Hz<br>%{y:.3f} ms<extra></extra>',
  }], layout);
}

/** Cost of each plan as bars (MMAC/s per channel), the chosen one darker. */
export function planCost(el, plans) {
  const labels = plans.map((p) => p.name);
  const layout = baseLayout({
    showlegend: false,
    margin: { l: 150, r: 24, t: 16, b: 44 },
    hovermode: 'closest',
    xaxis: axis('cost, million multiply-adds per second per channel'),
    yaxis: axis('', { automargin: true, autorange: 'reversed' }),
  });
  el.style.height = `${Math.max(140, 30 * plans.length + 70)}px`;
  return react(el, [{
    type: 'bar', orientation: 'h', y: labels, x: plans.map((p) => p.mmac_per_second),
    marker: { color: plans.map((p) => (p.chosen ? colours.source : colours.source_faint)) },
    text: plans.map((p) => `${fmt.num(p.mmac_per_second, 1)} MMAC/s`), textposition: 'auto',
    hovertemplate: '%{y}: %{x:.2f} MMAC/s<extra></extra>', meta: 'plan_cost',
  }], layout);
}

// ------------------------------------------------------------------ audit

/**
 * Measured alias (downsampling) or image (upsampling) level against the input tone's
 * frequency, beside what the design's response predicts for the same tones.
 * `c` is the audit's curves.alias: {input_hz, output_hz, measured_db, worst_db, predicted_db}.
 */
export function auditArtefacts(el, c, { kind = 'alias', attenuationDb = null, edgeHz = null } = {}) {
  const custom = c.input_hz.map((_, i) => [c.output_hz[i]]);
  const data = [];
  if (c.worst_db && c.worst_db.some((v) => v !== null)) {
    data.push({
      type: 'scatter', mode: 'markers', x: c.input_hz, y: c.worst_db, name: `largest line of each tone`,
      meta: 'audit_worst', marker: { color: colours.measured_faint, size: 4 },
      hovertemplate: '%{x:.0f} Hz tone<br>%{y:.1f} dB<extra>largest line</extra>',
    });
  }
  if (c.predicted_db) {
    data.push({
      type: 'scatter', mode: 'lines', x: c.input_hz, y: c.predicted_db, name: 'predicted by the design',
      meta: 'audit_predicted', line: { color: colours.predicted, width: 1.3, dash: 'dash' }, connectgaps: false,
      hovertemplate: '%{x:.0f} Hz tone<br>%{y:.1f} dB<extra>predicted</extra>',
    });
  }
  const counts = c.in_stopband || c.input_hz.map(() => true);
  data.push({
    type: 'scatter', mode: 'markers', x: c.input_hz, y: c.measured_db, customdata: custom,
    name: `measured ${kind} (hollow: tone in the transition band, not judged)`, meta: 'audit_measured',
    marker: {
      color: counts.map((v) => (v ? colours.measured : colours.paper)), size: 5,
      line: { color: colours.measured, width: 1 },
    },
    hovertemplate: `%{x:.0f} Hz tone → ${kind} at %{customdata[0]:.0f} Hz<br>%{y:.1f} dB<extra>measured</extra>`,
  });
  const lines = [];
  if (Number.isFinite(attenuationDb)) lines.push(hline(-attenuationDb, 'audit_limit', colours.mask, `mask: ${fmt.db(-attenuationDb, 0)}`));
  if (Number.isFinite(edgeHz)) lines.push(vline(edgeHz, 'audit_edge', colours.output, `stopband edge ${fmt.hz(edgeHz)}`));
  const values = [...c.measured_db, ...(c.predicted_db || [])].filter((v) => v !== null && v > -390);
  const layout = baseLayout({
    xaxis: axis('input tone frequency', { tickformat: '~s', ticksuffix: 'Hz' }),
    yaxis: axis(`${kind} re the tone, dB`, {
      range: finiteRange([...values, Number.isFinite(attenuationDb) ? -attenuationDb : -120, 0], { span: 260, pad: 8 }),
    }),
    shapes: lines.map((l) => l.shape),
    annotations: lines.map((l) => l.annotation),
  });
  return react(el, data, layout);
}

/** Measured passband deviation against frequency, beside the design's prediction and the limits. */
export function auditPassband(el, c, { rippleDb = null, edgeHz = null } = {}) {
  const data = [];
  if (Number.isFinite(rippleDb) && Number.isFinite(edgeHz)) {
    data.push({
      type: 'scatter', mode: 'lines', x: [0, edgeHz, edgeHz, 0, 0], y: [rippleDb, rippleDb, -rippleDb, -rippleDb, rippleDb],
      fill: 'toself', fillcolor: colours.passband_fill, line: { color: colours.passband_line, width: 1, dash: 'dot' },
      name: `allowed ±${fmt.ripple(rippleDb)}`, hoverinfo: 'skip', meta: 'audit_ripple_limits',
    });
  }
  if (c.predicted_db) {
    data.push({
      type: 'scatter', mode: 'lines', x: c.freq_hz, y: c.predicted_db, name: 'predicted by the design',
      meta: 'audit_pb_predicted', line: { color: colours.predicted, width: 1.3, dash: 'dash' },
      hovertemplate: '%{x:.0f} Hz<br>%{y:.6f} dB<extra>predicted</extra>',
    });
  }
  data.push({
    type: 'scatter', mode: 'markers', x: c.freq_hz, y: c.measured_db, name: 'measured on the converter output',
    meta: 'audit_pb_measured', marker: { color: colours.measured, size: 4 },
    hovertemplate: '%{x:.0f} Hz<br>%{y:.6f} dB<extra>measured</extra>',
  });
  const all = [...c.measured_db, ...(c.predicted_db || [])].filter(Number.isFinite).map(Math.abs);
  const half = Math.max(Number.isFinite(rippleDb) ? rippleDb : 0, ...all, 1e-5) * 1.5;
  const layout = baseLayout({
    xaxis: axis('tone frequency', { tickformat: '~s', ticksuffix: 'Hz' }),
    yaxis: axis('deviation from unity, dB', { range: [-half, half], exponentformat: 'power' }),
  });
  return react(el, data, layout);
}

/** The measured output impulse in dB re its peak, with the −60 dB line that bounds pre-ringing. */
export function auditImpulse(el, c, { prering_ms = null } = {}) {
  const lines = [hline(-60, 'audit_ring_threshold', colours.muted, '−60 dB')];
  const shapes = lines.map((l) => l.shape);
  if (Number.isFinite(prering_ms) && prering_ms > 0) {
    shapes.push({ type: 'rect', xref: 'x', yref: 'paper', x0: -prering_ms, x1: 0, y0: 0, y1: 1, fillcolor: colours.prering, line: { width: 0 }, layer: 'below', name: 'audit_prering' });
  }
  const layout = baseLayout({
    showlegend: false,
    xaxis: axis('time from the peak, ms'),
    yaxis: axis('level, dB re peak', { range: [-160, 6] }),
    shapes, annotations: lines.map((l) => l.annotation),
  });
  return react(el, [{
    type: 'scatter', mode: 'lines', x: c.time_ms, y: c.level_db.map((v) => (v === null ? -400 : v)),
    name: 'measured impulse', meta: 'audit_impulse', line: { color: colours.measured, width: 1.1 },
    hovertemplate: '%{x:.3f} ms<br>%{y:.1f} dB<extra></extra>',
  }], layout);
}

// ------------------------------------------------------------------ overview

/**
 * The whole recording over time: the min/max envelope (left axis), short-term loudness (right
 * axis), markers where samples reach full scale and where the true peak goes over, and the
 * listening excerpt shaded. `o` is GET /api/recordings/<id>/overview; `excerpt` {start_s, length_s}.
 */
export function overview(el, o, excerpt = null) {
  const t = o.time_s;
  const data = [
    { type: 'scatter', mode: 'lines', x: t, y: o.max, name: 'envelope', meta: 'overview_max', line: { color: colours.envelope, width: 0.8 }, hoverinfo: 'skip', showlegend: false },
    {
      type: 'scatter', mode: 'lines', x: t, y: o.min, name: 'waveform (min/max)', meta: 'overview_min', fill: 'tonexty',
      fillcolor: colours.envelope, line: { color: colours.envelope, width: 0.8 },
      hovertemplate: '%{x:.2f} s<extra></extra>',
    },
    {
      type: 'scatter', mode: 'lines', x: t, y: o.short_term_lufs, yaxis: 'y2', name: 'short-term loudness (3 s)', meta: 'overview_loudness',
      line: { color: colours.loudness, width: 1.3 }, connectgaps: false, hovertemplate: '%{x:.2f} s<br>%{y:.1f} LUFS<extra></extra>',
    },
  ];
  const marker = (m, name, meta, y, colour, symbol) => ({
    type: 'scatter', mode: 'markers', x: m.time_s, y: m.time_s.map(() => y), name: `${name} (${fmt.grouped(m.total)})`, meta,
    marker: { color: colour, size: 8, symbol }, customdata: m.count,
    hovertemplate: `%{x:.3f} s<br>%{customdata} ${name}<extra></extra>`,
  });
  data.push(marker(o.full_scale, 'samples at full scale', 'overview_full_scale', 1.08, colours.full_scale, 'triangle-down'));
  data.push(marker(o.overs, 'true-peak overs', 'overview_overs', -1.08, colours.over, 'triangle-up'));
  const shapes = [];
  if (excerpt && Number.isFinite(excerpt.start_s)) {
    shapes.push({
      type: 'rect', name: 'excerpt', xref: 'x', yref: 'paper', x0: excerpt.start_s, x1: excerpt.start_s + excerpt.length_s,
      y0: 0, y1: 1, fillcolor: colours.excerpt, line: { color: colours.filter, width: 1 }, layer: 'below',
    });
  }
  const loud = o.short_term_lufs.filter(Number.isFinite);
  const top = loud.length ? Math.ceil(Math.max(...loud) / 6) * 6 + 6 : 0;
  const layout = baseLayout({
    margin: { l: 48, r: 56, t: 6, b: 30 },
    hovermode: 'x',
    xaxis: axis('', { range: [0, o.duration_s], ticksuffix: ' s', showgrid: false, fixedrange: true }),
    yaxis: axis('', { range: [-1.15, 1.15], tickvals: [-1, 0, 1], fixedrange: true, zeroline: false }),
    yaxis2: axis('LUFS', { overlaying: 'y', side: 'right', range: [top - 60, top], dtick: 12, showgrid: false, fixedrange: true }),
    legend: { orientation: 'h', x: 0, y: 1.02, yanchor: 'bottom', font: { size: 11 }, bgcolor: colours.label_bg },
    shapes,
  });
  return react(el, data, layout);
}

/** Call fn(x) with the data x of a click on the plot (time, frequency). */
export function onClick(el, fn) {
  el.on('plotly_click', (e) => {
    const p = e && e.points && e.points[0];
    if (p && Number.isFinite(p.x)) fn(p.x);
  });
}

// ------------------------------------------------------------------ time base

/**
 * Offset of the track against the reference over time: the per-window points (used ones
 * filled, the rest hollow), the fitted line, and below it the residuals of the used points.
 */
export function timeBase(el, r) {
  const p = r.points;
  const pick = (arr, want) => arr.filter((_, i) => p.used[i] === want);
  const data = [
    {
      type: 'scatter', mode: 'markers', x: pick(p.times_s, true), y: pick(p.offsets_ms, true),
      name: 'window offsets (used)', meta: 'offsets_used', marker: { color: colours.source, size: 6 },
      hovertemplate: '%{x:.1f} s<br>%{y:.3f} ms<extra></extra>',
    },
    {
      type: 'scatter', mode: 'markers', x: pick(p.times_s, false), y: pick(p.offsets_ms, false),
      name: 'windows left out', meta: 'offsets_unused',
      marker: { color: colours.muted, size: 6, symbol: 'circle-open' },
      hovertemplate: '%{x:.1f} s<br>%{y:.3f} ms (left out)<extra></extra>',
    },
    {
      type: 'scatter', mode: 'lines', x: [0, r.duration_s], y: [r.offset_ms, r.offset_end_ms],
      name: `fitted line: ${fmt.num(r.drift_ppm, 3)} ppm`, meta: 'fit',
      line: { color: colours.target, width: 2 }, hoverinfo: 'skip',
    },
    {
      type: 'scatter', mode: 'markers', x: pick(p.times_s, true), y: pick(p.residual_ms, true),
      name: 'residual', meta: 'residuals', xaxis: 'x', yaxis: 'y2',
      marker: { color: colours.measured, size: 5 },
      hovertemplate: '%{x:.1f} s<br>%{y:.4f} ms<extra></extra>',
    },
  ];
  const layout = baseLayout({
    uirevision: `${r.reference}-${r.track}`,
    hovermode: 'closest',
    xaxis: axis('reference time, s', { range: [0, r.duration_s], anchor: 'y2' }),
    yaxis: axis('track offset, ms', { domain: [0.36, 1] }),
    yaxis2: axis('residual, ms', { domain: [0, 0.26] }),
  });
  return react(el, data, layout);
}
