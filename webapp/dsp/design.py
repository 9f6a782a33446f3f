"""Spec -> FIR prototype, with order estimates, measured verification and cost figures.

Conventions
-----------
* The prototype runs at ``filter_rate_hz``: ``fs_in * up`` on the polyphase path, ``fs_in * phases``
  on the arbitrary-ratio path. Its DC gain equals ``up`` (or ``phases``) so that zero-stuffed input
  keeps its level.
* ``numtaps`` is the number of taps (odd for linear phase, so the delay is a whole number of
  samples at the filter rate).
* Measured figures come from the designed taps on a dense grid (one zero-padded FFT with about
  16 points per sidelobe) plus exact evaluation at both band edges; a design is accepted only
  when these measurements meet the mask. Estimates from formulas only set the starting length.

References
----------
Kaiser, "Nonrecursive digital filter design using the I0-sinh window function", Proc. IEEE
ISCAS 1974; Oppenheim & Schafer, Discrete-Time Signal Processing, 1989, eqs. 7.90-7.93.
Herrmann, Rabiner & Chan, "Practical design rules for optimum FIR lowpass digital filters",
Bell System Technical Journal 52(6), 1973. Bellanger, Digital Processing of Signals.
Smith & Gossett, "A flexible sampling-rate conversion method", ICASSP 1984 (arbitrary path).
"""

from dataclasses import dataclass, field, replace
import math
import time

import numpy as np
from scipy import signal

from .errors import ParameterError
from .rates import route as make_route
from .spec import Spec
from .spectrum import dense_response, response_at

__all__ = ["Measured", "Design", "Estimate", "design", "estimate", "kaiser_beta", "kaiser_numtaps",
           "herrmann_numtaps", "bellanger_numtaps", "measure", "interpolation_phases",
           "MAX_BANK_TAPS", "EQUIRIPPLE_AUTO_MAX", "EQUIRIPPLE_MAX", "LEAST_SQUARES_MAX"]

# Above this many prototype taps the exact polyphase bank is replaced by the arbitrary-ratio
# path (8 MB of float64 coefficients; the bank must also be designed and measured quickly).
MAX_BANK_TAPS = 1_000_000
# Parks-McClellan (scipy.signal.remez) converges reliably up to a few hundred taps on audio
# masks and fails to converge or loses precision beyond (measured here: 401 taps fine, 801 fail
# on a 48 k -> 16 k 120 dB mask).
EQUIRIPPLE_AUTO_MAX = 600
EQUIRIPPLE_MAX = 1500
# scipy.signal.firls solves a dense (N/2)^2 system.
LEAST_SQUARES_MAX = 4001
MAX_NUMTAPS = 8_000_000
MAX_ITERATIONS = 24
PRERING_THRESHOLD_DB = -60.0


@dataclass(frozen=True)
class Measured:
    """Figures measured on the designed taps."""

    passband_ripple_db: float        # worst |20 log10 |H|| in the passband (gain normalised)
    stopband_attenuation_db: float   # worst rejection in the stopband, positive dB
    worst_stopband_hz: float
    interpolation_error_db: float | None = None  # arbitrary path only: phase-interpolation error

    def to_dict(self):
        return dict(passband_ripple_db=self.passband_ripple_db,
                    stopband_attenuation_db=self.stopband_attenuation_db,
                    worst_stopband_hz=self.worst_stopband_hz,
                    interpolation_error_db=self.interpolation_error_db)


class RouteOfMask:
    """fs_in, fs_out, up and down of anything that carries its mask (designs and plans)."""

    @property
    def fs_in(self):
        return self.mask.fs_in

    @property
    def fs_out(self):
        return self.mask.fs_out

    @property
    def up(self):
        return self.mask.up

    @property
    def down(self):
        return self.mask.down


