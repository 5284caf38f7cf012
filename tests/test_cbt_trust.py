"""Trust on messy sweeps: bias order, bad points, outliers, correlated noise, the edge of a model.

The data come from the exact orthodox master equation of a 3-junction array
(analysis.cbt.simulate.exact_sweep, docs/physics.md 1.3), not from the tables the fit uses, so a
recovery here is a check against an independent line shape.
"""

import numpy as np
import pytest

from analysis.cbt.choice import fit_sweep_chosen
from analysis.cbt.fit import (
    EDGE_SD_MARGIN,
    NONLINEAR,
    FitSettings,
    ModelEdgeError,
    PointError,
    SweepData,
    edge_of_posterior,
    fit_sweep,
)
from analysis.cbt.full_model import FullTunnellingShape
from analysis.cbt.robust import (
    flag_outliers,
    hac_inflation,
    isolated_bias_points,
    lag1_correlation,
    outlier_threshold,
)
from analysis.cbt.simulate import exact_sweep

QUICK = FitSettings(walkers=12, block=100, max_steps=4000, min_tau_multiple=20, tau_tolerance=0.2)
T_TRUE, G_T = 0.05, 3e-6


def noisy_exact(u: float, seed: int, relative_noise: float = 3e-4, **kw):
    bias, g, setup = exact_sweep(3, T_TRUE, u, G_T, **kw)
    g = g + relative_noise * G_T * np.random.default_rng(seed).standard_normal(g.size)
    return bias, g, setup


def test_sweep_recorded_downwards_fits_like_upwards():
    # Before the fix the lag-1 residual check indexed a shortened array with the full sort order
    # and raised IndexError for any sweep recorded from high to low bias.
    bias, g, setup = noisy_exact(1.0, seed=3)
    up = fit_sweep(SweepData(bias, g, setup), seed=2, shape=FullTunnellingShape(3), settings=QUICK)
    down = fit_sweep(SweepData(bias[::-1], g[::-1], setup), seed=2, shape=FullTunnellingShape(3), settings=QUICK)
    assert down.temperature == pytest.approx(up.temperature, abs=0.2 * up.temperature_std)
    assert down.lag1_residual_correlation == pytest.approx(up.lag1_residual_correlation, abs=1e-9)
    shuffled = np.random.default_rng(0).permutation(bias.size)
    mixed = fit_sweep(SweepData(bias[shuffled], g[shuffled], setup), seed=2, shape=FullTunnellingShape(3),
                      settings=QUICK)
    assert mixed.lag1_residual_correlation == pytest.approx(up.lag1_residual_correlation, abs=1e-9)


def test_one_conductance_25_percent_off_is_named_and_left_out():
    bias, g, setup = noisy_exact(1.0, seed=4)
    g[137] *= 1.25
    fit = fit_sweep(SweepData(bias, g, setup), seed=1, shape=FullTunnellingShape(3), settings=QUICK)
    assert fit.diagnosis.outliers == (137,)
    assert any("outlier" in f for f in fit.diagnosis.findings)
    assert abs(fit.temperature - T_TRUE) < 3 * fit.temperature_std


def test_bias_with_wrong_exponent_is_refused_naming_the_point():
    bias, g, setup = noisy_exact(1.0, seed=5)
    bias = bias.copy()
    bias[-3] *= 1e3  # e.g. 2.6e-4 typed as 2.6e-1
    with pytest.raises(PointError) as exc:
        fit_sweep(SweepData(bias, g, setup), seed=1, shape=FullTunnellingShape(3), settings=QUICK)
    assert exc.value.points == (bias.size - 3,) and exc.value.field == "bias_V"
    assert "exponent" in str(exc.value)


