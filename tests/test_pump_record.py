"""On/off precision records: cycle differences, Allan deviation, Type A, budget (analysis.pump.record)."""

import math

import numpy as np
import pytest
from scipy.signal import lfilter

from analysis.pump import record as R
from analysis.pump import simulate
from analysis.pump.quantized import nominal_current

I0 = nominal_current(1.0e9)


def _square_record(on_len, off_len, cycles, dt=1.0):
    """Pump state off, on, off, … (off first and last) and times; ``off_len`` may be a list of
    lengths used in turn, which makes the timing irregular."""
    offs = off_len if isinstance(off_len, list) else [off_len]
    state = [np.zeros(offs[0], dtype=int)]
    for j in range(cycles):
        state += [np.ones(on_len, dtype=int), np.zeros(offs[(j + 1) % len(offs)], dtype=int)]
    on = np.concatenate(state)
    return np.arange(on.size) * dt, on


# ----- the drift-cancelling estimator --------------------------------------------------------


@pytest.mark.parametrize("on_len, off_len", [(40, 40), (30, 50), (50, [20, 45, 30])])
def test_linear_offset_drift_cancels_exactly(on_len, off_len):
    # Giblin et al., Nat. Commun. 3, 930 (2012): ΔI_j = Ī_on,j − (Ī_off,j + Ī_off,j+1)/2 cancels a
    # linear drift; with interpolation to the on segment's mean time it does so for any timing
    # (derived: the mean of a ramp is the ramp at the mean time).
    t, on = _square_record(on_len, off_len, cycles=12)
    current = I0 * on + 5e-12 + 3e-15 * t  # steep ramp: 3 fA/s
    cyc = R.cycle_differences(t, current, on, R.SettlingRule(seconds=5.0))
    assert cyc.differences.size == 12
    assert np.allclose(cyc.differences, I0, rtol=1e-12, atol=0)
    if on_len == off_len:
        assert np.allclose(cyc.weights, 0.5)


def test_without_interpolation_a_ramp_would_leak_into_unequal_segments():
    # Control for the test above: the plain midpoint average leaves a bias when timing is
    # asymmetric (derived), so the interpolation weights are doing real work there.
    t, on = _square_record(30, [50, 20], cycles=6)
    current = I0 * on + 3e-15 * t
    cyc = R.cycle_differences(t, current, on, R.SettlingRule(seconds=5.0))
    midpoint = cyc.on_means - 0.5 * (cyc.off_means[:-1] + cyc.off_means[1:])
    assert np.all(np.abs(midpoint - I0) > 1e-15)


def test_settling_rule_drops_readings_after_each_switch():
    t, on = _square_record(20, 20, cycles=3)
    current = I0 * on.astype(float)
    current[np.flatnonzero(np.diff(on)) + 1] = 1.0  # a wild first reading after every switch
    cyc = R.cycle_differences(t, current, on, R.SettlingRule(seconds=1.0))
    assert np.allclose(cyc.differences, I0, rtol=1e-12)
    assert cyc.readings_dropped == 7  # one per segment, including the start of the record
    by_fraction = R.cycle_differences(t, current, on, R.SettlingRule(fraction=0.25))
    assert by_fraction.readings_dropped == 7 * 5


def test_record_starting_with_pump_on_skips_the_unbracketed_segment():
    t, on = _square_record(10, 10, cycles=4)
    on = on[10:]  # starts on
    t = t[10:]
    cyc = R.cycle_differences(t, I0 * on, on, R.SettlingRule(seconds=0.0))
    assert cyc.differences.size == 3


@pytest.mark.parametrize(
    "mutate, match",
    [
        (lambda t, i, on: (t, i, np.ones_like(on)), "no pump-off segment"),
        (lambda t, i, on: (t[:45], i[:45], on[:45]), "1 complete off-on-off cycle"),
        (lambda t, i, on: (t[::-1].copy(), i, on), "increase strictly"),
        (lambda t, i, on: (np.where(np.arange(t.size) == 5, t[4], t), i, on), "increase strictly"),
        (lambda t, i, on: (t, i, np.where(on == 1, 2, 0)), "1 \\(pump on\\) or 0"),
    ],
)
def test_bad_records_are_refused_with_a_reason(mutate, match):
    t, on = _square_record(15, 15, cycles=4)
    i = I0 * on.astype(float)
    with pytest.raises(R.RecordError, match=match):
        R.cycle_differences(*mutate(t, i, on))


