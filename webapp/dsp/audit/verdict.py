"""The verdict: each measured figure beside the limit the mask sets for it."""

import math

from ..spec import FLOAT32_LIMIT_DB
from .measure import MEASUREMENT_LOW_HZ
from .result import VerdictRow
from .signals import TONE_LEVEL_DBFS

__all__ = ["ALIGNMENT_LIMIT_SAMPLES", "thd_n_limit_db", "verdict_rows"]

# The converter promises output n at time n / fs_out exactly (the alignment rule): a linear-phase audit
# fails when the measured offset exceeds this (our own limit, far above float64 rounding).
ALIGNMENT_LIMIT_SAMPLES = 0.01
# Relative rounding noise of the arithmetic: float32 products keep about -125 dB (measured);
# float64 keeps far below -250 dB (53-bit mantissa; our conservative figure).
ARITHMETIC_FLOOR_DB = {"float32": FLOAT32_LIMIT_DB, "float64": 250.0}


def thd_n_limit_db(line_count, attenuation_db, arithmetic):
    """The THD+N the mask allows: each of ``line_count`` alias/image lines at the stopband level,
    plus the rounding noise of ``arithmetic``."""
    floor_rel = 10 ** (-ARITHMETIC_FLOOR_DB.get(arithmetic, 250.0) / 10)
    return 10 * math.log10(line_count * 10 ** (-attenuation_db / 10) + floor_rel)


def verdict_rows(figures, mask, *, line_count, band_high_hz):
    """The verdict rows of an audit.

    Parameters
    ----------
    figures : dict
        The measured figures under their :class:`AuditResult` field names.
    mask : Mask
        The mask the audit judges against.
    line_count : int
        Alias/image lines the fundamental makes in the measurement band (the THD+N rule).
    band_high_hz : float
        Top of the THD+N measurement band.

    Returns
    -------
    list of VerdictRow
    """
    f = figures
    fp = float(mask.passband_hz)
    dev_worst = f["passband_deviation_db"]
    rows = [VerdictRow("passband deviation", dev_worst, float(mask.ripple_db),
                       bool(dev_worst <= mask.ripple_db), "dB",
                       f"largest |gain| error over {len(f['deviation_hz'])} tones up to {fp:g} "
                       f"Hz must stay within the mask's ripple")]
    worst_alias = f["worst_alias_db"]
    if worst_alias is not None:
        down = f["direction"] == "down"
        name = "worst alias" if down else "worst image"
        which = ("tones above the target Nyquist (and, with up > 1, images of in-band tones)"
                 if down else "in-band tones")
        rows.append(VerdictRow(name, worst_alias, -float(mask.attenuation_db),
                               bool(worst_alias <= -mask.attenuation_db), "dB",
                               f"largest line that {which} make in the output band from the "
                               "stopband, relative to the tone, must stay below the mask's "
                               "stopband level"))
    thd, thd_limit = f["thd_n_db"], f["thd_n_limit_db"]
    rows.append(VerdictRow(
        "THD+N", thd, thd_limit, bool(thd <= thd_limit), "dB",
        f"{f['fundamental_hz']:g} Hz at {TONE_LEVEL_DBFS:g} dBFS, AES17 style; each of the "
        f"{line_count} alias/image lines it makes in {MEASUREMENT_LOW_HZ:g} Hz - "
        f"{band_high_hz:g} Hz may reach -{mask.attenuation_db:g} dB, plus {f['arithmetic']} "
        "rounding"))
    if f["phase"] == "linear":
        err = abs(f["alignment_error_samples"])
        rows.append(VerdictRow(
            "time alignment", err, ALIGNMENT_LIMIT_SAMPLES, bool(err <= ALIGNMENT_LIMIT_SAMPLES),
            "output samples",
            "a linear-phase conversion puts output n at time n / fs_out of the input"))
    else:
        err = abs(f["group_delay_ms"] - f["group_delay_predicted_ms"]) / 1000.0 * f["fs_out"]
        rows.append(VerdictRow(
            "reported latency", err, 1.0, bool(err <= 1.0), "output samples",
            "measured group delay must match the design's reported latency within a sample"))
    return rows
