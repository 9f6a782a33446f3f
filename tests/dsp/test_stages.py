"""Multistage plans.

Checks: the noble identity (Crochiere & Rabiner, Multirate Digital Signal Processing, 1983,
ch. 3) gives the equivalent single-rate filter of a two-stage decimator as
h_eq = h1 * (h2 upsampled by M1); the plan's measured figures must equal that filter's measured
figures. Multistage decimation by a large composite factor costs far less than one stage
(Crochiere & Rabiner, IEEE Trans. ASSP 1975; Lyons, Understanding DSP: 400 kHz -> 4 kHz at 60 dB,
about 2727 taps single stage against about 197 in two).
"""

import numpy as np
import pytest

from webapp.dsp.design import measure
from webapp.dsp.spec import Spec
from webapp.dsp.stages import choose_plan, plan_options


def test_large_decimation_plans_are_much_cheaper_and_verified():
    spec = Spec(attenuation_db=100.0, ripple_db=0.05)
    single, plans = plan_options(spec, 192000, 8000)
    assert plans and all(p.meets_mask for p in plans)
    best = plans[0]
    assert best.macs_per_output_sample < single.macs_per_output_sample / 5
    assert best.rates[0] == 192000 and best.rates[-1] == 8000
    assert np.prod([s.down for s in best.stages]) == 24
    assert best.measured.passband_ripple_db <= 0.05
    costs = [p.macs_per_output_sample for p in plans]
    assert costs == sorted(costs)


def test_two_stage_lyons_example_is_an_order_of_magnitude_cheaper():
    # 400 kHz -> 4 kHz, passband 1.8 kHz, 60 dB (Lyons' worked example)
    spec = Spec(passband_hz=1800.0, attenuation_db=60.0, ripple_db=0.1)
    single, plans = plan_options(spec, 400000, 4000, max_stages=2)
    best = plans[0]
    assert single.numtaps > 2000
    assert best.numtaps < 400
    assert single.macs_per_output_sample / best.macs_per_output_sample > 5


def test_cascade_measurement_equals_the_noble_identity_filter():
    spec = Spec(attenuation_db=90.0, ripple_db=0.1)
    single, plans = plan_options(spec, 96000, 8000, max_stages=2)
    p = next(p for p in plans if len(p.stages) == 2)
    s1, s2 = p.stages
    m1 = s1.down
    up2 = np.zeros((s2.taps.size - 1) * m1 + 1)
    up2[::m1] = s2.taps
    h_eq = np.convolve(s1.taps, up2)
    ref = measure(h_eq, 96000.0, p.mask, 1.0)
    assert p.measured.stopband_attenuation_db == pytest.approx(ref.stopband_attenuation_db, abs=0.2)
    assert p.measured.passband_ripple_db == pytest.approx(ref.passband_ripple_db, rel=0.05, abs=1e-5)


def test_interpolation_plans_mirror_decimation():
    spec = Spec(attenuation_db=100.0, ripple_db=0.05)
    single, plans = plan_options(spec, 8000, 192000)
    assert plans[0].meets_mask
    assert plans[0].macs_per_output_sample < single.macs_per_output_sample / 4


def test_prime_factors_give_no_plans_and_auto_keeps_single_stage():
    spec = Spec(stages="auto")
    single, plans = plan_options(spec, 48000, 16000)
    assert plans == []
    assert choose_plan(spec, 48000, 16000).path == "polyphase"


def test_auto_picks_the_cheapest_verified_plan():
    p = choose_plan(Spec(stages="auto", attenuation_db=100.0, ripple_db=0.05), 192000, 8000)
    assert p.path == "multistage" and p.meets_mask
    figs = p.figures()
    assert figs["rates"][0] == 192000 and len(figs["stages"]) == len(p.stages)
