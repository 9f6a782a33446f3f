"""Programme loudness (ITU-R BS.1770-4, EBU R 128), measured in a stream.

Conventions: data is frames x channels, float; levels are in LUFS (= LKFS) and LU. Silence, or
a programme too short for one measuring block, reads ``-inf`` (the JSON layer maps it to null);
an undefined loudness range reads ``nan``. The true peak is :mod:`webapp.dsp.truepeak`.

The meter keeps its own state between blocks, so any split of the programme into blocks gives
the same figures, and its memory does not grow with duration beyond one float per 100 ms.

References
----------
ITU-R BS.1770-4 (10/2015), "Algorithms to measure audio programme loudness and true-peak audio
level": K-weighting table (Annex 1, 48 kHz), channel weights, gating (400 ms blocks, 75 % overlap,
-70 LKFS absolute gate, -10 LU relative gate).
EBU Tech 3341 ("EBU Mode" metering: momentary 400 ms, short-term 3 s) and EBU Tech 3342
(loudness range: 3 s short-term values, -70 LUFS absolute and -20 LU relative gates, 10th to 95th
percentile).
"""

from array import array
from dataclasses import dataclass
import math

from functools import lru_cache

import numpy as np
from scipy import optimize, signal

from .errors import ParameterError
from .frames import as_frames, validate_channels
from .rates import validate_rate

__all__ = ["MIN_LOUDNESS_RATE_HZ", "k_weighting", "default_channel_weights", "LoudnessResult",
           "LoudnessMeter", "integrated_loudness"]

# ---------------------------------------------------------------------------------------------
# K-weighting
# ---------------------------------------------------------------------------------------------

# BS.1770-4 Annex 1, Tables 1 and 2: the two K-weighting biquads at 48 kHz (confirmed).
_STAGE1_48K_B = (1.53512485958697, -2.69169618940638, 1.19839281085285)
_STAGE1_48K_A = (1.0, -1.69065929318241, 0.73248077421585)
_STAGE2_48K_B = (1.0, -2.0, 1.0)
_STAGE2_48K_A = (1.0, -1.99004745483398, 0.99007225036621)
_TABLE_RATE_HZ = 48000

# Below this rate the 1.7 kHz shelf of the K-weighting comes too close to Nyquist to mean much.
MIN_LOUDNESS_RATE_HZ = 8000

# BS.1770-4 eq. (2): L = -0.691 + 10 log10(sum G_i z_i); the constant cancels the K-weighting
# gain at 997 Hz.
_LOUDNESS_OFFSET_DB = -0.691


def _denominator_prototype(a, rate_hz):
    """Invert the pre-warped bilinear transform of a monic biquad denominator.

    For s normalised to w0 and K = tan(pi f0 / fs), the denominator of the bilinear image of
    ``s^2 + s/Q + 1`` is ``(1 + K/Q + K^2) + 2(K^2 - 1) z^-1 + (1 - K/Q + K^2) z^-2``. Returns
    ``(f0_hz, q, a0)`` where ``a0 = 1 + K/Q + K^2`` is the normalisation that made ``a[0] = 1``.
    """
    _, a1, a2 = a
    k = math.sqrt((1.0 + a1 + a2) / (1.0 - a1 + a2))
    a0 = 4.0 / (1.0 - a1 + a2)
    q = k / ((1.0 - a2) * a0 / 2.0)
    return rate_hz / math.pi * math.atan(k), q, a0


def _shelf_prototype():
    """Analog high shelf ``(Vh s^2 + Vb s/Q + 1) / (s^2 + s/Q + 1)`` behind BS.1770 stage 1."""
    f0, q, a0 = _denominator_prototype(_STAGE1_48K_A, _TABLE_RATE_HZ)
    b0, b1, b2 = _STAGE1_48K_B
    k_over_q = math.tan(math.pi * f0 / _TABLE_RATE_HZ) / q
    vh = (b0 - b1 + b2) * a0 / 4.0          # gain at s -> infinity (z = -1)
    vb = (b0 - b2) * a0 / (2.0 * k_over_q)  # the middle term of the numerator
    return f0, q, vh, vb


