"""Precision on/off records of a pump current, and their uncertainty budget.

The pump current (about 100 pA) is measured against an ammeter whose offset drifts by more than the
ppm-level effect sought, so the pump is switched on and off repeatedly and each on segment is
compared with the off segments on either side (Giblin et al., Nat. Commun. 3, 930 (2012)):

    ΔI_j = Ī_on,j − (Ī_off,j + Ī_off,j+1)/2,

which cancels an offset that drifts linearly in time. We interpolate the two off means to the mean
time of the on readings, ΔI_j = Ī_on,j − [(1 − w_j) Ī_off,j + w_j Ī_off,j+1]; for the usual
symmetric timing w_j = 1/2 and this is the expression above, and for any timing a linear drift
cancels exactly.

Readings just after each switch are dropped while the ammeter settles (:class:`SettlingRule`);
how many is decided by the transient measured in the record itself (:mod:`analysis.pump.settling`,
:func:`measure_settling`), which also corrects for the tail left in the kept readings.

Neighbouring ΔI_j share an off segment, so they are correlated even for white reading noise
(lag-1 correlation Var(Ī_off)/4 over Var(ΔI), about +1/6 for equal segments; lags ≥ 2 are
uncorrelated — derived). The Type A uncertainty of the mean therefore uses the effective number of
observations n_eff = n / [1 + 2 Σ_k (1 − k/n) ρ_k] (Zhang, Metrologia 43, S276 (2006), formula
from memory), and correlation at lags ≥ 2 — which white noise cannot produce — is reported as
non-white noise. The overlapping Allan deviation of the ΔI_j shows the same at a glance: for white
noise it falls as τ^−1/2.

The ammeter chain's measurement equation turns the mean indicated difference into the pump
current, and the relative deviation from n e f is budgeted by the GUM (``analysis.budget``) and
checked by a JCGM 101 Monte Carlo propagation of the same model (JCGM 101:2008 clause 8).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special

from analysis import budget as gum
from analysis.pump import settling as S
from analysis.pump.quantized import check_operating_point, nominal_current

log = logging.getLogger(__name__)


class RecordError(ValueError):
    """An on/off record that cannot be analysed (too few cycles, no off segments, ...)."""


# --------------------------------------------------------------------------------------------
# Segments and cycle differences


@dataclass(frozen=True)
class SettlingRule:
    """Which readings after each pump switch to drop while the ammeter settles.

    With ``seconds`` set, readings taken less than that long after the switch are dropped; otherwise
    the first ``fraction`` of each segment's duration is. The start of the record counts as a switch.
    Giblin et al. 2012 drop the first readings after each switch; the size of the cut is a matter of
    the ammeter's time constant (common practice, no source).
    """

    seconds: float | None = None
    fraction: float = 0.25

    def __post_init__(self) -> None:
        if self.seconds is not None and not (self.seconds >= 0 and math.isfinite(self.seconds)):
            raise ValueError(f"settling time must be a non-negative number of seconds, got {self.seconds}")
        if not 0 <= self.fraction < 1:
            raise ValueError(f"settling fraction must lie in [0, 1), got {self.fraction}")

    def describe(self) -> str:
        if self.seconds is not None:
            return f"readings within {self.seconds:g} s after each pump switch dropped"
        return f"first {100 * self.fraction:g} % of each on/off segment dropped"


@dataclass(frozen=True, eq=False)
class CycleDifferences:
    """Per-cycle on − off differences of one record."""

    differences: np.ndarray  # ΔI_j, A (indicated)
    times: np.ndarray  # mean time of the on readings of cycle j, s
    on_means: np.ndarray
    off_means: np.ndarray  # one more than differences
    off_times: np.ndarray
    weights: np.ndarray  # w_j of the interpolation (1/2 for symmetric timing)
    cycle_period_s: float  # median time between successive on segments
    readings_used: int
    readings_dropped: int
    segments: int
    settling: SettlingRule
    on_segments: np.ndarray  # segment number of each cycle's on segment
    segment_weights: np.ndarray  # weight of every segment in the mean of the differences


def _segments(state: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and stop (exclusive) indices of runs of equal pump state."""
    change = np.flatnonzero(np.diff(state)) + 1
    starts = np.concatenate(([0], change))
    stops = np.concatenate((change, [state.size]))
    return starts, stops


