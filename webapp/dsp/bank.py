"""The exact polyphase bank laid out for BLAS: coefficient stacks over strided input windows.

With prototype h (N taps at fs_in*L) and T = ceil(N/L) taps per phase, output n = qL + r with
rM + D = a_r L + b_r is y[qL + r] = sum_{j<T} h[jL + b_r] x[qM + a_r - j] (the polyphase product, derived in webapp/dsp/polyphase.py).

Layout
------
A *row* is K blocks of L outputs: R = K*L outputs from S = K*M new input frames. The row's
outputs are cut into groups of about g neighbouring residues; group k reads the inputs
``[q*S + base + k*step, ... + width)`` of row q and multiplies them by a ``width x g``
coefficient matrix. Groups of one size form a *stack*, and a stack is a single ``np.matmul``
of a (channels, groups, rows, width) strided view with a (groups, width, g) array, written
straight into the output through a strided view.

When ``width <= S`` the rows of one group's window matrix do not overlap, so the view is an
ordinary matrix with leading dimension S and BLAS reads it in place: no window is ever copied.
Larger K makes S wide enough for that; smaller g wastes fewer multiplications on the zeros
at the group's corners (width is about T + g*M/L for T useful taps) but makes thinner
products. :func:`bank_layout` picks K and g with a cost model (fixed numbers, so the choice,
and with it every output bit, is the same on every run; a timed calibration would not be).
"""

import functools
from dataclasses import dataclass

import numpy as np

__all__ = ["Stack", "Layout", "bank_layout"]

# Relative throughput of a BLAS product with g output columns (measured once with OpenBLAS
# sgemm/dgemm on a 2-core x86-64 machine; thin products run below the kernel's peak).
_EFFICIENCY = {4: 0.3, 8: 0.55, 12: 0.7, 16: 0.85, 24: 0.95, 32: 1.0, 48: 1.0, 64: 1.0}
_CALL_COST = 250_000       # one product call, in multiply-adds (numpy + BLAS dispatch)
_NOMINAL_FRAMES = 65536    # input frames per process() call assumed by the cost model
_COPY_COST = 1.5           # copying one window element, in multiply-adds
_MAX_COEFFS = 1 << 21      # coefficient elements allowed for the whole bank (8 MB in float32)


@dataclass(frozen=True, eq=False)
class Stack:
    """Groups of one size: outputs ``column + k*size + i`` of a row, i < size, k < groups."""
    column: int
    groups: int
    size: int
    step: int       # window start advance from one group to the next
    base: int       # window start of group 0, relative to q*S
    width: int
    mats: np.ndarray  # groups x width x size


@dataclass(frozen=True, eq=False)
class Layout:
    blocks: int      # K
    rows_out: int    # R = K*L outputs per row
    stride: int      # S = K*M input frames per row
    stacks: tuple
    lo: int          # first input a row reads, relative to q*S
    hi: int          # one past the last input a row reads, relative to q*S
    copy: bool       # windows overlap (width > S): copied before the product
    macs_per_output: float


def _residues(up, down, delay, rows_out):
    p = np.arange(rows_out, dtype=np.int64) * down + delay
    return p // up, p % up


def _group_sizes(rows_out, size):
    """Split rows_out columns into groups of nearly ``size``: [(column, groups, size), ...]."""
    count = -(-rows_out // size)
    small, extra = divmod(rows_out, count)
    parts = []
    if extra:
        parts.append((0, extra, small + 1))
    if count - extra:
        parts.append((extra * (small + 1), count - extra, small))
    return parts


def _stack_geometry(off, taps, up, down, column, groups, size):
    """Window step, base and width of one stack (no coefficients)."""
    step = int(round(size * down / up))
    first = column + size * np.arange(groups)
    k = np.arange(groups)
    base = int(np.min(off[first] - (taps - 1) - k * step))
    width = int(np.max(off[first + size - 1] + 1 - k * step)) - base
    return step, base, width


def _cost(up, down, taps, delay, blocks, size):
    """Multiply-add equivalents per output of a layout, or None if its bank is too large."""
    rows_out, stride = blocks * up, blocks * down
    off, _ = _residues(up, down, delay, rows_out)
    work, copying, calls, widest = 0.0, 0.0, 0, 0
    for column, groups, g in _group_sizes(rows_out, size):
        _, _, width = _stack_geometry(off, taps, up, down, column, groups, g)
        eff = _EFFICIENCY[max(s for s in _EFFICIENCY if s <= g)] if g >= 4 else 0.2
        work += groups * g * width / eff
        copying += groups * width * _COPY_COST
        calls += groups
        widest = max(widest, width)
    if rows_out * widest > _MAX_COEFFS:
        return None
    if widest > stride:       # overlapping windows must be copied for BLAS
        work += copying
    rows = max(1.0, _NOMINAL_FRAMES / stride)
    return work / rows_out + calls * _CALL_COST / (rows * rows_out)


def _choose(up, down, taps, delay):
    best = None
    for size in sorted(_EFFICIENCY):
        # the smallest K whose windows do not overlap, and a few above it (even splits)
        need = taps - 1 + -(-size * down // up) + 2
        k0 = max(1, -(-need // down))
        options = [1] + list(range(k0, k0 + 4))
        for blocks in options:
            if size > 2 * blocks * up and blocks > 1:
                continue
            c = _cost(up, down, taps, delay, blocks, size)
            if c is not None and (best is None or c < best[0]):
                best = (c, blocks, size)
    return best[1], best[2]


@functools.lru_cache(maxsize=64)
def _layout_cached(taps_key, up, down, delay, dtype):
    return _build(np.frombuffer(taps_key, dtype=np.float64), up, down, delay, np.dtype(dtype))


def bank_layout(taps, up, down, delay, dtype):
    """The row layout and coefficient stacks for an exact L/M bank (cached per route)."""
    h = np.ascontiguousarray(taps, dtype=np.float64)
    return _layout_cached(h.tobytes(), int(up), int(down), int(delay), np.dtype(dtype).name)


def _build(h, up, down, delay, dtype):
    taps = -(-h.size // up)
    hp = np.zeros(taps * up)
    hp[:h.size] = h
    blocks, size = _choose(up, down, taps, delay)
    rows_out, stride = blocks * up, blocks * down
    off, b = _residues(up, down, delay, rows_out)
    j = np.arange(taps)
    stacks, macs = [], 0
    for column, groups, g in _group_sizes(rows_out, size):
        step, base, width = _stack_geometry(off, taps, up, down, column, groups, g)
        r = column + np.arange(groups * g)
        k, c = (r - column) // g, (r - column) % g
        rows = off[r][:, None] - j[None, :] - (base + k * step)[:, None]
        mats = np.zeros((groups, width, g), dtype=dtype)
        mats[k[:, None], rows, c[:, None]] = hp[j[None, :] * up + b[r][:, None]]
        mats.setflags(write=False)
        stacks.append(Stack(column, groups, g, step, base, width, mats))
        macs += groups * g * width
    lo = min(s.base for s in stacks)
    hi = max(s.base + (s.groups - 1) * s.step + s.width for s in stacks)
    copy = max(s.width for s in stacks) > stride
    return Layout(blocks, rows_out, stride, tuple(stacks), lo, hi, copy, macs / rows_out)
