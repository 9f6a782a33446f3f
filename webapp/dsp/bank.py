"""The exact polyphase bank laid out for BLAS: coefficient stacks over strided input windows.

With prototype h (N taps at fs_in*L) and T = ceil(N/L) taps per phase, output n = qL + r with
rM + D = a_r L + b_r is y[qL + r] = sum_{j<T} h[jL + b_r] x[qM + a_r - j] (the polyphase product, derived in webapp/dsp/polyphase.py).

Layout
------
A *row* is K blocks of L outputs: R = K*L outputs from S = K*M new input frames. The row's
outputs are cut into groups of g neighbouring residues (and one smaller group for the rest);
group k reads the inputs ``[q*S + base + k*step, ... + width)`` of row q and multiplies them
by a ``width x g`` coefficient matrix. Groups of one size form a *stack*, and a stack is a
single ``np.matmul`` of a (channels, groups, rows, width) strided view with a
(groups, width, g) array, written straight into the output through a strided view.

When ``width <= S`` the rows of one group's window matrix do not overlap, so the view is an
ordinary matrix with leading dimension S and BLAS reads it in place: no window is ever copied.
Larger K makes S wide enough for that; smaller g wastes fewer multiplications on the zeros
at the group's corners (width is about T + g*M/L for T useful taps) but makes thinner
products, and thin products run far below the kernel's peak (more so in float32, whose
kernel is twice as wide). :func:`bank_layout` picks K and g per arithmetic with a cost
model (fixed numbers, so the choice, and with it every output bit, is the same on every
run; a timed calibration would not be).

Tiles
-----
Rows are computed ``tile_rows`` at a time, every call of one fixed shape. A BLAS product's
rounding depends on the call's shape and on where a row sits in it, so fixed tiles aligned
to multiples of ``tile_rows`` give every output the same summation order whatever the
blocks the input arrives in.
"""

import functools
import math
from dataclasses import dataclass

import numpy as np

__all__ = ["Stack", "Layout", "bank_layout"]

# Relative throughput of a BLAS product with g output columns, per arithmetic: OpenBLAS
# sgemm/dgemm on an x86-64 core (AVX2 kernels), 256 rows of 110-400 strided inputs, one
# thread, median over the widths. float32 runs best at multiples of 16 columns.
_EFFICIENCY = {
    "float32": {4: 0.29, 8: 0.57, 12: 0.55, 16: 0.80, 20: 0.72, 24: 0.87, 28: 0.80, 32: 0.91,
                40: 0.93, 48: 0.95, 56: 0.97, 64: 0.97, 80: 0.98, 96: 0.99, 112: 1.0, 128: 1.0},
    "float64": {4: 0.38, 8: 0.57, 12: 0.66, 16: 0.73, 20: 0.78, 24: 0.82, 28: 0.85, 32: 0.87,
                40: 0.89, 48: 0.92, 56: 0.94, 64: 0.95, 80: 0.97, 96: 0.98, 112: 1.0, 128: 1.0},
}
# One product call (numpy + BLAS dispatch, about 4 us), in multiply-adds at the kernel's peak
_CALL_COST = {"float32": 200_000, "float64": 100_000}
_MAX_COEFFS = 1 << 21      # coefficient elements allowed for the whole bank (8 MB in float32)
# Rows per product call: BLAS splits a call of a few hundred rows over two threads at nearly
# twice the speed of one, and thinner calls lose their dispatch cost; a tile's input frames
# are capped so that routes with very long rows keep a small frame.
_TILE_ROWS = 384
_TILE_FRAMES = 1 << 18
_MIN_TILE_ROWS = 32


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
    tile_rows: int   # rows per product call (per channel), a fixed shape for every call
    span: int        # input frames one tile reads
    advance: int     # input frames from one tile to the next (tile_rows * S)


def _residues(up, down, delay, rows_out):
    p = np.arange(rows_out, dtype=np.int64) * down + delay
    return p // up, p % up


def _group_sizes(rows_out, size):
    """Split rows_out columns into groups of ``size`` and one smaller group for the rest:
    [(column, groups, size), ...] (BLAS kernels run best on whole multiples of their width)."""
    full, rest = divmod(rows_out, size)
    parts = [(0, full, size)] if full else []
    if rest:
        parts.append((full * size, 1, rest))
    return parts


def _stack_geometry(off, taps, up, down, column, groups, size):
    """Window step, base and width of one stack (no coefficients)."""
    step = int(round(size * down / up))
    first = column + size * np.arange(groups)
    k = np.arange(groups)
    base = int(np.min(off[first] - (taps - 1) - k * step))
    width = int(np.max(off[first + size - 1] + 1 - k * step)) - base
    return step, base, width


def _efficiency(dtype, size):
    table = _EFFICIENCY[dtype]
    return table[max((s for s in table if s <= size), default=min(table))] * min(1, size / 4)


def _cost(up, down, taps, delay, blocks, size, dtype):
    """(copies windows, multiply-add equivalents per output) of a layout, or None if its bank
    is too large."""
    rows_out, stride = blocks * up, blocks * down
    off, _ = _residues(up, down, delay, rows_out)
    work, calls, widest = 0.0, 0, 0
    for column, groups, g in _group_sizes(rows_out, size):
        _, _, width = _stack_geometry(off, taps, up, down, column, groups, g)
        work += groups * g * width / _efficiency(dtype, g)
        calls += groups
        widest = max(widest, width)
    if rows_out * widest > _MAX_COEFFS:
        return None
    tile = _tile_rows(stride)
    return widest > stride, (work + calls * _CALL_COST[dtype] / tile) / rows_out


def _tile_rows(stride):
    return max(_MIN_TILE_ROWS, min(_TILE_ROWS, _TILE_FRAMES // stride))


def _choose(up, down, taps, delay, dtype):
    """(K, g) of the cheapest layout; one that copies windows only when no other fits."""
    best = None
    for size in sorted(_EFFICIENCY[dtype]):
        # the smallest K whose windows do not overlap, a few above it, and the first K from
        # there whose row is a whole number of groups
        need = taps - 1 + -(-size * down // up) + 2
        k0 = max(1, -(-need // down))
        unit = size // math.gcd(size, up)
        options = {1, k0, k0 + 1, k0 + 2, k0 + 3, -(-k0 // unit) * unit}
        for blocks in sorted(options):
            if blocks * up < size or blocks > 2 * k0 + 8:     # too thin, or a needlessly long row
                continue
            c = _cost(up, down, taps, delay, blocks, size, dtype)
            if c is not None and (best is None or c < best[0]):
                best = (c, blocks, size)
    if best is None:        # every layout is over the budget: the thinnest row
        return 1, min(up, min(_EFFICIENCY[dtype]))
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
    blocks, size = _choose(up, down, taps, delay, dtype.name)
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
    tile = _tile_rows(stride)
    span = (tile - 1) * stride + hi - lo
    return Layout(blocks, rows_out, stride, tuple(stacks), lo, hi, copy, macs / rows_out,
                  tile, span, tile * stride)
