"""Drift between recorded files: measure a track against a reference, correct it, verify.

The file side of :mod:`webapp.dsp.drift` and :mod:`webapp.dsp.timebase`, shared by the command
line (``rateferry drift``) and the web app:

* :func:`measure_files` reads both files block by block (through :mod:`webapp.media`) into the
  core's measurement;
* :func:`drift_report` is the report both entry points give (JSON keys equal the
  :class:`~webapp.dsp.drift.DriftMeasurement` field names, plus the file names);
* :func:`correction_job` prepares the correction as an ordinary job (:func:`webapp.jobs.prepare`
  with the measured time base), so it goes through the same delivery chain, mask, progress,
  history and recipe as any conversion;
* :func:`verification` measures the corrected file against the reference again;
* :func:`summed_excerpts` gives the reference and the track summed before and after the
  correction, for listening (misalignment is heard as comb filtering and echo).

Sign conventions (the time base's): ``drift_ppm`` is positive when the track's clock runs fast,
``offset_ms`` positive when the track's content comes late (starts later in its file).
"""

from concurrent.futures import ThreadPoolExecutor
from dataclasses import replace
import math
import os

import numpy as np

from . import jobs, media
from .dsp.drift import measure_drift
from .dsp.errors import ParameterError
from .dsp.timebase import TimeBase, correct_drift
from .threads import one_blas_thread

__all__ = ["measure_files", "drift_report", "correction_job", "named_in",
           "verification", "summed_excerpts", "LISTEN_PEAK_DBFS"]

#: Peak of the louder of the two summed excerpts; the player still starts quiet on top of this.
LISTEN_PEAK_DBFS = -6.0
_EXCERPT_MARGIN_S = 0.05


def _reader(path):
    return lambda: media.read_blocks(path, dtype="float32")


def _both_at_once(fn, sources, rates):
    """Read and decimate the two recordings on two threads (numpy, scipy and libsndfile
    release the GIL), the BLAS library held to one thread meanwhile: its own threads would
    only compete with them for the cores."""
    with one_blas_thread(), ThreadPoolExecutor(2) as pool:
        return list(pool.map(fn, sources, rates))


def measure_files(reference, track, **options):
    """:func:`webapp.dsp.drift.measure_drift` of two files (``options`` are its keywords); both
    files are read at once."""
    ref, trk = media.probe(reference), media.probe(track)
    options.setdefault("mapper", _both_at_once)
    return measure_drift(_reader(reference), ref.rate_hz, _reader(track), trk.rate_hz,
                         **options)


def drift_report(measurement, *, reference_name=None, track_name=None):
    """The measurement as plain figures: every field, the interval, the per-window points, the
    fitted line at the points and the residuals (ms) of the used ones."""
    m = measurement
    out = dict(reference=reference_name, track=track_name)
    out.update(m.figures())
    out["interval_ppm"] = [m.drift_ppm_low, m.drift_ppm_high]
    fitted = m.offset_at_ms(m.times_s)
    out["points"]["fitted_ms"] = fitted.tolist()
    out["points"]["residual_ms"] = (m.offsets_ms - fitted).tolist()
    out["duration_s"] = m.ref_frames / m.ref_rate_hz
    out["offset_end_ms"] = float(m.offset_at_ms(out["duration_s"]))
    return out


def named_in(job, folder):
    """``job`` writing to ``<folder>/<track stem>_aligned_<rate>_<bits><ext>`` (the corrected
    track's name; the word length is the job's own decision)."""
    stem = os.path.splitext(os.path.basename(job.source))[0]
    return replace(job, target=os.path.join(folder, job.download_name(f"{stem}_aligned")))


def correction_job(track, target, measurement, **options):
    """The job that brings ``track`` onto the reference's clock, rate, start and length.

    ``options`` are :func:`webapp.jobs.prepare`'s (spec, delivery, plan, block_frames, probe).
    """
    tb = measurement.time_base()
    return jobs.prepare(track, target, fs_out=tb.fs_out, time_base=tb, **options)


