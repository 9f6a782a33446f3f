"""What the `rateferry` commands share: the spec and delivery options, their parsing into a Spec
and a Delivery, the options every command takes, printing, and the progress display."""

import argparse
import json
import sys
import time

from .cli_args import number_arg, rate_arg, whole_arg
from .dsp.dither import DITHERS, WORD_LENGTHS
from .dsp.spec import DEFAULT_PRESET, PRESETS, preset, preset_bits, spec_from_dict
from .jsontools import jsonable

__all__ = ["SPEC_OPTIONS", "add_spec_options", "spec_from_args", "preset_name", "print_json", "say", "detail", "grouped", "db_text", "level_text", "Progress", "add_delivery_options", "add_replace_option", "profile_of", "delivery_from_args", "fs_out_of", "common_options", "add_rate_options"]

SPEC_OPTIONS = [
    # flag, spec field, type, help
    ("--passband", "passband_hz", number_arg("--passband", unit="Hz"),
     "passband edge in Hz (default: a fraction of the lower Nyquist)"),
    ("--passband-fraction", "passband_fraction", number_arg("--passband-fraction"),
     "passband edge as a fraction of the lower Nyquist"),
    ("--stopband", "stopband_hz", number_arg("--stopband", unit="Hz"),
     "stopband edge in Hz (default: the lower Nyquist)"),
    ("--ripple", "ripple_db", number_arg("--ripple", unit="dB"), "largest passband deviation, +- dB"),
    ("--attenuation", "attenuation_db", number_arg("--attenuation", unit="dB"),
     "smallest stopband rejection, dB"),
    ("--phase", "phase", str, "linear | minimum"),
    ("--method", "method", str, "auto | kaiser | equiripple | least-squares"),
    ("--arithmetic", "arithmetic", str, "float32 | float64"),
    ("--stages", "stages", str, "single | auto (multistage when it saves work)"),
]


def add_spec_options(p):
    p.add_argument("--preset", default=None, choices=sorted(PRESETS),
                   help=f"starting spec (default: the profile's, else {DEFAULT_PRESET})")
    for flag, field, typ, text in SPEC_OPTIONS:
        p.add_argument(flag, dest=field, type=typ, default=None, help=text)
    p.add_argument("--transition-aliasing", dest="allow_transition_aliasing",
                   action="store_true", default=None,
                   help="let aliases fall into the transition band (stopband = lower rate - passband)")


def spec_from_args(args):
    data = {field: getattr(args, field) for _, field, _, _ in SPEC_OPTIONS}
    data["allow_transition_aliasing"] = args.allow_transition_aliasing
    data = {k: v for k, v in data.items() if v is not None}
    return spec_from_dict(data, base=preset(preset_name(args)))


def preset_name(args):
    chosen = profile_of(args)
    return args.preset or (chosen.preset if chosen else DEFAULT_PRESET)


def print_json(obj):
    json.dump(jsonable(obj), sys.stdout, indent=2, allow_nan=False)
    sys.stdout.write("\n")


def say(args, text):
    """A line that states the result: printed unless --silent."""
    if not args.silent:
        print(text)


def detail(args, text):
    """A line of detail: printed unless --quiet or --silent."""
    if not (args.quiet or args.silent):
        print(text)


def grouped(n):
    """12 345 678 (thin groups, as the page writes them)."""
    return f"{int(n):,}".replace(",", " ")


def db_text(value, unit="dB", digits=2):
    return "-" if value is None else f"{value:+.{digits}f} {unit}".replace("+-", "-")


def level_text(value, unit):
    return "-" if value is None else f"{value:.1f} {unit}"


class Progress:
    """Progress of a conversion on stderr: a tqdm bar with rate and ETA on a terminal; when
    stderr is not a terminal (a log, a pipe), one summary line at the end instead."""

    def __init__(self, label, *, enabled, stream=None):
        self.label = label
        self.enabled = enabled
        self.stream = stream or sys.stderr
        self.terminal = enabled and hasattr(self.stream, "isatty") and self.stream.isatty()
        self.bar = None
        self.done = self.total = 0
        self._t0 = time.perf_counter()

    def __call__(self, fraction, done, total):
        if not self.enabled:
            return
        self.done, self.total = done, total
        if self.terminal:
            if self.bar is None:
                from tqdm import tqdm
                self.bar = tqdm(total=total, desc=self.label, unit="frame", unit_scale=True,
                                file=self.stream, dynamic_ncols=True, leave=False)
            self.bar.update(done - self.bar.n)

    def close(self, finished=True):
        if not self.enabled:
            return
        if self.bar is not None:
            self.bar.close()
            return
        if finished and self.total:
            elapsed = time.perf_counter() - self._t0
            rate = self.done / elapsed if elapsed > 0 else 0.0
            self.stream.write(f"{self.label}: {100.0 * self.done / self.total:.1f} % of "
                              f"{grouped(self.total)} frames read in {elapsed:.2f} s "
                              f"({grouped(rate)} frames/s)\n")
            self.stream.flush()



