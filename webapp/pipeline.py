"""The streaming execution of a prepared job (:mod:`webapp.jobs` prepares it).

source file -> channel layout -> streaming converter (none for a same-rate job without a
filter) -> gain -> look-ahead true-peak limiter -> word length and dither -> atomic output file
(RIFF chunks carried into WAV), with BS.1770 loudness and true peak measured on the source and
on what is delivered.

When a true-peak ceiling or a loudness target is set, the delivered layout is measured in a
first pass at unity gain and :func:`webapp.delivery.first_attempt` sets the gain (and the
limiter's ceiling). Every written pass is verified before its file is moved onto the target:
the meters of the written samples (PCM) or of the decoded file (MP3, Vorbis, Opus) go to
:func:`webapp.delivery.review`, which may ask for another pass (a gain correction, a lower
limiter ceiling for a codec's overshoot); the result reports the passes, the limiter's largest
gain reduction and time limiting, and whether the delivery met its promise. Memory stays flat:
everything streams in blocks. Every decision is made by :mod:`webapp.jobs` and
:mod:`webapp.delivery`; this module executes them.
"""

from dataclasses import asdict, dataclass, field
import functools
import math
import os
import time

import numpy as np

from . import __version__
from . import media, riff, riffchunks
from .threads import Background, Stages, one_blas_thread, prefetch
from .dsp.channels import apply_layout
from .dsp.dither import Quantizer
from .dsp.limiter import TruePeakLimiter
from .delivery import Attempt, Delivery, first_attempt, review
from .dsp.errors import ParameterError, RateferryError
from .dsp.loudness import LoudnessMeter
from .dsp.truepeak import TruePeakMeter
from .dsp.polyphase import make_converter
from .dsp.spec import Spec

__all__ = ["Cancelled", "ConversionResult", "execute", "Meters", "measure_file", "BLOCK_FRAMES"]

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
    channels_out: int | None = None     # after the channel layout (None: as the source)
    filter_applied: bool = True         # False: same rate in and out, no filter asked for
    delivery_report: dict = field(default_factory=dict)   # verification, limiter, passes

    @property
    def delivery_met(self):
        """True / False when the delivery promised a ceiling or a loudness; None otherwise."""
        return (self.delivery_report or {}).get("met")

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
            channels_out=self.channels_out or self.channels, filter_applied=self.filter_applied,
            delivery_report=dict(self.delivery_report),
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

    def process(self, x, *, checked=False):
        """Measure one block; ``checked``: finite float frames x channels already (a block
        read by :func:`webapp.media.read_blocks`, or samples the pipeline made)."""
        if self.loud is not None:
            self.loud.process(x, checked=checked)
        self.peak.process(x, checked=checked)

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


def _meter_stage(stages, meters, name):
    """``meters`` on a background stage of their own, taking blocks the pipeline made or read
    (finite float frames x channels already). Loudness and true peak share the one thread:
    measured, a thread each cost more CPU in all (4.4-5.0 s against 4.0-4.2 s for ten minutes
    of stereo) and more time."""
    return stages.add(functools.partial(meters.process, checked=True), name)


def _finite(v):
    v = float(v)
    return v if math.isfinite(v) else None


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
    with one_blas_thread():
        return _execute(job, progress=progress, cancel=cancel, tags_comment=tags_comment)


class _PassThrough:
    """The converter of a same-rate job without a filter: the samples as they are."""

    def __init__(self, channels):
        self.channels = channels
        self.frames_out = 0

    def process(self, block):
        self.frames_out += block.shape[0]
        return block

    def flush(self):
        return np.zeros((0, self.channels))


class _Again(Exception):
    """A written pass failed its verification; ``attempt`` is the next pass's settings."""

    def __init__(self, attempt):
        super().__init__("another write pass")
        self.attempt = attempt


def _converter(job):
    if not job.filter_applied:
        return _PassThrough(job.channels_out)
    return make_converter(job.plan, channels=job.channels_out, dtype=job.plan.spec.arithmetic,
                          time_base=job.time_base)


def _layout(job):
    """The channel layout as a function of a source block (None: kept as it is)."""
    d = job.delivery
    if d.channel_layout == "keep":
        return None
    return lambda block: apply_layout(block, d.channel_layout, law=d.mono_law, pick=d.pick_channel)


class _Progress:
    """Frames done against frames to do; a further write pass adds a source's worth."""

    def __init__(self, job, progress):
        self.total, self.done, self._fn = job.frames_total, 0, progress

    def add(self, frames):
        self.done += frames
        self.report()

    def more(self, frames):
        self.total += frames

    def report(self):
        if self._fn is not None:
            self._fn(min(1.0, self.done / max(self.total, 1)), self.done, self.total)


def _source_blocks(job, layout, cancel, progress, source_stage=None):
    """The source in blocks (the layout applied), with progress and cancellation."""
    for block in prefetch(media.read_blocks(job.source, blocksize=job.block_frames)):
        _check_cancel(cancel)
        if source_stage is not None:
            source_stage.submit(block)
        progress.add(block.shape[0])
        yield block if layout is None else layout(block)