def _highpass_prototype():
    """Analog high-pass ``g s^2 / (s^2 + s/Q + 1)`` behind BS.1770 stage 2 (the RLB curve).

    The table keeps the numerator ``1, -2, 1`` unnormalised, which puts ``g = a0(48 kHz)``
    (about 1.005, +0.043 dB) into the prototype; we keep that gain at every rate, so the
    response (and the -0.691 dB constant tuned to it) stays the one the table gives at 48 kHz.
    """
    f0, q, a0 = _denominator_prototype(_STAGE2_48K_A, _TABLE_RATE_HZ)
    gain = _STAGE2_48K_B[0] * a0
    return f0, q, gain


_SHELF = _shelf_prototype()
_HIGHPASS = _highpass_prototype()


# Below this rate the bilinear transform's warping moves the shelf by more than 0.01 dB, so the
# two biquads are refined by a fit to the 48 kHz table's response (see k_weighting).
_FIT_BELOW_HZ = 44100
_FIT_POINTS = 600
_FIT_LOW_HZ = 10.0
_FIT_TOP_FRACTION = 0.45


def k_weighting(rate_hz):
    """Second-order sections of the BS.1770 K-weighting at ``rate_hz``.

    Parameters
    ----------
    rate_hz : int
        Sample rate, at least 8000 Hz.

    Returns
    -------
    sos : ndarray, shape (2, 6)
        Stage 1 (high shelf, the head's acoustic effect) then stage 2 (RLB high-pass), each row
        ``b0, b1, b2, 1, a1, a2`` as :func:`scipy.signal.sosfilt` takes them.

    Raises
    ------
    ParameterError
        If the rate is not a whole number of Hz from 8000 to 768000.

    Notes
    -----
    BS.1770-4 gives the coefficients at 48 kHz only and asks other rates for the same response.
    Both analog prototypes (f0, Q and gains) are recovered exactly from the published 48 kHz
    table by inverting the bilinear transform pre-warped at each section's f0 (stage 1: about
    1681.97 Hz, Q 0.7072, +4.00 dB; stage 2: about 38.14 Hz, Q 0.5003), then mapped to
    ``rate_hz`` by the bilinear transform pre-warped at the same f0. At 48 kHz this returns the
    table itself; from 44.1 kHz up the warping leaves, up to 0.45 fs (at most 20 kHz), a
    deviation from the 48 kHz response of at most 0.01 dB. Stage 2 keeps the table's
    high-frequency gain of about +0.043 dB at every rate (see ``_highpass_prototype``).

    Below 44.1 kHz the shelf at 1.7 kHz comes close to Nyquist and the bilinear design
    deviates by up to 0.3 dB near 2.7 kHz at 8 kHz (0.07 dB at 16 kHz): speech measured at
    8 kHz read about 0.1 LU high. There the ten coefficients are refined, starting from the
    bilinear design, by a least-squares fit (``scipy.optimize.least_squares``) of the log
    magnitude to the 48 kHz table's response on 600 log-spaced points from 10 Hz to 0.45 fs:
    the deviation drops to 0.012 dB at 8 kHz, 0.0012 dB at 16 kHz and 0.0003 dB at 22.05 kHz
    (poles checked inside the unit circle). Phase is not matched; loudness only needs magnitude.
    """
    return _k_weighting(_validate_loudness_rate(rate_hz)).copy()


@lru_cache(maxsize=32)
def _k_weighting(rate):
    sos = _bilinear_k_weighting(rate)
    if rate < _FIT_BELOW_HZ:
        sos = _fitted_k_weighting(sos, rate)
    return sos


