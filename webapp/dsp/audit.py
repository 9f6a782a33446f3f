"""Test signals and measured artefact figures of a converter.

A design predicts its figures from its taps; an audit proves them: it runs the real converter
(the streaming code :func:`~webapp.dsp.polyphase.make_converter` builds, in the design's own
arithmetic) on test signals generated at the source rate and measures what comes out.

Conventions
-----------
* Rates are integers in Hz; a route converts ``fs_in`` to ``fs_out`` by ``up/down`` (L/M).
  Data is frames x channels; every level is in dB.
* Levels of sines are in dBFS as AES17 defines them: 0 dBFS is the rms of a sine whose peak just
  reaches full scale (amplitude 1.0), so an rms value ``r`` reads ``20 log10(r sqrt 2)`` dBFS.
* Coherent measurement: every test tone is a whole number of Hz and every measured segment is
  exactly one second of steady-state output, so each tone and each of its artefacts falls on
  one DFT bin. No window, no leakage: float64 resolves lines far below -200 dB.
* Artefact separation: shifting the input of an L/M converter by M samples shifts its output
  by L samples, so the converter is periodic in time with period 1/g seconds,
  g = gcd(fs_in, fs_out), and a tone at f makes output lines only at +-f + k g. Tones share one
  run (one channel of one converter call) when their residues +-f mod g differ; every output
  line then belongs to exactly one tone. (A system that commutes with shifts of 1/g seconds
  maps exp(j 2 pi f t) to a sum of lines at f + k g: expand its periodic gain in a Fourier
  series.) Below 8 usable residue classes (g < 17) tones share a run only when their
  fundamental and main-artefact bins differ ("key-bins": lines of other tones may then add to
  a measured line).
* An *alias* (downsampling) is the line a tone above the target Nyquist makes in the output
  band; an *image* (upsampling) is a line of the copies at k fs_in +- f of an in-band tone.
  Both are reported relative to the tone that caused them. The "main" artefact is the one the
  response predicts most directly: the alias at f itself, or the first image at fs_in - f; the
  "worst" is the largest line the tone makes anywhere in the output band.
* THD+N and dynamic range follow AES17-2015, "AES standard method for digital audio engineering -
  Measurement of digital audio equipment" (clause numbers from memory, not checked against the
  text: definitions of full scale and dBFS in clause 3, the standard low-pass filter and the
  notch filter among the instrument requirements in clause 5, THD+N and dynamic range among the
  procedures in clause 6). THD+N is the rms of what remains after notching the fundamental,
  band-limited to 20 Hz - 20 kHz (or the output Nyquist when lower), relative to the rms of the
  band-limited signal. Dynamic range is measured the same way on a 997 Hz tone at -60 dBFS,
  expressed relative to full scale (AES17: the -60 dBFS THD+N plus 60 dB). Here the notch and
  the band limit are ideal (DFT bins of a coherent segment), where AES17's notch and standard
  low-pass filter are real filters with tolerances; the test frequency 997 Hz is AES17's.
"""

from dataclasses import dataclass, field
import math
import time

import numpy as np
from scipy import optimize, signal

from .dither import Quantizer
from .errors import ParameterError
from .polyphase import make_converter
from .rates import validate_rate
from .spec import FLOAT32_LIMIT_DB
from .spectrum import response_at

__all__ = [
    "AES17_FREQUENCY_HZ", "DITHERS", "WORD_LENGTHS", "FLOOR_DB", "ALIGNMENT_LIMIT_SAMPLES",
    "VerdictRow", "AuditResult", "audit",
    "tone", "multitone", "log_sweep", "impulse", "silence", "schroeder_phases",
    "settle_time_s", "convert_channels", "steady_segment", "line_spectrum", "power_spectrum",
    "thd_n_db", "residual_dbfs", "band_rms_dbfs", "impulse_group_delay",
    "equivalent_time_response", "prering_ms",
    "alignment_from_lines", "alignment_from_signals", "predicted_response",
]

AES17_FREQUENCY_HZ = 997.0          # AES17's standard test frequency (prime, never a bin of a
                                    # common rate unless the segment is a whole second)
MEASUREMENT_LOW_HZ = 20.0           # AES17 measurement bandwidth 20 Hz - 20 kHz
MEASUREMENT_HIGH_HZ = 20000.0
LOW_LEVEL_DBFS = -60.0              # AES17 dynamic range test level
TONE_LEVEL_DBFS = -1.0
DITHERS = ("none", "tpdf", "shaped")
WORD_LENGTHS = ("16", "24")
FLOOR_DB = -400.0                   # levels of exactly zero lines are reported at this floor
PRERING_THRESHOLD_DB = -60.0        # the same threshold design.py uses on the taps
# The converter promises output n at time n / fs_out exactly (DESIGN.md): a linear-phase audit
# fails when the measured offset exceeds this (our own limit, far above float64 rounding).
ALIGNMENT_LIMIT_SAMPLES = 0.01
# Relative rounding noise of the arithmetic: float32 products keep about -125 dB (DESIGN.md);
# float64 keeps far below -250 dB (53-bit mantissa; our conservative figure).
ARITHMETIC_FLOOR_DB = {"float32": FLOAT32_LIMIT_DB, "float64": 250.0}
MAX_RUNS = 8                        # channels per tone family
RESIDUE_MIN_CAPACITY = 8            # below this many residue classes, fall back to key bins
PASS_TONES = 260                    # targets spread over the passband ...
EDGE_TONES = 80                     # ... plus these near the passband / stopband edge
STOP_TONES = 200
CLUSTER_GAP_HZ = 16384              # predicted_response: gaps that split a chirp-z grid
MAX_PREDICTED_MACS = 50_000_000    # skip the predicted THD+N beyond this much direct work
IMPULSES = 32                       # impulses merged into one finely sampled response


# ------------------------------------------------------------------ results

@dataclass(frozen=True)
class VerdictRow:
    """One figure beside the limit the mask sets for it.

    ``passes`` is ``measured <= limit``; ``rule`` says where the limit comes from.
    """

    figure: str
    measured: float
    limit: float
    passes: bool
    unit: str
    rule: str

    def to_dict(self):
        return dict(figure=self.figure, measured=_plain(self.measured), limit=_plain(self.limit),
                    passes=bool(self.passes), unit=self.unit, rule=self.rule)


