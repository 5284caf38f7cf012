"""The CLI end to end on the bundled example run, and its refusals."""

import json
import shutil
from pathlib import Path

import pytest

from service.cli.main import main

EXAMPLE = Path(__file__).resolve().parent.parent / "example_runs" / "cbt-hollowmere"


@pytest.mark.slow
def test_certify_example_run(tmp_path, capsys):
    out = tmp_path / "cert"
    assert main(["certify", str(EXAMPLE), "--out", str(out)]) == 0
    record = json.loads((out / "certificate.json").read_text())
    html = (out / "certificate.html").read_text()
    assert record["state"] == "draft" and record["job"] == "cbt_thermometry"
    assert len(record["results"]) == 5
    for r in record["results"]:
        for key in ("name", "sweep", "value", "unit", "standard_uncertainty", "expanded_uncertainty",
                    "coverage_factor", "coverage_probability", "budget"):
            assert key in r
        assert r["unit"] == "K" and r["diagnostics"]["posterior"]["converged"]
        assert r["expanded_uncertainty"] == pytest.approx(r["coverage_factor"] * r["standard_uncertainty"])
        assert r["sweep"] in html
    # ISO/IEC 17025 7.8.2: unique id on the document, laboratory, customer, item, dates, statements.
    assert record["certificate_id"] in html and html.count(record["certificate_id"]) >= 2
    for key in ("laboratory", "customer", "item", "dates", "method", "traceability", "statements"):
        assert record[key]
    assert any("relate only to the item" in s for s in record["statements"])
    assert any("not an accreditation" in s for s in record["statements"])
    assert "<svg" in html
    assert "CC-" in capsys.readouterr().out


def test_same_run_same_bytes(tmp_path):
    run = tmp_path / "run"
    run.mkdir()
    shutil.copy(EXAMPLE / "sweep_03_60mK.csv", run)
    a, b = tmp_path / "a", tmp_path / "b"
    assert main(["certify", str(run), "--out", str(a), "--quick", "--seed", "7"]) == 0
    assert main(["certify", str(run), "--out", str(b), "--quick", "--seed", "7"]) == 0
    assert (a / "certificate.json").read_bytes() == (b / "certificate.json").read_bytes()
    assert (a / "certificate.html").read_bytes() == (b / "certificate.html").read_bytes()
    rec = json.loads((a / "certificate.json").read_text())
    assert rec["reproducibility"]["seed"] == 7
    assert any("quick-look" in d for d in rec["deviations"])


