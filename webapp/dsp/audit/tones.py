"""Tone plans: which whole-Hz tones share a run (one channel of one converter call) so that
every output line belongs to exactly one tone, where each tone's artefacts land, and the
levels the design's response predicts for them (see the package notes)."""

import math

import numpy as np

from ..spectrum import response_at
from .measure import _db10, _level_db, _stages, predicted_response

MAX_RUNS = 8                        # channels per tone family
RESIDUE_MIN_CAPACITY = 8            # below this many residue classes, fall back to key bins
PASS_TONES = 260                    # targets spread over the passband ...
EDGE_TONES = 80                     # ... plus these near the passband / stopband edge
STOP_TONES = 200
MAX_PREDICTED_MACS = 50_000_000    # skip the predicted THD+N beyond this much direct work


# ------------------------------------------------------------------ placing tones

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


# ------------------------------------------------------------------ lines and predictions

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

