"""Look-ahead true-peak limiter: a smooth gain curve that keeps the reconstructed signal under a
ceiling.

Conventions: data is frames x channels, float, full scale 1.0; the ceiling is in dBTP; times in
ms, release in dB per second. One gain for all channels (linked), so the stereo image stays.

The gain curve, frame by frame (n counts frames, A = look-ahead, H = hold, both in frames):

1. detection: ``e[n]``, the largest |x(t)| of any channel for n <= t < n + 1 on the 16x
   reconstruction of :mod:`webapp.dsp.oversample` (the true-peak meter's interpolator);
   ``r[n] = min(1, c / e[n])`` with c the ceiling less a 0.2 dB margin: the interpolator
   errs by at most about 0.06 dB up to 0.475 fs (flatness and grid), reads content between
   0.475 fs and Nyquist low (hard-clipped drums measured 0.15 dB under an independent 16x
   reference), and the gain's own modulation widens the spectrum a little;
2. look-ahead and hold: ``s[n] = min(r[n - H] .. r[n + A])``;
3. release: in dB, ``u[n] = min(s[n], u[n - 1] + release / fs)``, a straight recovery at the
   stated rate (a running minimum, so it is computed without a per-sample loop);
4. attack: two moving averages of A/2 + 1 frames each (a triangular window spanning A + 1
   frames) smooth the curve into an S-shaped attack of A frames and round the corners of
   hold and release.

Every frame of the averaging window of step 4 lies within the look-ahead / hold window of the
frame it lands on, so ``g[n] <= r[n]`` holds exactly: the gain is down to what a peak needs
when the peak arrives. The output is ``g[n] x[n]``: aligned with the input, same length.

Work is done in chunks of 8192 frames at fixed positions of the stream (the interpolator's
and the curve's), with a fixed history, so any split of the input into blocks gives the same
output, bit for bit; memory does not grow with duration. Latency: up to two chunks plus the
look-ahead.
"""

from dataclasses import dataclass
import math
import numbers

import numpy as np
from scipy import ndimage

from .errors import ParameterError
from .frames import validate_channels
from .oversample import EDGE_FRAMES, PeakInterpolator
from .rates import validate_rate

__all__ = ["LimiterReport", "TruePeakLimiter", "limit"]

_CHUNK = 8192                 # frames of gain curve per step, at fixed stream positions
MARGIN_DB = 0.2               # detection threshold below the ceiling (see the module notes)
_LIMITING = 1.0 - 1e-6        # a gain below this counts as limiting


@dataclass(frozen=True)
class LimiterReport:
    """What a :class:`TruePeakLimiter` did.

    Attributes
    ----------
    max_gain_reduction_db : float
        Largest reduction applied, dB (0.0 when it never acted; positive otherwise).
    limited_s : float
        Time during which the gain was below unity, seconds.
    frames : int
        Frames delivered.
    """

    max_gain_reduction_db: float
    limited_s: float
    frames: int


def _positive_ms(name, value, low, high):
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(value) \
            or not low <= value <= high:
        raise ParameterError(f"{name} must be a number from {low:g} to {high:g}, got {value!r}", name)
    return float(value)


def _even_frames(ms, rate):
    return 2 * max(1, int(round(ms * rate / 2000.0)))