def test_settling_longer_than_a_segment_is_refused():
    t, on = _square_record(10, 10, cycles=3)
    with pytest.raises(R.RecordError, match="shorten the settling time"):
        R.cycle_differences(t, I0 * on, on, R.SettlingRule(seconds=20.0))


# ----- Allan deviation -----------------------------------------------------------------------


def test_allan_deviation_of_white_noise_falls_as_inverse_square_root():
    # Allan, Proc. IEEE 54, 221 (1966); IEEE Std 1139: white noise has σ(τ) = σ/√(τ/τ₀).
    y = np.random.default_rng(1139).standard_normal(2**15)
    ad = R.allan_deviation(y, tau0_s=2.0)
    assert ad.slope == pytest.approx(-0.5, abs=0.05)
    assert ad.deviation[0] == pytest.approx(1.0, rel=0.02)
    assert ad.tau_s[3] == 2.0 * ad.m[3]
    expected = 1.0 / np.sqrt(ad.m)
    assert np.allclose(ad.deviation[:8], expected[:8], rtol=0.15)


def test_allan_deviation_matches_the_defining_sum():
    # Overlapping estimator, IEEE Std 1139-2008, written out term by term (from memory).
    y = np.random.default_rng(5).standard_normal(50)
    ad = R.allan_deviation(y, m=np.array([1, 3, 7]))
    for m, dev in zip(ad.m, ad.deviation, strict=True):
        terms = [sum(y[i + m] - y[i] for i in range(j, j + m)) ** 2 for j in range(50 - 2 * m + 1)]
        assert dev == pytest.approx(math.sqrt(sum(terms) / (2 * m * m * len(terms))), rel=1e-12)


def test_allan_deviation_of_random_walk_grows():
    # Random-walk noise: σ(τ) ∝ τ^{+1/2} (IEEE Std 1139, power-law noise table, from memory).
    y = np.cumsum(np.random.default_rng(3).standard_normal(2**14))
    assert R.allan_deviation(y).slope == pytest.approx(0.5, abs=0.1)


# ----- Type A with autocorrelation -----------------------------------------------------------


def _ar1(phi, n, seed):
    e = np.random.default_rng(seed).standard_normal(n + 200)
    return lfilter([1.0], [1.0, -phi], e)[200:]


@pytest.mark.parametrize("phi", [0.0, 0.5, 0.8])
def test_type_a_of_ar1_noise_matches_the_variance_of_the_mean(phi):
    # AR(1), x_t = φ x_{t−1} + ε_t: ρ_k = φ^k and Var(x̄) = σ²/n [1 + 2 Σ (1 − k/n) φ^k]
    # (Box & Jenkins; Zhang, Metrologia 43, S276 (2006), from memory). Averaged over seeds, the
    # estimated u² and the scatter of the means must both match it.
    n, seeds = 2000, 120
    k = np.arange(1, n)
    var_mean = (1 / (1 - phi**2)) / n * (1 + 2 * np.sum((1 - k / n) * phi**k))
    u2, means = [], []
    for s in range(seeds):
        ta = R.type_a_autocorrelated(_ar1(phi, n, s))
        u2.append(ta.standard_uncertainty**2)
        means.append(ta.mean)
    assert np.mean(u2) == pytest.approx(var_mean, rel=0.08)
    assert np.var(means) == pytest.approx(var_mean, rel=0.3)  # χ² scatter of 120 means


def test_type_a_flags_non_white_noise_and_not_white_noise():
    # Ljung & Box, Biometrika 65, 297 (1978): white noise passes, AR(1) with φ = 0.6 fails.
    assert R.type_a_autocorrelated(_ar1(0.0, 500, 1)).white
    ta = R.type_a_autocorrelated(_ar1(0.6, 500, 1))
    assert not ta.white
    assert any("not white" in n for n in ta.notes)
    assert ta.effective_n < 0.5 * ta.n


