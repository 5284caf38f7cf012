"""The sensor-calibration job (service/calibrations/sensor.py): intake pieces, records, CLI end to end."""

import json
import math
import shutil
from pathlib import Path

import numpy as np
import pytest

from analysis import scales, sensors
from service.calibrations import sensor as sr
from service.cli.main import main
from service.intake import IntakeError, parse_csv

EXAMPLES = Path(__file__).resolve().parent.parent / "example_runs"
EXAMPLE = EXAMPLES / "sensor-larkspur"
EXAMPLE_LOG = EXAMPLES / "sensor-larkspur-log" / "mixing_chamber_log.csv"
# The invented sensor that example_runs/make_sensor_example.py simulates (demo data, used here
# only to see that the pipeline recovers what went in).
EXAMPLE_SENSOR = sensors.SimulatedSensor(r0_ohm=1150.0, t0_K=0.42, exponent=0.31, ripple=0.025)


def _csv(name: str, text: str):
    return parse_csv(name, text.encode())


def _sweep(name: str, extra: str = "") -> object:
    rows = "\n".join(f"{v:.3e},1.0e-5" for v in np.linspace(-1e-3, 1e-3, 31))
    return _csv(name, f"# junctions_in_series: 10\n{extra}bias_V,conductance_S\n{rows}\n")


# ------------------------------------------------------------------------------------------
# Sensor readings from metadata or a time-matched log


def test_reading_from_metadata():
    f = _sweep("a.csv", "# sensor_resistance_ohm: 5123.5\n")
    r = sr.sensor_reading(f, None, 1e-4)
    assert r.resistance_ohm == 5123.5 and r.u_ln_resistance == 1e-4


def test_reading_from_time_matched_log_uses_spread():
    log = _csv(
        "log.csv",
        "# time_origin: 2026-11-23T08:00:00Z\ntime_s,resistance_ohm\n"
        + "".join(
            f"{t},{r}\n"
            for t, r in [
                (0, 900.0),
                (60, 1000.0),
                (120, 1010.0),
                (180, 990.0),
                (240, 1000.0),
                (600, 700.0),
            ]
        ),
    )
    timed = sr._find_log(sr_run([log]), "resistance_ohm")
    f = _sweep(
        "b.csv", "# sweep_started: 2026-11-23T08:01:00Z\n# sweep_ended: 2026-11-23T08:04:00Z\n"
    )
    r = sr.sensor_reading(f, timed, 0.0)
    window = np.array([1000.0, 1010.0, 990.0, 1000.0])
    assert r.resistance_ohm == pytest.approx(window.mean())
    assert r.u_ln_resistance == pytest.approx(np.std(window, ddof=1) / window.mean())
    assert r.readings == 4


def sr_run(files):
    from service.intake import Run

    return Run(path="", manifest={}, files=tuple(files), kind="sensor_calibration")


def test_log_problems_named():
    log = _csv("log.csv", "time_s,resistance_ohm\n0,1000\n60,1001\n")
    with pytest.raises(IntakeError, match="time_origin") as exc:
        sr._find_log(sr_run([log]), "resistance_ohm")
    assert exc.value.file == "log.csv"
    back = _csv("log.csv", "# time_origin: 2026-11-23T08:00:00Z\ntime_s,resistance_ohm\n0,1\n0,2\n")
    with pytest.raises(IntakeError, match="increase") as exc:
        sr._find_log(sr_run([back]), "resistance_ohm")
    assert exc.value.line == 4
    good = sr._find_log(
        sr_run(
            [_csv("log.csv", "# time_origin: 2026-11-23T08:00:00Z\ntime_s,resistance_ohm\n0,1\n")]
        ),
        "resistance_ohm",
    )
    with pytest.raises(IntakeError, match="sweep_started"):
        sr.sensor_reading(_sweep("c.csv"), good, 0.0)
    late = _sweep(
        "d.csv", "# sweep_started: 2026-11-24T08:00:00Z\n# sweep_ended: 2026-11-24T09:00:00Z\n"
    )
    with pytest.raises(IntakeError, match="no readings"):
        sr.sensor_reading(late, good, 0.0)
    with pytest.raises(IntakeError, match="sensor_resistance_ohm"):
        sr.sensor_reading(_sweep("e.csv"), None, 0.0)


