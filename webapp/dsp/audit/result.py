"""What an audit returns: its figures (:class:`AuditResult`) and the verdict rows
(:class:`VerdictRow`), with their JSON-ready form."""

from dataclasses import dataclass, field
import math

import numpy as np

__all__ = ["VerdictRow", "AuditResult"]


@dataclass(frozen=True)
class VerdictRow:
    """One figure beside the limit the mask sets for it.

    ``passes`` is ``measured <= limit``; ``rule`` says where the limit comes from.
    """

    figure: str
    measured: float
    limit: float
    passes: bool
    unit: str
    rule: str

    def to_dict(self):
        return dict(figure=self.figure, measured=_plain(self.measured), limit=_plain(self.limit),
                    passes=bool(self.passes), unit=self.unit, rule=self.rule)


@dataclass(frozen=True, eq=False)
class AuditResult:
    """Figures measured on a converter's real output, the design's predictions beside them,
    plot curves and the verdict against the mask.

    Levels are in dB; ``*_dbfs`` per AES17 (a full-scale sine reads 0 dBFS). ``None`` marks a
    figure the route doesn't have (no aliases on a 1:1 route).
    """

    fs_in: int
    fs_out: int
    up: int
    down: int
    direction: str                      # "down", "up" or "same"
    phase: str
    arithmetic: str
    dither: str
    bits: str
    separation: str                     # "residue" (exact) or "key-bins" (see module notes)
    # passband
    passband_deviation_db: float        # worst |20 log10 gain| over the passband tones
    passband_deviation_predicted_db: float
    # aliases (down) or images (up)
    worst_alias_db: float | None
    worst_alias_input_hz: float | None
    worst_alias_output_hz: float | None      # the output bin of that worst line
    worst_alias_predicted_db: float | None   # the response at that same line
    design_stopband_db: float | None         # -(stopband attenuation the design measured)
    # AES17
    thd_n_db: float
    thd_n_limit_db: float
    thd_n_predicted_db: float | None    # from the response at each line (None: too many lines)
    fundamental_hz: float
    noise_floor_dbfs: float             # notched 997 Hz at -60 dBFS, band-limited
    dynamic_range_db: float
    idle_noise_dbfs: float              # converted (dithered) silence, band-limited
    idle_noise_full_dbfs: float         # the same over the whole output band
    source_idle_noise_dbfs: float       # the (dithered) silence before conversion
    # time
    group_delay_ms: float               # removed look-ahead + measured residual delay
    group_delay_predicted_ms: float
    residual_delay_ms: float            # measured at the output (0 for aligned linear phase)
    prering_ms: float
    prering_predicted_ms: float | None
    alignment_error_samples: float      # output samples (multitone cross-correlation)
    alignment_error_us: float
    sweep_alignment_samples: float      # the same from the log sweep
    # curves for plots
    deviation_hz: np.ndarray = field(repr=False)
    deviation_db: np.ndarray = field(repr=False)
    deviation_predicted_db: np.ndarray = field(repr=False)
    alias_input_hz: np.ndarray = field(repr=False)
    alias_output_hz: np.ndarray = field(repr=False)     # where the main artefact lands
    alias_db: np.ndarray = field(repr=False)            # main artefact, measured
    alias_worst_db: np.ndarray = field(repr=False)      # largest line of that tone
    alias_predicted_db: np.ndarray = field(repr=False)  # main artefact, from the response
    alias_in_stopband: np.ndarray = field(repr=False)   # counts for the verdict
    impulse_ms: np.ndarray = field(repr=False)          # impulse response, time after impulse
    impulse_response: np.ndarray = field(repr=False)    # h / max|h| (equivalent-time samples)
    impulse_db: np.ndarray = field(repr=False)          # |h| in dB relative to its peak
    verdict: list
    passes: bool
    audit_ms: float

    def figures(self):
        """JSON-ready figures: plain floats, lists and dicts (no numpy, no infinities)."""
        keys = ("fs_in", "fs_out", "up", "down", "direction", "phase", "arithmetic", "dither",
                "bits", "separation",
                "passband_deviation_db", "passband_deviation_predicted_db",
                "worst_alias_db", "worst_alias_input_hz", "worst_alias_output_hz",
                "worst_alias_predicted_db", "design_stopband_db",
                "thd_n_db", "thd_n_limit_db", "thd_n_predicted_db", "fundamental_hz",
                "noise_floor_dbfs",
                "dynamic_range_db", "idle_noise_dbfs", "idle_noise_full_dbfs",
                "source_idle_noise_dbfs", "group_delay_ms", "group_delay_predicted_ms",
                "residual_delay_ms", "prering_ms", "prering_predicted_ms",
                "alignment_error_samples", "alignment_error_us", "sweep_alignment_samples",
                "passes", "audit_ms")
        out = {k: _plain(getattr(self, k)) for k in keys}
        out["verdict"] = [row.to_dict() for row in self.verdict]
        out["curves"] = dict(
            deviation=dict(freq_hz=_plain(self.deviation_hz),
                           measured_db=_plain(self.deviation_db),
                           predicted_db=_plain(self.deviation_predicted_db)),
            alias=dict(input_hz=_plain(self.alias_input_hz),
                       output_hz=_plain(self.alias_output_hz),
                       measured_db=_plain(self.alias_db),
                       worst_db=_plain(self.alias_worst_db),
                       predicted_db=_plain(self.alias_predicted_db),
                       in_stopband=[bool(v) for v in self.alias_in_stopband]),
            impulse=dict(time_ms=_plain(self.impulse_ms),
                         value=_plain(self.impulse_response),
                         level_db=_plain(self.impulse_db)),
        )
        return out


def _plain(value):
    """numpy scalars/arrays -> float/list; non-finite floats -> None (JSON has no infinity)."""
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    v = float(value)
    return v if math.isfinite(v) else None

