"""Multistage plans: factor L/M into 2-3 stages, design relaxed masks, verify the cascade.

Each stage i converts r_i -> r_{i+1} = r_i L_i / M_i with its own prototype at r_i L_i. Because
L and M are coprime, every L_i is coprime with every M_j, so (noble identities) the cascade is
exactly one converter up L -> H_eq -> down M with H_eq(f) = prod_i H_i(f), each H_i periodic with
its own filter rate. The cascade is verified by measuring H_eq against the overall mask; the
stage masks are only the design heuristic (Crochiere & Rabiner, "Optimum FIR digital filter
implementations for decimation, interpolation, and narrow-band filtering", IEEE Trans. ASSP 1975;
their Multirate Digital Signal Processing, 1983, ch. 5):

* every stage keeps the overall passband and stopband attenuation; the ripple is split evenly
  (ripple/K per stage, common practice);
* a stage between rates a and b has its stopband at max(stop, min(a, b) - stop): what folds
  (or images) into [min(a,b) - stop, ...] lands above the overall stopband edge, where a later
  (or earlier) stage removes it.
"""

from dataclasses import dataclass, field, replace
import math

import numpy as np

from .design import Design, RouteOfMask, design, kaiser_numtaps, require_met, _meets, Measured
from .errors import ParameterError
from .rates import route as make_route

__all__ = ["Plan", "as_plan", "plan_options", "choose_plan", "verified_plan", "cascade_response"]

MAX_CANDIDATES = 6


@dataclass(frozen=True, eq=False)
class Plan(RouteOfMask):
    """What a conversion runs: one or more single-stage designs that together convert fs_in to
    fs_out. A single-stage design is a one-stage plan (:meth:`single`); every caller holds a
    Plan, whatever the number of stages.
    """

    spec: object
    mask: object
    stages: tuple = field(repr=False)
    rates: tuple
    measured: Measured
    meets_mask: bool
    macs_per_output_sample: float
    mmac_per_second: float
    latency_ms: float
    numtaps: int
    path: str = "multistage"
    method: str = "multistage"

    @classmethod
    def single(cls, design):
        """The one-stage plan of a single-stage :class:`~webapp.dsp.design.Design`."""
        return cls(spec=design.spec, mask=design.mask, stages=(design,),
                   rates=(design.fs_in, design.fs_out), measured=design.measured,
                   meets_mask=design.meets_mask,
                   macs_per_output_sample=design.macs_per_output_sample,
                   mmac_per_second=design.mmac_per_second, latency_ms=design.latency_ms,
                   numtaps=design.numtaps, path=design.path, method=design.method)

    @property
    def multistage(self):
        return len(self.stages) > 1

    @property
    def prering_ms(self):
        """The single stage's pre-ringing; None for a cascade (each stage has its own)."""
        return None if self.multistage else self.stages[0].prering_ms

    @property
    def phase(self):
        return self.spec.phase

    @property
    def design(self):
        """The single stage's design (for plots of one filter); the first stage otherwise."""
        return self.stages[0]

    @property
    def label(self):
        if not self.multistage:
            return "single"
        return " then ".join(f"{s.up}/{s.down}" for s in self.stages)

    def figures(self):
        """Plain figures: a one-stage plan reports its design's figures unchanged."""
        if not self.multistage:
            return self.stages[0].figures()
        return dict(
            path=self.path, method=self.method, label=self.label,
            fs_in=self.fs_in, fs_out=self.fs_out, up=self.up, down=self.down,
            rates=list(self.rates), numtaps=self.numtaps,
            macs_per_output_sample=self.macs_per_output_sample,
            mmac_per_second=self.mmac_per_second, latency_ms=self.latency_ms,
            meets_mask=self.meets_mask, measured=self.measured.to_dict(),
            stages=[s.figures() for s in self.stages],
        )

    def require_met(self):
        """This plan, or a ParameterError naming what misses the mask."""
        if not self.multistage:
            require_met(self.stages[0])
        elif not self.meets_mask:
            raise ParameterError("the multistage plan does not meet the mask", "stages")
        return self


def as_plan(design_or_plan):
    """A Plan for a Plan or a single-stage Design."""
    if isinstance(design_or_plan, Plan):
        return design_or_plan
    if isinstance(design_or_plan, Design):
        return Plan.single(design_or_plan)
    raise ParameterError(f"expected a Design or a Plan, got {type(design_or_plan).__name__}",
                         "design")