def _measure_pass(job, source_meters, cancel, progress):
    """First pass: the delivered layout's converted signal at unity gain, measured."""
    conv, first = _converter(job), Meters(job.fs_out, job.channels_out)
    with Stages() as stages:
        source_stage = _meter_stage(stages, source_meters, "rateferry-source-meters")
        first_stage = _meter_stage(stages, first, "rateferry-output-meters")
        for block in _source_blocks(job, _layout(job), cancel, progress, source_stage):
            first_stage.submit(conv.process(block))
        first_stage.submit(conv.flush())
    return first.result()


def measure_file(path, rate_hz, channels):
    """:class:`Meters` over a whole file, read in blocks: a recording as loaded, or a lossy
    output decoded again to verify it."""
    meters = Meters(rate_hz, channels)
    for block in media.read_blocks(path, blocksize=BLOCK_FRAMES):
        meters.process(block, checked=True)     # read_blocks checks every sample
    return meters.result()


def _write_pass(job, attempt, *, source_meters, cancel, progress, comment, chunks, review):
    """One write pass: convert, gain, limit, quantise, write; ``review`` checks the finished
    file before it is moved onto the target (raising :class:`_Again` for another pass)."""
    out_plan, channels = job.output, job.channels_out
    gain = 10 ** (attempt.gain_db / 20.0)
    quant = None
    if out_plan.bits in ("16", "24"):
        quant = Quantizer(bits=out_plan.bits, dither=job.delivery.dither,
                          seed=job.delivery.dither_seed, channels=channels, rate_hz=job.fs_out)
    scale = {"16": 2.0**15, "24": 2.0**31}.get(out_plan.bits)
    limiter = None
    if attempt.limiter_ceiling_dbtp is not None:
        limiter = TruePeakLimiter(rate_hz=job.fs_out, channels=channels,
                                  ceiling_dbtp=max(-60.0, attempt.limiter_ceiling_dbtp))
    out_meters = Meters(job.fs_out, channels)
    conv = _converter(job)

    batch = _Batch(quant.preferred_frames if quant is not None else None)

    def quantize(y):
        # y None: the stream is over (what the batch holds goes out)
        y = batch.take(y)
        if y is None:
            return
        codes = quant.process(y)
        # a batch goes on in the pipeline's own block size: the writer and the meters keep
        # their memory whatever the quantiser works in
        for i in range(0, codes.shape[0], job.block_frames):
            part = codes[i:i + job.block_frames]
            write_stage.submit(part)
            meter_stage.submit(part.astype(np.float64) / scale)

    def finish():
        if quant_stage is not None:
            quant_stage.submit(None)

    def emit(y):
        if y.shape[0] == 0:
            return
        if quant is not None:
            quant_stage.submit(y)
        else:
            write_stage.submit(y)
            meter_stage.submit(y)

    def limit(y):
        emit(limiter.flush() if y is None else limiter.process(y))
        if y is None:
            finish()

    def deliver(y):
        if y.shape[0] == 0:
            return
        if gain != 1.0:
            y = y * gain
        if limit_stage is not None:
            limit_stage.submit(y)
        else:
            emit(y)

    def check(path):
        meters = out_meters.result()
        if out_plan.is_lossy:
            meters = measure_file(path, job.fs_out, channels)
        review(meters, out_meters.result(), limiter)

    writer = media.AtomicWriter(job.target, out_plan, tags=job.probe.tags, add_comment=comment,
                                source=job.source, chunks=chunks, check=check)
    writer.open()
    try:
        with Stages() as stages:
            write_stage = stages.add(writer.write, "rateferry-writer")
            meter_stage = _meter_stage(stages, out_meters, "rateferry-output-meters")
            quant_stage = stages.add(quantize, "rateferry-quantizer") if quant else None
            limit_stage = stages.add(limit, "rateferry-limiter") if limiter else None
            source_stage = None if source_meters is None else _meter_stage(
                stages, source_meters, "rateferry-source-meters")
            frames_read = 0
            for block in _source_blocks(job, _layout(job), cancel, progress, source_stage):
                deliver(conv.process(block))
                frames_read += block.shape[0]
            _check_cancel(cancel)
            deliver(conv.flush())
            if limit_stage is not None:
                limit_stage.submit(None)        # the limiter's last frames, then finish()
            else:
                finish()
    except BaseException:
        writer.abort()
        raise
    writer.commit()
    return dict(frames_read=frames_read, frames_out=conv.frames_out, quant=quant,
                limiter=limiter, out_meters=out_meters)


class _Batch:
    """Blocks gathered up to ``frames`` (None: each block as it comes) for a stage that works
    faster on large blocks (the shaped quantiser); the order and the samples are unchanged."""

    def __init__(self, frames):
        self.frames = frames
        self._parts = []
        self._held = 0

    def take(self, block):
        """Add ``block`` (None: the stream is over); returns a block to process, or None."""
        if self.frames is None:
            return block
        if block is not None:
            self._parts.append(block)
            self._held += block.shape[0]
            if self._held < self.frames:
                return None
        if not self._parts:
            return None
        out = self._parts[0] if len(self._parts) == 1 else np.concatenate(self._parts)
        self._parts, self._held = [], 0
        return out