def test_bad_input_exits_nonzero_with_one_line_and_writes_nothing(tmp_path, capsys):
    run = tmp_path / "run"
    run.mkdir()
    lines = ["# junctions_in_series: 33", "bias_V,conductance_S"] + [f"{i * 1e-5},3e-6" for i in range(40)]
    lines[10] = "2e-4,oops"
    (run / "bad.csv").write_text("\n".join(lines) + "\n")
    out = tmp_path / "out"
    assert main(["certify", str(run), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0
    assert "bad.csv:11" in err and "conductance_S" in err and "oops" in err
    assert not out.exists()


def test_narrow_sweep_refused_with_file_and_field(tmp_path, capsys):
    from analysis.cbt.simulate import simulate_sweep

    bias, g, _ = simulate_sweep(33, 0.05, 0.01, 3e-6, seed=2, range_half_widths=2.0)
    run = tmp_path / "run"
    run.mkdir()
    (run / "narrow.csv").write_text(
        "# junctions_in_series: 33\nbias_V,conductance_S\n"
        + "".join(f"{float(v)!r},{float(c)!r}\n" for v, c in zip(bias, g, strict=True))
    )
    assert main(["certify", str(run), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "narrow.csv" in err and "bias_V" in err and "V_1/2" in err


def test_secondary_command_round_trip(tmp_path, capsys):
    # A certificate record with a global fit; zero-bias readings made from the depth series
    # (Farhangfar et al. 1997) at known temperatures must come back as those temperatures.
    from analysis.cbt.models import depth_series

    E, gt = 0.0072, 1.5e-5
    record = {
        "job": "cbt_thermometry",
        "dates": {"measured": "2099-01-01"},
        "sections": {"global_fit": {"charging_energy_K": E, "charging_energy_std_K": 1e-5}},
        "results": [{"fit": {"asymptotic_conductance_S": gt, "asymptotic_conductance_std_S": 1e-10,
                             "charging_energy_K": E, "charging_energy_std_K": 1e-5}}],
    }
    cert = tmp_path / "certificate.json"
    cert.write_text(json.dumps(record))
    temps = [0.012, 0.03, 0.09]
    log = tmp_path / "log.csv"
    log.write_text("time_s,conductance_S\n" + "".join(
        f"{60.0 * i},{gt * (1 - float(depth_series(E / T)))!r}\n" for i, T in enumerate(temps)))
    out = tmp_path / "T.csv"
    assert main(["secondary", str(cert), str(log), "--out", str(out)]) == 0
    rows = out.read_text().splitlines()
    # The contract's four columns first (rounded as a certificate prints them, GUM 7.2.6), then
    # the same two at full precision.
    assert rows[0] == ("time_s,conductance_S,temperature_K,standard_uncertainty_K,"
                       "temperature_unrounded_K,standard_uncertainty_unrounded_K")
    got = [float(r.split(",")[4]) for r in rows[1:]]
    assert got == pytest.approx(temps, rel=1e-9)
    from analysis.budget import round_for_report

    for row in rows[1:]:
        cells = row.split(",")
        assert (cells[2], cells[3]) == round_for_report(float(cells[4]), float(cells[5]))
        assert len(cells[3].replace("0.", "").lstrip("0")) == 2  # two significant digits of u
    # A reading outside the validated depth range is refused with its line and column.
    log.write_text("time_s,conductance_S\n0,1.0e-5\n")
    assert main(["secondary", str(cert), str(log), "--out", str(out)]) == 2
    assert "log.csv:2: conductance_S" in capsys.readouterr().err


@pytest.mark.parametrize(
    "argv",
    [["verify", "CC-2026-00001"], ["verify", "--all"], ["reproduce", "CC-2026-00001"]],
)
def test_read_only_commands_never_create_an_instance(tmp_path, monkeypatch, capsys, argv):
    # Without --instance, verify/reproduce used to create ./instance with a new lab key pair and
    # then report "not found". A missing instance is an error naming the folder searched.
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("COLDCERT_INSTANCE", raising=False)
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert str(tmp_path / "instance") in err and "--instance" in err
    assert list(tmp_path.iterdir()) == []
    missing = tmp_path / "elsewhere"
    assert main([*argv, "--instance", str(missing)]) == 2
    assert str(missing) in capsys.readouterr().err and not missing.exists()


def test_same_bytes_whatever_the_number_of_workers(tmp_path):
    # Sweeps are fitted on worker processes, each with its own seed: one process or two must
    # give the same certificate, byte for byte (quick-look rule to keep the test short).
    run = tmp_path / "run"
    run.mkdir()
    for name in ("sweep_04_120mK.csv", "sweep_05_250mK.csv"):
        shutil.copy(EXAMPLE / name, run)
    outs = {}
    for workers in ("1", "2"):
        outs[workers] = tmp_path / f"w{workers}"
        argv = ["certify", str(run), "--out", str(outs[workers]), "--quick", "--seed", "11",
                "--workers", workers]
        assert main(argv) == 0
    for name in ("certificate.json", "certificate.html"):
        assert (outs["1"] / name).read_bytes() == (outs["2"] / name).read_bytes()
    assert len(json.loads((outs["1"] / "certificate.json").read_text())["results"]) == 2


def test_workers_must_be_a_positive_number(tmp_path, capsys):
    with pytest.raises(SystemExit):
        main(["certify", str(EXAMPLE), "--out", str(tmp_path / "x"), "--workers", "0"])
    assert "--workers" in capsys.readouterr().err
