"""The audit itself: plan the tones, build the test channels, run the converter once, measure
the AES17, tone-run and time figures, and judge them against the mask."""

from dataclasses import dataclass
import math
import time

import numpy as np
from scipy import signal

from .measure import (MEASUREMENT_HIGH_HZ, MEASUREMENT_LOW_HZ, _check_design, _level_db,
                      _stages, alignment_from_lines, alignment_from_signals, band_rms_dbfs,
                      convert_channels, equivalent_time_response, impulse_group_delay,
                      line_spectrum, predicted_response, prering_ms, residual_dbfs,
                      settle_time_s, thd_n_db)
from .result import AuditResult
from .signals import (AES17_FREQUENCY_HZ, LOW_LEVEL_DBFS, TONE_LEVEL_DBFS, _check_dither,
                      _impulse_positions, _multitone, _sweep_at, _sweep_frequency_time,
                      _word_length, tone)
from .tones import (EDGE_TONES, PASS_TONES, RESIDUE_MIN_CAPACITY, STOP_TONES, _artefact_lines,
                    _class_bins, _fold, _main_artefact, _place, _predicted_line_db,
                    _predicted_thd_n_db, _targets)
from .verdict import thd_n_limit_db, verdict_rows

__all__ = ["audit"]

IMPULSES = 32                       # impulses merged into one finely sampled response


@dataclass(frozen=True)
class _Route:
    """What every step needs to know of the converter, the mask and the signal timing."""

    d: object
    mask: object
    fs_in: int
    fs_out: int
    up: int
    down: int
    g: int                  # gcd(fs_in, fs_out): the converter's period is 1/g seconds
    direction: str
    arithmetic: str
    phase: str
    nyq_in: float
    nyq_out: float
    fp: float               # passband edge of the mask
    fst: float              # stopband edge of the mask
    span_s: float           # settling time
    margin: int             # input frames before (and after) the measured second
    n_in: int               # input frames per channel
    n0: int                 # first output frame of the measured second
    half_out: int           # output samples either side of an impulse


@dataclass(frozen=True)
class _Channels:
    """The test signals, one per column of ``x``, and where each sits."""

    x: np.ndarray
    quiet: np.ndarray       # the (dithered) silence, column 2
    impulses: list          # input frames of the impulses in column 3
    sweep_args: tuple       # (duration_s, start_hz, stop_hz, fade_s) of the sweep, column 4
    runs: list              # (family, freqs, amplitudes, phases, column) of each tone run