# ------------------------------------------------------------------------------------------
# CBT budgets -> calibration points


def _entry(t: float, posterior: float, scale: float, model: float) -> dict:
    def row(q, kind, contribution):
        return {"quantity": q, "type": kind, "contribution": contribution, "note": ""}

    return {
        "value": t,
        "budget": {
            "rows": [
                row("temperature from the fit (posterior)", "A", posterior * t),
                row("bias-voltage scale factor", "B", scale * t),
                row("model truncation", "B", model * t),
            ]
        },
    }


def test_type_a_rows_independent_type_b_rows_common():
    names = ["s1.csv", "s2.csv", "s3.csv", "s4.csv"]
    sweeps = [
        _sweep(n, f"# sensor_resistance_ohm: {1000 * (i + 1)}\n") for i, n in enumerate(names)
    ]
    entries = {
        n: _entry(0.1 / (i + 1), 0.002 * (i + 1), 3e-4, 1e-3 / (i + 1)) for i, n in enumerate(names)
    }
    readings = {f.name: sr.sensor_reading(f, None, 1e-4) for f in sweeps}
    data = sr.points_from_cbt(sweeps, entries, readings, 2e-4)
    assert np.allclose(data.u_ln_temperature, [0.002, 0.004, 0.006, 0.008])
    comps = {c.name: c for c in data.components}
    assert np.allclose(comps["CBT: bias-voltage scale factor"].relative_uncertainties, 3e-4)
    assert np.allclose(
        comps["CBT: model truncation"].relative_uncertainties, [1e-3, 5e-4, 1e-3 / 3, 2.5e-4]
    )
    bridge = comps["sensor bridge: resistance scale"]
    assert bridge.quantity == "resistance" and np.allclose(bridge.relative_uncertainties, 2e-4)
    assert data.labels == tuple(names)


# ------------------------------------------------------------------------------------------
# Curve record round trip, table file, conversion of a log


@pytest.fixture(scope="module")
def fitted():
    sim = sensors.simulate_calibration(EXAMPLE_SENSOR, np.geomspace(0.01, 1.0, 16), seed=31)
    fit = sensors.fit_calibration_curve(sim.data)
    record = {
        "job": "sensor_calibration",
        "certificate_id": "CC-TEST",
        "sections": {
            "sensor_calibration": {
                "curve": sr.curve_record(fit.curve),
                "table": {"coverage_probability": 0.95},
            }
        },
    }
    return fit, json.loads(json.dumps(record))


def test_curve_survives_json_round_trip(fitted):
    fit, record = fitted
    curve = sr.curve_from_record(record)
    r = np.geomspace(*fit.curve.resistance_range_ohm, 17)
    t0, u0 = fit.curve.temperature(r)
    t1, u1 = curve.temperature(r)
    assert np.array_equal(t0, t1) and np.allclose(u0, u1, rtol=1e-14)
    # The end points of the range stay inside after the round trip.
    curve.temperature(np.array(fit.curve.resistance_range_ohm))


def test_wrong_certificate_refused(fitted):
    _, record = fitted
    with pytest.raises(sr.CertificateError, match="not a sensor calibration"):
        sr.curve_from_record({**record, "job": "cbt_thermometry"})
    with pytest.raises(sr.CertificateError, match="missing or malformed"):
        sr.curve_from_record({"job": "sensor_calibration", "sections": {}})


