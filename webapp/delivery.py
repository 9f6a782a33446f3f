"""How converted audio leaves the tool: word length, dither, true-peak ceiling, loudness target,
limiter, channel layout and MP3 bit rate.

:class:`Delivery` is the one description of these choices; the command line, the server, recipes
and batch manifests all build it with :meth:`Delivery.from_dict` (JSON keys equal the field names).
"""

from dataclasses import dataclass, asdict, fields, replace
import math

import numpy as np

from .dsp.channels import CHANNEL_LAYOUTS, MONO_LAWS
from .dsp.dither import DITHERS, WORD_LENGTHS, noise_transfer_taps
from .dsp.errors import ParameterError
from .dsp.numbers import finite_number, shown

__all__ = ["Delivery", "DITHERS", "WORD_LENGTHS", "CHANNEL_LAYOUTS", "MONO_LAWS", "MP3_MODES",
           "MP3_KBPS_RANGE", "gain_for", "Attempt", "first_attempt", "review", "tolerance_lu",
           "uses_limiter", "working_ceiling_dbtp", "DEFAULT_TOLERANCE_LU", "AIM_LU",
           "MAX_WRITE_PASSES"]

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
        target (e.g. 0.5 LU for EBU R 128); None: DEFAULT_TOLERANCE_LU (0.5 LU).
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


#: Default loudness tolerance when a target is set without one: EBU R 128's +-0.5 LU (the
#: broadcast programme profile cites it).
DEFAULT_TOLERANCE_LU = 0.5
#: How close to the target a limited delivery aims (issue 13: "aim for +-0.1 LU"); another
#: write pass corrects the gain when the verified loudness lands further away.
AIM_LU = 0.1
#: Most write passes of one delivery (gain corrections and codec overshoot corrections).
MAX_WRITE_PASSES = 4
# A codec's overshoot is corrected by this much more than was measured (ours).
_OVERSHOOT_MARGIN_DB = 0.3


@dataclass(frozen=True)
class Attempt:
    """One write pass's settings: the gain, the limiter's ceiling, and the largest gain the
    ceiling and the allowed limiting permit (``gain_cap_db``; None: no cap)."""

    gain_db: float
    reason: str
    limiter_ceiling_dbtp: float | None = None
    gain_cap_db: float | None = None
    limiting_needed_db: float = 0.0
    # kept across write passes: (gain, delivered loudness) of the passes before, the codec
    # overshoot corrected so far, the first pass's gain and reason
    history: tuple = ()
    overshoot_db: float = 0.0
    first_gain_db: float | None = None
    base_reason: str = ""

    @property
    def capped(self):
        return self.gain_cap_db is not None and self.gain_db >= self.gain_cap_db - 1e-9


def tolerance_lu(delivery):
    """The loudness tolerance that applies (:data:`DEFAULT_TOLERANCE_LU` when none is set)."""
    if delivery.loudness_tolerance_lu is not None:
        return float(delivery.loudness_tolerance_lu)
    return DEFAULT_TOLERANCE_LU


def uses_limiter(delivery):
    """The limiter runs when asked for and there is a ceiling for it to hold."""
    return bool(delivery.limiter and delivery.ceiling_dbtp is not None)


def working_ceiling_dbtp(delivery, bits, rate_hz):
    """The ceiling less room for the requantisation error.

    TPDF moves a sample by at most 1 LSB and rounding by half of one (1.5 LSB); with noise
    shaping the error passes through the noise transfer function, whose taps bound it by
    1.5 LSB * sum |ntf|.
    """
    lsb = {"16": 2.0**-15, "24": 2.0**-23}.get(bits, 0.0) * 1.5
    if delivery.dither == "shaped" and lsb:
        lsb *= float(np.sum(np.abs(noise_transfer_taps(rate_hz))))
    return 20 * math.log10(max(10 ** (delivery.ceiling_dbtp / 20.0) - lsb, 1e-12))


