"""The streaming sample-rate converters.

Conventions
-----------
* Data is frames x channels; every converter is stateful: ``process(block)`` returns the output
  frames that are complete so far, ``flush()`` returns the rest. Any split of the input into
  blocks gives the same output; the exact converter holds that to the last bit (its products
  run in tiles of one fixed shape, see bank.py), so a recipe re-run with another block size
  writes the same bytes.
* Alignment: a linear-phase converter removes its own delay, so output frame n sits at time
  n / fs_out of the input; a minimum-phase one keeps its (small, reported) delay. The output
  of a whole signal of ``frames`` frames has ``ceil(frames * up / down)`` frames.
* Positions are integers (block index q, residue r), never float times, so hours don't drift.

The math: with prototype h (N taps at fs_in*L) and T = ceil(N/L) taps per phase,
output n = qL + r, with p = rM + D = a_r L + b_r, is
    y[qL + r] = sum_{j<T} h[jL + b_r] x[qM + a_r - j].
A row of K*L outputs (K blocks) is split into groups of neighbouring residues; each group is one
dense product of a strided view of the input (read in place by BLAS, see bank.py) with a small
coefficient matrix, a tile of rows per product call.
"""

from fractions import Fraction
import math
import numbers

import numpy as np
from numpy.lib.stride_tricks import as_strided

from .bank import bank_layout
from .errors import ParameterError

__all__ = ["PolyphaseConverter", "ArbitraryConverter", "CascadeConverter", "make_converter",
           "convert", "output_length", "real_ratio"]

_MAX_DENOMINATOR = 1 << 40  # arbitrary path: position denominator, keeps block offsets in int64
_COEF_ELEMENTS = 1 << 18    # arbitrary path: interpolated coefficients per chunk (outputs x width)
_MIN_STRETCH = 64           # arbitrary path: read windows in place when stretches are this long


