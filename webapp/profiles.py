"""Delivery profiles: named after the destination, each a bundle of rate, channels, format, word
length or codec, loudness target with tolerance, true-peak ceiling and filter preset.

Every number carries its source in ``sources`` (field name -> text). "Confirmed" means read in
the published document or in a public summary of it quoted below; "common practice" marks a
fact of the trade with no normative source; "from memory" a value not confirmed in a source.
Every field can be overridden: :func:`profile` takes the changes by field name and refuses
unknown names, and :meth:`Profile.delivery` turns a profile into the :class:`Delivery` the
conversion uses. JSON keys equal the field names.
"""

from dataclasses import asdict, dataclass, field, fields, replace
import math

from .delivery import Delivery
from .dsp.errors import ParameterError
from .dsp.rates import validate_rate
from .dsp.spec import PRESETS

__all__ = ["Profile", "PROFILES", "CONTAINERS", "profile", "profile_names"]

CONTAINERS = ("wav", "flac", "mp3")

_R128 = ("EBU R 128 (v3.0, 2014): programme loudness -23.0 LUFS, tolerance +-0.5 LU (+-1 LU for "
         "live), maximum true peak -1 dBTP; confirmed in EBU's version history of R 128 (v3.0: "
         "'target level tolerances restricted to +/- 0.5 LU') and a public summary of the text")
_A85 = ("ATSC A/85 (2013): target loudness -24 LKFS, +-2 dB; confirmed in a public summary of the "
        "recommended practice")
_A85_PEAK = ("ATSC A/85: true peak at most -2 dBTP; seen only in a vendor's summary, from memory for "
             "the document itself")
_TD1004 = ("AES TD1004.1.15-10 (2015), for network file playback such as podcasts: target loudness "
           "not above -16 LUFS and not below -20 LUFS; confirmed in the AES announcement of the "
           "document")
_TD1004_PEAK = ("AES TD1004.1.15-10: true peak at most -1 dBTP; from memory (the -1 dBTP maximum is "
                "confirmed for the AES revision that followed it)")


@dataclass(frozen=True)
class Profile:
    """One destination's delivery requirements (all overridable).

    name, label : str
        Key and words shown on screen.
    rate_hz : int or None
        Target rate; None keeps the source's.
    channel_layout : str
        One of :data:`webapp.delivery.CHANNEL_LAYOUTS` ("keep", "mono", "pick", "stereo").
    container : "wav" | "flac" | "mp3"
    bits : "16" | "24" | None
        Word length of PCM containers (None for mp3).
    mp3_kbps : int or None
        MP3 bit rate (mp3 only).
    mp3_mode : str
        One of :data:`webapp.delivery.MP3_MODES`.
    loudness_lufs, loudness_tolerance_lu : float or None
        Integrated loudness target and how far the delivery may land from it.
    ceiling_dbtp : float or None
        Largest true peak allowed.
    limiter : bool
        Whether the true-peak limiter may act to meet the loudness target under the ceiling.
    max_limiting_db : float
        The most gain reduction the limiter may apply before the target counts as not met.
    preset : str
        Filter preset (see :data:`webapp.dsp.spec.PRESETS`).
    dither, mono_law, pick_channel
        As in :class:`webapp.delivery.Delivery` (defaults "tpdf", "half", 1).
    sources : dict
        Field name -> where the value comes from.
    """

    name: str
    label: str
    rate_hz: int | None
    channel_layout: str
    container: str
    bits: str | None
    mp3_kbps: int | None
    mp3_mode: str
    loudness_lufs: float | None
    loudness_tolerance_lu: float | None
    ceiling_dbtp: float | None
    limiter: bool
    max_limiting_db: float
    preset: str
    dither: str = "tpdf"
    mono_law: str = "half"
    pick_channel: int = 1
    sources: dict = field(default_factory=dict, compare=False)

    def __post_init__(self):
        if self.rate_hz is not None:
            validate_rate(self.rate_hz, field="rate_hz")
        if self.container not in CONTAINERS:
            raise ParameterError(f"container must be one of {', '.join(CONTAINERS)}, got "
                                 f"{self.container!r}", "container")
        if self.preset not in PRESETS:
            raise ParameterError(f"preset must be one of {', '.join(PRESETS)}, got {self.preset!r}",
                                 "preset")
        if self.container == "mp3" and self.bits is not None:
            raise ParameterError(f"bits applies to wav and flac; mp3 takes mp3_kbps, got bits "
                                 f"{self.bits!r}", "bits")
        if self.container != "mp3" and self.mp3_kbps is not None:
            raise ParameterError(f"mp3_kbps applies to mp3 only, got {self.mp3_kbps!r} for "
                                 f"{self.container}", "mp3_kbps")
        self.delivery()   # every other rule is the Delivery's

    def delivery(self):
        """The :class:`webapp.delivery.Delivery` of this profile (``dither`` is "none" for mp3)."""
        return Delivery(bits=self.bits, ceiling_dbtp=self.ceiling_dbtp, loudness_lufs=self.loudness_lufs,
                        loudness_tolerance_lu=self.loudness_tolerance_lu, limiter=self.limiter,
                        max_limiting_db=self.max_limiting_db, channel_layout=self.channel_layout,
                        mp3_kbps=self.mp3_kbps, mp3_mode=self.mp3_mode, dither=self.dither,
                        mono_law=self.mono_law, pick_channel=self.pick_channel)

    def to_dict(self):
        return asdict(self)