def first_attempt(delivery, out_meters, bits, rate_hz):
    """The first write pass: the gain that meets the loudness target and/or the ceiling.

    ``out_meters`` are the converted signal's (after the channel layout) at unity gain. Without
    the limiter the lower of the two gains wins (a ceiling alone only ever lowers the level);
    with it the loudness gain is applied and the limiter holds the ceiling, up to
    ``max_limiting_db`` of gain reduction: a target needing more is capped there (and will be
    reported as not met when that leaves it out of tolerance).
    """
    limiter = uses_limiter(delivery)
    gain, why = 0.0, "report only"
    if delivery.loudness_lufs is not None:
        lufs = out_meters["integrated_lufs"]
        if lufs is None:
            raise ParameterError("loudness_lufs can't be applied: the output is silent (no "
                                 "gated loudness)", "loudness_lufs")
        gain, why = delivery.loudness_lufs - lufs, "loudness target"
    if delivery.ceiling_dbtp is None:
        return Attempt(gain_db=float(gain), reason=why)
    ceiling = working_ceiling_dbtp(delivery, bits, rate_hz)
    tp = out_meters["true_peak_dbtp"]
    room = 0.0 if tp is None else ceiling - tp        # gain that puts the peak on the ceiling
    if not limiter:
        # the lower gain wins; the reasons read as they did before the limiter (recipe
        # version 1 records them, and its re-runs compare them)
        cap = room if delivery.loudness_lufs is not None else min(room, 0.0)
        gains = [(cap, "true-peak ceiling")]
        if delivery.loudness_lufs is not None:
            gains.append((gain, "loudness target"))
        g, why = min(gains)
        if len(gains) == 2:
            why = f"{why} won (the {max(gains)[1]} alone would give {max(gains)[0]:+.2f} dB)"
        return Attempt(gain_db=float(g), reason=why, gain_cap_db=float(cap))
    from .dsp.limiter import MARGIN_DB
    # the limiter reduces from its threshold, MARGIN_DB under its ceiling
    cap = room + delivery.max_limiting_db - MARGIN_DB
    needed = max(0.0, gain - room + MARGIN_DB)
    if delivery.loudness_lufs is None:
        why = "level kept; the limiter holds the ceiling"
    else:
        why = "loudness target; the limiter holds the ceiling"
    if gain > cap:
        why = (f"loudness target capped: it needs {needed:.2f} dB of limiting, more than the "
               f"{delivery.max_limiting_db:g} dB allowed")
        gain = cap
    return Attempt(gain_db=float(gain), reason=why, limiter_ceiling_dbtp=float(ceiling),
                   gain_cap_db=float(cap), limiting_needed_db=float(needed))