def _execute(job, *, progress, cancel, tags_comment):
    t0 = time.perf_counter()
    media.refuse_same_file(job.source, job.target)
    # the source's sha256 on a thread of its own, beside the conversion rather than after it
    # (on an error it is left to finish reading on its own, not waited for)
    hashes = []
    source_hash = Background(lambda path: hashes.append(media.sha256_file(path)),
                             name="rateferry-source-hash")
    source_hash.submit(job.source)
    try:
        return _convert(job, progress, cancel, tags_comment, t0, source_hash, hashes)
    except BaseException:
        source_hash.leave()
        raise


def _convert(job, progress, cancel, tags_comment, t0, source_hash, hashes):
    """The passes of :func:`_execute`, then its result (the source's hash from its thread)."""
    src, source, target = job.probe, job.source, job.target
    fs_in, fs_out, delivery, out_plan = job.fs_in, job.fs_out, job.delivery, job.output
    tracker = _Progress(job, progress)
    source_meters = Meters(fs_in, src.channels)
    if job.passes == 2:
        attempt = first_attempt(delivery, _measure_pass(job, source_meters, cancel, tracker),
                                out_plan.bits, fs_out)
        source_stage = None
    else:
        attempt = Attempt(gain_db=0.0, reason="report only")
        source_stage = source_meters
    comment = media.converted_comment(fs_in, fs_out) if tags_comment else None
    chunks, warnings = _carried_chunks(job)
    verdicts, done = [], 0

    def review_pass(meters, written_meters, limiter):
        verdicts.clear()
        nxt, verdict = review(delivery, attempt, meters, passes_done=done + 1,
                              lossy=out_plan.is_lossy)
        verdict["meters"], verdict["written_meters"] = meters, written_meters
        verdict["limiter"] = None if limiter is None else dict(
            ceiling_dbtp=limiter.ceiling_dbtp, **asdict(limiter.result()))
        verdicts.append(verdict)
        if nxt is not None:
            raise _Again(nxt)

    while True:
        try:
            written = _write_pass(job, attempt, source_meters=source_stage, cancel=cancel,
                                  progress=tracker, comment=comment, chunks=chunks,
                                  review=review_pass)
            break
        except _Again as again:
            attempt, done, source_stage = again.attempt, done + 1, None
            tracker.more(src.frames)
    tracker.report()
    source_hash.finish()
    verdict = verdicts[0]
    warnings += short_source_warnings(source, written["frames_read"],
                                      max(src.frames, riff.declared_frames(source) or 0))
    quant = written["quant"]
    report = dict(met=verdict["met"], notes=verdict["notes"],
                  loudness_tolerance_lu=verdict["loudness_tolerance_lu"],
                  write_passes=verdict["write_passes"], verified_on=verdict["verified_on"],
                  limiter=verdict["limiter"], filter_applied=job.filter_applied,
                  channel_layout=delivery.channel_layout, carried_chunks=[
                      c[0].decode("latin-1").strip() for c in chunks])
    if out_plan.is_lossy:
        report["decoded"] = verdict["meters"]
    if out_plan.kbps is not None:
        report["mp3_kbps"] = out_plan.kbps
    return ConversionResult(
        source_path=os.fspath(source), output_path=os.fspath(target), fs_in=fs_in,
        fs_out=fs_out, channels=src.channels, frames_in=src.frames,
        frames_out=written["frames_out"], seconds=time.perf_counter() - t0, spec=job.plan.spec,
        delivery=delivery, plan=job.plan, source_probe=src, output_format=out_plan.format,
        output_subtype=out_plan.subtype, bits=out_plan.bits, gain_db=attempt.gain_db,
        gain_reason=attempt.reason, source_meters=source_meters.result(),
        output_meters=verdict["written_meters"],
        clipped_samples=int(quant.clipped_samples) if quant is not None else 0,
        passes=job.passes, block_frames=int(job.block_frames),
        source_sha256=hashes[0], output_sha256=media.sha256_file(target),
        warnings=warnings, channels_out=job.channels_out, filter_applied=job.filter_applied,
        delivery_report=report, time_base=job.time_base, speed=job.speed)


def _carried_chunks(job):
    """(chunks, warnings): the source's bext / iXML / cue chunks, rescaled, for a WAV output."""
    chunks = riffchunks.carried_chunks(job.source, job.fs_in, job.fs_out)
    retimed = job.time_base is not None or job.speed is not None
    if not chunks or (job.output.format == "WAV" and not retimed):
        return chunks, ()
    names = ", ".join(sorted({c[0].decode("latin-1").strip() for c in chunks}))
    why = ("a drift correction or speed change (their positions are not rescaled yet)" if retimed
           else f"a {job.output.format} output (WAV outputs carry them)")
    return [], (f"the source's {names} chunks are not carried into {why}",)