def audit(design_or_plan, *, dither="none", bits="16", seed=0, mask=None):
    """Run the real converter on test signals and measure its artefacts.

    Parameters
    ----------
    design_or_plan : Design or Plan
        From :func:`webapp.dsp.design.design` or :func:`webapp.dsp.stages.choose_plan`
        (or a Design rebuilt with other taps, e.g. by ``dataclasses.replace``).
    dither : {"none", "tpdf", "shaped"}, optional
        Dither of the low-level test signals (silence and the -60 dBFS tone), quantised to
        ``bits`` at the source rate. Default "none": they stay unquantised, so the figures are
        the converter's own.
    bits : {"16", "24"}, optional
        Word length of the dithered signals. Default "16".
    seed : int, optional
        Seed of the dither.
    mask : Mask, optional
        Judge against this mask (``passband_hz``, ``stopband_hz``, ``ripple_db``,
        ``attenuation_db``) instead of the design's own, e.g. a stricter delivery target.

    Returns
    -------
    AuditResult

    Raises
    ------
    ParameterError
        For an object that is not a design, or an unknown dither or word length.

    Notes
    -----
    One converter call carries every test signal as a channel, each about one second plus the
    converter's settling time at both ends: the 997 Hz tones at -1 and -60 dBFS, the (dithered)
    silence, an impulse, a log sweep to the source Nyquist and the tone runs. Tone runs: the
    passband multitone (deviation, alignment; images on an upsampling route) and, downsampling,
    tones between the target and the source Nyquist (aliases). Cost: a few converter-seconds
    of audio per channel count, plus one FFT per channel.
    """
    t0 = time.perf_counter()
    _check_design(design_or_plan)
    dither, bits = _check_dither(dither, bits)
    r = _route(design_or_plan, mask)
    band_runs, stop_runs, residue = _plan_tones(r)
    # the fundamental: 997 Hz unless the passband is too narrow
    f0 = AES17_FREQUENCY_HZ if AES17_FREQUENCY_HZ <= 0.5 * r.fp else float(max(1, int(r.fp / 4)))
    ch = _build_channels(r, f0, band_runs, stop_runs, dither=dither, bits=bits, seed=seed)
    y = convert_channels(r.d, ch.x)
    seg = y[r.n0:r.n0 + r.fs_out]

    figures = dict(fs_in=r.fs_in, fs_out=r.fs_out, up=r.up, down=r.down,
                   direction=r.direction, phase=r.phase, arithmetic=r.arithmetic,
                   dither=dither, bits=bits, separation="residue" if residue else "key-bins")
    aes17, line_count = _aes17_figures(r, seg, ch.quiet, f0)
    figures.update(aes17)
    # one line spectrum per tone-run channel
    lines = line_spectrum(seg[:, [m[4] for m in ch.runs]], r.fs_out)[1] if ch.runs else None
    passband, dev_lines = _passband_figures(r, lines, ch.runs)
    figures.update(passband)
    figures.update(_artefact_figures(r, lines, ch.runs, residue))
    figures.update(_time_figures(r, y, ch, *dev_lines))
    rows = verdict_rows(figures, r.mask, line_count=line_count,
                        band_high_hz=min(MEASUREMENT_HIGH_HZ, r.nyq_out))
    return AuditResult(**figures, verdict=rows, passes=all(row.passes for row in rows),
                       audit_ms=(time.perf_counter() - t0) * 1000.0)


def _route(d, mask):
    """The route facts and the timing of the test signals around one measured second."""
    fs_in, fs_out = int(d.fs_in), int(d.fs_out)
    mask = d.mask if mask is None else mask
    span_s = settle_time_s(d)
    margin = int(math.ceil(span_s * fs_in)) + 4
    return _Route(
        d=d, mask=mask, fs_in=fs_in, fs_out=fs_out, up=int(d.up), down=int(d.down),
        g=math.gcd(fs_in, fs_out),
        direction="down" if fs_out < fs_in else "up" if fs_out > fs_in else "same",
        arithmetic=str(_stages(d)[-1].spec.arithmetic), phase=str(d.spec.phase),
        nyq_in=fs_in / 2.0, nyq_out=fs_out / 2.0,
        fp=float(mask.passband_hz), fst=float(mask.stopband_hz),
        span_s=span_s, margin=margin, n_in=fs_in + 2 * margin,
        n0=int(math.ceil(margin / fs_in * fs_out - 1e-9)),
        half_out=int(math.ceil(span_s * fs_out)) + 4)


def _plan_tones(r):
    """(passband runs, stopband runs, residue separation?): the tones of each run channel."""
    residue = (r.g - 1) // 2 >= RESIDUE_MIN_CAPACITY
    place = dict(g=r.g, fs_in=r.fs_in, fs_out=r.fs_out, up=r.up, residue=residue)
    fp, fst = r.fp, r.fst
    low_edge = MEASUREMENT_LOW_HZ if fp > 4 * MEASUREMENT_LOW_HZ else max(1.0, fp / 20)
    stop_runs = []
    if r.direction == "up":
        top = math.ceil(r.nyq_in) - 1
        band_runs = _place(_targets(low_edge, top, PASS_TONES, 0.9 * fp, top, EDGE_TONES)
                           + [math.floor(fp), r.fs_in - math.ceil(fst)], 1, top, **place)
        return band_runs, stop_runs, residue
    band_runs = _place(_targets(low_edge, fp, PASS_TONES, 0.9 * fp, fp, EDGE_TONES)
                       + [math.floor(fp)], 1, math.floor(fp), **place)
    if r.direction == "down":
        lo, hi = math.floor(r.nyq_out) + 1, math.ceil(r.nyq_in) - 1
        edge_hi = min(hi, fst + 0.1 * (r.nyq_in - fst))
        stop_runs = _place(_targets(lo, hi, STOP_TONES, fst, edge_hi, EDGE_TONES)
                           + [math.ceil(fst)], lo, hi, **place)
    return band_runs, stop_runs, residue