def test_white_reading_noise_gives_lag_one_correlation_only():
    # Neighbouring ΔI_j share an off segment: for equal segments ρ₁ = (σ²/4)/(3σ²/2) = 1/6 and
    # ρ_k = 0 for k ≥ 2 (derived). The record analysis must take lag 1 into account and still
    # call the noise white.
    settings = simulate.RecordSettings(cycles=1500, readings_per_segment=8, settling_tau_s=0.01,
                                       drift_a_per_s=0.0)
    t, i, on = simulate.on_off_record(settings, seed=17)
    res = R.analyse_record(t, i, on, 1.0e9, 1, seed=1, settling=R.SettlingRule(seconds=0.5),
                           monte_carlo_draws=20_000)
    rho = R.autocorrelation(res.cycles.differences, 3)
    assert rho[1] == pytest.approx(1 / 6, abs=0.06)
    assert res.type_a.white
    assert res.type_a.lags_used >= 1
    assert res.type_a.effective_n / res.type_a.n == pytest.approx(0.75, abs=0.1)


# ----- measurement equation, budget and Monte Carlo ------------------------------------------


def _chain():
    return R.AmmeterChain(
        "transresistance",
        gain_correction=R.ChainInput(5.0, 0.2, "normal", 30, "calibration against a CCC"),
        gain_drift=R.ChainInput(0.0, 0.3 / math.sqrt(3), "rectangular"),
        voltmeter_correction=R.ChainInput(-1.0, 0.1, "normal"),
        frequency_correction=R.ChainInput(0.0, 0.001, "normal"),
        leakage_current=R.ChainInput(0.0, 0.02e-15, "rectangular"),
    )


def test_sensitivities_are_the_derivatives_of_the_measurement_equation():
    # GUM 5.1.3: c_i = ∂f/∂x_i at the estimates; checked by central differences.
    ta = R.TypeA(I0 * (1 + 3e-6), 1e-15, 100, 80.0, 1e-16, 79.0, 1, 1e-16, 0.5, 2, True)
    res = R.precision_budget(ta, _chain(), 1.0e9, 1, seed=1, monte_carlo_draws=10_000)
    x = [ta.mean, 5.0, 0.0, -1.0, 0.0, 0.0]
    names = ["indicated", "gain_correction", "gain_drift", "voltmeter_correction",
             "frequency_correction", "leakage"]
    steps = [1e-18, 1e-3, 1e-3, 1e-3, 1e-3, 1e-18]

    def f(v):
        return R.deviation_ppm_model(**dict(zip(names, map(np.asarray, v), strict=True)),
                                     frequency_hz=1.0e9, electrons_per_cycle=1)

    assert res.budget.estimate == pytest.approx(float(f(x)))
    for row, i, h in zip(res.budget.rows, range(6), steps, strict=True):
        up, dn = list(x), list(x)
        up[i] += h
        dn[i] -= h
        assert row.sensitivity == pytest.approx(float(f(up) - f(dn)) / (2 * h), rel=1e-5)