def test_isolated_bias_rule_leaves_uneven_but_sane_grids_alone():
    dense = np.concatenate([np.linspace(-1, -0.2, 20), np.linspace(-0.2, 0.2, 200)[1:-1], np.linspace(0.2, 1, 20)])
    assert isolated_bias_points(dense) == []
    assert isolated_bias_points(np.append(dense, 50.0)) == [dense.size]
    assert isolated_bias_points(np.append(dense, np.nan)) == [dense.size]


def test_outlier_threshold_false_alarm_rate():
    # The threshold is Φ⁻¹(1 − 0.0025/n): on clean Gaussian noise the screen flags a point in about
    # 0.5 % of sweeps (Bonferroni bound; scipy.stats.norm as the reference).
    from scipy import stats

    assert outlier_threshold(401) == pytest.approx(stats.norm.isf(0.0025 / 401))
    rng = np.random.default_rng(11)
    flagged = sum(flag_outliers(rng.standard_normal(401))[0].size > 0 for _ in range(400))
    assert flagged <= 8  # expected ~2 of 400; 8 is beyond the binomial 99.9 % point
    spiky = rng.standard_normal(401)
    spiky[[50, 200, 333]] += [9.0, -8.0, 12.0]
    assert list(flag_outliers(spiky)[0]) == [50, 200, 333]


def test_lag1_and_newey_west_against_ar1_theory():
    # AR(1) with ρ: lag-1 autocorrelation → ρ, and the variance of a mean is inflated by
    # (1 + ρ)/(1 − ρ) (the long-run variance of AR(1); Box & Jenkins 1970, from memory).
    rho, n = 0.6, 20000
    rng = np.random.default_rng(2)
    e = np.empty(n)
    e[0] = rng.standard_normal()
    for i in range(1, n):
        e[i] = rho * e[i - 1] + np.sqrt(1 - rho**2) * rng.standard_normal()
    assert lag1_correlation(e) == pytest.approx(rho, abs=0.02)
    f = hac_inflation(np.ones((n, 1)), e, lag=60)[0]
    assert f**2 == pytest.approx((1 + rho) / (1 - rho), rel=0.1)
    assert hac_inflation(np.ones((n, 1)), rng.standard_normal(n))[0] == pytest.approx(1.0, abs=0.05)


def _samples(u_mean, u_sd, bound, n=4000, seed=0):
    rng = np.random.default_rng(seed)
    s = np.column_stack([np.full(n, 0.05) + 1e-5 * rng.standard_normal(n),
                         u_mean + u_sd * rng.standard_normal(n), 1e-7 * rng.standard_normal(n)])
    return np.minimum(s, [np.inf, bound, np.inf])


def test_posterior_edge_rule_just_inside_and_outside():
    shape = FullTunnellingShape(3)
    bounds = {"temperature_K": (0.0, 100.0), "u": (0.0, shape.max_u), "bias_offset_V": (-1e-4, 1e-4)}
    top = shape.max_u
    # Just inside: the 99.9 % quantile (mean + 3.09 sd) stays more than EDGE_SD_MARGIN sd below.
    assert edge_of_posterior(shape, _samples(top - 3.6 * 0.01, 0.01, top), bounds) is None
    # Just outside: a posterior cut by the bound (mass piled against it).
    err = edge_of_posterior(shape, _samples(top - 2.0 * 0.01, 0.01, top), bounds)
    assert isinstance(err, ModelEdgeError) and err.parameter == "u" and "upper bound" in str(err)
    # The lower bound and the bias-offset window behave the same way.
    low = _samples(3.6 * 0.01, 0.01, np.inf)
    assert edge_of_posterior(shape, low, bounds) is None
    low[:, 1] = np.maximum(low[:, 1] - 0.02, 0.0)
    assert edge_of_posterior(shape, low, bounds).parameter == "u"
    off = _samples(1.0, 0.01, np.inf)
    off[:, 2] += 1e-4 - 1e-7
    assert edge_of_posterior(shape, off, bounds).parameter == "bias_offset_V"
    assert EDGE_SD_MARGIN < 1 and NONLINEAR[1] == "u"