def _checked(time_s: np.ndarray, current_a: np.ndarray, pump_on: np.ndarray):
    """Validated arrays and the segment layout (start, stop, state of each run of equal state)."""
    t = np.asarray(time_s, dtype=float)
    i = np.asarray(current_a, dtype=float)
    on = np.asarray(pump_on)
    if not (t.shape == i.shape == on.shape) or t.ndim != 1:
        raise RecordError("time, current and pump state must be one-dimensional and of equal length")
    if t.size < 4:
        raise RecordError(f"an on/off record needs more readings, got {t.size}")
    if not np.all(np.isin(on, (0, 1))):
        raise RecordError("pump_on must be 1 (pump on) or 0 (pump off) on every reading")
    if not np.all(np.isfinite(t)) or not np.all(np.isfinite(i)):
        raise RecordError("the record contains non-finite times or currents")
    if np.any(np.diff(t) <= 0):
        raise RecordError("times must increase strictly from reading to reading")
    on = on.astype(np.int8)
    starts, stops = _segments(on)
    states = on[starts]
    if not np.any(states == 0):
        raise RecordError("the record has no pump-off segment, so the ammeter offset is unknown")
    if not np.any(states == 1):
        raise RecordError("the record has no pump-on segment")
    return t, i, on, starts, stops, states


def cycle_differences(
    time_s: np.ndarray, current_a: np.ndarray, pump_on: np.ndarray,
    settling: SettlingRule = SettlingRule(),
) -> CycleDifferences:
    """ΔI_j for every on segment that has an off segment before and after it (module docstring)."""
    t, i, on, starts, stops, states = _checked(time_s, current_a, pump_on)
    # Time since the segment began (the first reading of a segment is the switch).
    seg_index = np.repeat(np.arange(starts.size), stops - starts)
    since = t - t[starts][seg_index]
    if settling.seconds is not None:
        keep = since >= settling.seconds
    else:
        # Segment duration taken as the span to the next segment's first reading.
        ends = np.append(t[starts[1:]], t[-1] + (t[-1] - t[-2]))
        duration = (ends - t[starts])[seg_index]
        keep = since >= settling.fraction * duration
    counts = np.bincount(seg_index, weights=keep, minlength=starts.size)
    sums = np.bincount(seg_index, weights=np.where(keep, i, 0.0), minlength=starts.size)
    tsum = np.bincount(seg_index, weights=np.where(keep, t, 0.0), minlength=starts.size)
    return _from_segment_sums(t, starts, states, counts, sums, tsum, settling)


class _SegmentSums:
    """Per-segment sums of the readings kept by any settling time, from cumulative sums: each
    threshold costs a search per segment instead of a pass over the record (used when the
    settling analysis tries many discards on a long record)."""

    def __init__(self, time_s: np.ndarray, current_a: np.ndarray, pump_on: np.ndarray) -> None:
        t, i, _, starts, stops, states = _checked(time_s, current_a, pump_on)
        self.t, self.starts, self.stops, self.states = t, starts, stops, states
        seg_index = np.repeat(np.arange(starts.size), stops - starts)
        self.since = t - t[starts][seg_index]
        # One sorted key for the whole record: segment number, then time since its switch.
        self.span = 2.0 * (float(self.since.max()) + 1.0)
        self.key = seg_index * self.span + self.since
        self.ci = np.concatenate(([0.0], np.cumsum(i)))
        self.ct = np.concatenate(([0.0], np.cumsum(t)))

    def cycles(self, seconds: float) -> CycleDifferences:
        """The same as :func:`cycle_differences` with SettlingRule(seconds=seconds)."""
        # Within a segment `since` increases, so the first kept reading is found by bisection.
        first = np.searchsorted(self.key, np.arange(self.starts.size) * self.span + seconds)
        counts = (self.stops - first).astype(float)
        sums = self.ci[self.stops] - self.ci[first]
        tsum = self.ct[self.stops] - self.ct[first]
        return _from_segment_sums(self.t, self.starts, self.states, counts, sums, tsum,
                                  SettlingRule(seconds=seconds))


def _from_segment_sums(t: np.ndarray, starts: np.ndarray, states: np.ndarray, counts: np.ndarray,
                       sums: np.ndarray, tsum: np.ndarray, settling: SettlingRule
                       ) -> CycleDifferences:
    with np.errstate(invalid="ignore", divide="ignore"):
        means = sums / counts
        tmeans = tsum / counts
    empty = counts == 0
    if np.any(empty):
        first = int(np.flatnonzero(empty)[0])
        raise RecordError(
            f"the settling rule ({settling.describe()}) leaves no reading in the segment starting "
            f"at t = {t[starts[first]]:g} s; shorten the settling time"
        )

    # Cycles: off, on, off consecutive (segments alternate by construction).
    idx = np.flatnonzero((states[1:-1] == 1) & (states[:-2] == 0) & (states[2:] == 0)) + 1
    if idx.size < 2:
        raise RecordError(
            f"the record has {idx.size} complete off-on-off cycle(s); at least two are needed "
            "for a Type A evaluation"
        )
    # Cycles are consecutive on segments, so their off segments chain: off_j, off_{j+1}, ...
    off_before = idx - 1
    off_after = idx + 1
    w = (tmeans[idx] - tmeans[off_before]) / (tmeans[off_after] - tmeans[off_before])
    diffs = means[idx] - ((1 - w) * means[off_before] + w * means[off_after])
    off_idx = np.union1d(off_before, off_after)
    period = float(np.median(np.diff(tmeans[idx])))
    # mean ΔI = Σ_s c_s Ī_s: +1/J for an on segment, −(1 − w_j)/J and −w_j/J for its off segments.
    seg_w = np.zeros(starts.size)
    j = idx.size
    np.add.at(seg_w, idx, 1.0 / j)
    np.add.at(seg_w, off_before, -(1 - w) / j)
    np.add.at(seg_w, off_after, -w / j)
    return CycleDifferences(
        differences=diffs,
        times=tmeans[idx],
        on_means=means[idx],
        off_means=means[off_idx],
        off_times=tmeans[off_idx],
        weights=w,
        cycle_period_s=period,
        readings_used=int(counts.sum()),
        readings_dropped=int(t.size - counts.sum()),
        segments=int(starts.size),
        settling=settling,
        on_segments=idx,
        segment_weights=seg_w,
    )


