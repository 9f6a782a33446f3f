"""The filter mask a conversion must meet, and named presets.

Conventions
-----------
* Frequencies are in Hz. ``passband_hz`` and ``stopband_hz`` are absolute edges; when they are
  ``None`` they resolve against the route: the passband edge is ``passband_fraction`` of the lower
  Nyquist frequency, the stopband edge is the lower Nyquist frequency, or, with
  ``allow_transition_aliasing``, ``lower_rate - passband_hz`` (aliases then fall only into the
  transition band, never into the passband).
* ``ripple_db`` is the largest allowed deviation of the passband gain from unity, either way
  (|20 log10 |H(f)|| <= ripple_db for f in the passband).
* ``attenuation_db`` is the smallest allowed stopband rejection, a positive number of dB.

The spec is the single source of defaults; JSON keys equal these field names.
"""

from dataclasses import dataclass, asdict, fields, replace

from .errors import ParameterError
from .numbers import finite_number
from .rates import Route

__all__ = ["Spec", "Mask", "PHASES", "METHODS", "ARITHMETICS", "STAGE_CHOICES", "PRESETS",
           "DEFAULT_PRESET", "preset", "preset_bits", "spec_from_dict", "FLOAT32_LIMIT_DB"]

PHASES = ("linear", "minimum")
METHODS = ("auto", "kaiser", "equiripple", "least-squares")
ARITHMETICS = ("float32", "float64")
STAGE_CHOICES = ("single", "auto")
# float32 products keep about -125 dB relative error (24-bit mantissa, sums of a few hundred
# products); a deeper mask needs float64 arithmetic. Common practice.
FLOAT32_LIMIT_DB = 125.0
MIN_ATTENUATION_DB = 20.0
MAX_ATTENUATION_DB = 200.0
MIN_RIPPLE_DB = 1e-5
MAX_RIPPLE_DB = 3.0


@dataclass(frozen=True)
class Spec:
    """What the anti-aliasing / anti-imaging low-pass must achieve, and how to build it."""

    passband_hz: float | None = None
    passband_fraction: float = 0.9
    stopband_hz: float | None = None
    allow_transition_aliasing: bool = False
    ripple_db: float = 0.01
    attenuation_db: float = 120.0
    phase: str = "linear"
    method: str = "auto"
    arithmetic: str = "float64"
    stages: str = "single"

    def __post_init__(self):
        _check_choice("phase", self.phase, PHASES)
        _check_choice("method", self.method, METHODS)
        _check_choice("arithmetic", self.arithmetic, ARITHMETICS)
        _check_choice("stages", self.stages, STAGE_CHOICES)
        _check_number("ripple_db", self.ripple_db, MIN_RIPPLE_DB, MAX_RIPPLE_DB, "dB")
        _check_number("attenuation_db", self.attenuation_db, MIN_ATTENUATION_DB,
                      MAX_ATTENUATION_DB, "dB")
        _check_number("passband_fraction", self.passband_fraction, 0.05, 0.995, "")
        for name in ("passband_hz", "stopband_hz"):
            value = getattr(self, name)
            if value is not None:
                _check_number(name, value, 1e-9, 1e7, "Hz")
        if not isinstance(self.allow_transition_aliasing, bool):
            raise ParameterError("allow_transition_aliasing must be true or false, got "
                                 f"{self.allow_transition_aliasing!r}", "allow_transition_aliasing")
        if self.arithmetic == "float32" and self.attenuation_db > FLOAT32_LIMIT_DB:
            raise ParameterError(
                f"float32 arithmetic keeps about {FLOAT32_LIMIT_DB:g} dB; a mask of "
                f"{self.attenuation_db:g} dB needs arithmetic float64", "arithmetic")

    def to_dict(self):
        return asdict(self)

    def mask(self, route):
        """Resolve the edges against ``route`` and check the mask is possible there."""
        return Mask.from_spec(self, route)


