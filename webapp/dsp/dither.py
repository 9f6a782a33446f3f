"""Word length of the delivered file: rounding to integer codes with TPDF dither and noise shaping.

Conventions: data is frames x channels, float, full scale 1.0; one LSB of an N-bit word is
``2**-(N-1)``. Integer word lengths give the codes soundfile writes: int16 for "16", and for
"24" an int32 whose top 24 bits hold the code (code << 8), which soundfile stores as PCM_24.
Float word lengths ("32f", "64f") pass the samples through unchanged (float32 rounds them to
24-bit mantissas) and take no dither.

References
----------
S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Quantization and Dither: A Theoretical
Survey", J. Audio Eng. Soc. 40(5):355-375, 1992: TPDF dither of 2 LSB peak to peak makes the
first and second moments of the total error independent of the signal (variance q^2/4).
The noise-shaping filter is designed at the output rate, see :func:`noise_shaping_design`.
"""

from dataclasses import dataclass
from functools import lru_cache
import numbers

import numpy as np
from scipy import linalg, signal

from .errors import ParameterError
from .frames import validate_channels
from .rates import validate_rate
from .shaping import PREFERRED_SAMPLES, new_history, shape_block

__all__ = ["WORD_LENGTHS", "DITHERS", "MIN_SHAPED_RATE_HZ", "threshold_in_quiet_db",
           "NoiseShaping", "noise_shaping_design", "noise_transfer_taps", "Quantizer"]

WORD_LENGTHS = ("16", "24", "32f", "64f")
DITHERS = ("none", "tpdf", "shaped")

# Integer word lengths: bits of the code, shift into the container, container dtype.
_INTEGER_FORMATS = {"16": (16, 0, np.int16), "24": (24, 8, np.int32)}
_FLOAT_FORMATS = {"32f": np.float32, "64f": np.float64}
_DRAW_FRAMES = 65536          # shaped dither: frames of random numbers drawn at a time

# The noise-shaping filter, designed at the output rate (see noise_shaping_design).
SHAPING_ORDER = 9             # feedback taps: an order-9 fit comes within 0.2 dB of order 24
_CURVE_SPAN_DB = 40.0         # the threshold curve is limited to its minimum + 40 dB
_DESIGN_POINTS = 8192         # frequency grid of the design (points over the whole circle)
MIN_SHAPED_RATE_HZ = 8000


def threshold_in_quiet_db(freq_hz):
    """Threshold of hearing in quiet, dB SPL, by Terhardt's approximation.

    ``T(f) = 3.64 f^-0.8 - 6.5 exp(-0.6 (f - 3.3)^2) + 1e-3 f^4`` with f in kHz: E. Terhardt,
    "Calculating virtual pitch", Hearing Research 1:155-182, 1979 (as quoted by Bosi &
    Goldberg, Introduction to Digital Audio Coding and Standards, 2003). Below 20 Hz the value
    at 20 Hz is used (the formula is not meant for lower frequencies).
    """
    f = np.maximum(np.asarray(freq_hz, dtype=np.float64), 20.0) / 1000.0
    return 3.64 * f ** -0.8 - 6.5 * np.exp(-0.6 * (f - 3.3) ** 2) + 1e-3 * f ** 4


@dataclass(frozen=True)
class NoiseShaping:
    """A noise-shaping design at one rate.

    Attributes
    ----------
    rate_hz : int
    ntf : ndarray
        Noise transfer function taps ``[1, a_1 .. a_9]``; the fed-back filter is ``-a_k``.
    weighted_gain_db : float
        Audibility-weighted power of the shaped requantisation noise relative to plain TPDF's
        (negative: quieter to the ear), weighting ``10^(-T(f)/10)`` over 0 .. fs/2 with T the
        limited threshold curve.
    total_gain_db : float
        Unweighted power relative to plain TPDF (``10 log10 sum ntf^2``).
    """

    rate_hz: int
    ntf: np.ndarray
    weighted_gain_db: float
    total_gain_db: float


def noise_shaping_design(rate_hz):
    """Design the error-feedback noise-shaping filter for ``rate_hz`` (8 kHz and up).

    Notes
    -----
    Target: the requantisation noise power should follow the threshold of hearing in quiet
    (:func:`threshold_in_quiet_db`, Terhardt 1979) over 0 .. fs/2, limited to 40 dB above the
    curve's minimum (so the noise pushed to the extremes, below about 100 Hz and into the top
    octave, stays bounded). Method: linear prediction (autocorrelation method) of the inverse
    target spectrum: the autocorrelation of ``1 / S(f)`` (an inverse FFT) gives, through the
    Toeplitz normal equations (``scipy.linalg.solve_toeplitz``), the order-9 monic polynomial
    A(z) with ``1 / |A|^2`` closest to ``1 / S``, i.e. ``|A|^2`` follows S, fitted best where
    S is lowest (where the ear is most sensitive). A is minimum phase by construction, its
    first tap is 1, and the mean of ln|A| over frequency is 0 (Gerzon & Craven 1989): shaping
    moves noise, it cannot remove it. NTF = A.

    Weighted improvement over plain TPDF (computed, see ``weighted_gain_db``): about -2.1 dB at
    8 kHz, -1.4 dB at 16 kHz, -2.5 dB at 22.05 kHz (at these rates the curve varies little
    below Nyquist), -8.9 dB at 32 kHz, -13.9 dB at 44.1 kHz, -14.9 dB at 48 kHz and about
    -20 dB at 96 and 192 kHz.
    """
    rate = validate_rate(rate_hz, field="rate_hz")
    if rate < MIN_SHAPED_RATE_HZ:
        raise ParameterError(
            f'dither="shaped" is designed from {MIN_SHAPED_RATE_HZ} Hz up; use dither="tpdf" at '
            f'{rate} Hz', "rate_hz")
    return _design(rate)


