"""The streaming execution of a prepared job (:mod:`webapp.jobs` prepares it).

source file -> probe -> route and design (verified against the mask) -> streaming converter
-> gain (headroom / loudness policy) -> word length and dither -> atomic output file,
with BS.1770 loudness and true peak measured on the source and on the delivered output.

When a true-peak ceiling or a loudness target is set, the output is measured in a first pass
at unity gain; conversion is linear, so the gain that satisfies both bounds follows exactly and
the second pass writes the file. Memory stays flat: everything streams in blocks.
"""

from dataclasses import dataclass, field
import math
import os
import queue
import threading
import time

import numpy as np
from threadpoolctl import threadpool_limits

from . import __version__
from . import media, riff
from .dsp.dither import Quantizer
from .delivery import Delivery, gain_for
from .dsp.errors import ParameterError, RateferryError
from .dsp.loudness import LoudnessMeter, TruePeakMeter
from .dsp.polyphase import make_converter
from .dsp.spec import Spec

__all__ = ["Cancelled", "ConversionResult", "execute", "Meters", "BLOCK_FRAMES"]

BLOCK_FRAMES = 65536


class Cancelled(RateferryError):
    """The conversion was cancelled; no output was left behind."""


@dataclass(frozen=True)
class ConversionResult:
    """Everything a report, a design sheet or a recipe needs about one conversion."""

    source_path: str
    output_path: str
    fs_in: int
    fs_out: int
    channels: int
    frames_in: int
    frames_out: int
    seconds: float
    spec: Spec
    delivery: Delivery
    plan: object = field(repr=False)
    source_probe: object = field(repr=False)
    output_format: str = ""
    output_subtype: str = ""
    bits: str | None = None
    gain_db: float = 0.0
    gain_reason: str = ""
    source_meters: dict = field(default_factory=dict)
    output_meters: dict = field(default_factory=dict)
    clipped_samples: int = 0
    passes: int = 1
    block_frames: int = BLOCK_FRAMES
    source_sha256: str = ""
    output_sha256: str = ""
    version: str = __version__
    recipe_check: dict | None = None    # a recipe re-run: reproduces, differences
    warnings: tuple = ()                # e.g. a source shorter than its header declares
    time_base: object = None            # the job's TimeBase (a drift correction) or None
    speed: object = None                # the job's SpeedChange or None

    def figures(self):
        d = self.plan.figures()
        d.update(
            frames_in=self.frames_in, frames_out=self.frames_out, seconds=self.seconds,
            channels=self.channels, output_format=self.output_format,
            output_subtype=self.output_subtype, bits=self.bits, gain_db=self.gain_db,
            gain_reason=self.gain_reason, passes=self.passes,
            source=dict(self.source_meters), output=dict(self.output_meters,
                                                         clipped_samples=self.clipped_samples),
            clipped_samples=self.clipped_samples, delivery=self.delivery.to_dict(),
            source_sha256=self.source_sha256, output_sha256=self.output_sha256,
            version=self.version, warnings=list(self.warnings),
        )
        if self.recipe_check is not None:
            d["recipe_check"] = dict(self.recipe_check)
        if self.time_base is not None:
            d["time_base"] = self.time_base.to_dict()
        if self.speed is not None:
            d["speed"] = self.speed.to_dict()
        return d


class Meters:
    """BS.1770 loudness and true peak of one stream, fed block by block.

    ``result()`` gives ``integrated_lufs``, ``loudness_range_lu``, ``true_peak_dbtp`` and
    ``sample_peak_dbfs``, None where undefined (silence, under 400 ms). Below the loudness
    meter's lowest rate (8 kHz) the loudness figures are None and ``analysis_note`` says why;
    the true peak is still measured, so such a conversion still runs.
    """

    def __init__(self, rate, channels):
        try:
            self.loud, self.note = LoudnessMeter(rate_hz=rate, channels=channels), None
        except ParameterError as exc:
            self.loud, self.note = None, exc.message
        self.peak = TruePeakMeter(rate_hz=rate, channels=channels)

    def process(self, x):
        if self.loud is not None:
            self.loud.process(x)
        self.peak.process(x)

    def result(self):
        pr = self.peak.result()
        out = dict(integrated_lufs=None, loudness_range_lu=None,
                   true_peak_dbtp=_finite(pr.true_peak_dbtp),
                   sample_peak_dbfs=_finite(pr.sample_peak_dbfs))
        if self.loud is not None:
            lr = self.loud.result()
            out.update(integrated_lufs=_finite(lr.integrated_lufs),
                       loudness_range_lu=_finite(lr.loudness_range_lu))
        if self.note:
            out["analysis_note"] = f"no loudness: {self.note}"
        return out