def _build_channels(r, f0, band_runs, stop_runs, *, dither, bits, seed):
    """Columns: f0 at -1 dBFS, f0 at -60 dBFS (dithered), silence (dithered), impulses, the log
    sweep, then one multitone per tone run."""
    fs_in, n_in = r.fs_in, r.n_in
    cols, runs = [], []
    cols.append(tone(fs_in, f0, level_dbfs=TONE_LEVEL_DBFS, frames=n_in))
    cols.append(_word_length(tone(fs_in, f0, level_dbfs=LOW_LEVEL_DBFS, frames=n_in), fs_in,
                             dither=dither, bits=bits, seed=seed))
    quiet = _word_length(np.zeros(n_in), fs_in, dither=dither, bits=bits, seed=seed + 1)
    cols.append(quiet)
    spacing = 2 * int(math.ceil(r.span_s * fs_in)) + 16
    imp_pos = _impulse_positions(n_in, 2 * r.margin, spacing, r.up, r.down, IMPULSES)
    x_imp = np.zeros(n_in)
    x_imp[imp_pos] = 1.0
    cols.append(x_imp)
    sweep_args = (n_in / fs_in, 20.0 if r.nyq_in > 200 else r.nyq_in / 10, r.nyq_in, 0.005)
    cols.append(10 ** (TONE_LEVEL_DBFS / 20) * _sweep_at(np.arange(n_in) / fs_in, *sweep_args))
    for family, tone_runs in (("band", band_runs), ("stop", stop_runs)):
        for freqs in tone_runs:
            x, amps, ph = _multitone(fs_in, freqs, n_in, TONE_LEVEL_DBFS, None, None)
            runs.append((family, freqs, amps, ph, len(cols)))
            cols.append(x)
    return _Channels(x=np.stack(cols, axis=1), quiet=quiet, impulses=imp_pos,
                     sweep_args=sweep_args, runs=runs)


def _aes17_figures(r, seg, quiet, f0):
    """THD+N (measured, allowed, predicted), noise floor, dynamic range and idle noise; and the
    number of alias/image lines f0 makes in the measurement band."""
    band_hi = min(MEASUREMENT_HIGH_HZ, r.nyq_out)
    noise_floor = residual_dbfs(seg[:, 1], r.fs_out, f0)
    lines_nu = _artefact_lines(f0, r.fs_in, r.fs_out, r.up, MEASUREMENT_LOW_HZ, band_hi)
    count = int(lines_nu.size)
    src = quiet[r.margin:r.margin + r.fs_in]
    return dict(
        thd_n_db=thd_n_db(seg[:, 0], r.fs_out, f0),
        thd_n_limit_db=thd_n_limit_db(count, r.mask.attenuation_db, r.arithmetic),
        thd_n_predicted_db=_predicted_thd_n_db(r.d, f0, r.fs_in, lines_nu),
        fundamental_hz=f0,
        noise_floor_dbfs=noise_floor, dynamic_range_db=-noise_floor,
        idle_noise_dbfs=band_rms_dbfs(seg[:, 2], r.fs_out),
        idle_noise_full_dbfs=band_rms_dbfs(seg[:, 2], r.fs_out, low_hz=0.0, high_hz=math.inf),
        source_idle_noise_dbfs=band_rms_dbfs(src, r.fs_in, low_hz=0.0, high_hz=math.inf),
    ), count


