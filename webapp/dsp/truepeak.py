"""True peak (ITU-R BS.1770-4 Annex 2), measured in a stream.

Conventions: data is frames x channels, float; peaks are in dBFS (sample peak) and dBTP (true
peak) relative to a full scale of 1.0; silence reads ``-inf`` (the JSON layer maps it to null).
The meter keeps its own state between blocks, so any split of the programme into blocks gives
the same figures; its memory does not grow with duration.

References
----------
ITU-R BS.1770-4 (10/2015), Annex 2: true-peak guideline (at least 4x over-sampling; our 16x
interpolator is in :mod:`webapp.dsp.oversample`) and its example 4x interpolator
(:func:`annex2_interpolator`, for comparison).
"""

import copy
from dataclasses import dataclass

import numpy as np

from .frames import as_frames, validate_channels
from .oversample import OVERSAMPLING, PeakInterpolator
from .rates import validate_rate

__all__ = ["true_peak_oversampling", "annex2_interpolator", "TruePeakResult", "channel_peaks",
           "TruePeakMeter", "true_peak"]


# BS.1770-4 Annex 2, example 48-tap interpolation filter for 4x over-sampling, as 4 phases x 12
# taps; phase 3 is phase 0 reversed and phase 2 is phase 1 reversed (the prototype is
# symmetric). Phase 0 is confirmed (the figures of BS.1770-4 Annex 2); phases 1 and 2 are
# from memory, matching several independent public copies of the table. Tap i of a
# phase multiplies the input i samples back.
_ANNEX2_PHASE0 = (0.0017089843750, 0.0109863281250, -0.0196533203125, 0.0332031250000,
                  -0.0594482421875, 0.1373291015625, 0.9721679687500, -0.1022949218750,
                  0.0476074218750, -0.0266113281250, 0.0148925781250, -0.0083007812500)
_ANNEX2_PHASE1 = (-0.0291748046875, 0.0292968750000, -0.0517578125000, 0.0891113281250,
                  -0.1665039062500, 0.4650878906250, 0.7797851562500, -0.2003173828125,
                  0.1015625000000, -0.0582275390625, 0.0330810546875, -0.0189208984375)
_ANNEX2_PHASES = np.array([_ANNEX2_PHASE0, _ANNEX2_PHASE1, _ANNEX2_PHASE1[::-1], _ANNEX2_PHASE0[::-1]])


def true_peak_oversampling(rate_hz):
    """Over-sampling factor of the true-peak meter at ``rate_hz``: 16 at every rate.

    The interpolator (:mod:`webapp.dsp.oversample`) is flat to 0.475 fs in normalised
    frequency, so one design serves every rate from 8 kHz to 768 kHz.
    """
    validate_rate(rate_hz, field="rate_hz")
    return OVERSAMPLING


def annex2_interpolator():
    """Phase filters (4 x 12) of the BS.1770-4 Annex 2 example interpolator, for comparison.

    The meter does not use them: near Nyquist the example reads low (its passband ends about
    0.4 fs); see :mod:`webapp.dsp.oversample` for the interpolator used.
    """
    return _ANNEX2_PHASES.copy()


@dataclass(frozen=True)
class TruePeakResult:
    """Peak figures of everything a :class:`TruePeakMeter` has seen.

    Attributes
    ----------
    true_peak_dbtp : float
        Highest true peak over all channels, dBTP (``-inf`` for silence).
    sample_peak_dbfs : float
        Highest absolute sample over all channels, dBFS.
    channel_true_peak_dbtp, channel_sample_peak_dbfs : tuple of float
        The same per channel.
    oversampling : int
        Over-sampling factor used (16).
    """

    true_peak_dbtp: float
    sample_peak_dbfs: float
    channel_true_peak_dbtp: tuple
    channel_sample_peak_dbfs: tuple
    oversampling: int


def channel_peaks(x):
    """Largest |x| of each channel of a frames x channels block (``np.abs(x).max(axis=0)``).

    Reduced as rows of 128 frames, so the reduction runs along contiguous memory: a reduction
    over the frames of a 2-channel block is many times slower."""
    frames, channels = x.shape
    width = 128 * channels
    rows = (frames * channels) // width
    peaks = np.zeros(channels, dtype=x.dtype)
    if rows:
        flat = np.ascontiguousarray(x).reshape(-1)[:rows * width]
        peaks = np.abs(flat).reshape(rows, width).max(axis=0).reshape(-1, channels).max(axis=0)
    done = rows * width // channels
    if done < frames:
        peaks = np.maximum(peaks, np.abs(x[done:]).max(axis=0))
    return peaks