# --------------------------------------------------------------------------------------------
# Allan deviation


@dataclass(frozen=True, eq=False)
class AllanDeviation:
    """Overlapping Allan deviation of a series at averaging factors m (τ = m τ₀)."""

    m: np.ndarray
    tau_s: np.ndarray
    deviation: np.ndarray
    terms: np.ndarray  # number of overlapping differences at each m
    slope: float  # fitted d ln σ / d ln τ (−1/2 for white noise)


def allan_deviation(y: np.ndarray, tau0_s: float = 1.0, m: np.ndarray | None = None) -> AllanDeviation:
    """Overlapping Allan deviation σ(mτ₀) of equally spaced values y (IEEE Std 1139-2008, the
    overlapping estimator; Allan, Proc. IEEE 54, 221 (1966)).

    σ²(m) = 1/(2 m² (N − 2m + 1)) Σ_j [Σ_{i=j}^{j+m−1} (y_{i+m} − y_i)]², computed from cumulative
    sums in O(N) per m. For white noise σ(m) = σ_y / √m. Default m: octaves up to N/4.
    """
    y = np.asarray(y, dtype=float)
    n = y.size
    if n < 3:
        raise ValueError("the Allan deviation needs at least three values")
    if m is None:
        m = 2 ** np.arange(0, max(1, int(math.log2(max(n // 4, 1))) + 1))
    m = np.asarray(m, dtype=int)
    m = m[(m >= 1) & (2 * m < n)]
    c = np.concatenate(([0.0], np.cumsum(y)))
    dev = np.empty(m.size)
    terms = np.empty(m.size, dtype=int)
    for k, mm in enumerate(m):
        # Sum over the second block minus the first: c[j+2m] − 2c[j+m] + c[j].
        d = c[2 * mm :] - 2 * c[mm : n - mm + 1] + c[: n - 2 * mm + 1]
        terms[k] = d.size
        dev[k] = math.sqrt(float(np.mean(d**2)) / (2.0 * mm**2))
    good = dev > 0
    # Weights ∝ 1/relative uncertainty of each point, about √(terms/m) (common practice, no source).
    weight = np.sqrt(terms[good] / m[good])
    slope = (float(np.polyfit(np.log(m[good]), np.log(dev[good]), 1, w=weight)[0])
             if good.sum() >= 2 else math.nan)
    return AllanDeviation(m, m * tau0_s, dev, terms, slope)


# --------------------------------------------------------------------------------------------
# Type A with autocorrelation


def autocorrelation(x: np.ndarray, max_lag: int) -> np.ndarray:
    """Sample autocorrelation ρ_k, k = 0..max_lag, with the usual 1/n normalisation (biased,
    positive-definite estimator; Box & Jenkins, Time Series Analysis, eq. 2.1.12), via FFT."""
    x = np.asarray(x, dtype=float)
    n = x.size
    d = x - x.mean()
    size = 1 << (2 * n - 1).bit_length()
    f = np.fft.rfft(d, size)
    acov = np.fft.irfft(f * np.conj(f), size)[: max_lag + 1] / n
    if acov[0] == 0:
        return np.concatenate(([1.0], np.zeros(max_lag)))
    return acov / acov[0]


@dataclass(frozen=True)
class TypeA:
    """Mean of a correlated series and its Type A standard uncertainty."""

    mean: float
    standard_deviation: float
    n: int
    effective_n: float
    standard_uncertainty: float
    degrees_of_freedom: float
    lags_used: int
    naive_standard_uncertainty: float  # s/√n, right only for uncorrelated values
    correlation_test_p_value: float  # Ljung–Box on the lags that should be uncorrelated
    correlation_test_first_lag: int
    white: bool
    notes: tuple[str, ...] = field(default_factory=tuple)

    def as_dict(self) -> dict:
        return {
            "mean": self.mean, "standard_deviation": self.standard_deviation, "n": self.n,
            "effective_n": self.effective_n, "standard_uncertainty": self.standard_uncertainty,
            "degrees_of_freedom": self.degrees_of_freedom, "lags_used": self.lags_used,
            "naive_standard_uncertainty": self.naive_standard_uncertainty,
            "correlation_test_p_value": self.correlation_test_p_value,
            "correlation_test_first_lag": self.correlation_test_first_lag,
            "white_noise": self.white, "notes": list(self.notes),
        }


def type_a_autocorrelated(
    x: np.ndarray, first_uncorrelated_lag: int = 1, significance: float = 0.01
) -> TypeA:
    """Type A evaluation of the mean of a possibly autocorrelated series.

    n_eff = n / [1 + 2 Σ_{k=1}^{M} (1 − k/n) ρ_k] (Zhang, Metrologia 43, S276 (2006), from memory)
    with the sum cut at M, the first lag k ≥ ``first_uncorrelated_lag`` where |ρ_k| < 2/√n (lags
    below it always enter, because the construction of the series correlates them); M ≤ n/4.
    Because s² itself is biased low for correlated data, E[s²] = σ²(1 − 1/n_eff) n/(n − 1), the
    variance of the mean is u² = s² (n − 1) / (n (n_eff − 1)) (derived; Zhang 2006 gives the same
    form), with ν = n_eff − 1.

    A Ljung–Box test (Ljung & Box, Biometrika 65, 297 (1978)) on lags ≥ ``first_uncorrelated_lag``
    (up to min(20, n/4)) flags correlation that white noise would not produce; ``white`` is False
    when its p-value is below ``significance``.
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    if n < 3:
        raise RecordError(f"a Type A evaluation needs at least three values, got {n}")
    mean = float(np.mean(x))
    s = float(np.std(x, ddof=1))
    max_lag = max(1, n // 4)
    rho = autocorrelation(x, max_lag)
    bound = 2.0 / math.sqrt(n)
    cut = max_lag
    for k in range(max(1, first_uncorrelated_lag), max_lag + 1):
        if abs(rho[k]) < bound:
            cut = k - 1
            break
    cut = max(cut, first_uncorrelated_lag - 1)
    ks = np.arange(1, cut + 1)
    factor = 1.0 + 2.0 * float(np.sum((1.0 - ks / n) * rho[1 : cut + 1]))
    notes = []
    if factor <= 0:
        notes.append("estimated autocorrelations sum to a non-physical variance factor; using n_eff = n")
        factor = 1.0
    n_eff = n / factor
    if n_eff > n:
        notes.append("negative autocorrelation: n_eff capped at n (conservative)")
        n_eff = float(n)
    if n_eff <= 1.5:
        raise RecordError(
            f"the series is too strongly correlated for a Type A evaluation (n_eff = {n_eff:.2f} "
            f"from n = {n}); record more cycles"
        )
    u = s * math.sqrt((n - 1) / (n * (n_eff - 1)))
    h = min(20, max_lag)
    first = max(1, first_uncorrelated_lag)
    if h >= first:
        lags = np.arange(first, h + 1)
        q = n * (n + 2) * float(np.sum(rho[lags] ** 2 / (n - lags)))
        p = float(special.chdtrc(lags.size, q))
    else:
        p = math.nan
    white = not (p < significance)
    if not white:
        notes.append(
            f"noise is not white: autocorrelation at lags ≥ {first} (Ljung–Box p = {p:.2g}); "
            f"the Type A uncertainty uses n_eff = {n_eff:.1f} of n = {n}"
        )
    return TypeA(mean, s, n, n_eff, u, n_eff - 1.0, cut, s / math.sqrt(n), p, first, white,
                 tuple(notes))


# --------------------------------------------------------------------------------------------
# Ammeter chain and budget


@dataclass(frozen=True)
class ChainInput:
    """One Type B input of the ammeter chain (relative inputs in ppm, leakage in A)."""

    estimate: float
    standard_uncertainty: float
    distribution: str = "normal"
    degrees_of_freedom: float = math.inf
    note: str = ""


_ZERO_IDEAL = ChainInput(0.0, 0.0, "normal", math.inf, "ideal ammeter assumed: no calibration data given")


@dataclass(frozen=True)
class AmmeterChain:
    """Calibration data of the chain that turns the pump current into a reading.

    The record's ``current_A`` is the *indicated* current: a voltage divided by the nominal gain
    (transresistance amplifier: I_ind = V_out / A_nom; reference resistor: I_ind = V / R_nom).
    Measurement equation (both chains):

        I = I_ind · (1 + c_V) / (1 + c_G + d_G) − I_leak,
        D = [I / (n e f_set (1 + c_f)) − 1] × 10⁶,

    c_G the calibrated relative gain correction (A/A_nom − 1 or R/R_nom − 1), d_G its drift since
    calibration, c_V the voltmeter's relative correction, c_f the frequency reference's relative
    error, I_leak a leakage current that follows the pump state (one that does not cancels in the
    on/off difference). Relative inputs are in ppm.
    """

    kind: str  # "transresistance", "reference_resistor" or "ideal"
    gain_correction: ChainInput = _ZERO_IDEAL
    gain_drift: ChainInput = _ZERO_IDEAL
    voltmeter_correction: ChainInput = _ZERO_IDEAL
    frequency_correction: ChainInput = _ZERO_IDEAL
    leakage_current: ChainInput = _ZERO_IDEAL
    description: str = ""

    def __post_init__(self) -> None:
        if self.kind not in ("transresistance", "reference_resistor", "ideal"):
            raise ValueError(
                f"ammeter chain kind must be 'transresistance', 'reference_resistor' or 'ideal', "
                f"got {self.kind!r}"
            )

    @classmethod
    def ideal(cls) -> AmmeterChain:
        return cls("ideal", description="ideal ammeter assumed (no chain calibration data given)")

    @property
    def is_ideal(self) -> bool:
        return self.kind == "ideal"


_GAIN_NAME = {
    "transresistance": "transresistance gain",
    "reference_resistor": "reference resistor",
    "ideal": "ammeter gain",
}


def deviation_ppm_model(
    indicated: np.ndarray, gain_correction: np.ndarray, gain_drift: np.ndarray,
    voltmeter_correction: np.ndarray, frequency_correction: np.ndarray, leakage: np.ndarray,
    settling_bias: np.ndarray | float = 0.0, *, frequency_hz: float, electrons_per_cycle: int,
) -> np.ndarray:
    """D = [(I_ind − b_s)(1 + c_V)/(1 + c_G + d_G) − I_leak] / [n e f (1 + c_f)] − 1, in ppm
    (the measurement equation of :class:`AmmeterChain`; b_s the settling transient left in the
    mean cycle difference after the discard, :mod:`analysis.pump.settling` eq. 2)."""
    i0 = nominal_current(frequency_hz, electrons_per_cycle)
    current = corrected_current(indicated, gain_correction, gain_drift, voltmeter_correction,
                                leakage, settling_bias)
    return (current / (i0 * (1 + 1e-6 * frequency_correction)) - 1.0) * 1e6


def corrected_current(
    indicated: np.ndarray, gain_correction: np.ndarray, gain_drift: np.ndarray,
    voltmeter_correction: np.ndarray, leakage: np.ndarray, settling_bias: np.ndarray | float = 0.0,
) -> np.ndarray:
    """The pump current I = (I_ind − b_s)(1 + c_V)/(1 + c_G + d_G) − I_leak, in A (the
    numerator of :func:`deviation_ppm_model`)."""
    return (indicated - settling_bias) * (1 + 1e-6 * voltmeter_correction) / (
        1 + 1e-6 * (gain_correction + gain_drift)) - leakage


def _sampler(x: ChainInput):
    def draw(rng: np.random.Generator, n: int) -> np.ndarray:
        if x.standard_uncertainty == 0:
            return np.full(n, x.estimate)
        d = x.distribution
        if d in ("normal", "posterior"):
            return x.estimate + x.standard_uncertainty * rng.standard_normal(n)
        if d == "t":
            nu = x.degrees_of_freedom
            if math.isinf(nu):
                return x.estimate + x.standard_uncertainty * rng.standard_normal(n)
            # JCGM 101 6.4.9.7: scaled and shifted t; scale chosen to give the GUM standard
            # uncertainty as the scale parameter.
            return x.estimate + x.standard_uncertainty * rng.standard_t(nu, n)
        half = x.standard_uncertainty * math.sqrt({"rectangular": 3.0, "triangular": 6.0,
                                                   "arcsine": 2.0}[d])
        if d == "rectangular":
            return x.estimate + rng.uniform(-half, half, n)
        if d == "triangular":
            return x.estimate + rng.triangular(-half, 0.0, half, n)
        return x.estimate + half * np.sin(2 * math.pi * rng.uniform(size=n))  # arcsine

    return draw


def validation_tolerance(uc: float) -> float:
    """δ of JCGM 101 7.9.2 for u_c stated to two significant digits: half a unit of the second."""
    return 0.5 * 10.0 ** (math.floor(math.log10(uc)) - 1) if uc > 0 else 0.0


def interval_end_numerical_u(mc: gum.MonteCarloResult) -> float:
    """Standard deviation of a Monte Carlo coverage-interval end from M trials.

    A sample p-quantile has variance p(1 − p)/(M g(y_p)²), g the output density (asymptotic
    variance of a sample quantile; from memory, any order-statistics text). With g approximated by
    the Gaussian of the Monte Carlo standard uncertainty u, g(y_p) = φ(z_p)/u. Used to tell whether
    trial count resolves the validation tolerance."""
    p = (1.0 - mc.coverage_probability) / 2.0
    z = float(special.ndtri(p))
    density = math.exp(-0.5 * z * z) / math.sqrt(2.0 * math.pi)  # standard normal φ(z)
    return mc.standard_uncertainty * math.sqrt(p * (1 - p) / mc.draws) / density


@dataclass(frozen=True)
class MonteCarloValidation:
    """JCGM 101 clause 8: does the GUM interval agree with the Monte Carlo one?

    ``validated`` is None when the two intervals differ by more than δ but by no more than the
    Monte Carlo's own numerical resolution allows (inconclusive, not a failure)."""

    monte_carlo: gum.MonteCarloResult
    tolerance: float  # δ: half a unit of the last significant digit of u_c (2 digits)
    low_difference: float  # |y − U − y_low|
    high_difference: float  # |y + U − y_high|
    validated: bool | None
    numerical_u: float  # standard deviation of an interval end from the finite trial count

    def as_dict(self) -> dict:
        mc = self.monte_carlo
        return {
            "method": "JCGM 101:2008 Monte Carlo propagation of the measurement equation",
            "draws": mc.draws, "seed": mc.seed, "adaptive_converged": mc.converged,
            "estimate": mc.estimate, "standard_uncertainty": mc.standard_uncertainty,
            "coverage_probability": mc.coverage_probability,
            "probabilistically_symmetric_interval": list(mc.symmetric_interval),
            "shortest_interval": list(mc.shortest_interval),
            "tolerance": self.tolerance, "low_end_difference": self.low_difference,
            "high_end_difference": self.high_difference,
            "interval_end_numerical_u": self.numerical_u,
            "gum_framework_validated": self.validated,
        }


def validate_with_monte_carlo(budget: gum.Budget, mc: gum.MonteCarloResult) -> MonteCarloValidation:
    """Compare the GUM interval y ± U with the probabilistically symmetric Monte Carlo interval
    (JCGM 101:2008, 8.2): validated when both ends agree within δ, half a unit of the last of two
    significant digits of u_c (7.9.2).

    The Monte Carlo ends carry their own sampling noise: the adaptive procedure (7.9) stops when
    twice its standard deviation is within δ, so an exactly right GUM interval would fail this
    comparison about one time in twenty. An end counts as failed only when it misses by more
    than δ plus twice its numerical standard deviation (:func:`interval_end_numerical_u`); a miss
    inside that margin leaves the outcome open (None), stated as such, not as a failure.
    """
    delta = validation_tolerance(budget.combined_standard_uncertainty)
    lo, hi = mc.symmetric_interval
    d_low = abs(budget.estimate - budget.expanded_uncertainty - lo)
    d_high = abs(budget.estimate + budget.expanded_uncertainty - hi)
    nu = interval_end_numerical_u(mc)
    if d_low <= delta and d_high <= delta:
        verdict: bool | None = True
    elif max(d_low, d_high) > delta + 2.0 * nu:
        verdict = False
    else:
        verdict = None
    return MonteCarloValidation(mc, delta, d_low, d_high, verdict, nu)


@dataclass(frozen=True)
class PrecisionResult:
    """(I − n e f)/(n e f) in ppm with its GUM budget and Monte Carlo check."""

    deviation_ppm: float
    current_a: float
    nominal_current_a: float
    budget: gum.Budget
    validation: MonteCarloValidation
    type_a: TypeA
    chain: AmmeterChain


def _samplers(type_a: TypeA, ch: AmmeterChain, settling_bias: ChainInput | None) -> dict:
    """The Monte Carlo draw of each input of :func:`deviation_ppm_model` (JCGM 101 6.4)."""
    ta = ChainInput(type_a.mean, type_a.standard_uncertainty, "t", type_a.degrees_of_freedom)
    samplers = {
        "indicated": _sampler(ta),
        "gain_correction": _sampler(ch.gain_correction),
        "gain_drift": _sampler(ch.gain_drift),
        "voltmeter_correction": _sampler(ch.voltmeter_correction),
        "frequency_correction": _sampler(ch.frequency_correction),
        "leakage": _sampler(ch.leakage_current),
    }
    if settling_bias is not None:
        samplers["settling_bias"] = _sampler(settling_bias)
    return samplers


def _chain_row(quantity: str, x: ChainInput, unit: str, sensitivity: float,
               sensitivity_unit: str) -> gum.BudgetRow:
    """A Type B row of the budget for one input of the measurement equation."""
    return gum.BudgetRow(quantity, x.estimate, x.standard_uncertainty, unit, "B", x.distribution,
                         sensitivity, x.degrees_of_freedom, sensitivity_unit, x.note)


def precision_budget(
    type_a: TypeA, chain: AmmeterChain, frequency_hz: float, electrons_per_cycle: int, seed: int,
    coverage_probability: float = 0.95, monte_carlo_draws: int | None = None,
    settling_bias: ChainInput | None = None,
) -> PrecisionResult:
    """GUM budget of D = (I − n e f)/(n e f) in ppm from the mean indicated cycle difference.

    Sensitivity coefficients are the partial derivatives of :func:`deviation_ppm_model` at the
    estimates (GUM 5.1.3); the same model is propagated by :func:`analysis.budget.monte_carlo`.
    The Type A input is drawn from a scaled and shifted t distribution with ν = n_eff − 1
    (JCGM 101 6.4.9). ``settling_bias``, when given, is the allowance for the settling transient
    left after the discard (a row of its own, in amperes of indicated current).
    """
    check_operating_point(frequency_hz, electrons_per_cycle)
    i0 = nominal_current(frequency_hz, electrons_per_cycle)
    ch = chain

    def model(**inputs):
        return deviation_ppm_model(frequency_hz=frequency_hz,
                                   electrons_per_cycle=electrons_per_cycle, **inputs)

    estimates = {
        "indicated": type_a.mean,
        "gain_correction": ch.gain_correction.estimate,
        "gain_drift": ch.gain_drift.estimate,
        "voltmeter_correction": ch.voltmeter_correction.estimate,
        "frequency_correction": ch.frequency_correction.estimate,
        "leakage": ch.leakage_current.estimate,
    }
    if settling_bias is not None:
        estimates["settling_bias"] = settling_bias.estimate
    # D and c_i = ∂D/∂x_i from the measurement equation itself (GUM 5.1.3).
    d, c = gum.sensitivity_coefficients(model, estimates)
    current = corrected_current(
        type_a.mean, ch.gain_correction.estimate, ch.gain_drift.estimate,
        ch.voltmeter_correction.estimate, ch.leakage_current.estimate,
        estimates.get("settling_bias", 0.0))
    gain_name = _GAIN_NAME[ch.kind]
    rows = [
        gum.BudgetRow(
            "mean on−off cycle difference (indicated current)", type_a.mean,
            type_a.standard_uncertainty, "A", "A", "t", c["indicated"], type_a.degrees_of_freedom,
            "ppm/A",
            f"{type_a.n} cycles, n_eff = {type_a.effective_n:.1f}"
            + ("" if type_a.white else "; noise not white"),
        ),
        _chain_row(f"{gain_name}: calibration correction", ch.gain_correction, "ppm",
                   c["gain_correction"], "ppm/ppm"),
        _chain_row(f"{gain_name}: drift since calibration", ch.gain_drift, "ppm",
                   c["gain_drift"], "ppm/ppm"),
        _chain_row("voltmeter calibration correction", ch.voltmeter_correction, "ppm",
                   c["voltmeter_correction"], "ppm/ppm"),
        _chain_row("frequency reference relative error", ch.frequency_correction, "ppm",
                   c["frequency_correction"], "ppm/ppm"),
        _chain_row("leakage current following the pump state", ch.leakage_current, "A",
                   c["leakage"], "ppm/A"),
    ]
    if settling_bias is not None:
        rows.append(_chain_row("settling transient left after the discard", settling_bias, "A",
                               c["settling_bias"], "ppm/A"))
    notes = []
    if ch.is_ideal:
        notes.append("ideal ammeter assumed: no calibration data for the ammeter chain were given, "
                     "so only the Type A uncertainty is included")
    notes.extend(type_a.notes)
    budget = gum.combine("(I − n·e·f)/(n·e·f)", "ppm", d, rows,
                         coverage_probability=coverage_probability, notes=notes)
    uc = budget.combined_standard_uncertainty
    tol = validation_tolerance(uc) if uc > 0 else None
    mc = gum.monte_carlo(model, _samplers(type_a, ch, settling_bias), seed, coverage_probability,
                         draws=monte_carlo_draws, tolerance=tol, batch=100_000,
                         max_draws=5_000_000)
    return PrecisionResult(d, current, i0, budget, validate_with_monte_carlo(budget, mc), type_a, ch)


# --------------------------------------------------------------------------------------------
# Whole record


@dataclass(frozen=True, eq=False)
class RecordAnalysis:
    """Everything a certificate needs from one precision record."""

    cycles: CycleDifferences
    allan: AllanDeviation
    type_a: TypeA
    precision: PrecisionResult
    frequency_hz: float
    electrons_per_cycle: int
    notes: tuple[str, ...]
    settling: S.SettlingAnalysis | None = None  # None when the discard was imposed, not measured

    def warnings(self) -> list[str]:
        """What a reader of the certificate must be told about this record."""
        out = list(self.notes[1:])
        if self.precision.validation.validated is False:
            out.append(
                "the JCGM 101 Monte Carlo interval differs from the GUM interval by more than the "
                "numerical tolerance (JCGM 101 clause 8): the Monte Carlo interval is the better "
                "description of this result")
        if self.allan.slope > -0.35:
            out.append(f"the Allan deviation of the cycle differences falls as "
                       f"τ^{self.allan.slope:.2f}, slower than white noise (τ^−0.5)")
        return out


def chain_standard_uncertainty_ppm(chain: AmmeterChain, nominal_a: float) -> float:
    """Root-sum-square of the chain's Type B inputs in ppm of n·e·f (unit sensitivities to first
    order in the measurement equation of :class:`AmmeterChain`; GUM 5.1.2)."""
    rel = [chain.gain_correction, chain.gain_drift, chain.voltmeter_correction,
           chain.frequency_correction]
    total = sum(x.standard_uncertainty**2 for x in rel)
    total += (1e6 * chain.leakage_current.standard_uncertainty / nominal_a) ** 2
    return math.sqrt(total)


def measure_settling(
    time_s: np.ndarray, current_a: np.ndarray, pump_on: np.ndarray, floor: SettlingRule,
    other_u_a: float = 0.0,
) -> S.SettlingAnalysis:
    """The settling transient of the record and the discard it calls for
    (:mod:`analysis.pump.settling`). ``other_u_a`` is the rest of the result's standard
    uncertainty (the chain's), in amperes of indicated current, so that the discard minimises the
    whole standard uncertainty; ``floor`` the smallest discard allowed (a fraction rule
    counts as that fraction of the median segment)."""
    t = np.asarray(time_s, dtype=float)
    i = np.asarray(current_a, dtype=float)
    on = np.asarray(pump_on).astype(np.int8)
    starts, stops = _segments(on)
    fast = _SegmentSums(t, i, on)

    def weights_and_u(d: float) -> tuple[np.ndarray, float]:
        cyc = fast.cycles(d)
        ta = type_a_autocorrelated(cyc.differences, first_uncorrelated_lag=2)
        return cyc.segment_weights, math.hypot(ta.standard_uncertainty, other_u_a)

    try:
        rec = S.stack_segments(t, i, starts, stops, on[starts])
        minimum_s = (floor.seconds if floor.seconds is not None
                     else floor.fraction * rec.segment_duration_s)
        return S.choose_discard(rec, minimum_s, weights_and_u)
    except S.SettlingError as exc:
        raise RecordError(str(exc)) from exc


def analyse_record(
    time_s: np.ndarray, current_a: np.ndarray, pump_on: np.ndarray, frequency_hz: float,
    electrons_per_cycle: int, seed: int, chain: AmmeterChain | None = None,
    settling: SettlingRule | None = None, coverage_probability: float = 0.95,
    monte_carlo_draws: int | None = None, measure_transient: bool = True,
) -> RecordAnalysis:
    """Settling transient, cycle differences, Allan deviation, Type A with autocorrelation, budget
    and Monte Carlo.

    With ``measure_transient`` (the default) the discard after each switch is chosen from the
    transient measured in the record (:func:`measure_settling`); ``settling`` is then only its
    floor (the operator's stated settling time; a fraction rule counts as that fraction of the
    median segment). Without it, ``settling`` (default: first 25 % of each segment) is applied
    as given and the budget has no settling row.
    """
    check_operating_point(frequency_hz, electrons_per_cycle)
    chain = chain or AmmeterChain.ideal()
    floor_rule = settling or (SettlingRule(seconds=0.0) if measure_transient else SettlingRule())
    cycles = cycle_differences(time_s, current_a, pump_on, floor_rule)
    # Lag 1 is correlated by construction (shared off segments); lags ≥ 2 should not be.
    if cycles.differences.size < 3:
        raise RecordError(
            f"the record has {cycles.differences.size} complete cycles; at least three are needed"
        )
    settle = None
    bias_input = None
    if measure_transient:
        i0 = nominal_current(frequency_hz, electrons_per_cycle)
        other = 1e-6 * i0 * chain_standard_uncertainty_ppm(chain, i0)
        settle = measure_settling(time_s, current_a, pump_on, floor_rule, other)
        cycles = cycle_differences(time_s, current_a, pump_on, SettlingRule(seconds=settle.discard_s))
        bias_input = ChainInput(
            settle.residual_bias_a, settle.residual_bias_u_a, "t", settle.blocks - 1.0,
            f"fitted transient left after dropping {settle.discard_s:g} s after each switch; "
            f"jackknife over {settle.blocks} blocks of segments")
    ta = type_a_autocorrelated(cycles.differences, first_uncorrelated_lag=2)
    allan = allan_deviation(cycles.differences, cycles.cycle_period_s)
    prec = precision_budget(ta, chain, frequency_hz, electrons_per_cycle, seed,
                            coverage_probability, monte_carlo_draws, bias_input)
    notes = [settle.describe() if settle else cycles.settling.describe()]
    if cycles.differences.size < 10:
        notes.append(f"only {cycles.differences.size} cycles: the Type A uncertainty rests on "
                     "few degrees of freedom")
    notes.extend(ta.notes)
    if settle is not None and settle.limiting:
        notes.append(
            f"the settling transient limits this result: the uncertainty of its correction "
            f"({settle.residual_bias_u_a * 1e15:.2g} fA) exceeds that of the rest "
            "(longer segments would lower it)")
    return RecordAnalysis(cycles, allan, ta, prec, frequency_hz, electrons_per_cycle, tuple(notes),
                          settle)