def test_sensitivities_equal_the_hand_derived_partial_derivatives():
    # D = [(I_ind − b_s)(1 + c_V)/(1 + c_G + d_G) − I_leak] / [n e f (1 + c_f)] − 1, in ppm, with
    # c_G, d_G, c_V, c_f in ppm. Its partial derivatives, worked out by hand (derived; GUM 5.1.3
    # defines c_i = ∂f/∂x_i at the estimates), with v = 1 + 1e-6 c_V, g = 1 + 1e-6 (c_G + d_G),
    # f = 1 + 1e-6 c_f and I = (I_ind − b_s) v/g − I_leak:
    #   ∂D/∂I_ind = 1e6 v/(g I0 f) = −∂D/∂b_s      ∂D/∂c_G = ∂D/∂d_G = −(I_ind − b_s) v/(g² I0 f)
    #   ∂D/∂c_V = (I_ind − b_s)/(g I0 f)            ∂D/∂c_f = −I/(I0 f²)      ∂D/∂I_leak = −1e6/(I0 f)
    ta = R.TypeA(I0 * (1 + 3e-6), 1e-15, 100, 80.0, 1e-16, 79.0, 1, 1e-16, 0.5, 2, True)
    chain = R.AmmeterChain(
        "transresistance",
        gain_correction=R.ChainInput(5.0, 0.2),
        gain_drift=R.ChainInput(0.7, 0.3),
        voltmeter_correction=R.ChainInput(-1.0, 0.1),
        frequency_correction=R.ChainInput(0.4, 0.001),
        leakage_current=R.ChainInput(2e-18, 0.02e-15),
    )
    bias = R.ChainInput(3e-17, 1e-17, "normal", math.inf, "settling")
    res = R.precision_budget(ta, chain, 1.0e9, 1, seed=1, monte_carlo_draws=10_000,
                             settling_bias=bias)
    x = ta.mean - bias.estimate
    v, g, f = 1 - 1e-6, 1 + 5.7e-6, 1 + 0.4e-6
    current = x * v / g - 2e-18
    hand = [1e6 * v / (g * I0 * f), -x * v / (g * g * I0 * f), -x * v / (g * g * I0 * f),
            x / (g * I0 * f), -current / (I0 * f * f), -1e6 / (I0 * f), -1e6 * v / (g * I0 * f)]
    assert [row.sensitivity for row in res.budget.rows] == pytest.approx(hand, rel=1e-12)
    assert res.current_a == pytest.approx(current, rel=1e-15)
    assert res.deviation_ppm == pytest.approx((current / (I0 * f) - 1) * 1e6, rel=1e-9)


def test_monte_carlo_validates_the_near_linear_budget():
    # JCGM 101:2008 clause 8: for a model this close to linear the GUM interval agrees with the
    # Monte Carlo one within half a unit of the second significant digit.
    ta = R.TypeA(I0 * (1 + 0.8e-6), 1e-15, 400, 300.0, 0.08e-15, 299.0, 1, 0.08e-15, 0.5, 2, True)
    res = R.precision_budget(ta, _chain(), 1.0e9, 1, seed=3)
    assert res.validation.validated
    assert res.validation.monte_carlo.standard_uncertainty == pytest.approx(
        res.budget.combined_standard_uncertainty, rel=0.02)


def test_ideal_chain_budget_is_type_a_only_and_says_so():
    settings = simulate.RecordSettings(deviation_ppm=2.0, cycles=40)
    t, i, on = simulate.on_off_record(settings, seed=2)
    res = R.analyse_record(t, i, on, 1.0e9, 1, seed=4, monte_carlo_draws=20_000)
    b = res.precision.budget
    # Only the Type A row and the measured settling transient's row carry uncertainty.
    settling = [r for r in b.rows if r.quantity.startswith("settling transient")]
    assert len(settling) == 1
    assert all(r.standard_uncertainty == 0 for r in b.rows[1:] if r not in settling)
    assert b.combined_standard_uncertainty == pytest.approx(
        math.hypot(b.rows[0].contribution, settling[0].contribution))
    assert any("ideal ammeter" in n for n in b.notes)
    assert abs(b.estimate - 2.0) < 4 * b.combined_standard_uncertainty


def test_gain_correction_removes_a_known_chain_error():
    # The indicated current reads 5 ppm high (transresistance 5 ppm above nominal); the calibration correction of
    # the chain puts it back (measurement equation of AmmeterChain).
    settings = simulate.RecordSettings(deviation_ppm=0.0, gain_error_ppm=5.0, cycles=400,
                                       noise_a=5e-15)
    t, i, on = simulate.on_off_record(settings, seed=9)
    chain = R.AmmeterChain("transresistance", gain_correction=R.ChainInput(5.0, 0.1))
    res = R.analyse_record(t, i, on, 1.0e9, 1, seed=4, chain=chain, monte_carlo_draws=20_000)
    b = res.precision.budget
    assert abs(b.estimate) < 4 * b.combined_standard_uncertainty
    ideal = R.analyse_record(t, i, on, 1.0e9, 1, seed=4, monte_carlo_draws=20_000)
    assert ideal.precision.budget.estimate == pytest.approx(5.0, abs=4 * b.combined_standard_uncertainty)


