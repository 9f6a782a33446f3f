"""The DSP core of Rateferry: numpy and scipy only, no I/O, no web.

A catalogue; each public name lives in a private-purpose module:

- rates:     Route, route, validate_rate, SpeedChange, speed_change, true_rate_change
- spec:      Spec, Mask, PRESETS, preset, spec_from_dict
- design:    Design, Measured, design, require_met, kaiser_beta, kaiser_numtaps,
             herrmann_numtaps, bellanger_numtaps
- stages:    Plan, plan_options, choose_plan
- polyphase: PolyphaseConverter, ArbitraryConverter, CascadeConverter, make_converter,
             convert, output_length, real_ratio
- timebase:  TimeBase, correct_drift, timebase_design, timebase_converter
- drift:     DriftMeasurement, measure_drift (imported from webapp.dsp.drift)
- speed:     speed_design, change_speed
- spectrum:  welch_spectrum, dense_response, response_at
- dither:    Quantizer
- loudness:  LoudnessMeter, integrated_loudness, k_weighting
- truepeak:  TruePeakMeter, true_peak
- audit:     audit (imported from webapp.dsp.audit)
- errors:    RateferryError, ParameterError, AudioFileError
"""

from .errors import AudioFileError, ParameterError, RateferryError
from .rates import Route, SpeedChange, route, speed_change, true_rate_change, validate_rate
from .spec import PRESETS, Mask, Spec, preset, spec_from_dict
from .design import (Design, Measured, bellanger_numtaps, design, herrmann_numtaps,
                     kaiser_beta, kaiser_numtaps, require_met)
from .stages import Plan, choose_plan, plan_options
from .polyphase import (ArbitraryConverter, CascadeConverter, PolyphaseConverter, convert,
                        make_converter, output_length, real_ratio)
from .timebase import TimeBase, correct_drift, timebase_converter, timebase_design
from .speed import change_speed, speed_design
from .spectrum import dense_response, response_at, welch_spectrum

__all__ = [
    "AudioFileError", "ParameterError", "RateferryError", "Route", "route", "validate_rate",
    "PRESETS", "Mask", "Spec", "preset", "spec_from_dict", "Design", "Measured",
    "bellanger_numtaps", "design", "herrmann_numtaps", "kaiser_beta", "kaiser_numtaps",
    "require_met", "Plan", "choose_plan", "plan_options", "ArbitraryConverter",
    "CascadeConverter", "PolyphaseConverter", "convert", "make_converter", "output_length",
    "dense_response", "response_at", "welch_spectrum", "SpeedChange", "speed_change",
    "true_rate_change", "real_ratio", "TimeBase", "correct_drift", "timebase_converter",
    "timebase_design", "change_speed", "speed_design",
]