@dataclass(frozen=True, eq=False)
class Design(RouteOfMask):
    """A designed, measured single-stage prototype and its cost."""

    spec: Spec
    mask: object
    path: str                 # "polyphase" or "arbitrary"
    path_reason: str
    method: str               # "kaiser", "equiripple", "least-squares"
    method_reason: str
    phase: str
    taps: np.ndarray = field(repr=False)
    filter_rate_hz: float
    phases: int               # polyphase branches: up, or the arbitrary table size
    delay_samples: int        # removed delay, in samples at the filter rate (0 for minimum phase)
    numtaps: int
    numtaps_estimate: int
    iterations: int
    taps_per_phase: int
    macs_per_output_sample: float
    mmac_per_second: float    # per channel, per second of output audio
    latency_ms: float
    prering_ms: float
    measured: Measured
    meets_mask: bool
    design_ms: float

    def figures(self):
        """Plain figures for JSON and reports (no arrays)."""
        return dict(
            fs_in=self.fs_in, fs_out=self.fs_out, up=self.up, down=self.down,
            path=self.path, path_reason=self.path_reason,
            method=self.method, method_reason=self.method_reason, phase=self.phase,
            arithmetic=self.spec.arithmetic,
            filter_rate_hz=self.filter_rate_hz, phases=self.phases,
            numtaps=self.numtaps, numtaps_estimate=self.numtaps_estimate,
            iterations=self.iterations, taps_per_phase=self.taps_per_phase,
            macs_per_output_sample=self.macs_per_output_sample,
            mmac_per_second=self.mmac_per_second, latency_ms=self.latency_ms,
            prering_ms=self.prering_ms, meets_mask=self.meets_mask,
            measured=self.measured.to_dict(), mask=self.mask.to_dict(),
            spec=self.spec.to_dict(), design_ms=self.design_ms,
        )


# ---------------------------------------------------------------- order estimates

def kaiser_beta(attenuation_db):
    """Kaiser's beta for a stopband attenuation in dB (Kaiser 1974; O&S 1989 eq. 7.92)."""
    a = float(attenuation_db)
    if a > 50:
        return 0.1102 * (a - 8.7)
    if a >= 21:
        return 0.5842 * (a - 21) ** 0.4 + 0.07886 * (a - 21)
    return 0.0


def kaiser_numtaps(attenuation_db, width):
    """Kaiser's length estimate; ``width`` is the transition width as a fraction of Nyquist.

    numtaps = ceil((A - 7.95) / (2.285 pi width) + 1) (Kaiser 1974, constant 7.95 as in
    scipy.signal.kaiserord; O&S use 8).
    """
    return int(math.ceil((attenuation_db - 7.95) / (2.285 * math.pi * width) + 1))


def herrmann_numtaps(dp, ds, df):
    """Herrmann-Rabiner-Chan (1973) equiripple estimate N (the filter order; taps = N + 1);
    ``df`` = transition width / rate."""
    if dp < ds:
        dp, ds = ds, dp
    l1, l2 = math.log10(dp), math.log10(ds)
    a1, a2, a3, a4, a5, a6 = 5.309e-3, 7.114e-2, -0.4761, -2.66e-3, -0.5941, -0.4278
    dinf = (a1 * l1 * l1 + a2 * l1 + a3) * l2 + (a4 * l1 * l1 + a5 * l1 + a6)
    f = 11.01217 + 0.51244 * (l1 - l2)
    return dinf / df - f * df


def bellanger_numtaps(dp, ds, df):
    """Bellanger's estimate N ~ (2/3) log10(1 / (10 dp ds)) / df, the filter order
    (``df`` = transition width / rate)."""
    return (2.0 / 3.0) * math.log10(1.0 / (10.0 * dp * ds)) / df


def interpolation_phases(passband_hz, fs_in, attenuation_db, *, margin_db=6.0):
    """Table size P for the arbitrary path: linear interpolation between phases leaves about
    (w/P)^2 / 8 relative error at w = 2 pi f / fs_in (Smith & Gossett 1984); keep it
    ``margin_db`` below the stopband level. Returns a power of two from 256 to 65536."""
    w = 2 * math.pi * passband_hz / fs_in
    target = 10 ** (-(attenuation_db + margin_db) / 20.0)
    p = w / math.sqrt(8 * target)
    return int(min(65536, max(256, 1 << int(math.ceil(math.log2(max(p, 1.0)))))))


def interpolation_error_db(passband_hz, fs_in, phases):
    w = 2 * math.pi * passband_hz / fs_in
    return 20 * math.log10((w / phases) ** 2 / 8.0)


# ---------------------------------------------------------------- measurement

def measure(taps, rate_hz, mask, gain):
    """Measure ``taps`` (at ``rate_hz``, DC gain ``gain``) against the mask's two bands."""
    freqs, H = dense_response(taps, rate_hz)
    mag = np.abs(H) / gain
    fp, fs = mask.passband_hz, mask.stopband_hz
    pb = freqs <= fp
    sb = freqs >= fs
    edges = np.abs(response_at(taps, rate_hz, [fp, fs])) / gain
    pass_mag = np.concatenate([mag[pb], edges[:1]])
    with np.errstate(divide="ignore"):
        ripple = float(np.max(np.abs(20 * np.log10(np.maximum(pass_mag, 1e-300)))))
        stop = np.concatenate([mag[sb], edges[1:]])
        stop_f = np.concatenate([freqs[sb], [fs]])
        k = int(np.argmax(stop))
        atten = float(-20 * np.log10(max(stop[k], 1e-300)))
    return Measured(ripple, atten, float(stop_f[k]))


