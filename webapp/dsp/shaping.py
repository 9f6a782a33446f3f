"""Error-feedback noise shaping, many stretches of a block at once, to the bit of the plain loop.

The shaped quantiser (:class:`webapp.dsp.dither.Quantizer` with ``dither="shaped"``) is a
recursion: each sample's code depends on the errors of the nine before it, through a rounding,
so it cannot be written as a vector operation or a linear filter. Run as written it is a
per-sample loop (:func:`shape_sequential`), about 1.5 microseconds a sample in Python.

This module gets the same codes, bit for bit, from vector operations. A block is cut into
stretches ("lanes") that all run at once, one numpy operation per step serving every lane.
Each lane starts some way *before* its stretch (a run-in) from zero errors; the loop forgets
where it started: its errors follow a stable recursion (the inverse of the noise transfer
function, whose zeros lie inside the unit circle), and once the last nine errors of two runs
agree bit for bit, everything after them agrees too (the same arithmetic on the same values).
So a lane's stretch is taken as it is when its nine errors at the stretch's start equal those
the stretch before it ended with (or, for the first, the errors carried from the previous
block). When they do not, the stretch is run again by the plain loop from the right errors,
only until its errors join the lane's (nine equal in a row), or to its end. Every code comes
from the exact errors, so the result is the plain loop's, whatever the block sizes; the run-in
only decides how often the plain loop has to step in.

Arithmetic is the plain loop's, operation by operation: ``v = x - (h1 e1 + ... + h9 e9)``
(products, then sums from the first tap on), ``code = round-half-even(v + d)`` clipped to the
word's range, ``e = code - v`` clipped to +-1.5 LSB. numpy's ufuncs round each operation as
Python's floats do (IEEE 754 double, no fused multiply-add).
"""

import numpy as np

__all__ = ["ERROR_BOUND_LSB", "PREFERRED_SAMPLES", "shape_sequential", "new_history", "shape_block"]

#: The fed-back error is clipped to this (its bound when nothing clips: 0.5 LSB of rounding
#: plus 1 LSB of TPDF), so the loop stays bounded through clipping and recovers after it.
ERROR_BOUND_LSB = 1.5

#: Samples (frames x channels) per block at which the lanes pay off best for their memory:
#: 128 lanes of 8192 frames, each with its run-in; blocks of half of this still gain.
PREFERRED_SAMPLES = 1 << 20

_ORDER = 9
_RUN_IN = 16384         # frames a lane runs before its stretch (the loop forgets its start)
_STRETCH = 8192         # frames a lane delivers
_STEP_ROWS = 512        # steps whose lane inputs are gathered at a time (divides both above)
# below this many samples a block goes through the plain loop: one step of the lanes costs
# about as much as 5 samples of the loop, and each lane takes RUN_IN + STRETCH steps
_LANES_FROM = 1 << 18


def new_history(channels):
    """The history :func:`shape_block` starts a stream with: zeros before the first frame."""
    return np.zeros((_RUN_IN, channels, 2))


def shape_sequential(scaled, tpdf, errors, feedback, low, high):
    """Error-feedback quantisation of one channel (values in LSB); updates ``errors`` in place.

    ``feedback`` is h_1 .. h_9, ``errors`` e[n-1] .. e[n-9]. Returns the codes (float array of
    whole numbers), the fed-back errors (float array) and how many codes were clipped.
    """
    h1, h2, h3, h4, h5, h6, h7, h8, h9 = feedback
    e1, e2, e3, e4, e5, e6, e7, e8, e9 = errors
    bound = ERROR_BOUND_LSB
    codes = []
    errs = []
    append, keep = codes.append, errs.append
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
        keep(e)
    errors[:] = [e1, e2, e3, e4, e5, e6, e7, e8, e9]
    return np.array(codes, dtype=np.float64), np.array(errs, dtype=np.float64), clipped