PROFILES = {
    "podcast_episode": Profile(
        name="podcast_episode", label="Podcast episode", rate_hz=44100, channel_layout="keep",
        container="mp3", bits=None, mp3_kbps=128, mp3_mode="constant", loudness_lufs=-16.0, dither="none",
        loudness_tolerance_lu=1.0, ceiling_dbtp=-1.0, limiter=True, max_limiting_db=6.0,
        preset="spoken_word_delivery",
        sources={"loudness_lufs": _TD1004 + "; we aim at the upper bound, common practice for "
                                            "spoken word",
                 "loudness_tolerance_lu": "ours: +-1 LU keeps the episode inside TD1004's -16 .. -20 "
                                          "range only from above; the limiter aims at +-0.1",
                 "ceiling_dbtp": _TD1004_PEAK,
                 "rate_hz": "common practice (44.1 kHz for MP3 distribution)",
                 "mp3_kbps": "common practice (128 kbit/s constant for stereo speech and music)",
                 "max_limiting_db": "ours: more than 6 dB of limiting is audible on speech"}),
    "broadcast_programme": Profile(
        name="broadcast_programme", label="Broadcast programme (EBU R 128)", rate_hz=48000,
        channel_layout="keep", container="wav", bits="24", mp3_kbps=None, mp3_mode="constant",
        loudness_lufs=-23.0, loudness_tolerance_lu=0.5, ceiling_dbtp=-1.0, limiter=True,
        max_limiting_db=3.0, preset="music_delivery",
        sources={"loudness_lufs": _R128, "loudness_tolerance_lu": _R128, "ceiling_dbtp": _R128,
                 "rate_hz": "common practice (48 kHz in broadcast production)",
                 "bits": "common practice (24-bit broadcast WAV)",
                 "max_limiting_db": "ours: a programme needing more is better remixed"}),
    "us_broadcast": Profile(
        name="us_broadcast", label="US broadcast (ATSC A/85)", rate_hz=48000, channel_layout="keep",
        container="wav", bits="24", mp3_kbps=None, mp3_mode="constant", loudness_lufs=-24.0,
        loudness_tolerance_lu=2.0, ceiling_dbtp=-2.0, limiter=True, max_limiting_db=3.0,
        preset="music_delivery",
        sources={"loudness_lufs": _A85, "loudness_tolerance_lu": _A85, "ceiling_dbtp": _A85_PEAK,
                 "rate_hz": "common practice (48 kHz in broadcast production)",
                 "bits": "common practice (24-bit broadcast WAV)",
                 "max_limiting_db": "ours: a programme needing more is better remixed"}),
    "speech_service_16k": Profile(
        name="speech_service_16k", label="Speech service, 16 kHz mono", rate_hz=16000,
        channel_layout="mono", container="wav", bits="16", mp3_kbps=None, mp3_mode="constant",
        loudness_lufs=None, loudness_tolerance_lu=None, ceiling_dbtp=-1.0, limiter=False,
        max_limiting_db=0.0, preset="spoken_word_delivery",
        sources={"rate_hz": "common practice (speech-to-text services take 16 kHz, 16-bit mono)",
                 "channel_layout": "common practice", "bits": "common practice",
                 "ceiling_dbtp": "common practice (headroom against clipping after decoding)",
                 "loudness_lufs": "no published target: level is left as recorded"}),
    "archive_master": Profile(
        name="archive_master", label="Archive master", rate_hz=None, channel_layout="keep",
        container="flac", bits="24", mp3_kbps=None, mp3_mode="constant", loudness_lufs=None,
        loudness_tolerance_lu=None, ceiling_dbtp=None, limiter=False, max_limiting_db=0.0,
        preset="archival_master",
        sources={"bits": "common practice (24-bit lossless masters)",
                 "rate_hz": "ours: an archive keeps the recorded rate unless told otherwise",
                 "loudness_lufs": "none: a master keeps its level; measured and reported only"}),
}


def profile_names():
    return tuple(PROFILES)


def profile(name, **overrides):
    """Profile ``name`` with ``overrides`` (field names) applied and checked.

    An overridden number's source becomes "set by the user".
    """
    if name not in PROFILES:
        raise ParameterError(f"profile must be one of {', '.join(PROFILES)}, got {name!r}", "profile")
    known = {f.name for f in fields(Profile)} - {"name", "sources"}
    unknown = sorted(set(overrides) - known)
    if unknown:
        raise ParameterError(f"unknown profile field {unknown[0]!r}; known: {', '.join(sorted(known))}",
                             unknown[0])
    for key in ("loudness_lufs", "loudness_tolerance_lu", "ceiling_dbtp", "max_limiting_db"):
        value = overrides.get(key)
        if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))
                                  or not math.isfinite(value)):
            raise ParameterError(f"{key} must be a number, got {value!r}", key)
    base = PROFILES[name]
    sources = dict(base.sources)
    sources.update({key: "set by the user" for key in overrides})
    return replace(base, **overrides, sources=sources)