def _bilinear_k_weighting(rate):
    f0, q, vh, vb = _SHELF
    k = math.tan(math.pi * f0 / rate)
    a0 = 1.0 + k / q + k * k
    stage1 = [(vh + vb * k / q + k * k) / a0, 2.0 * (k * k - vh) / a0, (vh - vb * k / q + k * k) / a0,
              1.0, 2.0 * (k * k - 1.0) / a0, (1.0 - k / q + k * k) / a0]
    f0, q, gain = _HIGHPASS
    k = math.tan(math.pi * f0 / rate)
    a0 = 1.0 + k / q + k * k
    g = gain / a0
    stage2 = [g, -2.0 * g, g, 1.0, 2.0 * (k * k - 1.0) / a0, (1.0 - k / q + k * k) / a0]
    return np.array([stage1, stage2], dtype=np.float64)


def _fitted_k_weighting(start, rate):
    """Refine ``start`` (2 x 6 sos) so its log magnitude fits the 48 kHz table's."""
    freqs = np.geomspace(_FIT_LOW_HZ, _FIT_TOP_FRACTION * rate, _FIT_POINTS)
    _, reference = signal.sosfreqz(_bilinear_k_weighting(_TABLE_RATE_HZ), worN=freqs, fs=_TABLE_RATE_HZ)
    target = 20.0 * np.log10(np.abs(reference))

    def sections(p):
        return np.array([[p[0], p[1], p[2], 1.0, p[3], p[4]], [p[5], p[6], p[7], 1.0, p[8], p[9]]])

    def error(p):
        _, h = signal.sosfreqz(sections(p), worN=freqs, fs=rate)
        return 20.0 * np.log10(np.abs(h)) - target

    p0 = np.r_[start[0, :3], start[0, 4:], start[1, :3], start[1, 4:]]
    fit = optimize.least_squares(error, p0, x_scale="jac", xtol=1e-15, ftol=1e-15, gtol=1e-15)
    sos = sections(fit.x)
    for row in sos:
        if np.abs(np.roots(row[3:])).max() >= 1.0:   # never expected; keep the stable start
            return start
    return sos


def _validate_loudness_rate(rate_hz):
    rate = validate_rate(rate_hz, field="rate_hz")
    if rate < MIN_LOUDNESS_RATE_HZ:
        raise ParameterError(
            f"rate_hz must be at least {MIN_LOUDNESS_RATE_HZ} Hz for loudness metering (the "
            f"K-weighting shelf sits at 1.7 kHz), got {rate}", "rate_hz")
    return rate


def default_channel_weights(channels):
    """BS.1770-4 channel weights G_i for a channel count, in WAV channel order.

    Mono and stereo: 1 each. Five channels (L, R, C, Ls, Rs): 1, 1, 1, 1.41, 1.41. Six channels
    (5.1: L, R, C, LFE, Ls, Rs): the same with the LFE channel excluded (weight 0). BS.1770-4
    gives no weights for other counts; they get 1 for every channel (pass ``weights`` to the
    meter to say otherwise).
    """
    channels = validate_channels(channels)
    if channels == 5:
        return (1.0, 1.0, 1.0, 1.41, 1.41)
    if channels == 6:
        return (1.0, 1.0, 1.0, 0.0, 1.41, 1.41)
    return (1.0,) * channels