def _passband_figures(r, lines, runs):
    """Passband deviation of the band tones up to the passband edge, measured and predicted;
    and the tones' lines (frequencies, measured, analytic) for the alignment."""
    dev_f, dev_y, dev_x = [], [], []
    for j, (family, freqs, amps, ph, _) in enumerate(runs):
        if family != "band":
            continue
        col = lines[:, j]
        for f, a, p in zip(freqs, amps, ph):
            f = int(f)
            if f <= r.fp:
                dev_f.append(f)
                dev_y.append(col[f])
                dev_x.append(a * np.exp(1j * (p + 2 * np.pi * ((r.n0 * f) % r.fs_out)
                                              / r.fs_out)))
    order = np.argsort(dev_f)
    dev_f = np.asarray(dev_f, dtype=np.float64)[order]
    dev_y = np.asarray(dev_y)[order]
    dev_x = np.asarray(dev_x)[order]
    dev_db = _level_db(np.abs(dev_y) / np.abs(dev_x))
    dev_pred_db = _level_db(np.abs(predicted_response(r.d, dev_f)))
    return dict(
        passband_deviation_db=float(np.max(np.abs(dev_db))) if dev_db.size else math.nan,
        passband_deviation_predicted_db=(float(np.max(np.abs(dev_pred_db)))
                                         if dev_pred_db.size else math.nan),
        deviation_hz=dev_f, deviation_db=dev_db, deviation_predicted_db=dev_pred_db,
    ), (dev_f, dev_y, dev_x)


def _artefact_figures(r, lines, runs, residue):
    """Per tone with an alias or image: its main artefact (measured and predicted) and the
    largest line it makes; the worst of those from the stopband against the design's figure."""
    al_f, al_out, al_main, al_worst, al_worst_bin = [], [], [], [], []
    for j, (_, freqs, amps, _, _) in enumerate(runs):
        col = lines[:, j]
        for f, a in zip(freqs, amps):
            f = int(f)
            art = int(_main_artefact([f], r.fs_in, r.fs_out, r.up)[0])
            if r.direction == "same" or art < 0:
                continue
            b_main = int(_fold(art, r.fs_out))
            b_worst = b_main
            if residue:
                bins = _class_bins(f, r.g, r.fs_out)
                if 2 * f < r.fs_out:
                    bins = bins[bins != f]
                b_worst = int(bins[int(np.argmax(np.abs(col[bins])))])
            al_f.append(f)
            al_out.append(b_main)
            al_main.append(abs(col[b_main]) / a)
            al_worst.append(abs(col[b_worst]) / a)
            al_worst_bin.append(b_worst)
    order = np.argsort(al_f)
    al_worst_bin = np.asarray(al_worst_bin, dtype=np.int64)[order]
    al_f = np.asarray(al_f, dtype=np.float64)[order]
    al_worst_db = _level_db(np.asarray(al_worst)[order])
    if al_f.size:
        nu = _main_artefact(al_f.astype(np.int64), r.fs_in, r.fs_out, r.up).astype(np.float64)
        al_pred_db = _level_db(np.abs(predicted_response(r.d, nu)))
        al_stop = nu >= r.fst - 1e-9
    else:
        al_pred_db = np.empty(0)
        al_stop = np.zeros(0, dtype=bool)
    return dict(
        alias_input_hz=al_f, alias_output_hz=np.asarray(al_out, dtype=np.float64)[order],
        alias_db=_level_db(np.asarray(al_main)[order]), alias_worst_db=al_worst_db,
        alias_predicted_db=al_pred_db, alias_in_stopband=al_stop,
        **_worst_artefact(r, al_f, al_worst_db, al_worst_bin, al_pred_db, al_stop))