@pytest.mark.slow
@pytest.mark.parametrize("beyond", [0.05, 0.1, 0.3])
def test_just_beyond_validated_range_is_refused_not_crashed(beyond):
    # Exact N = 3 sweeps just beyond the full model's validated u (its max_u): the posterior would
    # pile up at the bound; the fit must refuse with ModelEdgeError (a SweepError), never certify
    # or crash.
    bias, g, setup = noisy_exact(FullTunnellingShape(3).max_u + beyond, seed=7)
    with pytest.raises(ModelEdgeError, match="bound u = "):
        fit_sweep_chosen(SweepData(bias, g, setup), seed=1, settings=QUICK)


@pytest.mark.slow
def test_just_inside_validated_range_is_fitted():
    shape = FullTunnellingShape(3)
    u = shape.max_u - 0.1
    bias, g, setup = noisy_exact(u, seed=7, relative_noise=1e-4)
    fit, _ = fit_sweep_chosen(SweepData(bias, g, setup), seed=1, settings=QUICK)
    assert abs(fit.temperature - T_TRUE) < 3 * fit.temperature_std
    assert fit.u < shape.max_u


def test_dip_outside_central_half_is_refused():
    # V₀ has to lie in the central half of the swept range: keep bias ≥ −0.2 R of a ±R sweep and
    # that half is [0.1 R, 0.7 R], so the dip at 0 is outside it and the optimum sits on its edge.
    bias, g, setup = noisy_exact(1.0, seed=8, range_half_widths=8.0)
    keep = bias >= -0.2 * bias.max()
    with pytest.raises(ModelEdgeError, match="bias offset"):
        fit_sweep(SweepData(bias[keep], g[keep], setup), seed=1, shape=FullTunnellingShape(3), settings=QUICK)


def test_gum_g42_degrees_of_freedom_of_an_uncertain_uncertainty():
    from analysis.budget import degrees_of_freedom_from_reliability

    # GUM (JCGM 100:2008) G.4.2: an uncertainty judged reliable to about 25 % has ν = 8.
    assert degrees_of_freedom_from_reliability(0.25) == pytest.approx(8.0)
    assert degrees_of_freedom_from_reliability(0.5) == pytest.approx(2.0)  # eq. (G.3), derived
    assert degrees_of_freedom_from_reliability(0.0) == np.inf


def test_budget_has_a_row_for_every_input_and_lists_defaults():
    from analysis.cbt.uncertainty import (
        DEFAULT_RELIABILITY,
        TypeBInputs,
        defaulted_inputs,
        temperature_budget,
    )

    bias, g, setup = noisy_exact(1.0, seed=12)
    shape = FullTunnellingShape(3)
    fit = fit_sweep(SweepData(bias, g, setup), seed=1, shape=shape, settings=QUICK)
    silent = TypeBInputs()
    budget, factor = temperature_budget(fit, shape, setup, silent)
    names = [r.quantity for r in budget.rows]
    for needed in ("posterior", "bias-voltage scale", "excitation", "non-uniformity", "series", "self-heating",
                   "model truncation"):
        assert any(needed in n for n in names), needed
    # Nothing stated: no correction applied from a default spread, and no defaulted row silently zero.
    assert factor == 1.0
    for row in budget.rows:
        if "not stated" in row.note:
            assert row.contribution > 0, row.quantity
            assert row.degrees_of_freedom == pytest.approx(0.5 / DEFAULT_RELIABILITY**2), row.quantity
    deviations = " | ".join(defaulted_inputs(silent, setup, heating_model_given=False))
    for word in ("bias-voltage scale", "excitation amplitude not stated", "spread not stated",
                 "series (lead) resistance not stated", "no electron-phonon coupling"):
        assert word in deviations, word
    # Defaulted rows make the coverage factor larger than the normal 1.96 (finite ν_eff).
    assert budget.coverage_factor > 1.96
    stated = TypeBInputs(bias_scale_relative_u=0.0, bias_scale_stated=True, resistance_spread=0.0,
                         resistance_spread_stated=True, excitation_amplitude_stated=True,
                         series_resistance_stated=True)
    tight, _ = temperature_budget(fit, shape, setup, stated)
    assert tight.combined_standard_uncertainty < budget.combined_standard_uncertainty
    assert defaulted_inputs(stated, setup, heating_model_given=True) == []