def _factorings(n, parts):
    """Ordered tuples of ``parts`` positive integers whose product is n."""
    if parts == 1:
        yield (n,)
        return
    for d in range(1, n + 1):
        if n % d == 0:
            for rest in _factorings(n // d, parts - 1):
                yield (d,) + rest


def _stage_masks(spec, mask, factors):
    """Rates and per-stage specs for a factoring, or None when the route is unusable."""
    rates = [mask.fs_in]
    for L, M in factors:
        num = rates[-1] * L
        if num % M:
            return None
        rates.append(num // M)
    low = min(mask.fs_in, mask.fs_out)
    if any(r < low for r in rates[1:-1]):
        return None
    stop = mask.stopband_hz
    k = len(factors)
    specs = []
    for (a, b) in zip(rates[:-1], rates[1:]):
        s_i = max(stop, min(a, b) - stop)
        s_i = min(s_i, min(a, b) - mask.passband_hz)
        specs.append(replace(spec, passband_hz=mask.passband_hz, stopband_hz=s_i,
                             ripple_db=mask.ripple_db / k, stages="single",
                             allow_transition_aliasing=False))
    return rates, specs


def _estimated_cost(mask, rates, specs, factors):
    total = 0.0
    for (a, b), sp, (L, M) in zip(zip(rates[:-1], rates[1:]), specs, factors):
        width = (sp.stopband_hz - sp.passband_hz) / (a * L / 2)
        n = kaiser_numtaps(sp.attenuation_db, width)
        total += math.ceil(n / L) * b
    return total / mask.fs_out


def cascade_response(stages, F):
    """|H_eq| on a uniform grid over 0..F/2 (F = fs_in * L), exact products of stage FFTs."""
    cs = [int(round(F / s.filter_rate_hz)) for s in stages]
    base = 1
    for c in cs:
        base = base * c // math.gcd(base, c)
    need = max(16 * s.numtaps * c for s, c in zip(stages, cs))
    n_total = base * (1 << max(0, math.ceil(math.log2(max(1, need / base)))))
    mag = np.ones(n_total // 2 + 1)
    k = np.arange(n_total // 2 + 1)
    for s, c in zip(stages, cs):
        n_i = n_total // c
        Hi = np.abs(np.fft.rfft(s.taps / s.phases, n_i))
        idx = k % n_i
        idx = np.where(idx > n_i // 2, n_i - idx, idx)
        mag *= Hi[idx]
    freqs = k * (F / n_total)
    return freqs, mag


def _verify(stages, mask):
    F = float(mask.fs_in * mask.up)
    freqs, mag = cascade_response(stages, F)
    pb = freqs <= mask.passband_hz
    sb = freqs >= mask.stopband_hz
    ripple = float(np.max(np.abs(20 * np.log10(np.maximum(mag[pb], 1e-300)))))
    j = int(np.argmax(mag[sb]))
    atten = float(-20 * np.log10(max(mag[sb][j], 1e-300)))
    return Measured(ripple, atten, float(freqs[sb][j]))


def _build(spec, mask, factors, rates, specs):
    stages = tuple(design(sp, a, b) for sp, a, b in zip(specs, rates[:-1], rates[1:]))
    if any(s.path != "polyphase" for s in stages):
        return None
    measured = _verify(stages, mask)
    macs_per_s = sum(s.taps_per_phase * s.fs_out for s in stages)
    return Plan(spec=spec, mask=mask, stages=stages, rates=tuple(rates), measured=measured,
                meets_mask=_meets(measured, mask) and all(s.meets_mask for s in stages),
                macs_per_output_sample=macs_per_s / mask.fs_out,
                mmac_per_second=macs_per_s / 1e6,
                latency_ms=sum(s.latency_ms for s in stages),
                numtaps=sum(s.numtaps for s in stages))


def plan_options(spec, fs_in, fs_out, *, max_stages=3, candidates=MAX_CANDIDATES, single=None):
    """The single-stage design and the cheapest multistage plans, each verified.

    ``single`` may pass the single-stage design already made for this spec and route.

    Returns
    -------
    single : Design
    plans : list of Plan
        Sorted by MACs per output sample; empty when L and M offer no useful factoring
        (prime factors, or every factoring drops below the lower rate).
    """
    if single is None:
        single = design(spec, fs_in, fs_out)
    rt = make_route(fs_in, fs_out)
    mask = single.mask
    scored = []
    for k in range(2, max_stages + 1):
        for ls in _factorings(rt.up, k):
            for ms in _factorings(rt.down, k):
                factors = tuple(zip(ls, ms))
                if any(L == 1 and M == 1 for L, M in factors):
                    continue
                got = _stage_masks(spec, mask, factors)
                if got is None:
                    continue
                rates, specs = got
                try:
                    cost = _estimated_cost(mask, rates, specs, factors)
                except ParameterError:
                    continue
                scored.append((cost, factors, rates, specs))
    scored.sort(key=lambda t: t[0])
    plans = []
    for cost, factors, rates, specs in scored[:candidates]:
        try:
            p = _build(spec, mask, factors, rates, specs)
        except ParameterError:
            continue
        if p is not None:
            plans.append(p)
    plans.sort(key=lambda p: (not p.meets_mask, p.macs_per_output_sample))
    return single, plans


def choose_plan(spec, fs_in, fs_out, *, single=None, plans=None):
    """The Plan a conversion runs: the single stage, or with ``spec.stages == "auto"`` the
    cheapest verified multistage plan when it saves at least 20 % of the multiply-adds.
    ``single`` may pass the single-stage design already made (a cache), ``plans`` the
    multistage plans :func:`plan_options` already gave for it."""
    if single is None:
        single = design(spec, fs_in, fs_out)
    if spec.stages != "auto":
        return Plan.single(single)
    if plans is None:
        single, plans = plan_options(spec, fs_in, fs_out, single=single)
    good = [p for p in plans if p.meets_mask]
    if good and good[0].macs_per_output_sample < 0.8 * single.macs_per_output_sample:
        return good[0]
    return Plan.single(single)


def verified_plan(spec, fs_in, fs_out, *, single=None):
    """:func:`choose_plan`, refused with a ParameterError when it does not meet the mask.
    The one place that decides whether a conversion may run."""
    return choose_plan(spec, fs_in, fs_out, single=single).require_met()