def verification(reference, corrected, **options):
    """Measure the corrected file against the reference again: the remaining drift and offset.

    Returns the report of :func:`drift_report` plus ``worst_offset_ms``: the larger fitted
    offset, at the start or at the end (the correction holds when it stays small throughout).
    """
    m = measure_files(reference, corrected, **options)
    out = drift_report(m)
    out["worst_offset_ms"] = max(abs(out["offset_ms"]), abs(out["offset_end_ms"]))
    return out


def _mono(path, start, frames):
    parts = list(media.read_blocks(path, start=start, frames=frames))
    x = np.concatenate(parts, axis=0) if parts else np.zeros((0, 1))
    return x.mean(axis=1)


def _excerpt_at(track, info, tb, t0_s, frames_out, drift_ppm, offset_ms):
    """``frames_out`` frames of ``track`` at the reference rate from reference time ``t0_s``,
    on the time base (drift_ppm, offset_ms): only the stretch of the track it needs is read."""
    e = drift_ppm * 1e-6
    t_track = offset_ms / 1000.0 + (1 + e) * t0_s
    first = max(0, int(math.floor((t_track - _EXCERPT_MARGIN_S) * info.rate_hz)))
    span = frames_out / tb.fs_out * (1 + e) + 2 * _EXCERPT_MARGIN_S
    count = int(math.ceil(span * info.rate_hz)) + 1
    if first >= info.frames:
        return np.zeros(frames_out)
    x = _mono(track, first, min(count, info.frames - first))
    local = TimeBase(info.rate_hz, tb.fs_out, drift_ppm,
                     (t_track - first / info.rate_hz) * 1000.0, frames_out)
    return correct_drift(x, local)


def summed_excerpts(reference, track, measurement, *, start_s, length_s):
    """The reference plus the track, both mono, at the reference's rate, before and after the
    correction: ``(before, after, figures)``.

    Before: the track as it is (same file time as the reference, only its rate converted).
    After: the track on the measured time base. Each track excerpt is matched to the
    reference's rms before summing, so the comb filtering of a misalignment is at its
    deepest; one gain brings the louder sum's peak to :data:`LISTEN_PEAK_DBFS`.
    """
    m = measurement
    ref_info, trk_info = media.probe(reference), media.probe(track)
    tb = m.time_base()
    duration = ref_info.duration_s
    if not 0 <= start_s < duration:
        raise ParameterError(f"start_s must be from 0 to below the reference's {duration:.3f} "
                             f"s, got {start_s!r}", "start_s")
    frames = int(round(min(length_s, duration - start_s) * ref_info.rate_hz))
    first = int(round(start_s * ref_info.rate_hz))
    ref = _mono(reference, first, frames)
    frames = ref.shape[0]
    t0 = first / ref_info.rate_hz
    before = _excerpt_at(track, trk_info, tb, t0, frames, 0.0, 0.0)
    after = _excerpt_at(track, trk_info, tb, t0, frames, m.drift_ppm, m.offset_ms)

    def matched(x):
        rx, rr = float(np.sqrt(np.mean(x * x))), float(np.sqrt(np.mean(ref * ref)))
        return x * (rr / rx) if rx > 0 and rr > 0 else x

    sums = [ref + matched(before), ref + matched(after)]
    peak = max(float(np.max(np.abs(s))) for s in sums)
    gain = 10 ** (LISTEN_PEAK_DBFS / 20) / peak if peak > 0 else 1.0
    lag_before = m.offset_at_ms(t0 + frames / ref_info.rate_hz / 2)
    figures = dict(start_s=t0, length_s=frames / ref_info.rate_hz, rate_hz=ref_info.rate_hz,
                   gain_db=20 * math.log10(gain), misalignment_before_ms=float(lag_before))
    return sums[0] * gain, sums[1] * gain, figures