def test_analysis_is_reproducible_from_the_seed():
    t, i, on = simulate.on_off_record(simulate.RecordSettings(cycles=20), seed=1)
    a = R.analyse_record(t, i, on, 1.0e9, 1, seed=42, chain=_chain())
    b = R.analyse_record(t, i, on, 1.0e9, 1, seed=42, chain=_chain())
    assert a.precision.validation.monte_carlo == b.precision.validation.monte_carlo


# ----- JCGM 101 validation and the Monte Carlo's own noise ------------------------------------


def test_exact_gum_interval_is_not_failed_by_monte_carlo_noise():
    # With the Type A input alone, drawn from a scaled and shifted t distribution (JCGM 101
    # 6.4.9), the GUM interval y ± t_ν u is exact (from memory), so any failure would be the
    # Monte Carlo's sampling noise: the adaptive run stops when twice its standard deviation is
    # within δ, which formerly failed about one record in twenty. Never a failure now.
    verdicts = []
    for k, ua in enumerate(np.geomspace(0.15e-15, 2.5e-15, 24)):
        ta = R.TypeA(I0 * (1 + 1e-6), 1e-15, 400, 31.0, ua, 30.0, 1, ua, 0.5, 2, True)
        verdicts.append(R.precision_budget(ta, R.AmmeterChain.ideal(), 1.0e9, 1,
                                           seed=k).validation.validated)
    assert False not in verdicts
    assert verdicts.count(True) >= 18


def test_rectangular_dominated_budget_fails_validation():
    # A rectangular input of half-width a dominating: its 95 % probabilistically symmetric
    # interval is ±0.95 a = ±1.65 u (derived), the GUM one ±1.96 u (ν_eff = ∞): JCGM 101 clause
    # 8 must reject the GUM interval.
    chain = R.AmmeterChain("transresistance", gain_drift=R.ChainInput(0.0, 10 / math.sqrt(3),
                                                                      "rectangular"))
    ta = R.TypeA(I0, 1e-15, 400, 300.0, 1e-19, 299.0, 1, 1e-19, 0.5, 2, True)
    v = R.precision_budget(ta, chain, 1.0e9, 1, seed=5).validation
    assert v.validated is False
    assert v.monte_carlo.symmetric_interval[1] == pytest.approx(9.5, abs=0.05)


def test_numerical_deviation_of_an_interval_end_matches_repeated_runs():
    # Asymptotic variance of a sample p-quantile, p(1 − p)/(M g²) (from memory): for a standard
    # normal output and M = 4000 trials the 2.5 % end scatters by 2.67/√M between runs.
    from analysis import budget as gum

    ends = []
    for seed in range(300):
        mc = gum.monte_carlo(lambda x: x, {"x": lambda rng, n: rng.standard_normal(n)}, seed,
                             draws=4000)
        ends.append(mc.symmetric_interval[0])
    predicted = R.interval_end_numerical_u(mc)
    assert np.std(ends, ddof=1) == pytest.approx(predicted, rel=0.15)


def test_cumulative_sum_route_gives_the_same_cycles():
    # The settling analysis tries many discards through per-segment cumulative sums; they must
    # give exactly what the direct route gives, irregular timing and jittered clocks included.
    t, on = _square_record(30, [50, 20, 35], cycles=9)
    t = t + np.random.default_rng(2).uniform(0, 0.3, t.size)
    i = I0 * on + 5e-12 + 3e-15 * t + 1e-14 * np.random.default_rng(3).standard_normal(t.size)
    fast = R._SegmentSums(t, i, on)
    for d in (0.0, 2.5, 7.0, 15.0):
        a = R.cycle_differences(t, i, on, R.SettlingRule(seconds=d))
        b = fast.cycles(d)
        assert np.allclose(b.differences, a.differences, rtol=0, atol=1e-24)
        assert np.allclose(b.segment_weights, a.segment_weights)
        assert b.readings_used == a.readings_used