def shape_block(scaled, tpdf, history, errors, feedback, low, high):
    """Shaped codes of one block of frames x channels, equal to :func:`shape_sequential`'s.

    Parameters
    ----------
    scaled, tpdf : ndarray, frames x channels, float64
        The samples and the TPDF dither, in LSB.
    history : ndarray, (run-in frames) x channels x 2
        The samples and dither of the frames before the block (zeros before the stream: the
        loop then stays at zero errors, as the plain loop starts). Updated in place.
    errors : list of lists
        Per channel, the errors e[n-1] .. e[n-9] carried from the previous block; updated.
    feedback : sequence of 9 floats
        h_1 .. h_9.
    low, high : int
        The word's range.

    Returns
    -------
    codes : ndarray, frames x channels, float64 (whole numbers)
    clipped : int
        Codes clipped to the word's range.
    """
    if scaled.size < _LANES_FROM:
        codes, clipped = _sequential_block(scaled, tpdf, errors, feedback, low, high)
    else:
        codes, clipped = _lanes_block(scaled, tpdf, history, errors, feedback, low, high)
    _keep_history(history, scaled, tpdf)
    return codes, clipped


def _sequential_block(scaled, tpdf, errors, feedback, low, high):
    codes = np.empty_like(scaled)
    clipped = 0
    for c in range(scaled.shape[1]):
        codes[:, c], _, n = shape_sequential(scaled[:, c], tpdf[:, c], errors[c], feedback, low, high)
        clipped += n
    return codes, clipped


def _keep_history(history, scaled, tpdf):
    """The last run-in frames of samples and dither, for the next block's first lanes."""
    keep = history.shape[0]
    frames = scaled.shape[0]
    if frames >= keep:
        history[:, :, 0] = scaled[frames - keep:]
        history[:, :, 1] = tpdf[frames - keep:]
    else:
        history[:keep - frames] = history[frames:]
        history[keep - frames:, :, 0] = scaled
        history[keep - frames:, :, 1] = tpdf


def _gather(block, history, rows):
    """Samples (or dither) of ``rows`` (frame indices, the run-in's first frame being 0) as
    steps x lanes: frames before the block come from ``history``, frames past it are 0."""
    frames, channels = block.shape
    at = rows - _RUN_IN
    out = block[np.clip(at, 0, max(frames - 1, 0))]            # steps x stretches x channels
    before = at < 0
    if before.any():
        out[before] = history[at[before] + _RUN_IN]
    out[at >= frames] = 0.0
    return out.reshape(rows.shape[0], -1)


def _may_clip(scaled, feedback, low, high):
    """Whether any code of the block can reach the word's limits: |v| is at most |x| plus the
    fed-back errors (1.5 LSB each through sum |h|), and the dither adds at most 1."""
    reach = ERROR_BOUND_LSB * float(np.abs(feedback).sum()) + 1.0
    return scaled.size and (scaled.max() + reach >= high or scaled.min() - reach <= low)