def test_table_csv_header_exact(fitted):
    fit, _ = fitted
    table = fit.curve.table(points=7)
    text = sr.table_csv(table).decode()
    lines = text.splitlines()
    assert lines[0] == "resistance_ohm,temperature_K,expanded_uncertainty_K"
    assert len(lines) == 8
    r, t, u = map(float, lines[3].split(","))
    assert t == pytest.approx(table.temperature_K[2], rel=1e-9)
    assert u == pytest.approx(table.expanded_uncertainty_K[2], rel=1e-3)


def test_convert_log_refuses_out_of_range_naming_lines(fitted):
    fit, record = fitted
    lo, hi = fit.curve.resistance_range_ohm
    log = _csv("fridge.csv", f"time_s,resistance_ohm\n0,{lo * 1.2}\n60,{hi * 3}\n120,{hi}\n")
    with pytest.raises(IntakeError, match="line 3") as exc:
        sr.convert_log(record, log)
    assert exc.value.file == "fridge.csv" and exc.value.field == "resistance_ohm"
    csv, n_in, n_out = sr.convert_log(record, log, skip_out_of_range=True)
    assert (n_in, n_out) == (2, 1)
    lines = [ln for ln in csv.decode().splitlines() if not ln.startswith("#")]
    assert lines[0].startswith("time_s,resistance_ohm,temperature_K")
    assert lines[2].endswith(",,,,0")
    t = float(lines[1].split(",")[2])
    assert t == pytest.approx(fit.curve.temperature(lo * 1.2)[0][0], rel=1e-9)


# ------------------------------------------------------------------------------------------
# PLTS-2000 cross-check


def test_plts_cross_check_difference_and_zeta():
    # A CBT reading that equals the PLTS-2000 temperature of the pressure gives zero difference;
    # one 1 % high gives zeta = 0.01 T / sqrt(u_CBT^2 + u_PLTS^2) (zeta score, ISO 13528:2015,
    # from memory); u_PLTS = |dT/dp| u(p) (GUM 5.1.2).
    t = 0.05
    p = float(scales.melting_pressure(t))
    entries = {
        "a.csv": {"value": t, "standard_uncertainty": 1e-4, "expanded_uncertainty": 2e-4},
        "b.csv": {"value": 1.01 * t, "standard_uncertainty": 1e-4, "expanded_uncertainty": 2e-4},
        "c.csv": {"value": 0.9, "standard_uncertainty": 1e-3, "expanded_uncertainty": 2e-3},
    }
    pressures = {"a.csv": (p, 1), "b.csv": (p, 1), "c.csv": (5.0e6, 1)}
    rows = sr.plts_cross_check(["a.csv", "b.csv", "c.csv"], pressures, entries, 30.0)
    a, b, c = rows
    assert a["difference_K"] == pytest.approx(0.0, abs=1e-12) and a["branch"] == "low"
    u_plts = 30.0 / abs(float(scales.melting_pressure_slope(t)))
    assert b["plts2000_standard_uncertainty_K"] == pytest.approx(u_plts)
    assert b["normalised_difference_zeta"] == pytest.approx(0.01 * t / math.hypot(1e-4, u_plts))
    assert c["status"].startswith("not compared")


# ------------------------------------------------------------------------------------------
# End to end: the CLI on the invented example run (minimal form, quick MCMC settings)