def review(delivery, attempt, meters, *, passes_done, lossy=False):
    """Check a written pass against the delivery; returns ``(next_attempt or None, verdict)``.

    ``meters`` are the delivered file's (decoded, for a lossy codec). A true peak over the
    ceiling (a codec's overshoot) lowers the limiter's ceiling (or, without the limiter, the
    gain) by the overshoot and :data:`_OVERSHOOT_MARGIN_DB` more; a loudness further than
    :data:`AIM_LU` from the target corrects the gain (within its cap). Up to
    :data:`MAX_WRITE_PASSES` passes; the last is kept whatever it measures.

    verdict: dict with ``met`` (None when nothing was promised), ``notes`` (words), and the
    figures checked.
    """
    tp, lufs = meters.get("true_peak_dbtp"), meters.get("integrated_lufs")
    ceiling, target = delivery.ceiling_dbtp, delivery.loudness_lufs
    tol = tolerance_lu(delivery)
    notes = []
    over = ceiling is not None and tp is not None and tp > ceiling
    off = None if target is None or lufs is None else target - lufs
    out_of_tolerance = off is not None and abs(off) > tol + 1e-9
    if over:
        notes.append(f"true peak {tp:.2f} dBTP is over the {ceiling:g} dBTP ceiling")
    if target is not None and lufs is None:
        notes.append("the delivered file has no gated loudness (silent)")
        out_of_tolerance = True
    elif out_of_tolerance:
        notes.append(f"loudness {lufs:.2f} LUFS is {abs(off):.2f} LU from the {target:g} LUFS "
                     f"target, outside the +-{tol:g} LU tolerance")
    if attempt.capped and attempt.limiting_needed_db > 0 and delivery.loudness_lufs is not None:
        notes.append(f"the target needs more limiting than the {delivery.max_limiting_db:g} dB "
                     f"allowed (about {attempt.limiting_needed_db:.2f} dB by the first measurement)")
    elif attempt.capped and not uses_limiter(delivery) and out_of_tolerance:
        notes.append("the ceiling held the gain down: allow the limiter to meet the target")
    promised = ceiling is not None or target is not None
    verdict = dict(met=(not over and not out_of_tolerance) if promised else None, notes=notes,
                   loudness_tolerance_lu=tol if target is not None else None,
                   true_peak_dbtp=tp, integrated_lufs=lufs, write_passes=passes_done,
                   verified_on="the decoded file" if lossy else "the written samples")
    if passes_done >= MAX_WRITE_PASSES:
        return None, verdict
    nxt = attempt
    if over:
        lower = tp - ceiling + _OVERSHOOT_MARGIN_DB
        if attempt.limiter_ceiling_dbtp is not None:
            nxt = replace(nxt, limiter_ceiling_dbtp=attempt.limiter_ceiling_dbtp - lower,
                          overshoot_db=attempt.overshoot_db + lower)
        else:
            nxt = replace(nxt, gain_db=attempt.gain_db - lower, overshoot_db=attempt.overshoot_db
                          + lower, gain_cap_db=(None if attempt.gain_cap_db is None
                                                else attempt.gain_cap_db - lower))
    if off is not None and abs(off) > AIM_LU and not (over and attempt.limiter_ceiling_dbtp is None):
        # secant step on loudness against gain: under heavy limiting a dB of gain raises the
        # loudness by less than a dB (the slope is kept within 0.2 .. 1)
        slope = 1.0
        if attempt.history:
            g0, l0 = attempt.history[-1]
            if abs(attempt.gain_db - g0) > 1e-6:
                slope = min(1.0, max(0.2, (lufs - l0) / (attempt.gain_db - g0)))
        gain = nxt.gain_db + off / slope
        if nxt.gain_cap_db is not None:
            gain = min(gain, nxt.gain_cap_db)
        if abs(gain - nxt.gain_db) > 0.01:
            nxt = replace(nxt, gain_db=float(gain))
    if nxt == attempt:
        return None, verdict
    first = attempt.gain_db if attempt.first_gain_db is None else attempt.first_gain_db
    words = [attempt.base_reason or attempt.reason]
    if nxt.overshoot_db:
        words.append(f"{'limiter ceiling' if nxt.limiter_ceiling_dbtp is not None else 'gain'} "
                     f"lowered {nxt.overshoot_db:.2f} dB for the codec's overshoot")
    if nxt.limiter_ceiling_dbtp is not None or not nxt.overshoot_db:
        if abs(nxt.gain_db - first) > 1e-9:
            words.append(f"gain corrected by {nxt.gain_db - first:+.2f} dB after verification")
    history = attempt.history + ((attempt.gain_db, lufs),) if lufs is not None else attempt.history
    nxt = replace(nxt, reason="; ".join(words), history=history, first_gain_db=first,
                  base_reason=attempt.base_reason or attempt.reason)
    return nxt, verdict


def gain_for(delivery, out_meters, bits, rate_hz):
    """Gain (dB) of the first write pass and its reason in words (see :func:`first_attempt`)."""
    attempt = first_attempt(delivery, out_meters, bits, rate_hz)
    return attempt.gain_db, attempt.reason