@dataclass(frozen=True, eq=False)
class AuditResult:
    """Figures measured on a converter's real output, the design's predictions beside them,
    plot curves and the verdict against the mask.

    Levels are in dB; ``*_dbfs`` per AES17 (a full-scale sine reads 0 dBFS). ``None`` marks a
    figure the route doesn't have (no aliases on a 1:1 route).
    """

    fs_in: int
    fs_out: int
    up: int
    down: int
    direction: str                      # "down", "up" or "same"
    phase: str
    arithmetic: str
    dither: str
    bits: str
    separation: str                     # "residue" (exact) or "key-bins" (see module notes)
    # passband
    passband_deviation_db: float        # worst |20 log10 gain| over the passband tones
    passband_deviation_predicted_db: float
    # aliases (down) or images (up)
    worst_alias_db: float | None
    worst_alias_input_hz: float | None
    worst_alias_output_hz: float | None      # the output bin of that worst line
    worst_alias_predicted_db: float | None   # the response at that same line
    design_stopband_db: float | None         # -(stopband attenuation the design measured)
    # AES17
    thd_n_db: float
    thd_n_limit_db: float
    thd_n_predicted_db: float | None    # from the response at each line (None: too many lines)
    fundamental_hz: float
    noise_floor_dbfs: float             # notched 997 Hz at -60 dBFS, band-limited
    dynamic_range_db: float
    idle_noise_dbfs: float              # converted (dithered) silence, band-limited
    idle_noise_full_dbfs: float         # the same over the whole output band
    source_idle_noise_dbfs: float       # the (dithered) silence before conversion
    # time
    group_delay_ms: float               # removed look-ahead + measured residual delay
    group_delay_predicted_ms: float
    residual_delay_ms: float            # measured at the output (0 for aligned linear phase)
    prering_ms: float
    prering_predicted_ms: float | None
    alignment_error_samples: float      # output samples (multitone cross-correlation)
    alignment_error_us: float
    sweep_alignment_samples: float      # the same from the log sweep
    # curves for plots
    deviation_hz: np.ndarray = field(repr=False)
    deviation_db: np.ndarray = field(repr=False)
    deviation_predicted_db: np.ndarray = field(repr=False)
    alias_input_hz: np.ndarray = field(repr=False)
    alias_output_hz: np.ndarray = field(repr=False)     # where the main artefact lands
    alias_db: np.ndarray = field(repr=False)            # main artefact, measured
    alias_worst_db: np.ndarray = field(repr=False)      # largest line of that tone
    alias_predicted_db: np.ndarray = field(repr=False)  # main artefact, from the response
    alias_in_stopband: np.ndarray = field(repr=False)   # counts for the verdict
    impulse_ms: np.ndarray = field(repr=False)          # impulse response, time after impulse
    impulse_response: np.ndarray = field(repr=False)    # h / max|h| (equivalent-time samples)
    impulse_db: np.ndarray = field(repr=False)          # |h| in dB relative to its peak
    verdict: list
    passes: bool
    audit_ms: float

    def figures(self):
        """JSON-ready figures: plain floats, lists and dicts (no numpy, no infinities)."""
        keys = ("fs_in", "fs_out", "up", "down", "direction", "phase", "arithmetic", "dither",
                "bits", "separation",
                "passband_deviation_db", "passband_deviation_predicted_db",
                "worst_alias_db", "worst_alias_input_hz", "worst_alias_output_hz",
                "worst_alias_predicted_db", "design_stopband_db",
                "thd_n_db", "thd_n_limit_db", "thd_n_predicted_db", "fundamental_hz",
                "noise_floor_dbfs",
                "dynamic_range_db", "idle_noise_dbfs", "idle_noise_full_dbfs",
                "source_idle_noise_dbfs", "group_delay_ms", "group_delay_predicted_ms",
                "residual_delay_ms", "prering_ms", "prering_predicted_ms",
                "alignment_error_samples", "alignment_error_us", "sweep_alignment_samples",
                "passes", "audit_ms")
        out = {k: _plain(getattr(self, k)) for k in keys}
        out["verdict"] = [row.to_dict() for row in self.verdict]
        out["curves"] = dict(
            deviation=dict(freq_hz=_plain(self.deviation_hz),
                           measured_db=_plain(self.deviation_db),
                           predicted_db=_plain(self.deviation_predicted_db)),
            alias=dict(input_hz=_plain(self.alias_input_hz),
                       output_hz=_plain(self.alias_output_hz),
                       measured_db=_plain(self.alias_db),
                       worst_db=_plain(self.alias_worst_db),
                       predicted_db=_plain(self.alias_predicted_db),
                       in_stopband=[bool(v) for v in self.alias_in_stopband]),
            impulse=dict(time_ms=_plain(self.impulse_ms),
                         value=_plain(self.impulse_response),
                         level_db=_plain(self.impulse_db)),
        )
        return out


def _plain(value):
    """numpy scalars/arrays -> float/list; non-finite floats -> None (JSON has no infinity)."""
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    v = float(value)
    return v if math.isfinite(v) else None


# ------------------------------------------------------------------ test signals

def _frames(rate_hz, duration_s, frames):
    if frames is None:
        if not (isinstance(duration_s, (int, float)) and duration_s > 0):
            raise ParameterError(f"duration_s must be a number above 0, got {duration_s!r}",
                                 "duration_s")
        frames = int(round(duration_s * rate_hz))
    if int(frames) < 1:
        raise ParameterError(f"frames must be at least 1, got {frames!r}", "frames")
    return int(frames)


def _whole_hz(freqs_hz, rate_hz, field_name="freqs_hz"):
    f = np.atleast_1d(np.asarray(freqs_hz, dtype=np.float64))
    if f.size == 0 or np.any(f != np.round(f)) or np.any(f <= 0) or np.any(f >= rate_hz / 2):
        raise ParameterError(f"{field_name} must be whole numbers of Hz above 0 and below the "
                             f"Nyquist frequency {rate_hz / 2:g} Hz, got {freqs_hz!r}", field_name)
    return f.astype(np.int64)


def tone(rate_hz, freq_hz=AES17_FREQUENCY_HZ, *, level_dbfs=TONE_LEVEL_DBFS, duration_s=1.0,
         frames=None, phase_rad=0.0):
    """A sine at ``level_dbfs`` (AES17 dBFS: peak 10**(level/20)), 997 Hz by default.

    Parameters
    ----------
    rate_hz : int
        Sample rate.
    freq_hz : float, optional
        Default is 997 Hz, the AES17 test frequency.
    level_dbfs : float, optional
        Default is -1 dBFS.
    duration_s : float, optional
        Length; ignored when ``frames`` is given. Default is 1 s.
    frames : int, optional
    phase_rad : float, optional
        The signal is ``A cos(2 pi f m / rate + phase_rad)`` at frame m.

    Returns
    -------
    ndarray, 1-D float64

    Notes
    -----
    For whole-Hz frequencies the phase is computed from the exact integer ``f m mod rate``,
    so long signals don't drift.
    """
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    m = np.arange(n, dtype=np.int64)
    f = float(freq_hz)
    if f.is_integer():
        arg = 2 * np.pi * ((int(f) * m) % rate_hz) / rate_hz
    else:
        arg = 2 * np.pi * f * m / rate_hz
    return 10 ** (level_dbfs / 20.0) * np.cos(arg + phase_rad)


def schroeder_phases(count):
    """Schroeder's low-crest-factor phases -pi k (k - 1) / K for K equal tones (Schroeder,
    "Synthesis of low-peak-factor signals and binary sequences with low autocorrelation",
    IEEE Trans. Information Theory, 1970)."""
    k = np.arange(1, int(count) + 1, dtype=np.float64)
    return -np.pi * k * (k - 1) / count


