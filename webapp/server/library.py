"""Recordings: probe and measure a file once, register it in the store (no Flask here)."""

from concurrent.futures import CancelledError
import glob
import logging
import os
import threading

from webapp import media
from webapp.dsp.errors import RateferryError
from webapp.jsontools import jsonable
from webapp.overview import overview_and_meters
from webapp.pipeline import measure_file
from webapp.threads import one_blas_thread

__all__ = ["DEMO_NAME", "DEMO_PAIR", "probe_figures", "measure", "analyse", "RunningAnalyses",
           "register_demo", "register_demo_pair", "find_demo_file", "demo_files"]

log = logging.getLogger(__name__)

DEMO_NAME = "harbour_interview_44k1.flac"
#: The time base demo: a reference and a track of one invented interview (two recorders).
DEMO_PAIR = ("tidewater_call_16k.flac", "tidewater_guest_16k.flac")
_DEMO_PATTERNS = ("*.flac", "*.wav")


def probe_figures(info):
    """The probe as plain figures for the store and the API."""
    return dict(rate_hz=info.rate_hz, channels=info.channels, frames=info.frames,
                duration_s=info.duration_s, format=info.format, subtype=info.subtype,
                size_bytes=info.size_bytes, tags=dict(info.tags), is_float=info.is_float)


def measure(path, info):
    """Read the whole file once: BS.1770 loudness, true peak, and finiteness of every sample.

    Returns
    -------
    dict
        ``integrated_lufs``, ``loudness_range_lu``, ``true_peak_dbtp``, ``sample_peak_dbfs``
        (None when undefined: silence, shorter than 400 ms, or a rate below the loudness
        meter's 8 kHz, then with ``analysis_note``) and ``analysis: "done"``; the same meters
        as the conversion pipeline (:class:`webapp.pipeline.Meters`).

    Raises
    ------
    AudioFileError
        At the first NaN/Inf sample (from :func:`webapp.media.read_blocks`).
    """
    # the true-peak products are small: BLAS threads only fight each other (and the other
    # requests) over them, ten times slower on a busy machine
    with one_blas_thread():
        return dict(measure_file(path, info.rate_hz, info.channels), analysis="done")


def analyse(path, info, columns=None):
    """:func:`measure`, and with ``columns`` the overview in that many columns, from one read.

    Returns
    -------
    (dict, dict or None)
        The meters (as :func:`measure`) and the overview, JSON-ready (as
        :func:`webapp.overview.overview`), or None without ``columns``.

    Raises
    ------
    AudioFileError, ParameterError
        As :func:`measure`; ParameterError for ``columns`` outside 1 to 4000.
    """
    if columns is None:
        return measure(path, info), None
    overview, meters = overview_and_meters(path, columns=columns, probe=info)
    return dict(meters, analysis="done"), jsonable(overview)


class RunningAnalyses:
    """The background analyses of long recordings, by recording id: an overview request for
    the columns one of them draws waits for it instead of reading the file a second time (the
    two would only fight over the cores)."""

    def __init__(self):
        self._lock = threading.Lock()
        self._running = {}           # recording id -> (columns or None, future)

    def submit(self, executor, recording_id, columns, fn, *args):
        """Run ``fn(*args)`` on ``executor`` (its result: the overview or None)."""
        with self._lock:
            future = executor.submit(fn, *args)
            self._running[recording_id] = (columns, future)
        future.add_done_callback(lambda f: self._forget(recording_id, f))
        return future

    def _forget(self, recording_id, future):
        with self._lock:
            if self._running.get(recording_id, (None, None))[1] is future:
                del self._running[recording_id]

    def running(self, recording_id):
        """``(columns, future)`` of the analysis running for the recording, or None."""
        with self._lock:
            return self._running.get(recording_id)

    def overview(self, recording_id, columns):
        """The overview in ``columns`` columns from the analysis running for the recording
        (waits for it); None when none is running for those columns or it gave none."""
        running = self.running(recording_id)
        if running is None or running[0] != columns:
            return None
        try:
            return running[1].result()
        except CancelledError:       # the app is shutting down
            return None


def demo_files(folder):
    """Every demo recording in ``folder`` (.flac/.wav), DEMO_NAME first; [] without a folder."""
    if not folder or not os.path.isdir(folder):
        return []
    found = sorted({p for pattern in _DEMO_PATTERNS
                    for p in glob.glob(os.path.join(glob.escape(folder), pattern))})
    preferred = os.path.join(folder, DEMO_NAME)
    return sorted(found, key=lambda p: (os.path.abspath(p) != os.path.abspath(preferred), p))


def find_demo_file(folder):
    """The main demo recording in ``folder``: DEMO_NAME, else the first .flac/.wav; or None."""
    files = demo_files(folder)
    return files[0] if files else None


def register_demo_pair(store, folder):
    """Register the time base demo pair in place; returns {reference_id, track_id} or None."""
    paths = [os.path.join(folder or "", name) for name in DEMO_PAIR]
    if not all(os.path.isfile(p) for p in paths):
        log.info("no demo pair in %s", folder)
        return None
    ids = [_register_one(store, p) for p in paths]
    if None in ids:
        return None
    return dict(reference_id=ids[0], track_id=ids[1])


def _register_one(store, path):
    with store.open() as db:
        known = db.find_demo(path)
        if known is not None:
            return known["id"]
        try:
            info = media.probe(path)
            meters = measure(path, info)
        except RateferryError as exc:
            log.warning("demo recording %s can't be used: %s", path, exc.message)
            return None
        rec = db.add_recording(name=os.path.basename(path), path=path, owned=False, demo=True,
                               probe=probe_figures(info), meters=meters)
        return rec["id"]


def register_demo(store, folder):
    """Register every demo recording in place (no copy); returns the main one's id or None.

    A file registered before and unchanged since (size, modification time) keeps its id, so a
    page reloaded after a restart still finds it.
    """
    files = demo_files(folder)
    if not files:
        log.info("no demo recording in %s", folder)
        return None
    ids = [_register_one(store, path) for path in files]
    return next((i for i in ids if i is not None), None)
