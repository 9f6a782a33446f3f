"""Batch progress: one line on stderr for people, JSON lines on stdout for machines.

The line: files done / total, audio hours converted, throughput as a multiple of real time
(audio seconds converted per wall-clock second) and the estimated time left. JSON events carry
the same figures: ``{"event": "start", ...}``, one ``{"event": "file", ...}`` per finished file
and ``{"event": "end", ...}``.
"""

import json
import math
import sys
import time

from ..jsontools import jsonable

__all__ = ["Progress"]


class Progress:
    """Counts finished files and audio seconds; draws the line and writes the events."""

    def __init__(self, *, total_files, total_audio_s, line=True, json_events=False,
                 stream=None, out=None):
        self.total_files = total_files
        self.total_audio_s = float(total_audio_s)
        self.line = line
        self.json_events = json_events
        self.stream = stream or sys.stderr
        self.out = out or sys.stdout
        self.files_done = 0
        self.audio_done_s = 0.0
        self.t0 = time.perf_counter()
        self._last = 0.0

    def figures(self):
        elapsed = time.perf_counter() - self.t0
        speed = self.audio_done_s / elapsed if elapsed > 0 else 0.0
        left = self.total_audio_s - self.audio_done_s
        eta = left / speed if speed > 0 else None
        return dict(files_done=self.files_done, files_total=self.total_files,
                    audio_hours_done=self.audio_done_s / 3600.0,
                    audio_hours_total=self.total_audio_s / 3600.0,
                    x_realtime=speed, eta_s=eta, elapsed_s=elapsed)

    def event(self, kind, **data):
        if self.json_events:
            record = dict(event=kind, **data)
            self.out.write(json.dumps(jsonable(record), allow_nan=False) + "\n")
            self.out.flush()

    def start(self, **data):
        self.t0 = time.perf_counter()
        self.event("start", **data, **self.figures())
        self.draw(force=True)

    def clock(self):
        """Start timing the conversions (after the cluster is up): the throughput and the
        time left count from here."""
        self.t0 = time.perf_counter()

    def file_finished(self, name, *, state, audio_s=0.0, **data):
        """Count one file (``audio_s`` only when it was converted in this run)."""
        self.files_done += 1
        self.audio_done_s += audio_s
        self.event("file", name=name, state=state, **data, **self.figures())
        self.draw(force=state == "failed")

    def note(self, text):
        """A line of its own on stderr (a failure, a retry), also with --json or --quiet;
        then the progress line again."""
        self.stream.write(("\r\x1b[K" if self.line else "") + text + "\n")
        self.stream.flush()
        self.draw(force=True)

    def draw(self, *, force=False):
        if not self.line:
            return
        now = time.perf_counter()
        if not force and now - self._last < 0.25:
            return
        self._last = now
        f = self.figures()
        eta = f["eta_s"]
        eta_text = _clock(eta) if eta is not None and math.isfinite(eta) else "--:--"
        self.stream.write(f"\r\x1b[Kfiles {f['files_done']}/{f['files_total']}, "
                          f"{f['audio_hours_done']:.3f} of {f['audio_hours_total']:.3f} audio "
                          f"hours, {f['x_realtime']:.1f}x real time, {eta_text} left")
        self.stream.flush()

    def finish(self, **data):
        if self.line:
            self.draw(force=True)
            self.stream.write("\n")
            self.stream.flush()
        self.event("end", **data, **self.figures())


def _clock(seconds):
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"
