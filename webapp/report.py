"""The report of one conversion as the command line gives it: nested objects (source, design,
output, delivery, timing), each figure once, numbers rounded to what they mean.

The shape is documented by ``schemas/convert-report.schema.json`` (a test validates real reports
against it with jsonschema). The page and the design sheet keep the full-precision figures of
:meth:`webapp.pipeline.ConversionResult.figures`; this is for people and scripts reading a
terminal.

Rounding (common practice for reading, not a standard): levels in dB, LUFS, LU, dBTP and dBFS
to 0.01 (meters are not more exact than that), gains to 0.0001 dB (a gain is applied exactly),
the measured passband ripple to 6 significant digits (it is often a few thousandths of a dB),
times to 0.001 ms or 0.001 s, frequencies to 0.001 Hz.
"""

import math
import os

__all__ = ["convert_report", "rounded", "SCHEMA_NAME"]

SCHEMA_NAME = "convert-report.schema.json"

_LEVEL_SUFFIXES = ("_lufs", "_lu", "_dbtp", "_dbfs")


def _round_float(key, value):
    if not isinstance(value, float) or not math.isfinite(value):
        return value
    if key in ("passband_ripple_db", "ripple_db", "interpolation_error_db"):
        return float(f"{value:.6g}")
    if key == "gain_db":
        return round(value, 4)
    if key.endswith(_LEVEL_SUFFIXES) or key.endswith("_db"):
        return round(value, 2)
    if key.endswith("_ms") or key.endswith("_s") or key == "seconds":
        return round(value, 3)
    if key.endswith("_hz"):
        return round(value, 3)
    if key in ("macs_per_output_sample", "mmac_per_second", "realtime_factor"):
        return round(value, 3)
    if key.endswith("_fraction"):
        return round(value, 6)
    return float(f"{value:.6g}")


def rounded(value, key=""):
    """``value`` with every float rounded by its key's meaning (dicts and lists recursively)."""
    if isinstance(value, dict):
        return {k: rounded(v, k) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [rounded(v, key) for v in value]
    return _round_float(key, value)


def _design(plan_figures):
    """The plan's figures without what the report states elsewhere (rates, design time) and
    with the mask reduced to its resolved edges (its other fields are the spec's)."""
    d = dict(plan_figures)
    for key in ("fs_in", "fs_out", "design_ms"):
        d.pop(key, None)
    mask = d.pop("mask", None)
    if mask is not None:
        d["edges"] = dict(passband_hz=mask["passband_hz"], stopband_hz=mask["stopband_hz"])
    return d


def _verification(result):
    """The delivery's verification: met (None when nothing was promised), the notes, the write
    passes, what was measured (the decoded file for lossy codecs) and the limiter's work."""
    r = result.delivery_report or {}
    verified = r.get("decoded") or {k: v for k, v in result.output_meters.items()
                                    if k in ("integrated_lufs", "true_peak_dbtp")}
    return dict(met=r.get("met"), notes=list(r.get("notes") or ()),
                write_passes=r.get("write_passes", 1),
                verified_on=r.get("verified_on", "the written samples"),
                verified={k: verified.get(k) for k in ("integrated_lufs", "true_peak_dbtp")},
                limiter=r.get("limiter"), filter_applied=result.filter_applied,
                carried_chunks=list(r.get("carried_chunks") or ()))


def convert_report(result, *, rerun=None):
    """The nested, rounded report of a :class:`webapp.pipeline.ConversionResult`.

    ``rerun`` (a :class:`webapp.jobs.Rerun`) adds ``recipe`` with ``reproduces`` and
    ``differences``.
    """
    plan = result.plan.figures()
    src_meters = dict(result.source_meters)
    out_meters = dict(result.output_meters)
    delivery = result.delivery.to_dict()
    delivery["bits"] = result.bits          # the word length written (None for lossy formats)
    seconds = float(result.seconds)
    duration = result.frames_in / result.fs_in if result.fs_in else 0.0
    report = dict(
        version=result.version,
        source=dict(path=os.fspath(result.source_path), rate_hz=result.fs_in,
                    channels=result.channels, frames=result.frames_in,
                    duration_s=duration, sha256=result.source_sha256, **src_meters),
        design=_design(plan),
        output=dict(path=os.fspath(result.output_path), rate_hz=result.fs_out,
                    channels=result.channels_out or result.channels, frames=result.frames_out,
                    duration_s=result.frames_out / result.fs_out, format=result.output_format,
                    subtype=result.output_subtype, sha256=result.output_sha256,
                    clipped_samples=int(result.clipped_samples), **out_meters),
        delivery=dict(delivery, gain_db=result.gain_db, gain_reason=result.gain_reason,
                      passes=result.passes, **_verification(result)),
        timing=dict(seconds=seconds, design_ms=plan.get("design_ms"),
                    realtime_factor=(duration / seconds) if seconds > 0 else None,
                    block_frames=result.block_frames),
    )
    report = rounded(report)
    for name in ("time_base", "speed"):   # a drift correction or a speed change, every digit:
        value = getattr(result, name, None)   # these numbers make a re-run bit-exact
        if value is not None:
            report[name] = value.to_dict() if hasattr(value, "to_dict") else dict(value)
    if rerun is not None:
        # differences keep every digit: a rounded value could hide the difference it reports
        report["recipe"] = dict(reproduces=rerun.reproduces,
                                differences=rerun.figures()["differences"])
    return report