def _meets(measured, mask):
    return (measured.passband_ripple_db <= mask.ripple_db
            and measured.stopband_attenuation_db >= mask.attenuation_db)


# ---------------------------------------------------------------- designers

def _kaiser(numtaps, rate, mask, gain, attenuation_db):
    cutoff = 0.5 * (mask.passband_hz + mask.stopband_hz)
    beta = kaiser_beta(attenuation_db)
    h = signal.firwin(numtaps, cutoff, window=("kaiser", beta), fs=rate)
    return h * gain


def _equiripple(numtaps, rate, mask, gain):
    weight = [1.0, mask.passband_delta / mask.stopband_delta]
    h = signal.remez(numtaps, [0, mask.passband_hz, mask.stopband_hz, rate / 2], [1, 0],
                     weight=weight, fs=rate, maxiter=60, grid_density=16)
    return h * gain


def _least_squares(numtaps, rate, mask, gain):
    weight = [1.0, mask.passband_delta / mask.stopband_delta]
    h = signal.firls(numtaps, [0, mask.passband_hz, mask.stopband_hz, rate / 2], [1, 1, 0, 0],
                     weight=weight, fs=rate)
    return h * gain


def _odd(n):
    n = int(n)
    return n if n % 2 else n + 1


def _grow(n):
    return _odd(max(n + 2, int(math.ceil(n * 1.03))))


def _choose_method(spec, mask, rate):
    df = (mask.stopband_hz - mask.passband_hz) / rate
    est_eq = herrmann_numtaps(mask.passband_delta, mask.stopband_delta, df) + 1
    if spec.method != "auto":
        return spec.method, "chosen in the spec"
    if est_eq <= EQUIRIPPLE_AUTO_MAX:
        return ("equiripple",
                f"equiripple needs the fewest taps (about {est_eq:.0f} by Herrmann-Rabiner-Chan)")
    return ("kaiser",
            f"the mask needs about {est_eq:.0f} equiripple taps; Parks-McClellan is not reliable "
            f"beyond {EQUIRIPPLE_AUTO_MAX}, so a Kaiser window design is used")


def _design_linear(method, mask, rate, gain, attenuation_db=None):
    """Grow a linear-phase design until its measurement meets ``mask``.

    Returns taps, method, estimate, iterations, measured, met.
    """
    att = mask.attenuation_db if attenuation_db is None else attenuation_db
    width = (mask.stopband_hz - mask.passband_hz) / (rate / 2)
    dp, ds = mask.passband_delta, 10 ** (-att / 20.0)
    # The window method has equal ripple in both bands: design for the tighter of the two.
    a_kaiser = max(att, -20 * math.log10(min(dp, ds)))
    if method == "kaiser":
        n = _odd(kaiser_numtaps(a_kaiser, width))
    elif method == "equiripple":
        n = _odd(math.ceil(herrmann_numtaps(dp, ds, width / 2)) + 1)
    else:
        n = _odd(kaiser_numtaps(a_kaiser, width))
    estimate = n
    limit = {"kaiser": MAX_NUMTAPS, "equiripple": EQUIRIPPLE_MAX,
             "least-squares": LEAST_SQUARES_MAX}[method]
    if n > limit:
        raise ParameterError(
            f"method {method} is limited to {limit} taps; this mask needs about {n} at "
            f"{rate:g} Hz (use method auto or kaiser, or widen the transition band)", "method")
    target = replace(mask, attenuation_db=float(att))
    h = measured = None
    for it in range(1, MAX_ITERATIONS + 1):
        try:
            if method == "kaiser":
                h = _kaiser(n, rate, mask, gain, a_kaiser + 0.5 * (it - 1))
            elif method == "equiripple":
                h = _equiripple(n, rate, mask, gain)
            else:
                h = _least_squares(n, rate, mask, gain)
        except ValueError as exc:  # remez: failure to converge
            if method == "equiripple":
                return None, method, estimate, it, None, False, str(exc)
            raise
        measured = measure(h, rate, target, gain)
        if _meets(measured, target):
            return h, method, estimate, it, measured, True, ""
        nxt = _grow(n)
        if nxt > limit:
            break
        n = nxt
    return h, method, estimate, it, measured, False, f"not met after {it} designs up to {n} taps"