def _run_lanes(scaled, tpdf, history, stretches, feedback, low, high, clip):
    """Step every lane from zero errors through its run-in and its stretch.

    Returns the stretch's codes before clipping to the word (None when ``clip`` is False:
    nothing can clip) and after, ``STRETCH x lanes``, and the errors of the nine steps before
    the stretch and of every step of it, ``(9 + STRETCH) x lanes``."""
    channels = scaled.shape[1]
    lanes = stretches * channels
    taps = np.asarray(feedback, dtype=np.float64)[:, None]
    work = np.zeros((_ORDER + _STEP_ROWS, lanes))     # the errors: nine before, then a chunk
    kept = np.empty((_ORDER + _STRETCH, lanes))
    codes = np.empty((_STRETCH, lanes))
    raw = np.empty((_STRETCH, lanes)) if clip else None
    scratch = np.empty((2, lanes))
    prod = np.empty((_ORDER, lanes))
    acc = np.empty(lanes)
    v = np.empty(lanes)
    starts = np.arange(stretches) * _STRETCH
    for t0 in range(0, _RUN_IN + _STRETCH, _STEP_ROWS):     # RUN_IN, STRETCH: whole chunks
        rows = starts[None, :] + np.arange(t0, t0 + _STEP_ROWS)[:, None]
        xs = _gather(scaled, history[:, :, 0], rows)      # lanes in (stretch, channel) order
        ds = _gather(tpdf, history[:, :, 1], rows)
        into = t0 - _RUN_IN                               # row of the stretch, < 0 in the run-in
        for i in range(_STEP_ROWS):
            # e[n-1] .. e[n-9] are rows i + 8 down to i: one product, one sum in that order
            np.multiply(taps, work[i:i + _ORDER][::-1], out=prod)
            np.add.reduce(prod, axis=0, out=acc)
            np.subtract(xs[i], acc, out=v)
            code = codes[into + i] if into >= 0 else scratch[0]
            if clip:
                r = raw[into + i] if into >= 0 else scratch[1]
                np.add(v, ds[i], out=r)
                np.rint(r, out=r)
                np.clip(r, low, high, out=code)
            else:
                np.add(v, ds[i], out=code)
                np.rint(code, out=code)
            e = work[_ORDER + i]
            np.subtract(code, v, out=e)
            if clip:    # else |e| <= 0.5 + |d| < 1.5 already: the clip would change nothing
                np.clip(e, -ERROR_BOUND_LSB, ERROR_BOUND_LSB, out=e)
        if into >= 0:
            kept[_ORDER + into:_ORDER + into + _STEP_ROWS] = work[_ORDER:]
        elif into + _STEP_ROWS == 0:
            kept[:_ORDER] = work[-_ORDER:]
        work[:_ORDER] = work[-_ORDER:]
    return raw, codes, kept


def _lanes_block(scaled, tpdf, history, errors, feedback, low, high):
    frames, channels = scaled.shape
    stretches = -(-frames // _STRETCH)
    clip = _may_clip(scaled, feedback, low, high)
    raw, lane_codes, lane_errs = _run_lanes(scaled, tpdf, history, stretches, feedback, low, high, clip)
    shape = (-1, stretches, channels)
    lane_codes, lane_errs = lane_codes.reshape(shape), lane_errs.reshape(shape)
    raw = raw.reshape(shape) if clip else None
    start = _ORDER                         # row of lane_errs of a stretch's first frame
    codes = np.empty((frames, channels))
    clipped = 0
    for c in range(channels):
        state = list(errors[c])                   # e[n-1] .. e[n-9] at the stretch's start
        for k in range(stretches):
            first = k * _STRETCH
            last = min(_STRETCH, frames - first)            # frames past the block: padding
            out = codes[first:first + last, c]
            out[:] = lane_codes[:last, k, c]
            repaired, count = 0, 0
            if lane_errs[start - _ORDER:start, k, c][::-1].tolist() != state:
                stretch = slice(first, first + last)
                repaired, count = _repair(scaled[stretch, c], tpdf[stretch, c],
                                          lane_errs[start:start + last, k, c], out, state,
                                          feedback, low, high)
            if repaired < last:
                state = lane_errs[start + last - _ORDER:start + last, k, c][::-1].tolist()
                if clip:   # the plain loop counted where it ran, the lane counts the rest
                    rest = slice(repaired, last)
                    count += int(np.count_nonzero(raw[rest, k, c] != lane_codes[rest, k, c]))
            clipped += count
        errors[c][:] = state
    return codes, clipped


def _repair(x, d, lane_errs, out, state, feedback, low, high):
    """Run the plain loop over a stretch from the right errors ``state`` (updated in place)
    until its errors join the lane's (nine equal in a row), writing its codes into ``out``.

    Returns the frames the plain loop ran (the whole stretch when the errors never joined,
    and then ``state`` holds the errors at its end) and the codes it clipped."""
    n = x.size
    done, clipped = 0, 0
    step = 4 * _ORDER
    while done < n:
        part, errs, count = shape_sequential(x[done:done + step], d[done:done + step], state,
                                             feedback, low, high)
        out[done:done + part.size] = part
        done += part.size
        clipped += count
        if done < n and np.array_equal(errs[-_ORDER:], lane_errs[done - _ORDER:done]):
            return done, clipped
        step *= 2
    return n, clipped
