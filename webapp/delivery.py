"""How converted audio leaves the tool: word length, dither, true-peak ceiling, loudness target,
limiter, channel layout and MP3 bit rate.

:class:`Delivery` is the one description of these choices; the command line, the server, recipes
and batch manifests all build it with :meth:`Delivery.from_dict` (JSON keys equal the field names).
"""

from dataclasses import dataclass, asdict, fields
import math

import numpy as np

from .dsp.channels import CHANNEL_LAYOUTS, MONO_LAWS
from .dsp.dither import DITHERS, WORD_LENGTHS, noise_transfer_taps
from .dsp.errors import ParameterError
from .dsp.numbers import finite_number, shown

__all__ = ["Delivery", "DITHERS", "WORD_LENGTHS", "CHANNEL_LAYOUTS", "MONO_LAWS", "MP3_MODES",
           "MP3_KBPS_RANGE", "gain_for"]

MP3_MODES = ("constant", "average", "variable")
MP3_KBPS_RANGE = (32, 320)     # MPEG-1 Layer III bit rates (common practice)


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
        for podcasts); applied together with the ceiling, the lower gain wins unless the
        limiter may act.
    loudness_tolerance_lu : float or None. How far the delivered loudness may land from the
        target (e.g. 0.5 LU for EBU R 128); None: no promise, report only.
    limiter : bool. Let the true-peak limiter hold the ceiling so the loudness target is met.
    max_limiting_db : float. The most gain reduction the limiter may apply (0 to 40 dB); a
        delivery that would need more is reported as not meeting its target.
    channel_layout : "keep" | "mono" | "pick" | "stereo" (see webapp.dsp.channels).
    mono_law : "half" | "equal_power" | "sum": how "mono" sums the channels.
    pick_channel : int, 1-based channel "pick" delivers (1 = first, the left of a stereo pair).
    mp3_kbps : int or None. MP3 bit rate, 32 to 320 kbit/s (MP3 output only).
    mp3_mode : "constant" | "average" | "variable" bit rate.
    """

    bits: str | None = None
    dither: str = "tpdf"
    dither_seed: int = 0
    ceiling_dbtp: float | None = None
    loudness_lufs: float | None = None
    loudness_tolerance_lu: float | None = None
    limiter: bool = False
    max_limiting_db: float = 6.0
    channel_layout: str = "keep"
    mono_law: str = "half"
    pick_channel: int = 1
    mp3_kbps: int | None = None
    mp3_mode: str = "constant"

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
        if self.loudness_tolerance_lu is not None and not (
                _number(self.loudness_tolerance_lu) and 0.0 < self.loudness_tolerance_lu <= 10.0):
            raise ParameterError(f"loudness_tolerance_lu must be a number above 0 and at most 10 LU, "
                                 f"got {self.loudness_tolerance_lu!r}", "loudness_tolerance_lu")
        if not isinstance(self.limiter, bool):
            raise ParameterError(f"limiter must be true or false, got {self.limiter!r}", "limiter")
        if not (_number(self.max_limiting_db) and 0.0 <= self.max_limiting_db <= 40.0):
            raise ParameterError(f"max_limiting_db must be a number from 0 to 40 dB, got "
                                 f"{self.max_limiting_db!r}", "max_limiting_db")
        for name, choices in (("channel_layout", CHANNEL_LAYOUTS), ("mono_law", MONO_LAWS),
                              ("mp3_mode", MP3_MODES)):
            if getattr(self, name) not in choices:
                raise ParameterError(f"{name} must be one of {', '.join(choices)}, got "
                                     f"{getattr(self, name)!r}", name)
        if isinstance(self.pick_channel, bool) or not isinstance(self.pick_channel, int) \
                or not 1 <= self.pick_channel <= 64:
            raise ParameterError(f"pick_channel must be a whole number from 1 to 64, got "
                                 f"{self.pick_channel!r}", "pick_channel")
        low, high = MP3_KBPS_RANGE
        if self.mp3_kbps is not None and (isinstance(self.mp3_kbps, bool) or not isinstance(self.mp3_kbps, int)
                                          or not low <= self.mp3_kbps <= high):
            raise ParameterError(f"mp3_kbps must be a whole number from {low} to {high} kbit/s, got "
                                 f"{self.mp3_kbps!r}", "mp3_kbps")

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
        for name in ("ceiling_dbtp", "loudness_lufs", "loudness_tolerance_lu", "max_limiting_db"):
            v = values.get(name)
            if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))):
                raise ParameterError(f"{name} must be a number or null, got {shown(v)}", name)
            if v is not None:
                values[name] = finite_number(v, name)
        return cls(**values)


def _number(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


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