def _prering_ms(h, rate):
    mag = np.abs(h)
    peak = int(np.argmax(mag))
    above = np.nonzero(mag[:peak] >= mag[peak] * 10 ** (PRERING_THRESHOLD_DB / 20))[0]
    if above.size == 0:
        return 0.0
    return float((peak - above[0]) / rate * 1000.0)


def _min_phase(h_lin, rate, mask, gain):
    """Minimum-phase version with the same magnitude (homomorphic method, scipy.signal)."""
    n_fft = 1 << int(math.ceil(math.log2(max(2**16, 64 * h_lin.size))))
    n_fft = min(n_fft, 2**23)
    hm = signal.minimum_phase(h_lin / gain, method="homomorphic", n_fft=n_fft, half=False)
    return hm * gain


def _passband_group_delay_samples(h, rate, mask):
    freqs = np.linspace(0, mask.passband_hz, 64)
    w, gd = signal.group_delay((h, [1.0]), w=freqs, fs=rate)
    return float(np.median(gd))


@dataclass(frozen=True)
class Estimate:
    """What a design will cost, from the order formulas alone (no design made).

    ``numtaps`` is Kaiser's estimate for the prototype the design starts from (the design may
    grow it a few per cent until its measurement meets the mask); ``latency_ms`` is the delay of
    that many linear-phase taps, None for minimum phase (whose delay is only known once
    designed).
    """

    fs_in: int
    fs_out: int
    path: str
    path_reason: str
    phases: int
    filter_rate_hz: float
    numtaps: int
    latency_ms: float | None

    def figures(self):
        return dict(fs_in=self.fs_in, fs_out=self.fs_out, path=self.path,
                    path_reason=self.path_reason, phases=self.phases,
                    filter_rate_hz=self.filter_rate_hz, numtaps=self.numtaps,
                    latency_ms=self.latency_ms)


def estimate(spec, fs_in, fs_out, *, max_bank_taps=MAX_BANK_TAPS):
    """The length, path and delay of the design for a route, without designing it (fast).

    The path follows :func:`design`'s rule: the exact polyphase bank when Kaiser's estimate at
    ``fs_in * up`` fits ``max_bank_taps``, else the arbitrary-ratio table.

    Returns
    -------
    Estimate

    Raises
    ------
    ParameterError
        For invalid rates, an impossible mask, or a mask needing more than the length limit.
    """
    rt = make_route(fs_in, fs_out)
    mask = spec.mask(rt)
    a_design = max(mask.attenuation_db,
                   -20 * math.log10(min(mask.passband_delta, mask.stopband_delta)))
    rate = float(rt.prototype_rate)
    est = _odd(kaiser_numtaps(a_design, (mask.stopband_hz - mask.passband_hz) / (rate / 2)))
    if est <= max_bank_taps:
        path, phases, numtaps = "polyphase", rt.up, est
        path_reason = (f"exact {rt.up}/{rt.down} polyphase bank of about {est} taps "
                       f"({rt.up} phases)")
    else:
        path = "arbitrary"
        phases = interpolation_phases(mask.passband_hz, rt.fs_in, mask.attenuation_db)
        rate = float(rt.fs_in * phases)
        numtaps = _odd(kaiser_numtaps(a_design, (mask.stopband_hz - mask.passband_hz) / (rate / 2)))
        if numtaps > MAX_NUMTAPS:
            raise ParameterError(
                f"the mask needs about {numtaps} taps in a {phases}-phase table (limit "
                f"{MAX_NUMTAPS}); widen the transition band ({mask.passband_hz:g} to "
                f"{mask.stopband_hz:g} Hz) or lower the attenuation", "stopband_hz")
        path_reason = (f"the exact {rt.up}/{rt.down} bank would need about {est} taps (limit "
                       f"{max_bank_taps}); bandlimited interpolation with a {phases}-phase table "
                       f"and linear interpolation between phases is used instead")
    latency = (numtaps - 1) / 2 / rate * 1000.0 if spec.phase == "linear" else None
    return Estimate(fs_in=rt.fs_in, fs_out=rt.fs_out, path=path, path_reason=path_reason,
                    phases=int(phases), filter_rate_hz=rate, numtaps=int(numtaps),
                    latency_ms=latency)