def _validate_weights(weights, channels):
    if weights is None:
        return np.array(default_channel_weights(channels), dtype=np.float64)
    try:
        values = np.array(weights, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise ParameterError(f"weights must be {channels} numbers, one per channel, got {weights!r}",
                             "weights") from None
    if values.size != channels or not np.all(np.isfinite(values)) or np.any(values < 0) \
            or not np.any(values > 0):
        raise ParameterError(
            f"weights must be {channels} finite numbers >= 0, one per channel, not all 0, "
            f"got {weights!r}", "weights")
    return values


# ---------------------------------------------------------------------------------------------
# Loudness meter
# ---------------------------------------------------------------------------------------------

_STEPS_PER_SECOND = 10        # everything is built from 100 ms steps
_MOMENTARY_STEPS = 4          # 400 ms gating / momentary block, hop 100 ms (75 % overlap)
_SHORT_TERM_STEPS = 30        # 3 s short-term block, hop 100 ms (Tech 3342's minimum 10 Hz rate)
_ABSOLUTE_GATE_LUFS = -70.0   # BS.1770-4 and Tech 3342
_RELATIVE_GATE_LU = -10.0     # BS.1770-4
_LRA_RELATIVE_GATE_LU = -20.0  # Tech 3342
_LRA_PERCENTILES = (10.0, 95.0)  # Tech 3342


@dataclass(frozen=True)
class LoudnessResult:
    """Loudness figures of everything a :class:`LoudnessMeter` has seen.

    Attributes
    ----------
    integrated_lufs : float
        Gated programme loudness (BS.1770-4); ``-inf`` for silence or less than 400 ms.
    loudness_range_lu : float
        EBU Tech 3342 loudness range; ``nan`` when no 3 s block passes the gates.
    max_momentary_lufs : float
        Highest 400 ms loudness (hop 100 ms); ``-inf`` if shorter than 400 ms.
    max_short_term_lufs : float
        Highest 3 s loudness (hop 100 ms); ``-inf`` if shorter than 3 s.
    duration_s : float
        Frames seen divided by the rate.
    """

    integrated_lufs: float
    loudness_range_lu: float
    max_momentary_lufs: float
    max_short_term_lufs: float
    duration_s: float


class LoudnessMeter:
    """Streaming BS.1770-4 / EBU R 128 loudness meter.

    Parameters
    ----------
    rate_hz : int
        Sample rate, 8000 to 768000 Hz.
    channels : int
        Number of channels of every block.
    weights : sequence of float, optional
        Channel weights G_i. Default is :func:`default_channel_weights` (1 for mono and stereo;
        1, 1, 1, 1.41, 1.41 for 5.0; the LFE of 5.1 excluded).

    Notes
    -----
    Each block is K-weighted with :func:`scipy.signal.sosfilt` (state carried between blocks,
    vectorised over channels), squared, weighted by G_i and summed over channels; the sums are
    kept per 100 ms step (step k covers frames ``k fs // 10`` to ``(k+1) fs // 10``), which is the
    only memory that grows: 36 000 floats an hour. Gating blocks, momentary and short-term
    values are windows of 4 and 30 steps. Frames past the last whole step wait for the next
    block, so the sums (and the figures) do not depend on how the programme is split.
    Cost: two biquads and one multiply-add per sample and channel.
    """

    def __init__(self, *, rate_hz, channels, weights=None):
        self.rate_hz = _validate_loudness_rate(rate_hz)
        self.channels = validate_channels(channels)
        self.weights = _validate_weights(weights, self.channels)
        self._sos = k_weighting(self.rate_hz)
        self._zi = np.zeros((self._sos.shape[0], self.channels, 2))
        self._used = np.flatnonzero(self.weights > 0)
        self._frames = 0
        self._pending = np.zeros(0)      # weighted squares of the unfinished 100 ms step
        self._steps = array("d")         # weighted sum of squares of every whole 100 ms step

    def _step_edge(self, k):
        """First frame of 100 ms step ``k`` (integer arithmetic: no drift over hours)."""
        return (k * self.rate_hz) // _STEPS_PER_SECOND

    def process(self, block, *, checked=False):
        """Measure one block of frames x channels (float); returns nothing.

        ``checked=True`` skips the shape and finiteness checks: for a caller whose blocks are
        finite float frames x channels already (:func:`webapp.media.read_blocks` checks what it
        reads), the checks would be two more passes over every block."""
        x = block if checked else as_frames(block, self.channels)
        if x.shape[0] == 0:
            return
        # channel-major in and out (axis -1): the filter's own copy is the only one, and the
        # squares below run over contiguous rows; the state is sections x channels x 2
        y, self._zi = signal.sosfilt(self._sos, x.T, axis=-1, zi=self._zi)
        # weighted sum of squares per frame, channel by channel in a fixed order (in place:
        # w * (y * y), summed from channel 0 up, the same figures as a plain expression)
        power = None
        for c in self._used:
            row = y[c]
            np.multiply(row, row, out=row)
            row *= self.weights[c]
            if power is None:
                power = row
            else:
                power += row
        self._frames += x.shape[0]
        k0 = len(self._steps)
        # steps k0 .. k1 - 1 are now complete; data starts at the first frame of step k0
        k1 = (self._frames * _STEPS_PER_SECOND) // self.rate_hz
        data = np.concatenate([self._pending, power]) if self._pending.size else power
        if k1 > k0:
            edges = self._step_edge(np.arange(k0, k1 + 1)) - self._step_edge(k0)
            self._steps.frombytes(np.add.reduceat(data[:edges[-1]], edges[:-1]).tobytes())
            self._pending = data[edges[-1]:].copy()
        else:
            self._pending = data.copy()

    def short_term_lufs(self):
        """Short-term (3 s) loudness of every window so far, hop 100 ms (EBU Tech 3341):
        value i covers the 30 steps from ``i / 10`` s, so it ends at ``(i + 30) / 10`` s."""
        steps = np.array(self._steps, dtype=np.float64)
        return _window_loudness(steps, self._step_edge(np.arange(steps.size + 1)),
                                _SHORT_TERM_STEPS)

    def result(self):
        """Return the :class:`LoudnessResult` of all blocks so far (the meter keeps running)."""
        steps = np.array(self._steps, dtype=np.float64)
        edges = self._step_edge(np.arange(steps.size + 1))
        momentary = _window_loudness(steps, edges, _MOMENTARY_STEPS)
        short_term = _window_loudness(steps, edges, _SHORT_TERM_STEPS)
        return LoudnessResult(
            integrated_lufs=_gated_loudness(momentary),
            loudness_range_lu=_loudness_range(short_term),
            max_momentary_lufs=float(momentary.max()) if momentary.size else -math.inf,
            max_short_term_lufs=float(short_term.max()) if short_term.size else -math.inf,
            duration_s=self._frames / self.rate_hz,
        )


def _window_loudness(steps, edges, width):
    """Loudness of every window of ``width`` consecutive steps (hop one step)."""
    if steps.size < width:
        return np.zeros(0)
    sums = np.lib.stride_tricks.sliding_window_view(steps, width).sum(axis=1)
    lengths = edges[width:] - edges[:-width]
    with np.errstate(divide="ignore"):
        return _LOUDNESS_OFFSET_DB + 10.0 * np.log10(sums / lengths)


def _power_mean_loudness(loudness):
    """Loudness of the mean power of blocks given by their loudness (BS.1770-4 eqs. 5-7)."""
    return 10.0 * math.log10(np.mean(10.0 ** (loudness / 10.0)))


def _gated_loudness(blocks):
    """BS.1770-4 eqs. (5)-(7): absolute gate, relative gate, power mean of what is left."""
    above = blocks[blocks > _ABSOLUTE_GATE_LUFS]
    if above.size == 0:
        return -math.inf
    relative_gate = _power_mean_loudness(above) + _RELATIVE_GATE_LU
    kept = above[above > relative_gate]
    return _power_mean_loudness(kept)


def _loudness_range(short_term):
    """EBU Tech 3342: spread of the gated short-term loudness, 10th to 95th percentile."""
    above = short_term[short_term > _ABSOLUTE_GATE_LUFS]
    if above.size == 0:
        return math.nan
    kept = above[above >= _power_mean_loudness(above) + _LRA_RELATIVE_GATE_LU]
    low, high = np.percentile(kept, _LRA_PERCENTILES)
    return float(high - low)


def integrated_loudness(x, rate_hz, *, weights=None):
    """Integrated loudness in LUFS of a whole signal (frames x channels, or 1-D mono).

    A wrapper over :class:`LoudnessMeter`; ``-inf`` for silence or less than 400 ms.
    """
    x = np.asarray(x)
    channels = 1 if x.ndim == 1 else (x.shape[1] if x.ndim == 2 else 0)
    meter = LoudnessMeter(rate_hz=rate_hz, channels=channels if channels else 1, weights=weights)
    meter.process(x)
    return meter.result().integrated_lufs
