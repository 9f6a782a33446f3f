"""Designs kept in memory for the web app: live edits that come back to an earlier value cost
nothing, and a conversion runs the very plan the page showed (no Flask here)."""

from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor
import hashlib
import json
import threading

from webapp.jsontools import jsonable
from webapp.dsp.design import design as design_filter, estimate
from webapp.dsp.spec import preset
from webapp.dsp.stages import choose_plan
from webapp.figures import design_view, plans_view

__all__ = ["DesignCache", "design_key", "design_estimate", "PLAYBACK_PRESET", "EXTREME_NUMTAPS",
           "EXTREME_LATENCY_MS"]

# Renditions for the listening area are brought to the playback rate at this preset.
PLAYBACK_PRESET = "archival_master"
# Plans asked for "later" start once the designs have rested this long: during live edits each
# would take the second core for half a second while the page draws and the next design runs.
PLANS_REST_S = 0.25


#: Above these a design is "extreme": the page shows the estimate and asks before designing
#: (100 000 taps take seconds to design and measure; 50 ms of delay is audible against picture).
EXTREME_NUMTAPS = 100_000
EXTREME_LATENCY_MS = 50.0


def design_estimate(spec, fs_in, fs_out):
    """The order estimate of a design (no design made), and whether it is extreme.

    Returns a dict: :meth:`webapp.dsp.design.Estimate.figures` plus ``extreme`` (bool),
    ``reasons`` (plain words) and ``limits`` (``numtaps``, ``latency_ms``).
    """
    est = estimate(spec, fs_in, fs_out)
    reasons = []
    if est.numtaps > EXTREME_NUMTAPS:
        reasons.append(f"about {est.numtaps:,} taps (more than {EXTREME_NUMTAPS:,})"
                       .replace(",", " "))
    if est.latency_ms is not None and est.latency_ms > EXTREME_LATENCY_MS:
        reasons.append(f"about {est.latency_ms:.0f} ms of delay (more than "
                       f"{EXTREME_LATENCY_MS:g} ms)")
    return dict(est.figures(), extreme=bool(reasons), reasons=reasons,
                limits=dict(numtaps=EXTREME_NUMTAPS, latency_ms=EXTREME_LATENCY_MS))