@pytest.mark.slow
def test_certify_minimal_sensor_run_and_convert_log(tmp_path, capsys):
    # Minimal form: CBT sweeps with junctions_in_series and sensor_resistance_ohm, no run.toml.
    # The example's first ten sweeps (10-115 mK) keep the test short; over this decade ten
    # points allow a curve that follows the sensor (over the full two decades they would not,
    # and the job would rightly refuse).
    run = tmp_path / "run"
    run.mkdir()
    sweeps = sorted(EXAMPLE.glob("sweep_*.csv"))
    for f in sweeps[:10]:
        shutil.copy(f, run / f.name)
    out = tmp_path / "cert"
    assert main(["certify", str(run), "--out", str(out), "--quick"]) == 0
    record = json.loads((out / "certificate.json").read_text())
    assert record["job"] == "sensor_calibration"
    section = record["sections"]["sensor_calibration"]
    assert len(section["points"]) == 10
    assert section["curve"]["degree"] <= sensors.maximum_degree(10)

    assert sr.table_csv_from_record(record) == (out / "calibration_table.csv").read_bytes()
    table = (out / "calibration_table.csv").read_text().splitlines()
    assert table[0] == "resistance_ohm,temperature_K,expanded_uncertainty_K"
    values = np.array([[float(v) for v in line.split(",")] for line in table[1:]])
    assert values.shape == (sr.DEFAULT_TABLE_POINTS, 3)
    assert np.all(np.diff(values[:, 0]) > 0) and np.all(np.diff(values[:, 1]) < 0)
    assert np.all(values[:, 2] > 0)
    lo, hi = section["valid_range"]["resistance_ohm"]
    assert values[0, 0] == pytest.approx(lo) and values[-1, 0] == pytest.approx(hi)
    # The pipeline recovers the simulated sensor (demo data): within 3 U everywhere.
    truth = EXAMPLE_SENSOR.temperature(values[:, 0])
    assert np.all(np.abs(values[:, 1] - truth) <= 3 * values[:, 2])

    table_results = [
        r for r in record["results"] if r["name"] == "temperature from the calibration curve"
    ]
    assert len(table_results) == sr.DEFAULT_TABLE_POINTS
    rows = {row["quantity"] for row in table_results[0]["budget"]["rows"]}
    assert "CBT: bias-voltage scale factor" in rows and "sensor bridge: resistance scale" in rows
    assert len(section["plts2000_cross_check"]) == 3  # sweeps 1, 5 and 9 carry pressures
    html = (out / "certificate.html").read_text()
    assert "Sensor calibration" in html and html.count("<svg") >= 11
    assert any("bridge resistance-scale uncertainty not stated" in d for d in record["deviations"])
    capsys.readouterr()

    # Secondary use: the example fridge log ends with readings above the range on purpose.
    converted = tmp_path / "temperatures.csv"
    cert = str(out / "certificate.json")
    assert main(["sensor-temperatures", cert, str(EXAMPLE_LOG), "--out", str(converted)]) == 2
    err = capsys.readouterr().err
    assert "outside the calibrated range" in err and "mixing_chamber_log.csv" in err
    assert not converted.exists()
    assert (
        main(
            [
                "sensor-temperatures",
                str(out),
                str(EXAMPLE_LOG),
                "--out",
                str(converted),
                "--skip-out-of-range",
            ]
        )
        == 0
    )
    lines = [ln for ln in converted.read_text().splitlines() if not ln.startswith("#")]
    header = lines[0].split(",")
    assert header[:3] == ["time_s", "resistance_ohm", "temperature_K"]
    body = [ln.split(",") for ln in lines[1:]]
    assert [row[-1] for row in body[-3:]] == ["0", "0", "0"]
    inside = [row for row in body if row[-1] == "1"]
    r = np.array([float(row[1]) for row in inside])
    t = np.array([float(row[2]) for row in inside])
    big_u = np.array([float(row[4]) for row in inside])
    assert np.all(np.abs(t - EXAMPLE_SENSOR.temperature(r)) <= 3 * big_u)


# ------------------------------------------------------------------------------------------
# The job with time-matched logs (CBT analysis replaced by a stand-in to keep this fast)


def _fake_cbt(truth: dict[str, float]):
    from service.calibrations.outcome import CalibrationOutcome

    def analyse(run, seed, progress=None, fast=False):
        results = []
        for name, t in truth.items():
            results.append(
                {
                    "name": "electron temperature",
                    "sweep": name,
                    "value": t,
                    "unit": "K",
                    "standard_uncertainty": 0.002 * t,
                    "expanded_uncertainty": 0.004 * t,
                    "coverage_factor": 2.0,
                    "coverage_probability": 0.95,
                    "budget": {
                        "rows": [
                            {"quantity": "posterior", "type": "A", "contribution": 0.002 * t},
                            {
                                "quantity": "bias-voltage scale factor",
                                "type": "B",
                                "contribution": 3e-4 * t,
                            },
                        ]
                    },
                }
            )
        return CalibrationOutcome(results=results, method={"description": "stand-in"})

    return analyse


