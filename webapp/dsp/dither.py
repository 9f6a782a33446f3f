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
The noise-shaping filter and its source are described at ``_SHAPING_FEEDBACK``.
"""

import numbers

import numpy as np

from .errors import ParameterError
from .rates import validate_rate

__all__ = ["WORD_LENGTHS", "DITHERS", "SHAPED_RATE_RANGE_HZ", "noise_transfer_taps", "Quantizer"]

WORD_LENGTHS = ("16", "24", "32f", "64f")
DITHERS = ("none", "tpdf", "shaped")

# Integer word lengths: bits of the code, shift into the container, container dtype.
_INTEGER_FORMATS = {"16": (16, 0, np.int16), "24": (24, 8, np.int32)}
_FLOAT_FORMATS = {"32f": np.float32, "64f": np.float64}

# Error-feedback noise-shaping filter h_1 .. h_9: the noise transfer function is
# NTF(z) = 1 - sum_k h_k z^-k. Coefficients from memory: the nine-coefficient design for
# 44.1 kHz of Lipshitz, Vanderkooy & Wannamaker, "Minimally audible noise shaping", J. Audio
# Eng. Soc. 39(11):836-852, 1991 (E-weighted, after the ear's threshold curve), as we remember
# it; some public code attributes the same numbers to Wannamaker's F-weighted design
# ("Psychoacoustically optimal noise shaping", JAES 40(7/8), 1992). The attribution is not
# confirmed; the properties are checked in tests/dsp/test_dither.py: NTF is minimum phase (mean
# of ln|NTF| over frequency is 0, Gerzon-Craven), about -25 dB near 3.2 kHz and below -18 dB
# from 2 to 5 kHz at 44.1 kHz, +27 dB at Nyquist, total noise power +18.4 dB over flat TPDF.
_SHAPING_FEEDBACK = (2.412, -3.370, 3.937, -4.174, 3.353, -2.205, 1.281, -0.569, 0.0847)

# The filter is tied to the rate it was designed for; between 44.1 and 48 kHz its notch moves
# from 3.2 to 3.4 kHz, still in the ear's most sensitive band (common practice).
SHAPED_RATE_RANGE_HZ = (44100, 48000)

# |total error before shaping| = |rounding error + dither| < 0.5 + 1 LSB; the fed-back error
# is clipped to that bound so an overload cannot drive the loop (see Quantizer).
_ERROR_BOUND_LSB = 1.5


def noise_transfer_taps(rate_hz):
    """FIR taps of the noise transfer function of ``dither="shaped"`` at ``rate_hz``.

    Returns ``[1, -h_1, ..., -h_9]``: the shaped error is this filter applied to the white
    (rounding + TPDF) error of variance 1/4 LSB^2.

    Raises
    ------
    ParameterError
        If the rate lies outside 44100 to 48000 Hz, the range the filter is meant for.
    """
    _validate_shaped_rate(rate_hz)
    return np.concatenate([[1.0], -np.asarray(_SHAPING_FEEDBACK)])


def _validate_shaped_rate(rate_hz):
    if rate_hz is None:
        raise ParameterError('dither="shaped" needs rate_hz (its filter is designed for one rate), '
                             'got None', "rate_hz")
    rate = validate_rate(rate_hz, field="rate_hz")
    low, high = SHAPED_RATE_RANGE_HZ
    if not low <= rate <= high:
        raise ParameterError(
            f'dither="shaped" uses a filter designed for 44.1 kHz and is offered from {low} to '
            f'{high} Hz; use dither="tpdf" at {rate} Hz', "rate_hz")
    return rate


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
        Sample rate; required by ``dither="shaped"``, which is offered from 44100 to 48000 Hz
        only (its filter is designed for 44.1 kHz); other rates raise ParameterError, use
        "tpdf" there.

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

    "shaped" adds error feedback (Lipshitz et al. 1991 structure): ``v = x - sum_k h_k e[n-k]``,
    ``code = round(v + d)``, ``e = code - v``, so the output error is ``NTF * e``; the feedback
    state carries across blocks. On clipping ``e`` would be large and could make the loop
    ring or run away; it is clipped to +-1.5 LSB (its bound without clipping), so the loop
    stays bounded and recovers as soon as the signal is back in range. Shaping runs a
    per-sample loop in plain Python, about 1 microsecond per sample (see
    ``benchmarks/bench_meter_chain.py``); "none" and "tpdf" are vectorised.
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
        if isinstance(channels, bool) or not isinstance(channels, numbers.Integral) \
                or not 1 <= channels <= 64:
            raise ParameterError(f"channels must be an integer from 1 to 64, got {channels!r}", "channels")
        self.channels = int(channels)
        self.rate_hz = _validate_shaped_rate(rate_hz) if dither == "shaped" else (
            None if rate_hz is None else validate_rate(rate_hz, field="rate_hz"))
        self.clipped_samples = 0
        self._rng = np.random.Generator(np.random.PCG64(self.seed))
        # fed-back errors, most recent first, one list per channel
        self._errors = [[0.0] * len(_SHAPING_FEEDBACK) for _ in range(self.channels)]

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
        if not np.all(np.isfinite(frames)):
            raise ParameterError("block samples must be finite, got NaN or infinity", "block")
        if self.bits in _FLOAT_FORMATS:
            out = frames.astype(_FLOAT_FORMATS[self.bits], copy=True)
        else:
            out = self._quantize(frames)
        return out[:, 0] if flat else out

    def _quantize(self, frames):
        word, shift, container = _INTEGER_FORMATS[self.bits]
        scaled = frames.astype(np.float64) * float(1 << (word - 1))
        low, high = -(1 << (word - 1)), (1 << (word - 1)) - 1
        if self.dither == "none":
            codes = np.rint(scaled)
        else:
            pairs = self._rng.random((frames.shape[0], self.channels, 2))
            tpdf = pairs[..., 0] + pairs[..., 1] - 1.0
            if self.dither == "tpdf":
                codes = np.rint(scaled + tpdf)
            else:
                codes = np.empty_like(scaled)
                for c in range(self.channels):
                    codes[:, c], clipped = _shape_channel(scaled[:, c], tpdf[:, c], self._errors[c],
                                                          low, high)
                    self.clipped_samples += clipped
                return (codes.astype(container) << shift) if shift else codes.astype(container)
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


def _shape_channel(scaled, tpdf, errors, low, high):
    """Error-feedback quantisation of one channel (values in LSB); updates ``errors`` in place.

    Returns the codes (float array of whole numbers) and how many were clipped.
    """
    h1, h2, h3, h4, h5, h6, h7, h8, h9 = _SHAPING_FEEDBACK
    e1, e2, e3, e4, e5, e6, e7, e8, e9 = errors
    bound = _ERROR_BOUND_LSB
    codes = []
    append = codes.append
    clipped = 0
    for x, d in zip(scaled.tolist(), tpdf.tolist()):
        v = x - (h1 * e1 + h2 * e2 + h3 * e3 + h4 * e4 + h5 * e5 + h6 * e6 + h7 * e7 + h8 * e8 + h9 * e9)
        code = round(v + d)
        if code > high:
            code = high
            clipped += 1
        elif code < low:
            code = low
            clipped += 1
        e = code - v
        if e > bound:
            e = bound
        elif e < -bound:
            e = -bound
        e9, e8, e7, e6, e5, e4, e3, e2, e1 = e8, e7, e6, e5, e4, e3, e2, e1, e
        append(code)
    errors[:] = [e1, e2, e3, e4, e5, e6, e7, e8, e9]
    return np.array(codes, dtype=np.float64), clipped