class TruePeakMeter:
    """Streaming true-peak meter after ITU-R BS.1770-4 Annex 2.

    Parameters
    ----------
    rate_hz : int
        Sample rate, 1000 to 768000 Hz.
    channels : int
        Number of channels of every block.

    Notes
    -----
    The signal is over-sampled 16x by the two-stage interpolator of
    :mod:`webapp.dsp.oversample` (a 64-tap equiripple half-band, then an 8-phase Kaiser
    windowed sinc), the same design at every rate: within about 0.022 dB of the band-limited
    reconstruction from 0 to 0.475 fs, plus a sampling-grid error of at most 0.038 dB there
    (``1 - cos(pi f / (16 fs))``). BS.1770-4 Annex 2 asks for at least 4x and allows a better
    interpolator than its example, which reads up to 0.5 dB low near Nyquist. The grid
    includes the samples themselves, so the true peak is never below the sample peak. The
    signal is taken as silent before the first block and after the last one (``result()``
    lets the filter ring out without changing the state): an abrupt start or stop is a step
    that the band-limited reconstruction overshoots, and the meter reports that overshoot.

    Cost: about 300 multiply-adds per frame and channel in float32 matrix products (relative
    error about 1e-7, i.e. 1e-6 dB); the loudest chunks of a block go first, chunks whose bound
    stays under the running peak are not interpolated at all and rows that cannot raise it
    skip the second stage (see ``benchmarks/bench_meters.py``: about 0.65x a 120 dB
    conversion on programme, 1.7x on a full-scale sine, where nothing can be skipped).
    """

    def __init__(self, *, rate_hz, channels):
        self.rate_hz = validate_rate(rate_hz, field="rate_hz")
        self.channels = validate_channels(channels)
        self.oversampling = true_peak_oversampling(self.rate_hz)
        self._poly = PeakInterpolator(self.channels, peak_only=True)
        self._true = np.zeros(self.channels)
        self._sample = np.zeros(self.channels)

    def process(self, block, *, checked=False):
        """Measure one block of frames x channels (float); returns nothing.

        ``checked=True`` skips the shape and finiteness checks (see
        :meth:`LoudnessMeter.process`)."""
        x = block if checked else as_frames(block, self.channels)
        if x.shape[0] == 0:
            return
        self._sample = np.maximum(self._sample, channel_peaks(x))
        self._take(self._poly.process(x, floor=self._true, running=True))

    def _take(self, envelope):
        if envelope.shape[0]:
            self._true = np.maximum(self._true, envelope.max(axis=0))

    def running(self):
        """``(frames, peak)``: the frames before ``frames`` are measured (the interpolator
        works a chunk behind the input) and their envelope's peak, exact (every value that
        can reach it is computed), is ``peak`` (linear, the loudest channel's)."""
        return self._poly.covered, float(self._true.max())

    def result(self):
        """Return the :class:`TruePeakResult` of all blocks so far (the meter keeps running)."""
        true = np.maximum(self._true, self._sample)
        rest = copy.deepcopy(self._poly).finish(floor=self._true, running=True)
        if rest.shape[0]:
            true = np.maximum(true, rest.max(axis=0))
        channel_true = tuple(_amplitude_db(v) for v in true)
        channel_sample = tuple(_amplitude_db(v) for v in self._sample)
        return TruePeakResult(
            true_peak_dbtp=max(channel_true),
            sample_peak_dbfs=max(channel_sample),
            channel_true_peak_dbtp=channel_true,
            channel_sample_peak_dbfs=channel_sample,
            oversampling=self.oversampling,
        )


def true_peak(x, rate_hz):
    """True peak in dBTP of a whole signal (frames x channels, or 1-D mono).

    A wrapper over :class:`TruePeakMeter`; ``-inf`` for silence.
    """
    x = np.asarray(x)
    channels = 1 if x.ndim == 1 else (x.shape[1] if x.ndim == 2 else 0)
    meter = TruePeakMeter(rate_hz=rate_hz, channels=channels if channels else 1)
    meter.process(x)
    return meter.result().true_peak_dbtp


def _amplitude_db(value):
    """20 log10 of an amplitude, -inf for zero."""
    with np.errstate(divide="ignore"):
        return float(20.0 * np.log10(value))