def test_correlated_noise_gets_a_noise_model_and_a_structure_row():
    from analysis.cbt.uncertainty import TypeBInputs, temperature_budget

    bias, g, setup = exact_sweep(3, T_TRUE, 1.0, G_T)
    rng = np.random.default_rng(21)
    e = np.empty(g.size)
    e[0] = rng.standard_normal()
    for i in range(1, g.size):
        e[i] = 0.7 * e[i - 1] + np.sqrt(1 - 0.49) * rng.standard_normal()
    shape = FullTunnellingShape(3)
    fit = fit_sweep(SweepData(bias, g + 3e-4 * G_T * e, setup), seed=1, shape=shape, settings=QUICK)
    assert fit.diagnosis.noise_model != "white"
    if fit.diagnosis.noise_model.startswith("AR(1)"):
        assert fit.diagnosis.noise_correlation == pytest.approx(0.7, abs=0.12)
    assert abs(fit.temperature - T_TRUE) < 3 * fit.temperature_std
    budget, _ = temperature_budget(fit, shape, setup, TypeBInputs())
    assert any("residual structure" in r.quantity for r in budget.rows)
    # Not blamed on heating: no heating template fires on AR(1) noise.
    assert not any(t.significant and t.cause == "self-heating" for t in fit.diagnosis.templates)


def test_slope_is_named_and_the_background_added():
    bias, g, setup = noisy_exact(1.0, seed=13, relative_noise=2e-4)
    v = bias / bias.max()
    g = g * (1 + 4e-3 * v)
    fit = fit_sweep(SweepData(bias, g, setup), seed=1, shape=FullTunnellingShape(3), settings=QUICK)
    assert fit.diagnosis.background_added
    assert any("linear background" in f for f in fit.diagnosis.findings)
    assert abs(fit.temperature - T_TRUE) < 3 * fit.temperature_std


def _sweep_file(bias, g, name="sweep.csv"):
    from service.intake import parse_csv

    text = "# junctions_in_series: 3\nbias_V,conductance_S\n" + "".join(
        f"{float(v)!r},{float(c)!r}\n" for v, c in zip(bias, g, strict=True))
    return parse_csv(name, text.encode())


def test_service_names_file_and_line_of_a_mistyped_bias():
    from service.calibrations.cbt import fit_file
    from service.intake import IntakeError

    bias, g, _ = noisy_exact(1.0, seed=5)
    bias = bias[::-1].copy()  # recorded downwards, as some set-ups do
    bias[2] *= 1e3
    f = _sweep_file(bias, g)
    with pytest.raises(IntakeError) as exc:
        fit_file(f, 1, QUICK, FullTunnellingShape(3))
    assert exc.value.file == "sweep.csv" and exc.value.line == f.line_of_row(2) and exc.value.field == "bias_V"


def test_service_refuses_the_edge_of_a_model_without_a_traceback():
    from service.calibrations.cbt import fit_file
    from service.calibrations.outcome import CertificationRefused

    bias, g, _ = noisy_exact(1.0, seed=8, range_half_widths=8.0)
    keep = bias >= -0.2 * bias.max()
    with pytest.raises(CertificationRefused, match="sweep.csv: .*bound"):
        fit_file(_sweep_file(bias[keep], g[keep]), 1, QUICK, FullTunnellingShape(3))