def _worst_artefact(r, al_f, al_worst_db, al_worst_bin, al_pred_db, al_stop):
    """The largest line of the tones whose main artefact comes from the stopband."""
    if not al_stop.any():
        return dict(worst_alias_db=None, worst_alias_input_hz=None, worst_alias_output_hz=None,
                    worst_alias_predicted_db=None, design_stopband_db=None)
    idx = np.nonzero(al_stop)[0]
    k = idx[int(np.argmax(al_worst_db[idx]))]
    worst_out = float(al_worst_bin[k])
    worst_pred = _predicted_line_db(r.d, int(al_f[k]), worst_out, r.fs_in, r.fs_out, r.up)
    if worst_pred is None:
        worst_pred = float(al_pred_db[k])
    return dict(worst_alias_db=float(al_worst_db[k]), worst_alias_input_hz=float(al_f[k]),
                worst_alias_output_hz=worst_out, worst_alias_predicted_db=worst_pred,
                design_stopband_db=-float(r.d.measured.stopband_attenuation_db))


def _time_figures(r, y, ch, dev_f, dev_y, dev_x):
    """Alignment (from the passband tones and from the log sweep), group delay, pre-ringing and
    the equivalent-time impulse response."""
    lag_s = r.span_s + 2.0 / min(r.fs_in, r.fs_out)
    align_s = alignment_from_lines(dev_f, dev_y, dev_x, max_lag_s=lag_s)
    resid_samples = impulse_group_delay(y[:, 3], r.fs_out, ch.impulses[0] * r.up / r.down,
                                        passband_hz=min(r.fp, 0.999 * r.nyq_out),
                                        half_width=r.half_out)
    imp_t, imp_h = equivalent_time_response(y[:, 3], r.fs_in, r.fs_out, ch.impulses,
                                            half_width=r.half_out)
    prering = prering_ms(imp_t, imp_h)
    removed_s = sum(s.delay_samples / s.filter_rate_hz for s in _stages(r.d))
    resid_ms = resid_samples / r.fs_out * 1000.0
    peak = np.max(np.abs(imp_h)) if imp_h.size else 1.0
    imp_h = imp_h / peak
    return dict(
        group_delay_ms=removed_s * 1000.0 + resid_ms,
        group_delay_predicted_ms=float(r.d.latency_ms),
        residual_delay_ms=resid_ms, prering_ms=prering,
        prering_predicted_ms=getattr(r.d, "prering_ms", None),
        alignment_error_samples=align_s * r.fs_out, alignment_error_us=align_s * 1e6,
        sweep_alignment_samples=_sweep_alignment(r, y[:, 4], ch.sweep_args, lag_s),
        impulse_ms=imp_t * 1000.0, impulse_response=imp_h, impulse_db=_level_db(np.abs(imp_h)))


def _sweep_alignment(r, y_sweep, sweep_args, lag_s):
    """Lag of the converted sweep against the analytic sweep at the output rate, gated to the
    part well inside the passband (NaN when that part is too short)."""
    f_gate_hi = 0.9 * min(r.fp, r.nyq_out)
    t_a = _sweep_frequency_time(max(2 * sweep_args[1], 40.0), *sweep_args[:3])
    t_b = _sweep_frequency_time(f_gate_hi, *sweep_args[:3])
    t_out = np.arange(y_sweep.shape[0]) / r.fs_out
    gate = np.zeros_like(t_out)
    inside = (t_out >= t_a) & (t_out <= t_b)
    if not (t_b > t_a and inside.sum() > 8):
        return math.nan
    u = (t_out[inside] - t_a) / (t_b - t_a)
    gate[inside] = signal.windows.tukey(2001, 0.2)[np.round(u * 2000).astype(int)]
    ref = gate * 10 ** (TONE_LEVEL_DBFS / 20) * _sweep_at(t_out, *sweep_args)
    return alignment_from_signals(y_sweep, ref, r.fs_out,
                                  max_lag_samples=math.ceil(lag_s * r.fs_out))