def add_delivery_options(p):
    from .delivery import CHANNEL_LAYOUTS, MONO_LAWS, MP3_MODES
    from .profiles import profile_names
    p.add_argument("--profile", choices=list(profile_names()), default=None,
                   help="a destination's delivery (rate, channels, word length or MP3 bit rate, "
                        "loudness, ceiling, limiter, filter preset); every other option given "
                        "overrides its field")
    p.add_argument("--bits", choices=list(WORD_LENGTHS), default=None,
                   help="output word length (default: the profile's, else the preset's if it "
                        "states one, as spoken_word_delivery does (16), else like the source)")
    p.add_argument("--dither", choices=list(DITHERS), default=None,
                   help="dither for 16/24-bit outputs (default tpdf)")
    p.add_argument("--seed", type=whole_arg("--seed", low=0, high=2**63 - 1), default=None,
                   help="dither seed (default 0)")
    p.add_argument("--ceiling", type=number_arg("--ceiling", low=-60.0, high=0.0, unit="dBTP"),
                   default=None,
                   help="true-peak ceiling in dBTP (gain applied, or the limiter, to stay under it)")
    p.add_argument("--loudness", type=number_arg("--loudness", low=-70.0, high=0.0, unit="LUFS"),
                   default=None,
                   help="integrated loudness target in LUFS")
    p.add_argument("--tolerance", type=number_arg("--tolerance", low=0.0, high=10.0, unit="LU"),
                   default=None, help="how far the loudness may land from the target (default 0.5 LU)")
    p.add_argument("--limiter", action=argparse.BooleanOptionalAction, default=None,
                   help="let the true-peak limiter hold the ceiling so the loudness target is met")
    p.add_argument("--max-limiting", type=number_arg("--max-limiting", low=0.0, high=40.0, unit="dB"),
                   default=None, help="the most gain reduction the limiter may apply (default 6 dB)")
    p.add_argument("--channels", choices=list(CHANNEL_LAYOUTS), default=None,
                   help="channel layout: keep, mono (fold-down), pick (one channel), stereo "
                        "(from mono)")
    p.add_argument("--mono-law", choices=list(MONO_LAWS), default=None,
                   help="how mono sums the channels: half (1/N, default), equal_power (1/sqrt N), sum")
    p.add_argument("--pick", type=whole_arg("--pick", low=1, high=64), default=None,
                   help="the channel --channels pick delivers (1 = first)")
    p.add_argument("--mp3-kbps", type=whole_arg("--mp3-kbps", low=32, high=320), default=None,
                   help="MP3 bit rate, kbit/s (default 128)")
    p.add_argument("--mp3-mode", choices=list(MP3_MODES), default=None,
                   help="MP3 bit-rate mode (default constant)")
    p.add_argument("--filter-same-rate", action="store_true",
                   help="run the filter even when the rate does not change (default: the "
                        "samples pass through; only the delivery chain runs)")
    p.add_argument("--block-frames", type=whole_arg("--block-frames", low=1, high=2**24),
                   default=65536, help="frames per block read")


def add_replace_option(p, text):
    p.add_argument("--replace", action="store_true", help=text)


# option dest -> Delivery field
_DELIVERY_OPTIONS = {"bits": "bits", "dither": "dither", "seed": "dither_seed",
                     "ceiling": "ceiling_dbtp", "loudness": "loudness_lufs",
                     "tolerance": "loudness_tolerance_lu", "limiter": "limiter",
                     "max_limiting": "max_limiting_db", "channels": "channel_layout",
                     "mono_law": "mono_law", "pick": "pick_channel", "mp3_kbps": "mp3_kbps",
                     "mp3_mode": "mp3_mode"}


def profile_of(args):
    from .profiles import PROFILES
    return PROFILES[args.profile] if getattr(args, "profile", None) else None


def delivery_from_args(args):
    """The Delivery: the profile's (or the defaults), each option given overriding its field;
    without --bits and a profile, the preset's word length if it states one (spoken word: 16
    bit), else like the source."""
    from .delivery import Delivery
    chosen = profile_of(args)
    data = chosen.delivery().to_dict() if chosen else {"bits": preset_bits(preset_name(args))}
    data.update({field: getattr(args, dest) for dest, field in _DELIVERY_OPTIONS.items()
                 if getattr(args, dest) is not None})
    if data.get("ceiling_dbtp") is None and data.get("limiter") and args.limiter:
        from .dsp.errors import ParameterError
        raise ParameterError("--limiter needs a ceiling to hold (--ceiling DBTP)", "--limiter")
    return Delivery.from_dict(data)


def fs_out_of(args):
    """--to, else the profile's rate (None: the source's rate for a profile that keeps it)."""
    if args.fs_out is not None:
        return args.fs_out
    chosen = profile_of(args)
    return chosen.rate_hz if chosen else None


def common_options():
    """Options every command takes."""
    p = argparse.ArgumentParser(add_help=False)
    p.add_argument("--quiet", action="store_true",
                   help="no progress and no detail: only the line that states the result")
    p.add_argument("--silent", action="store_true",
                   help="print nothing but errors (and --json output); the exit status tells")
    return p


def add_rate_options(p):
    p.add_argument("--from", dest="fs_in", type=rate_arg("--from"), required=True,
                   help="source rate, Hz")
    p.add_argument("--to", dest="fs_out", type=rate_arg("--to"), required=True,
                   help="target rate, Hz")