def _multitone(rate_hz, freqs, n, peak_dbfs, amplitudes, phases_rad):
    """One second synthesised exactly by an inverse FFT (1 Hz bins), tiled to ``n`` frames."""
    f = _whole_hz(freqs, rate_hz)
    if np.unique(f).size != f.size:
        raise ParameterError("freqs_hz must not repeat a frequency", "freqs_hz")
    ph = schroeder_phases(f.size) if phases_rad is None else np.broadcast_to(
        np.asarray(phases_rad, dtype=np.float64), f.shape)
    amps = np.ones(f.size) if amplitudes is None else np.broadcast_to(
        np.asarray(amplitudes, dtype=np.float64), f.shape).copy()
    spec = np.zeros(rate_hz // 2 + 1, dtype=np.complex128)
    spec[f] = amps * (rate_hz / 2.0) * np.exp(1j * ph)
    period = np.fft.irfft(spec, n=rate_hz)
    if amplitudes is None:
        scale = 10 ** (peak_dbfs / 20.0) / np.max(np.abs(period))
        period *= scale
        amps = amps * scale
    x = period[np.arange(n) % rate_hz]
    return x, amps, np.asarray(ph)


def multitone(rate_hz, freqs_hz, *, duration_s=1.0, frames=None, peak_dbfs=TONE_LEVEL_DBFS,
              amplitudes=None, phases_rad=None):
    """A sum of cosines at whole-Hz frequencies, periodic with period one second.

    Parameters
    ----------
    rate_hz : int
    freqs_hz : array_like of whole numbers of Hz, each above 0 and below rate/2
    duration_s : float, optional
        Default is 1 s; ignored when ``frames`` is given.
    frames : int, optional
    peak_dbfs : float, optional
        With equal tones (``amplitudes`` None) the sum is scaled so its peak sits here.
        Default is -1 dBFS.
    amplitudes : array_like, optional
        Peak amplitude of each tone; overrides ``peak_dbfs``.
    phases_rad : array_like, optional
        Default: Schroeder phases (low crest factor).

    Returns
    -------
    ndarray, 1-D float64
    """
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    return _multitone(rate_hz, freqs_hz, n, peak_dbfs, amplitudes, phases_rad)[0]


def _sweep_at(t, duration_s, start_hz, stop_hz, fade_s):
    """Exponential sine sweep sin(2 pi f1 T / ln(f2/f1) (exp(t ln(f2/f1) / T) - 1)) with
    raised-cosine fades, evaluated at arbitrary times ``t`` (seconds)."""
    rate = math.log(stop_hz / start_hz) / duration_s
    phase = 2 * np.pi * start_hz / rate * np.expm1(rate * t)
    g = np.ones_like(t)
    if fade_s > 0:
        a = np.clip(t / fade_s, 0, 1)
        b = np.clip((duration_s - t) / fade_s, 0, 1)
        g = 0.5 - 0.5 * np.cos(np.pi * np.minimum(a, b))
    return g * np.sin(phase)


def _sweep_frequency_time(f_hz, duration_s, start_hz, stop_hz):
    return duration_s * np.log(f_hz / start_hz) / math.log(stop_hz / start_hz)


def log_sweep(rate_hz, *, duration_s=1.0, frames=None, start_hz=20.0, stop_hz=None,
              level_dbfs=TONE_LEVEL_DBFS, fade_s=0.005):
    """Exponential (log) sine sweep from ``start_hz`` to the source Nyquist frequency.

    The instantaneous frequency is f1 (f2/f1)**(t/T) (Farina, "Simultaneous measurement of
    impulse response and distortion with a swept-sine technique", AES 108th Convention, 2000).

    Parameters
    ----------
    rate_hz : int
    duration_s : float, optional
        Default is 1 s; ignored when ``frames`` is given (then T = frames / rate).
    frames : int, optional
    start_hz : float, optional
        Default is 20 Hz.
    stop_hz : float, optional
        Default is rate/2, the Nyquist frequency.
    level_dbfs : float, optional
        Peak level, default -1 dBFS.
    fade_s : float, optional
        Raised-cosine fade in and out; default 5 ms.

    Returns
    -------
    ndarray, 1-D float64
    """
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    stop_hz = rate_hz / 2.0 if stop_hz is None else float(stop_hz)
    if not 0 < start_hz < stop_hz <= rate_hz / 2:
        raise ParameterError(f"sweep needs 0 < start_hz < stop_hz <= {rate_hz / 2:g} Hz, got "
                             f"{start_hz!r} to {stop_hz!r}", "stop_hz")
    t = np.arange(n) / rate_hz
    return 10 ** (level_dbfs / 20.0) * _sweep_at(t, n / rate_hz, start_hz, stop_hz, fade_s)


def impulse(rate_hz, *, duration_s=1.0, frames=None, position=None, level=1.0):
    """A single sample of value ``level`` at frame ``position`` (default the middle), else 0."""
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    position = n // 2 if position is None else int(position)
    if not 0 <= position < n:
        raise ParameterError(f"position must be a frame from 0 to {n - 1}, got {position}",
                             "position")
    x = np.zeros(n)
    x[position] = level
    return x


def _check_dither(dither, bits):
    if dither not in DITHERS:
        raise ParameterError(f"dither must be one of {', '.join(DITHERS)}, got {dither!r}",
                             "dither")
    bits = str(bits)
    if bits not in WORD_LENGTHS:
        raise ParameterError(f"bits must be one of {', '.join(WORD_LENGTHS)}, got {bits!r}",
                             "bits")
    return dither, bits


def _word_length(x, rate_hz, *, dither, bits, seed):
    """Quantise ``x`` to ``bits`` with ``dither`` through :class:`webapp.dsp.dither.Quantizer`
    (the quantiser the pipeline writes files with) and return the codes over full scale.

    ``dither="none"`` leaves the signal unquantised: the converter is measured alone.
    """
    dither, bits = _check_dither(dither, bits)
    if dither == "none":
        return np.asarray(x, dtype=np.float64)
    q = Quantizer(bits=bits, dither=dither, seed=seed, channels=1, rate_hz=rate_hz)
    codes = np.asarray(q.process(np.asarray(x, dtype=np.float64)[:, None]))[:, 0]
    return codes.astype(np.float64) / (float(np.iinfo(codes.dtype).max) + 1.0)


def silence(rate_hz, *, duration_s=1.0, frames=None, dither="none", bits="16", seed=0):
    """Digital silence, or silence through a quantiser with ``dither`` at ``bits``.

    Parameters
    ----------
    rate_hz : int
    duration_s, frames : optional
    dither : {"none", "tpdf", "shaped"}, optional
        ``"none"`` (default) gives exact zeros.
    bits : {"16", "24"}, optional
    seed : int, optional

    Returns
    -------
    ndarray, 1-D float64 (codes divided by full scale)
    """
    rate_hz = validate_rate(rate_hz, field="rate_hz")
    n = _frames(rate_hz, duration_s, frames)
    return _word_length(np.zeros(n), rate_hz, dither=dither, bits=bits, seed=seed)


# ------------------------------------------------------------------ running the converter

def _stages(d):
    return tuple(getattr(d, "stages", None) or (d,))


def _check_design(d):
    need = ("up", "down", "mask", "spec", "fs_in", "fs_out")
    if any(not hasattr(d, name) for name in need):
        raise ParameterError(f"audit needs a Design or a multistage Plan, got {type(d).__name__}",
                             "design")
    for s in _stages(d):
        if any(not hasattr(s, name) for name in ("taps", "filter_rate_hz", "phases",
                                                 "delay_samples", "path")):
            raise ParameterError(f"audit needs a Design or a multistage Plan, got a stage of "
                                 f"type {type(s).__name__}", "design")


def settle_time_s(design_or_plan):
    """Seconds of input a converter needs on either side of an output sample (the sum of its
    filters' lengths): beyond this from the ends, the output of a steady input is steady."""
    return float(sum(np.asarray(s.taps).size / s.filter_rate_hz for s in _stages(design_or_plan)))


def convert_channels(design_or_plan, x):
    """Run the converter :func:`make_converter` builds (the design's own arithmetic) on a whole
    frames x channels (or 1-D) signal; return float64 output of ceil(frames up / down) frames."""
    x = np.asarray(x, dtype=np.float64)
    flat = x.ndim == 1
    x2 = x[:, None] if flat else x
    conv = make_converter(design_or_plan, channels=x2.shape[1])
    y = np.asarray(conv.process_all(x2), dtype=np.float64)
    return y[:, 0] if flat else y


def steady_segment(y, rate_hz, *, start_s, seconds=1):
    """The ``seconds`` whole seconds of ``y`` (at ``rate_hz``) from the first sample at or after
    ``start_s``; raises when ``y`` is too short."""
    start = int(math.ceil(start_s * rate_hz - 1e-9))
    n = int(seconds * rate_hz)
    if start < 0 or start + n > len(y):
        raise ParameterError(f"the signal has {len(y)} frames; a steady segment needs frames "
                             f"{start} to {start + n}", "y")
    return y[start:start + n]


# ------------------------------------------------------------------ measurements

def line_spectrum(segment, rate_hz):
    """Complex peak amplitude of each DFT line of a coherent segment.

    A component ``A cos(2 pi f n / rate + phi)`` that completes a whole number of periods in the
    segment reads ``A exp(j phi)`` at its bin (``phi`` relative to the segment's first sample).

    Returns
    -------
    freqs_hz, lines : ndarray
        Bins 0 .. N/2 at rate/N spacing; axis 0 of ``segment`` is time.
    """
    x = np.asarray(segment, dtype=np.float64)
    n = x.shape[0]
    spec = np.fft.rfft(x, axis=0) * (2.0 / n)
    spec[0] *= 0.5
    if n % 2 == 0:
        spec[-1] *= 0.5
    return np.arange(spec.shape[0]) * (rate_hz / n), spec


def power_spectrum(segment, rate_hz):
    """Mean-square power of each line of ``segment`` (sums to mean(x**2), Parseval)."""
    x = np.asarray(segment, dtype=np.float64)
    n = x.shape[0]
    p = np.abs(np.fft.rfft(x, axis=0)) ** 2 * (2.0 / n ** 2)
    p[0] *= 0.5
    if n % 2 == 0:
        p[-1] *= 0.5
    return np.arange(p.shape[0]) * (rate_hz / n), p


def _band(freqs, rate_hz, low_hz, high_hz):
    hi = min(float(high_hz), rate_hz / 2.0)
    return (freqs >= low_hz) & (freqs <= hi)


def _bin_of(freqs, rate_hz, n, f_hz):
    k = int(round(f_hz * n / rate_hz))
    if k < 0 or k >= freqs.size or abs(freqs[k] - f_hz) > 1e-9 * max(1.0, f_hz):
        raise ParameterError(f"the segment of {n} frames at {rate_hz:g} Hz has no bin at "
                             f"{f_hz:g} Hz; use a whole number of periods (a whole second for "
                             "whole-Hz tones)", "fundamental_hz")
    return k


def _notched(segment, rate_hz, fundamental_hz, low_hz, high_hz):
    x = np.asarray(segment, dtype=np.float64)
    freqs, p = power_spectrum(x, rate_hz)
    k = _bin_of(freqs, rate_hz, x.shape[0], fundamental_hz)
    band = _band(freqs, rate_hz, low_hz, high_hz)
    total = float(np.sum(p[band]))
    band[k] = False
    return float(np.sum(p[band])), total


def _db10(power):
    return 10 * math.log10(power) if power > 0 else -math.inf


def thd_n_db(segment, rate_hz, fundamental_hz=AES17_FREQUENCY_HZ, *,
             low_hz=MEASUREMENT_LOW_HZ, high_hz=MEASUREMENT_HIGH_HZ):
    """THD+N ratio in dB, AES17 style, of a coherent segment.

    The fundamental's bin is removed (an ideal notch) and the rest is summed over
    ``low_hz`` .. min(``high_hz``, rate/2); the result is relative to the whole band-limited
    signal (AES17-2015, THD+N ratio; clause number from memory, see the module notes).

    Parameters
    ----------
    segment : ndarray, 1-D
        A whole number of periods of every component (one second for whole-Hz tones).
    rate_hz : float
    fundamental_hz : float, optional
        Default is 997 Hz (AES17).
    low_hz, high_hz : float, optional
        Measurement bandwidth, default 20 Hz - 20 kHz.

    Returns
    -------
    float
        ``-inf`` for a perfectly pure tone.
    """
    resid, total = _notched(segment, rate_hz, fundamental_hz, low_hz, high_hz)
    if total <= 0:
        raise ParameterError("the segment carries no signal in the measurement band", "segment")
    return _db10(resid / total)


def residual_dbfs(segment, rate_hz, fundamental_hz=AES17_FREQUENCY_HZ, *,
                  low_hz=MEASUREMENT_LOW_HZ, high_hz=MEASUREMENT_HIGH_HZ):
    """Band-limited rms of what remains after notching the fundamental, in AES17 dBFS.

    On a 997 Hz tone at -60 dBFS this is the noise floor of the AES17 dynamic-range
    measurement; the dynamic range is its negative.
    """
    resid, _ = _notched(segment, rate_hz, fundamental_hz, low_hz, high_hz)
    return _db10(2 * resid)


def band_rms_dbfs(segment, rate_hz, *, low_hz=MEASUREMENT_LOW_HZ, high_hz=MEASUREMENT_HIGH_HZ):
    """rms of ``segment`` between ``low_hz`` and min(``high_hz``, rate/2) in AES17 dBFS
    (``low_hz=0, high_hz=inf`` gives the whole band)."""
    freqs, p = power_spectrum(segment, rate_hz)
    return _db10(2 * float(np.sum(p[_band(freqs, rate_hz, low_hz, high_hz)])))


def impulse_group_delay(y, rate_hz, impulse_at, *, passband_hz, half_width):
    """Group delay of an impulse response measured at the output, in output samples.

    Parameters
    ----------
    y : ndarray, 1-D
        The converter's output for an input holding a unit impulse.
    rate_hz : float
        Output rate.
    impulse_at : float
        Output-sample time of the input impulse (``position * up / down``; may be fractional).
    passband_hz : float
        The delay is the median of the group delay at 64 frequencies from 0 to this edge (the
        rule design.py applies to the taps).
    half_width : int
        Output samples used on either side of the impulse.

    Returns
    -------
    float
        Delay relative to the impulse (0 for an aligned linear-phase converter).
    """
    y = np.asarray(y, dtype=np.float64)
    c = int(math.floor(impulse_at))
    lo, hi = max(0, c - half_width), min(y.size, c + half_width + 1)
    freqs = np.linspace(0.0, passband_hz, 64)
    _, gd = signal.group_delay((y[lo:hi], [1.0]), w=freqs, fs=rate_hz)
    return float(np.median(gd)) + (lo - c) - float(impulse_at - c)


def equivalent_time_response(y, fs_in, fs_out, positions, *, half_width):
    """Merge the responses to several impulses into one finely sampled impulse response.

    The output sample n answers the impulse at input frame p at time n / fs_out - p / fs_in
    after it; impulses at frames with different ``p * up mod down`` sample the same response at
    different sub-sample offsets (equivalent-time sampling), so the merged points trace the
    response far more finely than one output-rate copy does.

    Returns
    -------
    times_s, h : ndarray
        Sorted times relative to the impulse and the response values there.
    """
    y = np.asarray(y, dtype=np.float64)
    ts, hs = [], []
    for p in positions:
        at = p * fs_out / fs_in
        c = int(math.floor(at))
        n = np.arange(max(0, c - half_width), min(y.size, c + half_width + 1))
        ts.append(n / fs_out - p / fs_in)
        hs.append(y[n])
    t = np.concatenate(ts)
    h = np.concatenate(hs)
    order = np.argsort(t, kind="stable")
    return t[order], h[order]


def prering_ms(times_s, h):
    """Time from the first point within 60 dB of the peak to the peak, in ms (the rule
    design.py applies to the taps)."""
    mag = np.abs(np.asarray(h, dtype=np.float64))
    if mag.size == 0:
        return 0.0
    peak = int(np.argmax(mag))
    above = np.nonzero(mag[:peak] >= mag[peak] * 10 ** (PRERING_THRESHOLD_DB / 20))[0]
    if above.size == 0:
        return 0.0
    return float((times_s[peak] - times_s[above[0]]) * 1000.0)


def _impulse_positions(n_in, start, spacing, up, down, count):
    """Input frames for the impulses: the first on a multiple of ``down`` (an output sample
    sits exactly on it), the others at sub-sample offsets spread over one output sample."""
    if down == 1:
        return [start]
    if down <= spacing:
        # each frame moves up to down - 1 past its slot: slots of spacing + down keep the
        # responses apart
        step = spacing + down
        count = max(1, min(count, (n_in - 2 * start) // step))
        inv = pow(up, -1, down)
        out = []
        for j in range(count):
            base = start + j * step
            r = int(round(j * down / count)) % down
            out.append(base + (r * inv - base) % down)
        return out
    # huge down (arbitrary-ratio path): frames spread over the signal have offsets
    # p up / down mod 1 spread over the sample; one sits on a multiple of down when it fits
    count = max(1, min(count, (n_in - 2 * start) // (2 * spacing)))
    grid = start + np.round(np.arange(count) * (n_in - 2 * start - 1) / max(count - 1, 1))
    grid = [int(v) for v in grid]
    exact = down * int(math.ceil(start / down))
    if exact <= n_in - start - 1:
        k = int(np.argmin([abs(v - exact) for v in grid]))
        grid.pop(k)
        grid.insert(0, exact)
    return grid


def alignment_from_lines(freqs_hz, measured, expected, *, max_lag_s):
    """Time offset (s) that maximises the cross-correlation of two line spectra.

    With measured lines Y_k and the analytic signal's lines X_k at f_k, the circular
    cross-correlation at lag s is R(s) = sum_k Re(Y_k conj(X_k) exp(j 2 pi f_k s)); its peak
    is the delay of the measured signal. R is searched on a fine grid within +-``max_lag_s``
    and refined between grid points (bounded scalar search on the exact trigonometric sum).
    """
    f = np.asarray(freqs_hz, dtype=np.float64)
    z = np.asarray(measured) * np.conj(np.asarray(expected))
    step = 1.0 / (6.0 * max(f.max(), 1.0))
    grid = np.arange(-max_lag_s, max_lag_s + step, step)
    r = np.empty(grid.size)
    for i in range(0, grid.size, 2048):
        g = grid[i:i + 2048]
        r[i:i + 2048] = np.real(np.exp(2j * np.pi * g[:, None] * f[None, :]) @ z)
    s0 = grid[int(np.argmax(r))]

    def neg(s):
        return -float(np.real(np.sum(z * np.exp(2j * np.pi * f * s))))

    res = optimize.minimize_scalar(neg, bounds=(s0 - step, s0 + step), method="bounded",
                                   options=dict(xatol=1e-13))
    return float(res.x)


def alignment_from_signals(y, reference, rate_hz, *, max_lag_samples):
    """Lag (in samples, fractional) at which ``y`` best matches ``reference``.

    The linear cross-correlation c(s) = sum_n y[n + s] reference[n] is computed by zero-padded
    FFTs; its peak within +-``max_lag_samples`` is refined between samples by evaluating the
    band-limited interpolation of c (its DFT sum) with a bounded scalar search.
    """
    y = np.asarray(y, dtype=np.float64)
    r = np.asarray(reference, dtype=np.float64)
    nfft = 1 << int(math.ceil(math.log2(y.size + r.size)))
    cross = np.fft.rfft(y, nfft) * np.conj(np.fft.rfft(r, nfft))
    c = np.fft.irfft(cross, nfft)
    lags = np.arange(-int(max_lag_samples), int(max_lag_samples) + 1)
    k0 = int(lags[int(np.argmax(c[lags % nfft]))])
    k = np.arange(cross.size)
    wgt = np.full(cross.size, 2.0)
    wgt[0] = 1.0
    wgt[-1] = 1.0

    def neg(s):
        return -float(np.real(np.sum(wgt * cross * np.exp(2j * np.pi * k * s / nfft))))

    res = optimize.minimize_scalar(neg, bounds=(k0 - 1.0, k0 + 1.0), method="bounded",
                                   options=dict(xatol=1e-9))
    return float(res.x)


def predicted_response(design_or_plan, freqs_hz):
    """Normalised complex response H(f) / gain of the design (product over a plan's stages)
    at ``freqs_hz``, where f is the frequency in the up-sampled (zero-stuffed) spectrum.

    Whole-Hz frequencies are grouped into clusters; a cluster dense enough is evaluated on a
    1 Hz grid by one chirp-z transform per stage (scipy.signal.zoom_fft, exact to rounding),
    the rest directly (:func:`~webapp.dsp.spectrum.response_at`).
    """
    f = np.atleast_1d(np.asarray(freqs_hz, dtype=np.float64))
    out = np.ones(f.size, dtype=np.complex128)
    if f.size == 0:
        return out
    stages = _stages(design_or_plan)
    if not np.all(f == np.round(f)):
        for s in stages:
            out *= response_at(s.taps, s.filter_rate_hz, f) / s.phases
        return out
    order = np.argsort(f, kind="stable")
    fs = f[order]
    cuts = np.nonzero(np.diff(fs) > CLUSTER_GAP_HZ)[0] + 1
    for idx in np.split(np.arange(fs.size), cuts):
        part = fs[idx]
        lo, hi = int(part[0]), int(part[-1])
        m = hi - lo + 1
        h = np.ones(part.size, dtype=np.complex128)
        for s in stages:
            taps = np.asarray(s.taps, dtype=np.float64)
            if m > 1 and m <= max(1 << 16, 64 * part.size) and part.size > 8:
                grid = signal.zoom_fft(taps, [lo, hi], m=m, fs=s.filter_rate_hz, endpoint=True)
                h *= grid[(part - lo).astype(np.int64)] / s.phases
            else:
                h *= response_at(taps, s.filter_rate_hz, part) / s.phases
        out[order[idx]] = h
    return out


# ------------------------------------------------------------------ tone plans

def _fold(freq, fs_out):
    """Frequency (array of ints) after sampling at fs_out, in 0 .. fs_out/2."""
    r = np.mod(freq, fs_out)
    return np.where(2 * r > fs_out, fs_out - r, r)


def _main_artefact(f, fs_in, fs_out, up):
    """Zero-stuffed frequency of each tone's main artefact, or -1 when it has none."""
    f = np.asarray(f, dtype=np.int64)
    alias = 2 * f > fs_out                         # the tone itself folds
    image = np.where(up > 1, fs_in - f, -1)        # first image, present when up > 1
    return np.where(alias, f, image)


def _place(targets, lo, hi, *, g, fs_in, fs_out, up, residue):
    """Snap target frequencies to whole Hz in [lo, hi] and share them out to runs.

    Residue mode: within a run, the classes min(f mod g, g - f mod g) differ, and 2 f mod g != 0
    (so no tone lands on DC, Nyquist or its own mirror). Key-bin mode (tiny g): within a run,
    fundamental and main-artefact bins differ and avoid DC and Nyquist.
    Returns a list of runs, each a sorted int array.
    """
    runs, keys = [], []
    used = set()
    for t in targets:
        base = int(round(t))
        placed = False
        for run_i in range(MAX_RUNS):
            if run_i == len(runs):
                runs.append([])
                keys.append(set())
            for off in (0, 1, -1, 2, -2, 3, -3):
                f = base + off
                if f < lo or f > hi or f in used:
                    continue
                if residue:
                    if (2 * f) % g == 0:
                        continue
                    c = f % g
                    key = {min(c, g - c)}
                else:
                    b = {int(_fold(f, fs_out))} if 2 * f < fs_out else set()
                    a = int(_main_artefact([f], fs_in, fs_out, up)[0])
                    if a >= 0:
                        b.add(int(_fold(a, fs_out)))
                    if any(v == 0 or 2 * v == fs_out for v in b):
                        continue
                    key = b
                if key & keys[run_i]:
                    continue
                runs[run_i].append(f)
                keys[run_i] |= key
                used.add(f)
                placed = True
                break
            if placed:
                break
    return [np.array(sorted(r), dtype=np.int64) for r in runs if r]


def _targets(lo, hi, n, edge_lo, edge_hi, n_edge):
    t = list(np.linspace(lo, hi, n))
    if n_edge and edge_hi > edge_lo:
        t += list(np.linspace(edge_lo, edge_hi, n_edge))
    return sorted(set(t))


def _class_bins(f, g, fs_out):
    """Output bins (0 .. fs_out/2) where a tone at f can make lines: +-f mod g."""
    r = int(f) % g
    top = fs_out // 2
    a = np.arange(r, top + 1, g)
    b = np.arange(g - r, top + 1, g) if r else np.empty(0, dtype=np.int64)
    return np.unique(np.concatenate([a, b]).astype(np.int64))


def _level_db(ratio):
    with np.errstate(divide="ignore"):
        v = 20 * np.log10(np.asarray(ratio, dtype=np.float64))
    return np.maximum(v, FLOOR_DB)


# ------------------------------------------------------------------ the audit

def _artefact_lines(f0, fs_in, fs_out, up, low_hz, high_hz):
    """The lines a tone at f0 makes in the band besides itself, as frequencies of the
    zero-stuffed spectrum 0 .. up fs_in / 2 (k fs_in +- f0), folded at fs_out by the output
    sampling (the polyphase model of the converter)."""
    k = np.arange(0, up + 1, dtype=np.int64)
    nu = np.concatenate([k * fs_in + int(f0), k[1:] * fs_in - int(f0)])
    nu = nu[(nu >= 0) & (2 * nu <= up * fs_in) & (nu != int(f0))]
    b = _fold(nu, fs_out)
    return np.unique(nu[(b >= low_hz) & (b <= min(high_hz, fs_out / 2))])


def _comb_response(stage, fs_in, f0, k):
    """Normalised response of one stage at k fs_in + f0 (k an int array, f0 may be negative).

    When the stage's filter rate F is Q fs_in (Q whole), H(f0 + k fs_in) is the length-Q DFT of
    the taps modulated by f0 and folded modulo Q: O(N + Q log Q) instead of O(N len(k)).
    """
    taps = np.asarray(stage.taps, dtype=np.float64)
    q = stage.filter_rate_hz / fs_in
    if float(q).is_integer() and q >= 1:
        q = int(q)
        n = np.arange(taps.size)
        g = taps * np.exp(-2j * np.pi * f0 * n / stage.filter_rate_hz)
        folded = np.zeros(q, dtype=np.complex128)
        np.add.at(folded, n % q, g)
        return np.fft.fft(folded)[np.mod(k, q)] / stage.phases
    return response_at(taps, stage.filter_rate_hz, k * fs_in + f0) / stage.phases


def _predicted_line_db(d, f, bin_hz, fs_in, fs_out, up):
    """Level the response predicts for the line(s) a tone at f makes at output bin ``bin_hz``
    (power sum when several coincide); None when the tone has too many lines to list."""
    if up > 100_000:
        return None
    k = np.arange(0, up + 1, dtype=np.int64)
    nu = np.concatenate([k * fs_in + int(f), k[1:] * fs_in - int(f)])
    nu = nu[(nu >= 0) & (2 * nu <= up * fs_in) & (nu != int(f) if 2 * f < fs_out else True)]
    nu = np.unique(nu[_fold(nu, fs_out) == int(bin_hz)])
    if nu.size == 0:
        return None
    h = np.abs(predicted_response(d, nu.astype(np.float64)))
    return float(_level_db(math.sqrt(float(np.sum(h ** 2)))))


def _predicted_thd_n_db(d, f0, fs_in, nu):
    """THD+N the design's response predicts: its lines at ``nu`` against the fundamental.

    None on the arbitrary-ratio path, whose coefficient interpolation is not the plain
    up-filter-down model the lines come from."""
    if any(s.path != "polyphase" for s in _stages(d)):
        return None
    nu = np.asarray(nu, dtype=np.int64)
    k = nu // fs_in
    plus = nu - k * fs_in == int(f0)
    h_lines = np.ones(nu.size, dtype=np.complex128)
    h0 = 1.0 + 0j
    for s in _stages(d):
        work = np.asarray(s.taps).size * (nu.size + 1)
        if not float(s.filter_rate_hz / fs_in).is_integer() and work > MAX_PREDICTED_MACS:
            return None
        h0 *= _comb_response(s, fs_in, float(f0), np.array([0]))[0]
        if plus.any():
            h_lines[plus] *= _comb_response(s, fs_in, float(f0), k[plus])
        if (~plus).any():
            h_lines[~plus] *= _comb_response(s, fs_in, -float(f0), k[~plus] + 1)
    art = float(np.sum(np.abs(h_lines) ** 2))
    return _db10(art / (abs(h0) ** 2 + art))


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
    d = design_or_plan
    stages = _stages(d)
    mask = d.mask if mask is None else mask
    fs_in, fs_out, up, down = int(d.fs_in), int(d.fs_out), int(d.up), int(d.down)
    g = math.gcd(fs_in, fs_out)
    direction = "down" if fs_out < fs_in else "up" if fs_out > fs_in else "same"
    arithmetic = str(stages[-1].spec.arithmetic)
    phase = str(d.spec.phase)
    nyq_out, nyq_in = fs_out / 2.0, fs_in / 2.0
    fp = float(mask.passband_hz)
    fst = float(mask.stopband_hz)

    span_s = settle_time_s(d)
    margin = int(math.ceil(span_s * fs_in)) + 4
    n_in = fs_in + 2 * margin
    seg_start_s = margin / fs_in
    n0 = int(math.ceil(seg_start_s * fs_out - 1e-9))
    half_out = int(math.ceil(span_s * fs_out)) + 4

    # ---- tone plans
    capacity = (g - 1) // 2
    residue = capacity >= RESIDUE_MIN_CAPACITY
    separation = "residue" if residue else "key-bins"
    place = dict(g=g, fs_in=fs_in, fs_out=fs_out, up=up, residue=residue)
    low_edge = MEASUREMENT_LOW_HZ if fp > 4 * MEASUREMENT_LOW_HZ else max(1.0, fp / 20)
    if direction == "up":
        top = math.ceil(nyq_in) - 1
        band_runs = _place(_targets(low_edge, top, PASS_TONES, 0.9 * fp, top, EDGE_TONES)
                           + [math.floor(fp), fs_in - math.ceil(fst)], 1, top, **place)
        stop_runs = []
    else:
        band_runs = _place(_targets(low_edge, fp, PASS_TONES, 0.9 * fp, fp, EDGE_TONES)
                           + [math.floor(fp)], 1, math.floor(fp), **place)
        stop_runs = []
        if direction == "down":
            lo, hi = math.floor(nyq_out) + 1, math.ceil(nyq_in) - 1
            edge_hi = min(hi, fst + 0.1 * (nyq_in - fst))
            stop_runs = _place(_targets(lo, hi, STOP_TONES, fst, edge_hi, EDGE_TONES)
                               + [math.ceil(fst)], lo, hi, **place)

    # ---- the fundamental (997 Hz unless the passband is too narrow)
    f0 = AES17_FREQUENCY_HZ if AES17_FREQUENCY_HZ <= 0.5 * fp else float(max(1, int(fp / 4)))

    # ---- channels
    cols, runs_meta = [], []
    cols.append(tone(fs_in, f0, level_dbfs=TONE_LEVEL_DBFS, frames=n_in))
    cols.append(_word_length(tone(fs_in, f0, level_dbfs=LOW_LEVEL_DBFS, frames=n_in), fs_in,
                             dither=dither, bits=bits, seed=seed))
    quiet = _word_length(np.zeros(n_in), fs_in, dither=dither, bits=bits, seed=seed + 1)
    cols.append(quiet)
    spacing = 2 * int(math.ceil(span_s * fs_in)) + 16
    imp_pos = _impulse_positions(n_in, 2 * margin, spacing, up, down, IMPULSES)
    x_imp = np.zeros(n_in)
    x_imp[imp_pos] = 1.0
    cols.append(x_imp)
    sweep_args = (n_in / fs_in, 20.0 if nyq_in > 200 else nyq_in / 10, nyq_in, 0.005)
    cols.append(10 ** (TONE_LEVEL_DBFS / 20) * _sweep_at(np.arange(n_in) / fs_in, *sweep_args))
    for family, runs in (("band", band_runs), ("stop", stop_runs)):
        for freqs in runs:
            x, amps, ph = _multitone(fs_in, freqs, n_in, TONE_LEVEL_DBFS, None, None)
            runs_meta.append((family, freqs, amps, ph, len(cols)))
            cols.append(x)
    X = np.stack(cols, axis=1)
    Y = convert_channels(d, X)
    seg = Y[n0:n0 + fs_out]

    # ---- AES17 figures
    band_hi = min(MEASUREMENT_HIGH_HZ, nyq_out)
    thd = thd_n_db(seg[:, 0], fs_out, f0)
    noise_floor = residual_dbfs(seg[:, 1], fs_out, f0)
    idle = band_rms_dbfs(seg[:, 2], fs_out)
    idle_full = band_rms_dbfs(seg[:, 2], fs_out, low_hz=0.0, high_hz=math.inf)
    src_idle = band_rms_dbfs(quiet[margin:margin + fs_in], fs_in, low_hz=0.0, high_hz=math.inf)
    lines_nu = _artefact_lines(f0, fs_in, fs_out, up, MEASUREMENT_LOW_HZ, band_hi)
    count = int(lines_nu.size)
    thd_pred = _predicted_thd_n_db(d, f0, fs_in, lines_nu)
    floor_rel = 10 ** (-ARITHMETIC_FLOOR_DB.get(arithmetic, 250.0) / 10)
    thd_limit = 10 * math.log10(count * 10 ** (-mask.attenuation_db / 10) + floor_rel)

    # ---- tone runs: one line spectrum per run channel
    lines = line_spectrum(seg[:, [m[4] for m in runs_meta]], fs_out)[1] if runs_meta else None
    dev_f, dev_y, dev_x = [], [], []
    al_f, al_out, al_main, al_worst, al_worst_bin = [], [], [], [], []
    for j, (family, freqs, amps, ph, _) in enumerate(runs_meta):
        col = lines[:, j]
        for f, a, p in zip(freqs, amps, ph):
            f = int(f)
            if family == "band" and f <= fp:
                dev_f.append(f)
                dev_y.append(col[f])
                dev_x.append(a * np.exp(1j * (p + 2 * np.pi * ((n0 * f) % fs_out) / fs_out)))
            art = int(_main_artefact([f], fs_in, fs_out, up)[0])
            if direction == "same" or art < 0:
                continue
            b_main = int(_fold(art, fs_out))
            b_worst = b_main
            if residue:
                bins = _class_bins(f, g, fs_out)
                if 2 * f < fs_out:
                    bins = bins[bins != f]
                b_worst = int(bins[int(np.argmax(np.abs(col[bins])))])
            al_f.append(f)
            al_out.append(b_main)
            al_main.append(abs(col[b_main]) / a)
            al_worst.append(abs(col[b_worst]) / a)
            al_worst_bin.append(b_worst)
    order = np.argsort(dev_f)
    dev_f = np.asarray(dev_f, dtype=np.float64)[order]
    dev_y = np.asarray(dev_y)[order]
    dev_x = np.asarray(dev_x)[order]
    h_pass = predicted_response(d, dev_f)
    dev_db = _level_db(np.abs(dev_y) / np.abs(dev_x))
    dev_pred_db = _level_db(np.abs(h_pass))
    order = np.argsort(al_f)
    al_worst_bin = np.asarray(al_worst_bin, dtype=np.int64)[order]
    al_f = np.asarray(al_f, dtype=np.float64)[order]
    al_out = np.asarray(al_out, dtype=np.float64)[order]
    al_db = _level_db(np.asarray(al_main)[order])
    al_worst_db = _level_db(np.asarray(al_worst)[order])
    if al_f.size:
        nu = _main_artefact(al_f.astype(np.int64), fs_in, fs_out, up).astype(np.float64)
        al_pred_db = _level_db(np.abs(predicted_response(d, nu)))
        al_stop = nu >= fst - 1e-9
    else:
        al_pred_db = np.empty(0)
        al_stop = np.zeros(0, dtype=bool)

    if al_stop.any():
        idx = np.nonzero(al_stop)[0]
        k = idx[int(np.argmax(al_worst_db[idx]))]
        worst_alias = float(al_worst_db[k])
        worst_in, worst_out = float(al_f[k]), float(al_worst_bin[k])
        worst_pred = _predicted_line_db(d, int(al_f[k]), worst_out, fs_in, fs_out, up)
        if worst_pred is None:
            worst_pred = float(al_pred_db[k])
        design_stop = -float(d.measured.stopband_attenuation_db)
    else:
        worst_alias = worst_in = worst_out = worst_pred = design_stop = None

    # ---- time: alignment (multitone and sweep), impulse
    lag_s = span_s + 2.0 / min(fs_in, fs_out)
    align_s = alignment_from_lines(dev_f, dev_y, dev_x, max_lag_s=lag_s)
    f_gate_hi = 0.9 * min(fp, nyq_out)
    t_a = _sweep_frequency_time(max(2 * sweep_args[1], 40.0), *sweep_args[:3])
    t_b = _sweep_frequency_time(f_gate_hi, *sweep_args[:3])
    t_out = np.arange(Y.shape[0]) / fs_out
    gate = np.zeros_like(t_out)
    inside = (t_out >= t_a) & (t_out <= t_b)
    if t_b > t_a and inside.sum() > 8:
        u = (t_out[inside] - t_a) / (t_b - t_a)
        gate[inside] = signal.windows.tukey(2001, 0.2)[np.round(u * 2000).astype(int)]
        ref = gate * 10 ** (TONE_LEVEL_DBFS / 20) * _sweep_at(t_out, *sweep_args)
        sweep_align = alignment_from_signals(Y[:, 4], ref, fs_out,
                                             max_lag_samples=math.ceil(lag_s * fs_out))
    else:
        sweep_align = math.nan
    resid_samples = impulse_group_delay(Y[:, 3], fs_out, imp_pos[0] * up / down,
                                        passband_hz=min(fp, 0.999 * nyq_out),
                                        half_width=half_out)
    imp_t, imp_h = equivalent_time_response(Y[:, 3], fs_in, fs_out, imp_pos,
                                            half_width=half_out)
    prering = prering_ms(imp_t, imp_h)
    removed_s = sum(s.delay_samples / s.filter_rate_hz for s in stages)
    resid_ms = resid_samples / fs_out * 1000.0
    group_delay = removed_s * 1000.0 + resid_ms
    peak = np.max(np.abs(imp_h)) if imp_h.size else 1.0
    imp_h = imp_h / peak
    imp_db = _level_db(np.abs(imp_h))

    # ---- verdict
    dev_worst = float(np.max(np.abs(dev_db))) if dev_db.size else math.nan
    dev_pred = float(np.max(np.abs(dev_pred_db))) if dev_pred_db.size else math.nan
    rows = [VerdictRow("passband deviation", dev_worst, float(mask.ripple_db),
                       bool(dev_worst <= mask.ripple_db), "dB",
                       f"largest |gain| error over {dev_f.size} tones up to {fp:g} Hz must stay "
                       f"within the mask's ripple")]
    if worst_alias is not None:
        name = "worst alias" if direction == "down" else "worst image"
        which = ("tones above the target Nyquist (and, with up > 1, images of in-band tones)"
                 if direction == "down" else "in-band tones")
        rows.append(VerdictRow(name, worst_alias, -float(mask.attenuation_db),
                               bool(worst_alias <= -mask.attenuation_db), "dB",
                               f"largest line that {which} make in the output band from the "
                               "stopband, relative to the tone, must stay below the mask's "
                               "stopband level"))
    rows.append(VerdictRow(
        "THD+N", thd, thd_limit, bool(thd <= thd_limit), "dB",
        f"{f0:g} Hz at {TONE_LEVEL_DBFS:g} dBFS, AES17 style; each of the {count} alias/image "
        f"lines it makes in {MEASUREMENT_LOW_HZ:g} Hz - {band_hi:g} Hz may reach "
        f"-{mask.attenuation_db:g} dB, plus {arithmetic} rounding"))
    if phase == "linear":
        rows.append(VerdictRow(
            "time alignment", abs(align_s * fs_out), ALIGNMENT_LIMIT_SAMPLES,
            bool(abs(align_s * fs_out) <= ALIGNMENT_LIMIT_SAMPLES), "output samples",
            "a linear-phase conversion puts output n at time n / fs_out of the input"))
    else:
        err = abs(group_delay - float(d.latency_ms)) / 1000.0 * fs_out
        rows.append(VerdictRow(
            "reported latency", err, 1.0, bool(err <= 1.0), "output samples",
            "measured group delay must match the design's reported latency within a sample"))
    passes = all(r.passes for r in rows)

    return AuditResult(
        fs_in=fs_in, fs_out=fs_out, up=up, down=down, direction=direction, phase=phase,
        arithmetic=arithmetic, dither=dither, bits=bits,
        separation=separation,
        passband_deviation_db=dev_worst, passband_deviation_predicted_db=dev_pred,
        worst_alias_db=worst_alias, worst_alias_input_hz=worst_in,
        worst_alias_output_hz=worst_out, worst_alias_predicted_db=worst_pred,
        design_stopband_db=design_stop,
        thd_n_db=thd, thd_n_limit_db=thd_limit, thd_n_predicted_db=thd_pred, fundamental_hz=f0,
        noise_floor_dbfs=noise_floor, dynamic_range_db=-noise_floor,
        idle_noise_dbfs=idle, idle_noise_full_dbfs=idle_full, source_idle_noise_dbfs=src_idle,
        group_delay_ms=group_delay, group_delay_predicted_ms=float(d.latency_ms),
        residual_delay_ms=resid_ms, prering_ms=prering,
        prering_predicted_ms=getattr(d, "prering_ms", None),
        alignment_error_samples=align_s * fs_out, alignment_error_us=align_s * 1e6,
        sweep_alignment_samples=sweep_align,
        deviation_hz=dev_f, deviation_db=dev_db, deviation_predicted_db=dev_pred_db,
        alias_input_hz=al_f, alias_output_hz=al_out, alias_db=al_db, alias_worst_db=al_worst_db,
        alias_predicted_db=al_pred_db, alias_in_stopband=al_stop,
        impulse_ms=imp_t * 1000.0, impulse_response=imp_h, impulse_db=imp_db,
        verdict=rows, passes=passes, audit_ms=(time.perf_counter() - t0) * 1000.0,
    )
