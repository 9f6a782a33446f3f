"""How converted audio leaves the tool: word length, dither, true-peak ceiling, loudness target.

:class:`Delivery` is the one description of these choices; the command line, the server, recipes
and batch manifests all build it with :meth:`Delivery.from_dict` (JSON keys equal the field names).
"""

from dataclasses import dataclass, asdict, fields
import math

import numpy as np

from .dsp.dither import DITHERS, WORD_LENGTHS, noise_transfer_taps
from .dsp.errors import ParameterError
from .dsp.numbers import finite_number, shown

__all__ = ["Delivery", "DITHERS", "WORD_LENGTHS", "gain_for"]


@dataclass(frozen=True)
class Delivery:
    """How the converted audio leaves the tool.

    bits : "16" | "24" | "32f" | "64f" | None (like the source)
    dither : "none" | "tpdf" | "shaped" (PCM outputs only; float outputs take none)
    dither_seed : int, so a re-run is bit-exact
    ceiling_dbtp : float or None. None reports the true peak only; a number applies a gain
        (never above 0 dB unless a loudness target asks for it) so the output's true peak stays
        at or below it. -1 dBTP is common practice for spoken-word delivery.
    loudness_lufs : float or None. Integrated loudness target (e.g. -16 LUFS, common practice
        for podcasts); applied together with the ceiling, the lower gain wins.
    """

    bits: str | None = None
    dither: str = "tpdf"
    dither_seed: int = 0
    ceiling_dbtp: float | None = None
    loudness_lufs: float | None = None

    def __post_init__(self):
        if self.dither not in DITHERS:
            raise ParameterError(f"dither must be one of {', '.join(DITHERS)}, got "
                                 f"{self.dither!r}", "dither")
        if not isinstance(self.dither_seed, int) or isinstance(self.dither_seed, bool) \
                or not 0 <= self.dither_seed < 2**63:
            raise ParameterError(f"dither_seed must be a whole number from 0 to 2^63-1, got "
                                 f"{self.dither_seed!r}", "dither_seed")
        if self.ceiling_dbtp is not None and not (math.isfinite(self.ceiling_dbtp)
                                                  and -60.0 <= self.ceiling_dbtp <= 0.0):
            raise ParameterError(f"ceiling_dbtp must be a number from -60 to 0 dBTP, got "
                                 f"{self.ceiling_dbtp!r}", "ceiling_dbtp")
        if self.loudness_lufs is not None and not (math.isfinite(self.loudness_lufs)
                                                   and -70.0 <= self.loudness_lufs <= 0.0):
            raise ParameterError(f"loudness_lufs must be a number from -70 to 0 LUFS, got "
                                 f"{self.loudness_lufs!r}", "loudness_lufs")

    def to_dict(self):
        return asdict(self)

    @classmethod
    def from_dict(cls, data):
        """A Delivery from JSON-like data (None or a dict); unknown keys are refused by name.

        ``bits`` may be given as a number (16, 24) or text ("16", "24", "32f", "64f").
        """
        if data is None:
            data = {}
        if not isinstance(data, dict):
            raise ParameterError(f"delivery must be a JSON object, got {type(data).__name__}",
                                 "delivery")
        known = tuple(f.name for f in fields(cls))
        unknown = sorted(set(data) - set(known))
        if unknown:
            raise ParameterError(f"unknown delivery field {unknown[0]!r}; known: "
                                 f"{', '.join(known)}", unknown[0])
        values = dict(data)
        bits = values.get("bits")
        if bits is not None:
            if isinstance(bits, int) and not isinstance(bits, bool):
                bits = str(bits)
            if bits not in WORD_LENGTHS:
                raise ParameterError(f"bits must be one of {', '.join(WORD_LENGTHS)} (or null "
                                     f"for like the source), got {data.get('bits')!r}", "bits")
            values["bits"] = bits
        for name in ("ceiling_dbtp", "loudness_lufs"):
            v = values.get(name)
            if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))):
                raise ParameterError(f"{name} must be a number or null, got {shown(v)}", name)
            if v is not None:
                values[name] = finite_number(v, name)
        return cls(**values)


def gain_for(delivery, out_meters, bits, rate_hz):
    """Gain (dB) that meets the ceiling and/or the loudness target; the reason in words.

    For PCM outputs the ceiling keeps room for the requantisation error: TPDF moves a sample by
    at most 1 LSB and rounding by half of one (1.5 LSB); with noise shaping the error passes
    through the noise transfer function, whose taps bound it by 1.5 LSB * sum |ntf|.
    """
    reasons = []
    gains = []
    if delivery.loudness_lufs is not None:
        lufs = out_meters["integrated_lufs"]
        if lufs is None:
            raise ParameterError("loudness_lufs can't be applied: the output is silent (no "
                                 "gated loudness)", "loudness_lufs")
        gains.append((delivery.loudness_lufs - lufs, "loudness target"))
    if delivery.ceiling_dbtp is not None:
        tp = out_meters["true_peak_dbtp"]
        lsb = {"16": 2.0**-15, "24": 2.0**-23}.get(bits, 0.0) * 1.5
        if delivery.dither == "shaped" and lsb:
            lsb *= float(np.sum(np.abs(noise_transfer_taps(rate_hz))))
        ceiling = 20 * math.log10(max(10 ** (delivery.ceiling_dbtp / 20.0) - lsb, 1e-12))
        g = 0.0 if tp is None else ceiling - tp
        if delivery.loudness_lufs is None:
            g = min(g, 0.0)   # a ceiling alone only ever lowers the level
        gains.append((g, "true-peak ceiling"))
    if not gains:
        return 0.0, "report only"
    g, why = min(gains)
    if len(gains) == 2:
        other = max(gains)[1]
        reasons.append(f"{why} won (the {other} alone would give {max(gains)[0]:+.2f} dB)")
    else:
        reasons.append(why)
    return float(g), "; ".join(reasons)