def design_key(spec, fs_in, fs_out):
    """A stable text key of (spec, fs_in, fs_out) for the store."""
    text = json.dumps([spec.to_dict(), int(fs_in), int(fs_out)], sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()



class DesignCache:
    """Designs, their plot data, plans and audits kept in memory, least recently used out.

    Parameters
    ----------
    size : int
        Entries kept per kind.
    max_taps : int
        Designs are also evicted while the cached taps add up to more than this.
    """

    def __init__(self, *, size=24, max_taps=24_000_000):
        self.size = int(size)
        self.max_taps = int(max_taps)
        self._data = OrderedDict()
        self._weights = {}
        self._lock = threading.Lock()
        self._pending = {}
        self._adopted = {}           # key -> a future computing its value elsewhere
        self._executor = ThreadPoolExecutor(max_workers=2, thread_name_prefix="rateferry-design")
        self._rest_timer = None

    def shutdown(self):
        self.hold_plans()
        self._executor.shutdown(wait=True, cancel_futures=True)

    def _memo(self, kind, key, compute, weight=lambda v: 0):
        k = (kind,) + key
        with self._lock:
            if k in self._data:
                self._data.move_to_end(k)
                return self._data[k], True
            ahead = self._adopted.get(k)
        if ahead is not None:
            try:
                return ahead.result(), True
            except Exception:        # failed or cancelled: computed here, as if never started
                pass
        with self._lock:
            lock = self._pending.setdefault(k, threading.Lock())
        with lock:
            with self._lock:
                if k in self._data:
                    self._data.move_to_end(k)
                    return self._data[k], True
            try:
                value = compute()
            finally:
                with self._lock:
                    self._pending.pop(k, None)
            with self._lock:
                self._data[k] = value
                self._weights[k] = weight(value)
                self._evict(kind)
        return value, False

    def _evict(self, kind):
        same = [k for k in self._data if k[0] == kind]
        while len(same) > self.size:
            old = same.pop(0)
            self._data.pop(old)
            self._weights.pop(old, None)
        while sum(self._weights.values()) > self.max_taps and len(self._weights) > 1:
            old = next(k for k in self._data if self._weights.get(k))
            self._data.pop(old)
            self._weights.pop(old, None)

    def design(self, spec, fs_in, fs_out):
        """The single-stage design (measured, maybe not meeting the mask)."""
        value, _ = self._memo("design", (spec, fs_in, fs_out),
                              lambda: design_filter(spec, fs_in, fs_out),
                              weight=lambda d: int(d.taps.size))
        return value

    def view(self, spec, fs_in, fs_out):
        """(design_view dict, cached?)."""
        return self._memo("view", (spec, fs_in, fs_out),
                          lambda: jsonable(design_view(self.design(spec, fs_in, fs_out))))

    def plans(self, spec, fs_in, fs_out):
        """(plans_view dict, cached?)."""
        def compute():
            label = None
            if spec.stages == "auto":
                chosen = self.route_plan(spec, fs_in, fs_out)
                label = chosen.label if chosen.multistage else None
            return jsonable(plans_view(spec, fs_in, fs_out, chosen_label=label))
        return self._memo("plans", (spec, fs_in, fs_out), compute)

    def plans_async(self, spec, fs_in, fs_out):
        """Start :meth:`plans` on a helper thread; returns a future of (dict, cached?)."""
        return self._executor.submit(self.plans, spec, fs_in, fs_out)

    def plans_after_rest(self, spec, fs_in, fs_out, *, rest_s=PLANS_REST_S):
        """Start :meth:`plans` once no other design has been asked for during ``rest_s``."""
        timer = threading.Timer(rest_s, self._start_plans, (spec, fs_in, fs_out))
        timer.daemon = True
        with self._lock:
            if self._rest_timer is not None:
                self._rest_timer.cancel()
            self._rest_timer = timer
        timer.start()

    def hold_plans(self):
        """A new design is on its way: plans waiting for a rest don't start."""
        with self._lock:
            if self._rest_timer is not None:
                self._rest_timer.cancel()
                self._rest_timer = None

    def _start_plans(self, spec, fs_in, fs_out):
        try:
            self.plans_async(spec, fs_in, fs_out)
        except RuntimeError:   # shut down meanwhile: nobody will ask for them
            pass

    def route_plan(self, spec, fs_in, fs_out):
        """The Plan a conversion with ``spec`` runs (:func:`choose_plan`), unverified."""
        value, _ = self._memo("route", (spec, fs_in, fs_out),
                              lambda: choose_plan(spec, fs_in, fs_out,
                                                  single=self.design(spec, fs_in, fs_out)))
        return value

    def conversion_plan(self, spec, fs_in, fs_out):
        """The verified Plan a conversion runs (as :func:`webapp.dsp.stages.verified_plan`)."""
        return self.route_plan(spec, fs_in, fs_out).require_met()

    def playback(self, fs_in, fs_out):
        """The archival-grade design that brings a rendition to the playback rate."""
        return self.conversion_plan(preset(PLAYBACK_PRESET), fs_in, fs_out)

    def memo(self, kind, key, compute):
        """Cache any other derived value (spectra, audits) under ``(kind,) + key``."""
        return self._memo(kind, key, compute)

    def adopt(self, kind, key, future):
        """Keep what ``future`` (work started elsewhere, e.g. the spectra of an upload computed
        beside its analysis) gives under ``(kind,) + key``: a :meth:`memo` of that key
        meanwhile waits for it instead of computing it a second time (and answers "cached").
        A future that fails or is cancelled leaves nothing: the memo computes the value itself.
        """
        k = (kind,) + key
        with self._lock:
            self._adopted[k] = future
        future.add_done_callback(lambda f: self._settle(k, f))

    def _settle(self, k, future):
        with self._lock:
            if self._adopted.get(k) is not future:
                return
            del self._adopted[k]
            if future.cancelled() or future.exception() is not None or k in self._data:
                return
            self._data[k] = future.result()
            self._weights[k] = 0
            self._evict(k[0])

    def put(self, kind, key, value):
        """Keep a value computed elsewhere (an overview from the upload's analysis) under
        ``(kind,) + key``; never waits for a :meth:`memo` computing the same key."""
        k = (kind,) + key
        with self._lock:
            self._data[k] = value
            self._data.move_to_end(k)
            self._weights[k] = 0
            self._evict(kind)