def test_service_warns_with_the_outlier_lines():
    from service.calibrations.cbt import fit_file

    bias, g, _ = noisy_exact(1.0, seed=4)
    g[137] *= 1.25
    f = _sweep_file(bias, g)
    work = fit_file(f, 1, QUICK, FullTunnellingShape(3))
    assert any(f"line {f.line_of_row(137)}" in w for w in work.warnings)


def test_named_outliers_and_findings_reach_the_certificate_renderings():
    """The record → render path: the outlier lines and each named finding of the residual checks
    appear as warnings in the HTML page and in the PDF, next to that sweep's budget."""
    import copy
    import io
    import json
    import re
    from pathlib import Path

    from analysis.cbt.uncertainty import TypeBInputs
    from service.calibrations.cbt import fit_file, sweep_result
    from service.render.html import render_html
    from service.render.pdf import render_pdf

    pypdf = pytest.importorskip("pypdf")
    bias, g, _ = noisy_exact(1.0, seed=4)
    g[137] *= 1.25
    g[290] *= 0.8
    f = _sweep_file(bias, g)
    work = fit_file(f, 1, QUICK, FullTunnellingShape(3))
    entry, _ = sweep_result(work, TypeBInputs())
    lines = entry["diagnostics"]["residual_checks"]["outlier_lines"]
    assert sorted(lines) == sorted([f.line_of_row(137), f.line_of_row(290)])

    example = Path(__file__).resolve().parents[1] / "example_runs" / "sensor-larkspur-certificate"
    record = copy.deepcopy(json.loads((example / "certificate.json").read_text()))
    record["job"] = "cbt_thermometry"
    record["sections"].pop("sensor_calibration")
    record["results"] = [entry]
    html = render_html(record)
    pdf = "".join(p.extract_text() for p in pypdf.PdfReader(io.BytesIO(render_pdf(record))).pages)
    squash = lambda s: re.sub(r"\s+", "", s)  # noqa: E731 - PDF text breaks lines anywhere
    warnings = entry["diagnostics"]["warnings"]
    outlier_warning = next(w for w in warnings if w.startswith("outliers left out"))
    for line in lines:
        assert str(line) in outlier_warning
    for w in warnings:  # every finding, the outlier lines among them
        assert f"Warning: {w}" in html.replace("&#39;", "'").replace("&#34;", '"').replace("&amp;", "&")
        assert squash(f"Warning: {w}") in squash(pdf)


@pytest.mark.slow
@pytest.mark.parametrize("u", [3.05, 3.1, 3.3])
def test_long_array_at_the_audit_u_is_refused_by_the_service_not_certified(u):
    # The audit's u = 3.05, 3.1, 3.3 lay just beyond the full model's limit when it was 3. Short
    # arrays are now validated to u = 5 (exact tables to N = 6; the slow tests above probe that
    # edge), but a long array's full model stops at u = 2 and the series at u = 1: a 10-junction
    # sweep this deep must be refused, with a message, not certified or crashed. The dip is the
    # exact N = 3 master-equation curve on the N = 10 voltage scale (x = eV/(N k_B T)); its depth
    # differs from a true N = 10 array's by well under 1e-3 at u ≈ 3 (docs/physics.md 1.3: the
    # depth has converged by N = 4-6), far less than the gap to the deepest u = 2 dip (0.277).
    from analysis.cbt.full_model import FullTunnellingShape as Full
    from service.calibrations.cbt import fit_file
    from service.calibrations.outcome import CertificationRefused
    from service.intake import parse_csv

    assert Full(10).max_u < 3.0
    bias, g, _ = noisy_exact(u, seed=9)
    text = "# junctions_in_series: 10\nbias_V,conductance_S\n" + "".join(
        f"{float(v) * 10 / 3!r},{float(c)!r}\n" for v, c in zip(bias, g, strict=True))
    f = parse_csv("deep.csv", text.encode())
    with pytest.raises(CertificationRefused, match=r"deep\.csv: .*(validated range|bound)"):
        fit_file(f, 1, QUICK, None)