def test_job_with_resistance_and_pressure_logs(monkeypatch):
    from service.intake import load_files

    temps = np.geomspace(0.02, 0.2, 8)
    named = {
        "run.toml": b'[run]\nkind = "sensor_calibration"\n[sensor]\ntable_points = 9\n'
        b"[instruments]\nmelting_pressure_u_Pa = 25\n"
    }
    truth = {}
    r_rows, p_rows = [], []
    rows = "\n".join(f"{v:.3e},1.0e-5" for v in np.linspace(-1e-3, 1e-3, 31))
    for k, t in enumerate(temps):
        name = f"sweep_{k}.csv"
        truth[name] = float(t)
        start = 3600 * k
        named[name] = (
            f"# junctions_in_series: 10\n# sweep_started: 2026-11-23T{8 + k:02d}:00:00Z\n"
            f"# sweep_ended: 2026-11-23T{8 + k:02d}:30:00Z\nbias_V,conductance_S\n{rows}\n"
        ).encode()
        r = float(EXAMPLE_SENSOR.resistance(t))
        for j, s in enumerate(range(start, start + 1800, 300)):
            r_rows.append(f"{s},{r * (1 + 1e-4 * (-1) ** j):.6f}")
        if k in (1, 6):
            p_rows.append(f"{start + 600},{float(scales.melting_pressure(t)):.1f}")
        r_rows.append(f"{start + 2400},{r * 1.5:.6f}")  # between sweeps: must be ignored
    header = "# time_origin: 2026-11-23T08:00:00Z\n"
    named["bridge_log.csv"] = (header + "time_s,resistance_ohm\n" + "\n".join(r_rows)).encode()
    named["melting.csv"] = (header + "time_s,pressure_Pa\n" + "\n".join(p_rows)).encode()
    run = load_files(named)
    assert run.kind == "sensor_calibration"
    monkeypatch.setattr(sr.thermometry, "analyse", _fake_cbt(truth))
    outcome = sr.analyse(run, seed=1)
    section = outcome.sections["sensor_calibration"]
    for p, t in zip(section["points"], temps, strict=True):
        assert p["resistance_source"].startswith("bridge_log.csv (6 readings)")
        assert p["resistance_ohm"] == pytest.approx(float(EXAMPLE_SENSOR.resistance(t)), rel=1e-9)
        assert p["resistance_relative_u"] == pytest.approx(math.hypot(1.095e-4, 1e-4), rel=0.01)
    cross = section["plts2000_cross_check"]
    assert [c["sweep"] for c in cross] == ["sweep_1.csv", "sweep_6.csv"]
    assert all(abs(c["relative_difference"]) < 1e-6 for c in cross)
    assert cross[0]["pressure_standard_uncertainty_Pa"] == 25
    table = outcome.extra_files["calibration_table.csv"].decode().splitlines()
    assert table[0] == sr.CALIBRATION_TABLE_HEADER and len(table) == 10
    assert any("bridge resistance-scale" in d for d in outcome.deviations)
    assert "<svg" in outcome.plots["sensor calibration curve and deviations of the points"]


def test_job_refuses_stray_file_and_too_few_sweeps(monkeypatch):
    from service.intake import load_files

    rows = "\n".join(f"{v:.3e},1.0e-5" for v in np.linspace(-1e-3, 1e-3, 31))
    named = {
        f"s{k}.csv": (
            f"# junctions_in_series: 10\n# sensor_resistance_ohm: {1000 + k}\n"
            f"bias_V,conductance_S\n{rows}\n"
        ).encode()
        for k in range(3)
    }
    with pytest.raises(IntakeError, match="at least 4 CBT sweeps"):
        sr.analyse(load_files(named), seed=1)
    named["s3.csv"] = named["s0.csv"].replace(b"1000\n", b"1003\n")
    named["notes.csv"] = b"gate_V,current_A\n0,1\n"
    run = load_files({**named, "run.toml": b'[run]\nkind = "sensor_calibration"\n'})
    with pytest.raises(IntakeError, match="not a CBT sweep") as exc:
        sr.analyse(run, seed=1)
    assert exc.value.file == "notes.csv"