def design(spec, fs_in, fs_out, *, max_bank_taps=MAX_BANK_TAPS):
    """Design, measure and cost the single-stage filter for converting ``fs_in`` to ``fs_out``.

    Parameters
    ----------
    spec : Spec
    fs_in, fs_out : int
        Rates in Hz (1000 to 768000).
    max_bank_taps : int, optional
        Largest exact polyphase prototype; beyond it the arbitrary-ratio path is used.

    Returns
    -------
    Design

    Raises
    ------
    ParameterError
        For invalid rates or a mask that can't be met within the length limits.
    """
    t0 = time.perf_counter()
    rt = make_route(fs_in, fs_out)
    mask = spec.mask(rt)
    guess = estimate(spec, fs_in, fs_out, max_bank_taps=max_bank_taps)
    path, path_reason, phases = guess.path, guess.path_reason, guess.phases
    rate = guess.filter_rate_hz
    est_arb = guess.numtaps
    gain = float(phases)
    method, method_reason = _choose_method(spec, mask, rate)
    if path == "arbitrary" and method != "kaiser":
        if spec.method != "auto":
            raise ParameterError(
                f"method {spec.method} can't design the {int(rate)} Hz prototype of the "
                f"arbitrary-ratio path (it needs about {est_arb} taps); use auto or kaiser",
                "method")
        method, method_reason = "kaiser", "long arbitrary-path prototype: Kaiser window design"

    minimum = spec.phase == "minimum"
    # A minimum-phase filter is the spectral factor of a linear-phase one with the same magnitude
    # (half=False keeps the magnitude). Both bands must hold for that same magnitude.
    h, method_used, first_numtaps, iterations, measured, met, why = _design_linear(method, mask, rate, gain)
    if (h is None or not met) and method == "equiripple" and spec.method == "auto":
        # remez did not converge, or did not reach the mask within its length limit
        method = "kaiser"
        method_reason = (f"Parks-McClellan failed ({why or 'mask not met'}); Kaiser window "
                         "design used instead")
        h, method_used, first_numtaps, iterations, measured, met, why = _design_linear(method, mask,
                                                                                  rate, gain)
    if h is None:
        raise ParameterError(f"method {method} could not design this mask: {why}", "method")

    if minimum:
        for extra in range(6):
            hm = _min_phase(h, rate, mask, gain)
            measured_m = measure(hm, rate, mask, gain)
            if _meets(measured_m, mask):
                break
            # the cepstral method loses a little depth: design the linear one deeper
            h2 = _design_linear(method, mask, rate, gain,
                                attenuation_db=mask.attenuation_db + 6.0 * (extra + 1))
            if h2[0] is None:
                break
            h, iterations = h2[0], iterations + h2[3]
        h, measured, met = hm, measured_m, _meets(measured_m, mask)
        delay = 0
        latency_samples = _passband_group_delay_samples(h, rate, mask)
        prering = _prering_ms(h, rate)
    else:
        delay = (h.size - 1) // 2
        latency_samples = float(delay)
        prering = _prering_ms(h, rate)

    numtaps = int(h.size)
    if path == "polyphase":
        per_phase = int(math.ceil(numtaps / rt.up))
        macs = float(per_phase)
    else:
        per_phase = int(math.ceil(numtaps / phases))
        # one dot product plus the interpolation of its coefficients between two phases
        macs = float(3 * per_phase)
        measured = Measured(measured.passband_ripple_db, measured.stopband_attenuation_db,
                            measured.worst_stopband_hz,
                            interpolation_error_db(mask.passband_hz, rt.fs_in, phases))
        met = met and measured.interpolation_error_db <= -mask.attenuation_db
    return Design(
        spec=spec, mask=mask, path=path, path_reason=path_reason, method=method_used,
        method_reason=method_reason, phase=spec.phase, taps=h, filter_rate_hz=rate,
        phases=phases, delay_samples=int(delay), numtaps=numtaps, numtaps_estimate=int(first_numtaps),
        iterations=int(iterations), taps_per_phase=per_phase, macs_per_output_sample=macs,
        mmac_per_second=macs * rt.fs_out / 1e6,
        latency_ms=float(latency_samples / rate * 1000.0), prering_ms=prering,
        measured=measured, meets_mask=bool(met),
        design_ms=(time.perf_counter() - t0) * 1000.0,
    )


def require_met(d):
    """Raise a ParameterError when design ``d`` does not meet its mask."""
    if not d.meets_mask:
        m = d.measured
        raise ParameterError(
            f"the mask can't be met: measured ripple {m.passband_ripple_db:.4g} dB (limit "
            f"{d.mask.ripple_db:g}) and attenuation {m.stopband_attenuation_db:.1f} dB (needs "
            f"{d.mask.attenuation_db:g}) with {d.numtaps} taps ({d.method})", "attenuation_db")
    return d