def _finite(v):
    v = float(v)
    return v if math.isfinite(v) else None


_STOP = object()


class _Background:
    """One worker thread applying ``fn`` to items in order, through a bounded queue.

    numpy, scipy and libsndfile release the GIL in their inner loops, so the meters, the
    encoder and the converter overlap on separate cores. The queue bounds memory; an error in
    the worker is raised in the caller at the next submit or at finish.
    """

    def __init__(self, fn, *, depth=4, name="rateferry-stage"):
        self._fn = fn
        self._q = queue.Queue(maxsize=depth)
        self._error = None
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    def _run(self):
        while True:
            item = self._q.get()
            if item is _STOP:
                return
            if self._error is None:
                try:
                    self._fn(item)
                except BaseException as exc:   # handed to the caller
                    self._error = exc

    def submit(self, item):
        if self._error is not None:
            raise self._error
        self._q.put(item)

    def finish(self):
        self._q.put(_STOP)
        self._thread.join()
        if self._error is not None:
            raise self._error

    def abort(self):
        self._q.put(_STOP)
        self._thread.join()


class _Stages:
    """Background stages that finish (or abort) together, the last added first."""

    def __init__(self):
        self._stages = []

    def add(self, fn, name):
        stage = _Background(fn, name=name)
        self._stages.append(stage)
        return stage

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        stages, self._stages = self._stages[::-1], []
        if exc_type is not None:
            for stage in stages:
                stage.abort()
            return False
        errors = []
        for stage in stages:
            try:
                stage.finish()
            except BaseException as err:
                errors.append(err)
        if errors:
            raise errors[0]
        return False