def output_length(frames, up, down):
    """ceil(frames * up / down): the output length of a whole signal."""
    return -(-int(frames) * int(up) // int(down))


def _channel_count(channels):
    if channels < 1:
        raise ParameterError(f"channels must be at least 1, got {channels}", "channels")
    return int(channels)


def _as_block(block, channels, dtype):
    x = np.asarray(block)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[1] != channels:
        raise ParameterError(f"blocks must be frames x {channels} channels, got shape {x.shape}",
                             "block")
    return x if dtype is None else x.astype(dtype, copy=False)


class _Output:
    """Output bookkeeping shared by every converter: frames_out and the whole-signal call."""

    def _emit(self, y, limit=None):
        if limit is not None:
            y = y[:max(0, limit - self.frames_out)]
        self.frames_out += y.shape[0]
        return y

    def process_all(self, x):
        """Convert a whole signal at once (resets first)."""
        self.reset()
        head = self.process(x)
        return np.concatenate([head, self.flush()], axis=0)


class _Streaming(_Output):
    """Shared buffer handling: channel-major input buffer with an absolute start index."""

    def _init_stream(self, channels, dtype, pre):
        self.channels = _channel_count(channels)
        self.dtype = np.dtype(dtype)
        self._pre = int(pre)
        self.reset()

    def reset(self):
        self._buf = np.zeros((self.channels, self._pre), dtype=self.dtype)
        self._buf_start = -self._pre
        self.frames_in = 0
        self.frames_out = 0
        self._flushed = False
        self._reset_position()

    def _append(self, x):
        if self._flushed:
            raise ParameterError("the converter was flushed; call reset() before reuse", "block")
        if x.shape[0]:
            self._buf = np.concatenate([self._buf, x.T], axis=1)
            self.frames_in += x.shape[0]

    def _drop_before(self, index):
        cut = index - self._buf_start
        if cut > 0:
            self._buf = np.ascontiguousarray(self._buf[:, cut:])
            self._buf_start = index

    def flush(self):
        """Return the remaining output frames; the total is ceil(frames_in * up / down)."""
        total = output_length(self.frames_in, self.up, self.down)
        need = total - self.frames_out
        out = self._finish(need)
        self._flushed = True
        return self._emit(out, total)


class PolyphaseConverter(_Output):
    """Exact rational L/M converter by grouped polyphase matrix products.

    Parameters
    ----------
    taps : array_like
        Prototype at fs_in * up with DC gain ``up``.
    up, down : int
        Reduced factor L/M.
    channels : int
    dtype : {"float32", "float64"}
    delay : int, optional
        Delay to remove, in samples at the filter rate; default (len(taps) - 1) // 2.

    Notes
    -----
    The products run on strided views of the input, laid out by
    :func:`~webapp.dsp.bank.bank_layout`; products in float32 accumulate in float32 (about
    -125 dB relative error, measured), so masks beyond about 120 dB want float64.

    Outputs are made a *tile* at a time: a fixed number of rows starting at a multiple of
    that number, each channel a product of one fixed shape. A BLAS product's rounding depends
    on where a row sits in the call and on the call's shape, so fixed tiles make every output
    bit the same for any split of the input into blocks (at a given number of BLAS threads:
    OpenBLAS's float32 kernels round differently when a call is shared between threads; the
    file pipeline always holds one). Input waits in the tile's frame until the tile is
    complete, at most one tile of latency; ``flush`` pads the end with zeros.
    """

    def __init__(self, taps, up, down, *, channels=1, dtype="float64", delay=None):
        h = np.asarray(taps, dtype=np.float64)
        self.up, self.down = int(up), int(down)
        if self.up < 1 or self.down < 1 or math.gcd(self.up, self.down) != 1:
            raise ParameterError(f"up/down must be coprime positive integers, got {up}/{down}",
                                 "up")
        self.channels = _channel_count(channels)
        self.dtype = np.dtype(dtype)
        self.numtaps = h.size
        self.delay = (h.size - 1) // 2 if delay is None else int(delay)
        self.taps_per_phase = -(-h.size // self.up)
        self._layout = bank_layout(h, self.up, self.down, self.delay, self.dtype)
        self._frame = np.zeros((self.channels, self._layout.span), dtype=self.dtype)
        self.reset()

    def reset(self):
        lay = self._layout
        self._fill = max(0, -lay.lo)    # frame position 0 is input frame q0*S + lo
        self._skip = max(0, lay.lo)     # input frames no window reads
        self._frame[:, :self._fill] = 0
        self.frames_in = 0
        self.frames_out = 0
        self._flushed = False

    def _tile(self, dst):
        """Rows of one tile: every channel's windows in the frame times every stack, into
        ``dst`` (channels x rows x R); then keep the inputs the next tile shares."""
        lay, frame = self._layout, self._frame
        item = frame.itemsize
        C, n, R = self.channels, dst.shape[1], lay.rows_out
        for st in lay.stacks:
            win = as_strided(frame[:, st.base - lay.lo:], shape=(C, st.groups, n, st.width),
                             strides=(frame.strides[0], st.step * item, lay.stride * item, item),
                             writeable=False)
            if lay.copy:        # overlapping windows: BLAS needs them copied
                win = np.ascontiguousarray(win)
            view = as_strided(dst[:, :, st.column:], shape=(C, st.groups, n, st.size),
                              strides=(dst.strides[0], st.size * item, R * item, item))
            np.matmul(win, st.mats, out=view)
        keep = lay.span - lay.advance
        frame[:, :keep] = frame[:, lay.advance:lay.span]
        self._fill = keep

    def _outputs(self, rows):
        """An output array of ``rows`` rows, channel-major so each channel is one run."""
        return np.empty((self.channels, rows, self._layout.rows_out), dtype=self.dtype)

    def process(self, block):
        """Feed a frames x channels block; return the output frames of the tiles now complete."""
        if self._flushed:
            raise ParameterError("the converter was flushed; call reset() before reuse", "block")
        x = _as_block(block, self.channels, None)
        self.frames_in += x.shape[0]
        if self._skip:
            drop = min(self._skip, x.shape[0])
            x, self._skip = x[drop:], self._skip - drop
        lay, frame, n = self._layout, self._frame, self._layout.tile_rows
        tiles = max(0, (self._fill + x.shape[0] - lay.span) // lay.advance + 1)
        out = self._outputs(tiles * n)
        i = 0
        for t in range(tiles):
            take = lay.span - self._fill
            frame[:, self._fill:lay.span] = x[i:i + take].T
            i += take
            self._tile(out[:, t * n:(t + 1) * n])
        rest = x.shape[0] - i
        frame[:, self._fill:self._fill + rest] = x[i:].T
        self._fill += rest
        return self._emit(out.reshape(self.channels, -1).T)

    def flush(self):
        """Return the remaining output frames; the total is ceil(frames_in * up / down).

        The rows still to come are computed in whole tiles and one last product of just the
        rows needed: how many there are depends on the signal's length alone, never on how it
        was split into blocks, so the summation order stays fixed and no tile is wasted.
        """
        if self._flushed:
            raise ParameterError("the converter was flushed; call reset() before reuse", "block")
        lay = self._layout
        total = output_length(self.frames_in, self.up, self.down)
        rows = max(0, -(-(total - self.frames_out) // lay.rows_out))
        out = self._outputs(rows)
        for r0 in range(0, rows, lay.tile_rows):
            self._frame[:, self._fill:lay.span] = 0     # the signal is silent after its end
            self._tile(out[:, r0:r0 + lay.tile_rows])
        self._flushed = True
        return self._emit(out.reshape(self.channels, -1).T, total)


class ArbitraryConverter(_Streaming):
    """Bandlimited interpolation for ratios whose exact polyphase bank is too large, and for
    real (non-whole-Hz) ratios such as a drifting clock.

    A prototype sampled at ``phases`` points per input sample; each output takes the two
    nearest phase filters and interpolates their coefficients linearly by the fractional
    position (Smith & Gossett, ICASSP 1984).

    Parameters
    ----------
    taps : array_like
        Prototype at fs_in * phases with DC gain ``phases``.
    up, down : int
        Output frames per input frame as an exact rational ``up/down``. Either may be a very
        large Python int (a real ratio held to about 1e-12, see :func:`real_ratio`); ``up``
        must stay below 2**40 so that the per-block position arithmetic fits in int64.
    phases : int
    start : number, optional
        Input position (frames, may be negative or fractional) of output frame 0; it is held
        as the nearest multiple of 1/up. Default 0. A positive start trims the head of the
        input, a negative one pads it with silence.
    frames_out : int, optional
        Fixed total output length; default ``ceil((frames_in - start) * up / down)``.

    Notes
    -----
    Positions are exact rationals with denominator ``up``: output n sits at input position
    (start_num + n * down) / up. The block base is computed with Python's unbounded ints and
    the offsets within a block with int64 from down = I*up + F (whole and fractional step), so
    nothing is accumulated in floating point and hours of audio don't drift; any block size
    gives the same positions.
    """

    def __init__(self, taps, up, down, phases, *, channels=1, dtype="float64", delay=None,
                 start=0, frames_out=None):
        h = np.asarray(taps, dtype=np.float64)
        self.up, self.down, self.phases = int(up), int(down), int(phases)
        if self.up < 1 or self.down < 1 or self.up >= _MAX_DENOMINATOR:
            raise ParameterError(f"up/down must be positive integers with up below 2**40, got "
                                 f"{up}/{down}", "up")
        P = self.phases
        self.delay = (h.size - 1) // 2 if delay is None else int(delay)
        D = self.delay
        # taps h[k] sit at tau = (k - D)/P input samples; for offset i (input m = a - i) and
        # table phase p, tau = i + p/P, k = i*P + p + D.
        i_lo = -((D + P) // P) - 1
        i_hi = (h.size - D) // P + 1
        i = np.arange(i_lo, i_hi + 1)
        p = np.arange(P + 1)
        k = i[None, :] * P + p[:, None] + D
        valid = (k >= 0) & (k < h.size)
        table = np.where(valid, h[np.clip(k, 0, h.size - 1)], 0.0)
        used = np.nonzero(np.any(table != 0, axis=0))[0]
        table = table[:, used[0]:used[-1] + 1]
        self._i = i[used[0]:used[-1] + 1]
        self._table = table.astype(dtype)
        self._table_asc = np.ascontiguousarray(self._table[:, ::-1])
        # the step from each phase to the next, so an interpolated filter is one product-add
        self._step_asc = np.ascontiguousarray(np.diff(self._table_asc, axis=0))
        self.taps_per_phase = self._table.shape[1]
        self.numtaps = h.size
        self._reach_back = int(self._i[-1])   # inputs down to a - i_max
        self._reach_fwd = int(-self._i[0])    # inputs up to a - i_min
        self._whole, self._frac = divmod(self.down, self.up)
        self._start_num = _exact_position(start, self.up)
        self.frames_total = None if frames_out is None else int(frames_out)
        a_first = self._start_num // self.up
        self._init_stream(channels, dtype, max(0, self._reach_back - min(0, a_first)))

    def _reset_position(self):
        self._n = 0

    def _position_num(self, n):
        return self._start_num + n * self.down

    def _positions(self, n0, count):
        base = self._position_num(n0)
        a0, rem0 = divmod(base, self.up)
        k = np.arange(count, dtype=np.int64)
        t = rem0 + k * self._frac           # < 2**40 + 2**18 * 2**40: fits int64
        a = a0 + k * self._whole + t // self.up
        rem = t % self.up
        scaled = rem * self.phases
        p = scaled // self.up
        eta = (scaled - p * self.up).astype(np.float64) / self.up
        return a, p, eta

    def _ready(self):
        end = self._buf_start + self._buf.shape[1]
        # output n is ready when a_n + reach_fwd < end, a_n = floor(position_num(n) / up)
        last_a = end - 1 - self._reach_fwd
        n_max = ((last_a + 1) * self.up - self._start_num - 1) // self.down
        count = max(0, n_max + 1 - self._n)
        if self.frames_total is not None:
            count = min(count, self.frames_total - self._n)
        return max(0, count)

    def _run(self, count):
        """Outputs n .. n+count-1: per output, the interpolated filter (its phase's row plus
        the fraction times the step to the next phase) against its input window.

        Near a ratio of 1 (a drift correction) consecutive outputs read consecutive inputs for
        thousands of outputs at a time; those stretches are read in place as slices of the
        sliding view (no gathered copy of the windows), which is most of the work saved. Other
        ratios gather the windows by integer indexing.
        """
        C = self.channels
        out = np.empty((C, count), dtype=self.dtype)
        width = self._table.shape[1]
        step = max(1, _COEF_ELEMENTS // width)
        # windows as rows of a sliding view, inputs ascending from a - i_max; the table is
        # stored in that order (column j holds offset i_max - j), so no per-output reversal
        table = self._table_asc
        windows = np.lib.stride_tricks.sliding_window_view(self._buf, width, axis=1)
        base = self._buf_start + self._reach_back
        for s in range(0, count, step):
            n = min(step, count - s)
            a, p, eta = self._positions(self._n + s, n)
            coef = table[p]
            coef += self._step_asc[p] * eta[:, None].astype(self.dtype)
            idx = a - base
            breaks = np.flatnonzero(idx[1:] - idx[:-1] != 1) + 1
            if breaks.size * _MIN_STRETCH < n:
                for b0, b1 in zip(np.r_[0, breaks], np.r_[breaks, n]):
                    view = windows[:, idx[b0]:idx[b0] + (b1 - b0)]      # C x stretch x width
                    out[:, s + b0:s + b1] = np.einsum("cnk,nk->cn", view, coef[b0:b1],
                                                      optimize=False)
            else:
                out[:, s:s + n] = np.einsum("cnk,nk->cn", windows[:, idx], coef, optimize=False)
        self._n += count
        return out.T

    def process(self, block):
        x = _as_block(block, self.channels, self.dtype)
        self._append(x)
        count = self._ready()
        y = self._run(count) if count else np.empty((0, self.channels), dtype=self.dtype)
        # input before the next output's reach is never needed again (a late start or a large
        # step may put that beyond what has arrived: drop no further than the end)
        end = self._buf_start + self._buf.shape[1]
        self._drop_before(min(end, self._position_num(self._n) // self.up - self._reach_back))
        return self._emit(y)

    def flush(self):
        """Return the remaining output frames (up to ``frames_out`` when it was given)."""
        if self.frames_total is None:
            total = max(0, -(-(self.frames_in * self.up - self._start_num) // self.down))
        else:
            total = self.frames_total
        out = self._finish(total - self.frames_out)
        self._flushed = True
        return self._emit(out, total)

    def _finish(self, need):
        if need <= 0:
            return np.empty((0, self.channels), dtype=self.dtype)
        a_last = self._position_num(self._n + need - 1) // self.up
        end_needed = a_last + self._reach_fwd + 1
        end = self._buf_start + self._buf.shape[1]
        if end_needed > end:
            pad = np.zeros((self.channels, end_needed - end), dtype=self.dtype)
            self._buf = np.concatenate([self._buf, pad], axis=1)
        return self._run(need)


def _exact_position(value, denominator):
    """``value`` (input frames: int, Fraction or float) as the nearest multiple of
    1/denominator, returned as that multiple's integer numerator."""
    return round(Fraction(value) * denominator)


def real_ratio(value, *, max_denominator=_MAX_DENOMINATOR - 1):
    """A real ratio (output frames per input frame) as an exact (up, down) pair.

    The closest fraction with ``up`` below 2**40 (continued fractions, Fraction.limit_denominator)
    differs from ``value`` by less than 1e-12 relative, i.e. under a thousandth of a frame after
    a billion frames; the converter then tracks positions exactly for that fraction.
    """
    if isinstance(value, bool) or not isinstance(value, (numbers.Real, Fraction)) \
            or not math.isfinite(value) or value <= 0:
        raise ParameterError(f"a conversion ratio must be a positive finite number, got {value!r}",
                             "ratio")
    # the position's denominator is up, the denominator of the step down/up: limit that one
    step = (1 / Fraction(value)).limit_denominator(max_denominator)
    return step.denominator, step.numerator


class CascadeConverter(_Output):
    """Stages run one after another; the whole keeps the single-stage length contract."""

    def __init__(self, stages, up, down):
        self.stages = list(stages)
        self.up, self.down = int(up), int(down)
        self.channels = self.stages[0].channels
        self.dtype = self.stages[-1].dtype
        self.reset()

    def reset(self):
        for s in self.stages:
            s.reset()
        self.frames_in = 0
        self.frames_out = 0

    def process(self, block):
        x = _as_block(block, self.channels, self.stages[0].dtype)
        self.frames_in += x.shape[0]
        for s in self.stages:
            x = s.process(x)
        return self._emit(x)

    def flush(self):
        total = output_length(self.frames_in, self.up, self.down)
        x = np.empty((0, self.channels), self.stages[0].dtype)
        for s in self.stages:
            x = np.concatenate([s.process(x), s.flush()], axis=0)
        short = total - self.frames_out - x.shape[0]
        if short > 0:
            x = np.concatenate([x, np.zeros((short, self.channels), x.dtype)], axis=0)
        return self._emit(x, total)


def make_converter(design, *, channels=1, dtype=None, time_base=None):
    """A converter for a :class:`~webapp.dsp.design.Design` or a multistage plan.

    With ``time_base`` (a :class:`~webapp.dsp.timebase.TimeBase`, or anything with ``up``,
    ``down``, ``start_frames`` and ``frames_out``), the design must be on the arbitrary path; the
    converter then runs at the time base's real ratio and start instead of the design's route.
    """
    stages = getattr(design, "stages", None)   # a Plan (one or more stages) or a Design
    if time_base is not None:
        if stages is not None and len(stages) == 1:
            design, stages = stages[0], None
        if stages is not None or design.path != "arbitrary":
            raise ParameterError("a time base needs a single-stage design on the arbitrary-ratio "
                                 f"path, got {getattr(design, 'path', 'a multistage plan')}",
                                 "time_base")
        return ArbitraryConverter(design.taps, time_base.up, time_base.down, design.phases,
                                  channels=channels, dtype=dtype or design.spec.arithmetic,
                                  delay=design.delay_samples, start=time_base.start_frames,
                                  frames_out=time_base.frames_out)
    if stages is not None:
        if len(stages) == 1:
            return make_converter(stages[0], channels=channels, dtype=dtype)
        parts = [make_converter(s, channels=channels, dtype=dtype) for s in stages]
        return CascadeConverter(parts, design.up, design.down)
    dtype = dtype or design.spec.arithmetic
    if design.path == "arbitrary":
        return ArbitraryConverter(design.taps, design.up, design.down, design.phases,
                                  channels=channels, dtype=dtype, delay=design.delay_samples)
    return PolyphaseConverter(design.taps, design.up, design.down, channels=channels,
                              dtype=dtype, delay=design.delay_samples)


def convert(x, design, *, dtype=None):
    """Convert a whole frames x channels signal (or 1-D) with ``design``."""
    x = np.asarray(x)
    flat = x.ndim == 1
    x2 = x[:, None] if flat else x
    conv = make_converter(design, channels=x2.shape[1], dtype=dtype)
    y = conv.process_all(x2)
    return y[:, 0] if flat else y