class TruePeakLimiter:
    """Streaming look-ahead true-peak limiter.

    Parameters
    ----------
    rate_hz : int
        Sample rate.
    channels : int
        Channels of every block.
    ceiling_dbtp : float
        The true peak the output must not exceed, -60 to 0 dBTP.
    lookahead_ms : float, optional
        Look-ahead, which is also the attack time (the gain's S-shaped descent). Default 5 ms.
    hold_ms : float, optional
        How long the gain stays down after the last peak that needed it. Default 20 ms.
    release_db_per_s : float, optional
        Recovery rate after the hold, dB per second. Default 40 (6 dB back in 150 ms).

    Notes
    -----
    Look-ahead and hold are rounded to an even number of frames (at least 2). See the module
    notes for the gain curve and why it holds the ceiling. Cost: the interpolator's (about
    300 multiply-adds per frame and channel, less where the signal stays well under the
    ceiling) plus a few vector passes for the curve.
    """

    def __init__(self, *, rate_hz, channels, ceiling_dbtp, lookahead_ms=5.0, hold_ms=20.0,
                 release_db_per_s=40.0):
        self.rate_hz = validate_rate(rate_hz, field="rate_hz")
        self.channels = validate_channels(channels)
        self.ceiling_dbtp = _positive_ms("ceiling_dbtp", ceiling_dbtp, -60.0, 0.0)
        self.lookahead_ms = _positive_ms("lookahead_ms", lookahead_ms, 0.1, 100.0)
        self.hold_ms = _positive_ms("hold_ms", hold_ms, 0.0, 1000.0)
        self.release_db_per_s = _positive_ms("release_db_per_s", release_db_per_s, 1.0, 10000.0)
        self._ahead = _even_frames(self.lookahead_ms, self.rate_hz)
        self._hold = _even_frames(self.hold_ms, self.rate_hz) if self.hold_ms > 0 else 0
        self._threshold = 10.0 ** ((self.ceiling_dbtp - MARGIN_DB) / 20.0)
        self._slope_db = self.release_db_per_s / self.rate_hz
        self._detector = PeakInterpolator(self.channels)
        # the curve starts a look-ahead before the envelope (frame -EDGE_FRAMES), so the
        # triangular window of every frame that can need a reduction lies on computed gains
        first = -EDGE_FRAMES - self._ahead
        self._r = np.ones(self._hold + self._ahead)  # r from frame self._r_start on
        self._r_start = first - self._hold
        self._lin = np.ones(self._ahead)           # linear gain u of the A frames before self._next
        self._u_db = 0.0                           # u of the frame before self._next
        self._next = first                         # first frame whose gain is not yet computed
        self._x = np.zeros((0, self.channels))     # input from frame 0 not yet delivered
        self._x_start = 0
        self.frames_in = 0
        self._frames_out = 0
        self._lowest = 1.0
        self._limited = 0

    def process(self, block):
        """Take a frames x channels float block; return the output frames now complete."""
        x = self._as_block(block)
        if x.shape[0]:
            self._x = np.concatenate([self._x, x])
            self.frames_in += x.shape[0]
        self._take_envelope(self._detector.process(x, floor=self._threshold))
        return self._deliver(final=False)

    def flush(self):
        """Return the remaining output frames; the total equals the input's."""
        self._take_envelope(self._detector.finish(floor=self._threshold))
        # after the envelope ends the signal is silent: no reduction needed
        self._r = np.concatenate([self._r, np.ones(self._ahead + _CHUNK)])
        return self._deliver(final=True)

    def result(self):
        """The :class:`LimiterReport` of the frames delivered so far."""
        return LimiterReport(max_gain_reduction_db=float(-20.0 * math.log10(self._lowest)),
                             limited_s=self._limited / self.rate_hz, frames=self._frames_out)

    def _as_block(self, block):
        x = np.asarray(block)
        if x.ndim == 1 and self.channels == 1:
            x = x[:, None]
        if x.ndim != 2 or x.shape[1] != self.channels:
            raise ParameterError(f"block must be frames x channels with {self.channels} channel(s), "
                                 f"got shape {x.shape}", "block")
        if not np.issubdtype(x.dtype, np.floating) or not np.all(np.isfinite(x)):
            raise ParameterError("block must hold finite floating-point samples", "block")
        return x.astype(np.float64, copy=False)

    def _take_envelope(self, envelope):
        if envelope.shape[0]:
            peak = envelope.max(axis=1)
            with np.errstate(divide="ignore"):
                r = np.minimum(1.0, self._threshold / peak)
            self._r = np.concatenate([self._r, r])

    def _deliver(self, final):
        out = []
        end = self.frames_in if final else None
        while True:
            have = self._r_start + self._r.size     # r known up to here (exclusive)
            if self._next + _CHUNK + self._ahead > have:
                break
            if final and self._next >= end:
                break
            gain = self._curve()
            lo, hi = self._next - _CHUNK, self._next  # frames the gain covers
            first, last = max(lo, self._x_start), min(hi, self._x_start + self._x.shape[0])
            if last > first and gain is None:          # unity: the input as it is
                out.append(self._x[first - self._x_start:last - self._x_start])
            elif last > first:
                g = gain[first - lo:last - lo]
                out.append(self._x[first - self._x_start:last - self._x_start] * g[:, None])
                self._lowest = min(self._lowest, float(g.min()))
                self._limited += int(np.count_nonzero(g < _LIMITING))
            if last > first:
                self._x = self._x[last - self._x_start:]
                self._x_start = last
        y = np.concatenate(out) if out else np.zeros((0, self.channels))
        self._frames_out += y.shape[0]
        return y

    def _curve(self):
        """Gain of the next chunk of frames (steps 2-4 of the module notes), None for unity;
        advances."""
        n0, A, H = self._next, self._ahead, self._hold
        # 2. s[n] = min r[n - H .. n + A] for n in the chunk
        lo = n0 - H - self._r_start
        window = self._r[lo:lo + _CHUNK + H + A]
        if self._u_db == 0.0 and window.min() >= 1.0 and self._lin.min() >= 1.0:
            # nothing to reduce in reach and no release under way: steps 2-4 give exactly 1
            # (0 dB through the release, averages of ones), most of a programme's chunks
            self._advance_curve(n0)
            return None
        held = ndimage.minimum_filter1d(window, size=H + A + 1, mode="nearest")
        s = held[(H + A) // 2:(H + A) // 2 + _CHUNK]   # centre of the window of frame n is n + (A - H)/2
        s_db = 20.0 * np.log10(s)
        # 3. release: u[i] = min(s[i], u[i - 1] + slope), as a running minimum
        i = np.arange(_CHUNK)
        u_db = np.minimum(0.0, self._slope_db * i + np.minimum(
            self._u_db + self._slope_db, np.minimum.accumulate(s_db - self._slope_db * i)))
        self._u_db = float(u_db[-1])
        # 4. attack: two moving averages of A/2 + 1 frames over u (with the A frames before)
        lin = np.concatenate([self._lin, 10.0 ** (u_db / 20.0)])
        self._lin = lin[-A:].copy()
        g = _moving_average(_moving_average(lin, A // 2 + 1), A // 2 + 1)
        self._advance_curve(n0)
        return g

    def _advance_curve(self, n0):
        """Drop the consumed r (keeping the hold's history); the next chunk starts after n0's."""
        cut = n0 + _CHUNK - self._hold - self._r_start
        self._r = self._r[cut:]
        self._r_start += cut
        self._next = n0 + _CHUNK


def _moving_average(values, length):
    """Causal mean of ``length`` values: out[i] = mean(values[i .. i + length - 1]), shorter by length - 1."""
    total = np.concatenate([[0.0], np.cumsum(values)])
    return (total[length:] - total[:-length]) / length


def limit(x, rate_hz, ceiling_dbtp, **options):
    """Limit a whole signal (frames x channels, or 1-D mono); returns ``(y, LimiterReport)``."""
    x = np.asarray(x)
    flat = x.ndim == 1
    frames = x[:, None] if flat else x
    limiter = TruePeakLimiter(rate_hz=rate_hz, channels=frames.shape[1], ceiling_dbtp=ceiling_dbtp,
                              **options)
    y = np.concatenate([limiter.process(frames), limiter.flush()])
    return (y[:, 0] if flat else y), limiter.result()