def test_global_fit_correlation_carried_into_points():
    names = ["s1.csv", "s2.csv", "s3.csv", "s4.csv"]
    sweeps = [
        _sweep(n, f"# sensor_resistance_ohm: {1000 * (i + 1)}\n") for i, n in enumerate(names)
    ]
    entries = {n: _entry(0.1 / (i + 1), 0.002, 3e-4, 1e-4) for i, n in enumerate(names)}
    readings = {f.name: sr.sensor_reading(f, None, 1e-4) for f in sweeps}
    # The global-fit section lists temperatures in its own order, then the charging energy.
    order = ["s3.csv", "s1.csv", "s4.csv", "s2.csv", "charging_energy"]
    corr = np.full((5, 5), 0.3) + 0.7 * np.eye(5)
    corr[0, 1] = corr[1, 0] = 0.8  # s3 with s1
    section = {"correlation_order": order, "temperature_correlation": corr.tolist()}
    rho = sr._global_correlation(section, names)
    assert rho[0, 2] == pytest.approx(0.8) and rho[1, 3] == pytest.approx(0.3)
    data = sr.points_from_cbt(sweeps, entries, readings, 2e-4, rho)
    assert data.ln_temperature_covariance[0, 2] == pytest.approx(0.8 * 0.002**2)
    assert sr._global_correlation(None, names) is None
    assert sr._global_correlation({**section, "correlation_order": order[:3]}, names) is None


def test_job_refuses_curve_that_cannot_follow_the_points(monkeypatch):
    from service.calibrations.outcome import CertificationRefused
    from service.intake import load_files

    # Six points over two decades allow degree 2 at most; with 0.2 % references the curvature of
    # this sensor leaves chi2 far beyond its degrees of freedom: refuse, do not inflate.
    temps = np.geomspace(0.01, 1.0, 6)
    rows = "\n".join(f"{v:.3e},1.0e-5" for v in np.linspace(-1e-3, 1e-3, 31))
    named, truth = {}, {}
    for k, t in enumerate(temps):
        name = f"s{k}.csv"
        truth[name] = float(t)
        r = float(EXAMPLE_SENSOR.resistance(t))
        named[name] = (
            f"# junctions_in_series: 10\n# sensor_resistance_ohm: {r:.4f}\n"
            f"bias_V,conductance_S\n{rows}\n"
        ).encode()
    monkeypatch.setattr(sr.thermometry, "analyse", _fake_cbt(truth))
    with pytest.raises(CertificationRefused, match="add calibration points"):
        sr.analyse(load_files(named), seed=1)


def test_example_certificate_renders_a_valid_dcc(dcc_schema_path):
    # The sensor certificate (its table points are results too) must go through the DCC
    # rendering and validate against the published DCC 3.3.0 schema (PTB), whose path comes
    # from COLDCERT_DCC_SCHEMA (see tests/conftest.py).
    etree = pytest.importorskip("lxml.etree")
    schema_path = dcc_schema_path
    from service.render.dcc import render_dcc

    record = json.loads((EXAMPLES / "sensor-larkspur-certificate" / "certificate.json").read_text())
    record["dates"]["issued"] = "2026-12-01"  # only an issued certificate is written as a DCC
    record["people"]["approver"] = "an approver"
    doc = etree.fromstring(render_dcc(record))
    schema = etree.XMLSchema(etree.parse(str(schema_path)))
    assert schema.validate(doc), schema.error_log.last_error