@dataclass(frozen=True)
class Mask:
    """A spec resolved for one route: concrete edges in Hz."""

    fs_in: int
    fs_out: int
    up: int
    down: int
    passband_hz: float
    stopband_hz: float
    ripple_db: float
    attenuation_db: float

    @classmethod
    def from_spec(cls, spec, route: Route):
        nyq = route.lower_nyquist_hz
        low = route.lower_rate
        fp = spec.passband_hz if spec.passband_hz is not None else spec.passband_fraction * nyq
        if not 0 < fp < nyq:
            raise ParameterError(
                f"passband_hz must be above 0 and below the lower Nyquist frequency {nyq:g} Hz, "
                f"got {fp:g}", "passband_hz")
        if spec.stopband_hz is not None:
            fs = float(spec.stopband_hz)
        elif spec.allow_transition_aliasing:
            # never past the filter's own Nyquist (fs_in * up / 2): for a route between equal
            # rates lower rate - passband lies above it
            fs = min(low - fp, route.prototype_rate / 2.0)
        else:
            fs = nyq
        if fs <= fp:
            raise ParameterError(
                f"stopband_hz must be above passband_hz ({fp:g} Hz), got {fs:g}", "stopband_hz")
        if fs > low - fp + 1e-9:
            raise ParameterError(
                f"stopband_hz must be at most lower rate - passband_hz = {low - fp:g} Hz, or "
                f"aliases land in the passband; got {fs:g}", "stopband_hz")
        if fs > route.prototype_rate / 2.0:
            raise ParameterError(
                f"stopband_hz must be at most half the filter's rate ({route.prototype_rate / 2:g}"
                f" Hz for {route.fs_in} -> {route.fs_out} Hz), got {fs:g}", "stopband_hz")
        return cls(route.fs_in, route.fs_out, route.up, route.down, float(fp), float(fs),
                   float(spec.ripple_db), float(spec.attenuation_db))

    @property
    def passband_delta(self):
        """Allowed linear passband deviation (the larger of the two dB bounds)."""
        return 10 ** (self.ripple_db / 20.0) - 1.0

    @property
    def stopband_delta(self):
        return 10 ** (-self.attenuation_db / 20.0)

    def to_dict(self):
        return asdict(self)


def _check_choice(name, value, choices):
    if value not in choices:
        raise ParameterError(f"{name} must be one of {', '.join(choices)}, got {value!r}", name)


def _check_number(name, value, low, high, unit):
    finite_number(value, name, low=low, high=high, unit=unit)


# Presets are named after the work they serve. Limits are common practice for the trade
# (passband ripple <= 0.01 dB for music, 0.001 dB for archives; rejection >= 100 dB for 16-bit
# delivery, >= 140 dB for 24-bit masters), not taken from a standard. A preset that names a word
# length (``bits``, one of webapp.dsp.dither.WORD_LENGTHS) sets the delivery's word length when
# the user does not choose one; the others leave it like the source.
PRESETS = {
    "spoken_word_delivery": dict(
        label="Spoken word delivery",
        about="Interviews and episodes delivered at 16 bit: 100 dB rejection, 0.05 dB ripple.",
        spec=Spec(passband_fraction=0.9, ripple_db=0.05, attenuation_db=100.0, arithmetic="float32"),
        bits="16"),
    "music_delivery": dict(
        label="Music delivery",
        about="Music beds and mixes: flat to 0.9 of the lower Nyquist, 0.01 dB, 120 dB.",
        spec=Spec(passband_fraction=0.9, ripple_db=0.01, attenuation_db=120.0, arithmetic="float64")),
    "archival_master": dict(
        label="Archival master",
        about="Masters kept at 24 bit: 0.001 dB ripple, 150 dB rejection, float64.",
        spec=Spec(passband_fraction=0.91, ripple_db=0.001, attenuation_db=150.0, arithmetic="float64"),
        bits="24"),
    "live_voice_pipeline": dict(
        label="Live voice pipeline",
        about="Speech services that need low delay: minimum phase, 90 dB.",
        spec=Spec(passband_fraction=0.85, ripple_db=0.1, attenuation_db=90.0, phase="minimum",
                  arithmetic="float32")),
    "quick_preview": dict(
        label="Quick preview",
        about="Cheap drafts to listen to while editing: 70 dB, aliases allowed in the transition band.",
        spec=Spec(passband_fraction=0.85, ripple_db=0.1, attenuation_db=70.0,
                  allow_transition_aliasing=True, arithmetic="float32")),
}

#: The preset the page and the command line start on: the demo is an interview, and spoken word
#: is the work most users bring.
DEFAULT_PRESET = "spoken_word_delivery"


def preset(name):
    """Return the :class:`Spec` of preset ``name``."""
    if name not in PRESETS:
        raise ParameterError(f"preset must be one of {', '.join(PRESETS)}, got {name!r}", "preset")
    return PRESETS[name]["spec"]


def preset_bits(name):
    """The word length preset ``name`` states ("16", "24"), or None (like the source)."""
    preset(name)
    return PRESETS[name].get("bits")


def spec_from_dict(data, *, base=None):
    """Build a :class:`Spec` from a mapping whose keys are Spec field names.

    Unknown keys raise; ``None`` values keep the base (or default) value, except for the two
    edges, where ``None`` means "resolve against the route".
    """
    base = base or Spec()
    names = {f.name for f in fields(Spec)}
    unknown = sorted(set(data) - names)
    if unknown:
        raise ParameterError(f"unknown spec field {unknown[0]!r}; known: {', '.join(sorted(names))}",
                             unknown[0])
    changes = {}
    for key, value in data.items():
        if value is None and key not in ("passband_hz", "stopband_hz"):
            continue
        if key in ("passband_hz", "stopband_hz", "passband_fraction", "ripple_db",
                   "attenuation_db") and value is not None:
            value = _as_float(key, value)
        changes[key] = value
    return replace(base, **changes)


def _as_float(name, value):
    return finite_number(value, name, text=True)