@lru_cache(maxsize=32)
def _design(rate):
    freqs = np.arange(_DESIGN_POINTS // 2 + 1) * rate / _DESIGN_POINTS
    curve = threshold_in_quiet_db(freqs)
    curve = np.minimum(curve, curve.min() + _CURVE_SPAN_DB)
    correlation = np.fft.irfft(10.0 ** (-curve / 10.0))[:SHAPING_ORDER + 1]
    a = linalg.solve_toeplitz(correlation[:SHAPING_ORDER], -correlation[1:SHAPING_ORDER + 1])
    ntf = np.concatenate([[1.0], a])
    ntf.setflags(write=False)
    _, response = signal.freqz(ntf, worN=freqs, fs=rate)
    weight = 10.0 ** (-curve / 10.0)
    weighted = float(10.0 * np.log10(np.sum(np.abs(response) ** 2 * weight) / np.sum(weight)))
    return NoiseShaping(rate_hz=rate, ntf=ntf, weighted_gain_db=weighted,
                        total_gain_db=float(10.0 * np.log10(np.sum(ntf ** 2))))


def noise_transfer_taps(rate_hz):
    """FIR taps of the noise transfer function of ``dither="shaped"`` at ``rate_hz``.

    Returns ``[1, a_1, ..., a_9]`` (see :func:`noise_shaping_design`): the shaped error is this
    filter applied to the white (rounding + TPDF) error of variance 1/4 LSB^2.
    """
    return noise_shaping_design(rate_hz).ntf.copy()


def _validate_shaped_rate(rate_hz):
    if rate_hz is None:
        raise ParameterError('dither="shaped" needs rate_hz (its filter is designed for one rate), '
                             'got None', "rate_hz")
    return noise_shaping_design(rate_hz).rate_hz


class Quantizer:
    """Streaming conversion of float frames to the delivered word length.

    Parameters
    ----------
    bits : {"16", "24", "32f", "64f"}
        Word length (16 and 24 also accepted as int).
    dither : {"none", "tpdf", "shaped"}, optional
        Default is "tpdf" for integer word lengths and "none" for float ones; float word
        lengths accept only "none".
    seed : int, optional
        Seed of the dither generator (numpy PCG64). Default is 0.
    channels : int, optional
        Channels of every block. Default is 1.
    rate_hz : int, optional
        Sample rate; required by ``dither="shaped"``, whose filter is designed at this rate
        (8000 Hz and up; see :func:`noise_shaping_design`).

    Attributes
    ----------
    clipped_samples : int
        Samples (over all channels and calls) whose code had to be clipped to the word's range.

    Notes
    -----
    Integer codes: ``code = round(x * 2**(N-1) + d)`` (round half to even) clipped to
    ``[-2**(N-1), 2**(N-1) - 1]``, where d is TPDF dither, the sum of two independent uniform
    values in [-0.5, 0.5) LSB. The dither is drawn per sample in frame order, channels
    interleaved, two values per sample, so the codes depend only on the seed and the samples,
    never on how they are split into blocks.

    "shaped" adds error feedback (the classic structure): ``v = x - sum_k h_k e[n-k]``,
    ``code = round(v + d)``, ``e = code - v``, so the output error is ``NTF * e``; the feedback
    state carries across blocks. On clipping ``e`` would be large and could make the loop
    ring or run away; it is clipped to +-1.5 LSB (its bound without clipping), so the loop
    stays bounded and recovers as soon as the signal is back in range. The rounding inside
    the loop makes each sample depend on the previous errors, so shaping cannot be written as
    a linear filter; :mod:`webapp.dsp.shaping` runs many stretches of a block at once and
    checks each against the errors the stretch before it ended with, so the codes are those
    of the plain per-sample loop (:func:`webapp.dsp.shaping.shape_sequential`) to the bit.
    Blocks of :attr:`preferred_frames` make it about ten times faster than that loop (see
    ``benchmarks/bench_limiter.py``); "none" and "tpdf" are vectorised.
    """

    def __init__(self, *, bits, dither=None, seed=0, channels=1, rate_hz=None):
        self.bits = _validate_bits(bits)
        is_float = self.bits in _FLOAT_FORMATS
        if dither is None:
            dither = "none" if is_float else "tpdf"
        if dither not in DITHERS:
            raise ParameterError(f"dither must be one of {', '.join(DITHERS)}, got {dither!r}", "dither")
        if is_float and dither != "none":
            raise ParameterError(
                f'dither applies to integer word lengths (16, 24); float output {self.bits!r} takes '
                f'dither="none", got {dither!r}', "dither")
        self.dither = dither
        if isinstance(seed, bool) or not isinstance(seed, numbers.Integral) or seed < 0:
            raise ParameterError(f"seed must be an integer >= 0, got {seed!r}", "seed")
        self.seed = int(seed)
        self.channels = validate_channels(channels)
        self.rate_hz = _validate_shaped_rate(rate_hz) if dither == "shaped" else (
            None if rate_hz is None else validate_rate(rate_hz, field="rate_hz"))
        self.clipped_samples = 0
        self._rng = np.random.Generator(np.random.PCG64(self.seed))
        # fed-back errors, most recent first, one list per channel
        self._feedback = tuple(-noise_transfer_taps(self.rate_hz)[1:]) if dither == "shaped" else None
        self._errors = [[0.0] * SHAPING_ORDER for _ in range(self.channels)]
        self._history = new_history(self.channels) if dither == "shaped" else None

    @property
    def preferred_frames(self):
        """Frames per :meth:`process` call at which this quantiser works fastest, or None when
        any block size serves. Shaped dither runs many stretches of a block at once (see
        :mod:`webapp.dsp.shaping`): blocks of about a million samples make it several times
        faster than the pipeline's usual 65536 frames. Any block size gives the same codes."""
        if self.dither != "shaped":
            return None
        return max(1, PREFERRED_SAMPLES // self.channels)

    @property
    def dtype(self):
        """numpy dtype of what :meth:`process` returns."""
        if self.bits in _FLOAT_FORMATS:
            return np.dtype(_FLOAT_FORMATS[self.bits])
        return np.dtype(_INTEGER_FORMATS[self.bits][2])

    def process(self, block):
        """Return the codes (or float samples) of one block, same shape as ``block``.

        ``block`` is frames x channels (1-D allowed for mono), float32 or float64, finite.
        """
        x = np.asarray(block)
        flat = x.ndim == 1 and self.channels == 1
        frames = x[:, None] if flat else x
        if frames.ndim != 2 or frames.shape[1] != self.channels:
            raise ParameterError(
                f"block must be frames x channels with {self.channels} channel(s), got shape {x.shape}",
                "block")
        if not np.issubdtype(frames.dtype, np.floating):
            raise ParameterError(f"block must hold floating-point samples, got dtype {x.dtype}", "block")
        # min and max are NaN when any sample is, infinite when any is: two reductions
        # instead of a boolean array as large as the block
        if frames.size and not (np.isfinite(frames.min()) and np.isfinite(frames.max())):
            raise ParameterError("block samples must be finite, got NaN or infinity", "block")
        if self.bits in _FLOAT_FORMATS:
            out = frames.astype(_FLOAT_FORMATS[self.bits], copy=True)
        else:
            out = self._quantize(frames)
        return out[:, 0] if flat else out

    def _shaped_tpdf(self, frames):
        """TPDF dither of ``frames`` frames, ``u1 + u2 - 1`` LSB, drawn as :meth:`_quantize`
        draws it (the same values) but a part at a time: a shaped block can be large."""
        tpdf = np.empty((frames, self.channels))
        for i in range(0, frames, _DRAW_FRAMES):
            pairs = self._rng.random((min(_DRAW_FRAMES, frames - i), self.channels, 2))
            part = tpdf[i:i + pairs.shape[0]]
            np.add(pairs[..., 0], pairs[..., 1], out=part)
            part -= 1.0
        return tpdf

    def _quantize(self, frames):
        word, shift, container = _INTEGER_FORMATS[self.bits]
        scaled = np.multiply(frames, float(1 << (word - 1)), dtype=np.float64)
        low, high = -(1 << (word - 1)), (1 << (word - 1)) - 1
        if self.dither == "none":
            codes = np.rint(scaled)
        elif self.dither == "shaped":
            codes, clipped = shape_block(scaled, self._shaped_tpdf(frames.shape[0]), self._history,
                                         self._errors, self._feedback, low, high)
            self.clipped_samples += clipped
            return (codes.astype(container) << shift) if shift else codes.astype(container)
        else:
            pairs = self._rng.random((frames.shape[0], self.channels, 2))
            # scaled + ((u1 + u2) - 1), in place: the same sums as the plain expression
            codes = np.add(pairs[..., 0], pairs[..., 1])
            codes -= 1.0
            codes += scaled
            np.rint(codes, out=codes)
        if codes.size and (codes.min() < low or codes.max() > high):
            self.clipped_samples += int(np.count_nonzero(codes < low) + np.count_nonzero(codes > high))
            np.clip(codes, low, high, out=codes)
        codes = codes.astype(container)
        return (codes << shift) if shift else codes


def _validate_bits(bits):
    if isinstance(bits, numbers.Integral) and not isinstance(bits, bool):
        bits = str(int(bits))
    if bits not in WORD_LENGTHS:
        raise ParameterError(f"bits must be one of {', '.join(WORD_LENGTHS)}, got {bits!r}", "bits")
    return bits