def _prefetch(blocks, *, depth=3):
    """Iterate ``blocks`` (a generator) in a reader thread, ``depth`` blocks ahead."""
    q = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def run():
        try:
            for item in blocks:
                while not stop.is_set():
                    try:
                        q.put(("block", item), timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    break
            q.put(("end", None))
        except BaseException as exc:
            q.put(("error", exc))
        finally:
            blocks.close()

    thread = threading.Thread(target=run, name="rateferry-reader", daemon=True)
    thread.start()
    try:
        while True:
            kind, item = q.get()
            if kind == "block":
                yield item
            elif kind == "end":
                return
            else:
                raise item
    finally:
        stop.set()
        while thread.is_alive():
            try:
                q.get(timeout=0.1)
            except queue.Empty:
                pass
        thread.join()


def short_source_warnings(source, frames_read, frames_declared):
    """A warning when the source held fewer frames than its header declares (a cut-off
    recording: libsndfile trims its frame count to the data there, without an error, so the
    declared figure comes from the header itself, :func:`webapp.riff.declared_frames`)."""
    if frames_read >= frames_declared:
        return ()
    name = os.path.basename(os.fspath(source))
    return (f"'{name}' is shorter than its header declares: {frames_read} of "
            f"{frames_declared} frames could be read (the file was cut off?); the output holds "
            f"the {frames_read} frames there are",)


def _check_cancel(cancel):
    if cancel is not None and cancel.is_set():
        raise Cancelled("the conversion was cancelled; no output was written", "conversion")


def execute(job, *, progress=None, cancel=None, tags_comment=True):
    """Run a prepared job (see :func:`webapp.jobs.prepare`); returns a ConversionResult.

    The stages (reader, converter, meters, quantiser, writer) run on their own threads, so the
    BLAS library is held to one thread meanwhile: its own worker threads would only compete
    with them for the cores (measured: 14.1 s against 10.1 s for ten minutes of stereo).

    progress : callable(fraction, frames_done, frames_total), optional
    cancel : threading.Event, optional
        When set, the conversion stops at the next block, leaving no output behind.
    """
    with threadpool_limits(limits=1, user_api="blas"):
        return _execute(job, progress=progress, cancel=cancel, tags_comment=tags_comment)


def _execute(job, *, progress, cancel, tags_comment):
    t0 = time.perf_counter()
    src, source, target = job.probe, job.source, job.target
    fs_in, fs_out, delivery, design = job.fs_in, job.fs_out, job.delivery, job.plan
    out_plan, blocksize, passes = job.output, job.block_frames, job.passes
    media.refuse_same_file(source, target)
    dtype = design.spec.arithmetic
    needs_first_pass = passes == 2
    total_work = src.frames * passes
    done = 0

    def report(frames):
        if progress is not None:
            progress(min(1.0, frames / max(total_work, 1)), frames, total_work)

    source_meters = Meters(fs_in, src.channels)
    gain_db, gain_reason = 0.0, "report only"
    if needs_first_pass:
        conv = make_converter(design, channels=src.channels, dtype=dtype,
                              time_base=job.time_base)
        first = Meters(fs_out, src.channels)
        with _Stages() as stages:
            source_stage = stages.add(source_meters.process, "rateferry-source-meters")
            first_stage = stages.add(first.process, "rateferry-output-meters")
            for block in _prefetch(media.read_blocks(source, blocksize=blocksize)):
                _check_cancel(cancel)
                source_stage.submit(block)
                first_stage.submit(conv.process(block))
                done += block.shape[0]
                report(done)
            first_stage.submit(conv.flush())
        gain_db, gain_reason = gain_for(delivery, first.result(), out_plan.bits, fs_out)
    gain = 10 ** (gain_db / 20.0)

    quant = None
    if out_plan.bits in ("16", "24"):
        quant = Quantizer(bits=out_plan.bits, dither=delivery.dither, seed=delivery.dither_seed,
                          channels=src.channels, rate_hz=fs_out)
    scale = {"16": 2.0**15, "24": 2.0**31}.get(out_plan.bits)
    out_meters = Meters(fs_out, src.channels)
    conv = make_converter(design, channels=src.channels, dtype=dtype, time_base=job.time_base)
    comment = media.converted_comment(fs_in, fs_out) if tags_comment else None

    def quantize(y):
        codes = quant.process(y)
        write_stage.submit(codes)
        meter_stage.submit(codes.astype(np.float64) / scale)

    def deliver(y):
        if y.shape[0] == 0:
            return
        if gain != 1.0:
            y = y * gain
        if quant is not None:
            quant_stage.submit(y)
        else:
            write_stage.submit(y)
            meter_stage.submit(y)

    with media.AtomicWriter(target, out_plan, tags=src.tags, add_comment=comment,
                            source=source) as writer:
        with _Stages() as stages:
            write_stage = stages.add(writer.write, "rateferry-writer")
            meter_stage = stages.add(out_meters.process, "rateferry-output-meters")
            source_stage = None if needs_first_pass else stages.add(source_meters.process,
                                                                    "rateferry-source-meters")
            quant_stage = stages.add(quantize, "rateferry-quantizer") if quant else None
            frames_read = 0
            for block in _prefetch(media.read_blocks(source, blocksize=blocksize)):
                _check_cancel(cancel)
                if source_stage is not None:
                    source_stage.submit(block)
                deliver(conv.process(block))
                done += block.shape[0]
                frames_read += block.shape[0]
                report(done)
            _check_cancel(cancel)
            deliver(conv.flush())
    report(total_work)
    warnings = short_source_warnings(source, frames_read,
                                     max(src.frames, riff.declared_frames(source) or 0))
    out_sha = media.sha256_file(target)
    return ConversionResult(
        source_path=os.fspath(source), output_path=os.fspath(target), fs_in=fs_in,
        fs_out=fs_out, channels=src.channels, frames_in=src.frames, frames_out=conv.frames_out,
        seconds=time.perf_counter() - t0, spec=design.spec,
        delivery=delivery, plan=design, source_probe=src, output_format=out_plan.format,
        output_subtype=out_plan.subtype, bits=out_plan.bits, gain_db=gain_db,
        gain_reason=gain_reason, source_meters=source_meters.result(),
        output_meters=out_meters.result(),
        clipped_samples=int(quant.clipped_samples) if quant is not None else 0,
        passes=passes, block_frames=int(blocksize), source_sha256=media.sha256_file(source),
        output_sha256=out_sha, warnings=warnings, time_base=job.time_base, speed=job.speed)
