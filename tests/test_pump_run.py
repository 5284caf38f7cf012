"""The pump job end to end: `coldcert certify RUN --out DIR` on pump runs, and its refusals."""

import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from analysis.pump import simulate
from service.calibrations.certify import certify_run
from service.cli.main import main
from service.intake import IntakeError, load_run

EXAMPLE = Path(__file__).resolve().parent.parent / "example_runs" / "pump-quillfen"


def _record_lines(cycles=8, per=12, deviation_ppm=0.0, seed=1, header=("frequency_Hz: 1.0e9",)):
    settings = simulate.RecordSettings(cycles=cycles, readings_per_segment=per, deviation_ppm=deviation_ppm,
                                       noise_a=5e-15, settling_tau_s=0.2)
    t, i, on = simulate.on_off_record(settings, seed=seed)
    lines = [f"# {h}" for h in header] + ["time_s,current_A,pump_on"]
    lines += [f"{float(a):g},{float(b)!r},{int(c)}" for a, b, c in zip(t, i, on, strict=True)]
    return lines


def _run(tmp_path, files: dict[str, list[str]], manifest: str | None = None) -> Path:
    run = tmp_path / "run"
    run.mkdir(parents=True, exist_ok=True)
    for name, lines in files.items():
        (run / name).write_text("\n".join(lines) + "\n")
    if manifest is not None:
        (run / "run.toml").write_text(manifest)
    return run


def _refusal(tmp_path, files, manifest=None) -> IntakeError:
    with pytest.raises(IntakeError) as info:
        certify_run(load_run(_run(tmp_path, files, manifest)), seed=1, fast=True)
    return info.value


# ----- minimal form -----------------------------------------------------------------------------


def test_minimal_record_without_manifest(tmp_path, capsys):
    run = _run(tmp_path, {"record.csv": _record_lines(deviation_ppm=50.0)})
    out = tmp_path / "out"
    assert main(["certify", str(run), "--out", str(out), "--quick"]) == 0
    record = json.loads((out / "certificate.json").read_text())
    assert record["job"] == "pump_verification"
    (r,) = record["results"]
    for key in ("name", "sweep", "value", "unit", "standard_uncertainty", "expanded_uncertainty",
                "coverage_factor", "coverage_probability", "budget"):
        assert key in r
    assert r["unit"] == "ppm" and r["sweep"] == "record.csv"
    assert r["expanded_uncertainty"] == pytest.approx(r["coverage_factor"] * r["standard_uncertainty"])
    assert abs(r["value"] - 50.0) < 5 * r["standard_uncertainty"]
    # No manifest: ideal ammeter assumed, and the certificate says so.
    assert r["ammeter_chain"]["ideal"]
    assert any("ideal ammeter" in d for d in record["deviations"])
    html = (out / "certificate.html").read_text()
    assert "ideal ammeter" in html and "not an accreditation" in html
    cycles = (out / "cycles_record.csv").read_text()
    assert cycles.count("\n") == 8 + 2
    # Every value a plain number a lab's script can read back (not a numpy repr).
    rows = [line.split(",") for line in cycles.splitlines()[2:]]
    assert all(len(row) == 4 and all(float(x) == float(x) for x in row[1:]) for row in rows)
    assert "ppm" in capsys.readouterr().out


def test_electrons_per_cycle_in_the_file(tmp_path):
    # Two electrons per cycle at 500 MHz give the same current as one at 1 GHz (I = n e f).
    lines = _record_lines(header=("frequency_Hz: 5.0e8", "electrons_per_cycle: 2"))
    cert = certify_run(load_run(_run(tmp_path, {"r.csv": lines})), seed=3, fast=True)
    (r,) = cert.record["results"]
    assert r["electrons_per_cycle"] == 2
    assert r["nominal_current_A"] == pytest.approx(160.2176634e-12, rel=1e-15)


# ----- refusals, each naming file, line and field ---------------------------------------------


def test_missing_frequency(tmp_path):
    err = _refusal(tmp_path, {"rec.csv": _record_lines(header=())})
    assert (err.file, err.field) == ("rec.csv", "frequency_Hz")
    assert "frequency_Hz: 1.0e9" in err.message


def test_misspelt_frequency_key(tmp_path):
    err = _refusal(tmp_path, {"rec.csv": _record_lines(header=("frequency_hz: 1e9",))})
    assert (err.file, err.line, err.field) == ("rec.csv", 1, "frequency_hz")
    assert "frequency_Hz" in err.message


def test_negative_frequency(tmp_path):
    err = _refusal(tmp_path, {"rec.csv": _record_lines(header=("note: x", "frequency_Hz: -1e9"))})
    assert (err.file, err.line, err.field) == ("rec.csv", 2, "frequency_Hz")
    assert "positive" in err.message


@pytest.mark.parametrize("n", ["0", "1000", "1.5", "many"])
def test_absurd_electron_number(tmp_path, n):
    err = _refusal(tmp_path, {"rec.csv": _record_lines(header=("frequency_Hz: 1e9", f"electrons_per_cycle: {n}"))})
    assert (err.file, err.line, err.field) == ("rec.csv", 2, "electrons_per_cycle")


def test_unsorted_and_repeated_times(tmp_path):
    lines = _record_lines()
    header_at = lines.index("time_s,current_A,pump_on")
    swapped = list(lines)
    swapped[header_at + 5], swapped[header_at + 6] = swapped[header_at + 6], swapped[header_at + 5]
    err = _refusal(tmp_path, {"rec.csv": swapped})
    assert (err.file, err.field) == ("rec.csv", "time_s")
    assert err.line == header_at + 1 + 6 and "earlier" in err.message
    repeated = list(lines)
    t_prev = repeated[header_at + 9].split(",")[0]
    repeated[header_at + 10] = t_prev + "," + repeated[header_at + 10].split(",", 1)[1]
    err = _refusal(tmp_path / "b", {"rec.csv": repeated})
    assert err.line == header_at + 1 + 10 and "repeats" in err.message


def test_record_without_off_segments(tmp_path):
    lines = _record_lines()
    lines = lines[:2] + [ln.rsplit(",", 1)[0] + ",1" for ln in lines[2:]]
    err = _refusal(tmp_path, {"rec.csv": lines})
    assert (err.file, err.field) == ("rec.csv", "pump_on") and "no pump-off" in err.message


def test_record_with_one_cycle(tmp_path):
    err = _refusal(tmp_path, {"rec.csv": _record_lines(cycles=1)})
    assert (err.file, err.field) == ("rec.csv", "pump_on") and "1 complete" in err.message


def test_pump_state_other_than_zero_or_one(tmp_path):
    lines = _record_lines()
    lines[7] = lines[7].rsplit(",", 1)[0] + ",0.5"
    err = _refusal(tmp_path, {"rec.csv": lines})
    assert (err.file, err.line, err.field) == ("rec.csv", 8, "pump_on")


def test_wrong_frequency_is_refused_not_certified(tmp_path):
    # 1 GHz data declared as 1 MHz: the on−off current is a thousand times n·e·f.
    err = _refusal(tmp_path, {"rec.csv": _record_lines(header=("frequency_Hz: 1e6",))})
    assert err.field == "frequency_Hz" and "check frequency_Hz" in err.message


def test_scan_that_never_reaches_a_plateau(tmp_path):
    gate = np.linspace(-1, 0, 200)
    scan = ["# frequency_Hz: 1e9", "gate_V,current_A"] + [
        f"{float(g)!r},{float((g + 1) * 2.5 * 160.2e-12)!r}" for g in gate]
    err = _refusal(tmp_path, {"rec.csv": _record_lines(), "scan.csv": scan})
    assert (err.file, err.field) == ("scan.csv", "current_A")
    assert "never reaches a current plateau" in err.message


def test_unknown_ammeter_key_and_bad_kind(tmp_path):
    files = {"rec.csv": _record_lines()}
    err = _refusal(tmp_path, files, '[ammeter]\nkind = "transresistance"\ngain_u_pmm = 0.1\n')
    assert err.file == "run.toml" and err.field == "ammeter.gain_u_pmm" and "gain_u_ppm" in err.message
    err = _refusal(tmp_path, files, '[ammeter]\nkind = "clamp meter"\n')
    assert err.field == "ammeter.kind"


def test_transient_the_segments_cannot_outlast_is_refused_not_certified(tmp_path):
    # 16 s segments with a 6 s transient after each switch-on: too slow for the segments, so the
    # record analysis refuses, and the job says which file (analysis.pump.settling).
    from service.calibrations.outcome import CertificationRefused

    settings = simulate.RecordSettings(cycles=30, readings_per_segment=16, noise_a=100e-15,
                                       settling_tau_s=0.2, transient_on=((200e-15, 6.0),))
    t, i, on = simulate.on_off_record(settings, seed=0)
    lines = ["# frequency_Hz: 1.0e9", "time_s,current_A,pump_on"]
    lines += [f"{float(a):g},{float(b)!r},{int(c)}" for a, b, c in zip(t, i, on, strict=True)]
    with pytest.raises(CertificationRefused, match="slow.csv: .*settling transient.*longer segments"):
        certify_run(load_run(_run(tmp_path, {"slow.csv": lines})), seed=1, fast=True)


def test_cli_refusal_is_one_line_and_writes_nothing(tmp_path, capsys):
    run = _run(tmp_path, {"rec.csv": _record_lines(header=())})
    out = tmp_path / "out"
    assert main(["certify", str(run), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "rec.csv" in err and "frequency_Hz" in err
    assert not (out / "certificate.json").exists()


# ----- the invented example run, end to end -----------------------------------------------------


@pytest.mark.slow
def test_certify_example_pump_run(tmp_path, capsys):
    run = tmp_path / "pump"
    shutil.copytree(EXAMPLE, run)
    out = tmp_path / "cert"
    assert main(["certify", str(run), "--out", str(out), "--quick"]) == 0
    record = json.loads((out / "certificate.json").read_text())
    html = (out / "certificate.html").read_text()
    (r,) = record["results"]
    assert r["unit"] == "ppm" and r["sweep"] == "record_1GHz.csv"
    assert not r["ammeter_chain"]["ideal"]
    # The chain's Type B rows are in the budget and the Monte Carlo check is reported beside it.
    quantities = [row["quantity"] for row in r["budget"]["rows"]]
    assert any("transresistance" in q for q in quantities) and any("frequency" in q for q in quantities)
    assert r["monte_carlo"]["draws"] > 0 and "gum_framework_validated" in r["monte_carlo"]
    # The invented pump is 0.3 ppm low; the result must cover it at the stated coverage (seeded).
    assert abs(r["value"] - (-0.3)) <= r["expanded_uncertainty"]
    scans = {s["file"]: s for s in record["sections"]["plateau_scans"]}
    assert scans["scan_exit_gate.csv"]["model_comparison"]["preferred"] == "decay_cascade"
    assert scans["map_exit_entrance.csv"]["best"]["gate2_V"] == pytest.approx(-0.25)
    assert record["sections"]["error_counting"]["errors"] == 2
    assert html.count("<svg") >= 5
    for words in ("What was verified", "Allan deviation", "not an accreditation", "Electrical standards",
                  "Settling transient, measured from the record"):
        assert words in html
    assert record["item"]["identifier"] == "LQ-P12"
    # The settling transient is measured: the stated 20 s is only the floor of the discard, and
    # what the fits predict in the kept readings has its own budget row.
    st = r["record"]["settling_transient"]
    assert st["discard_s"] >= 20.0 and st["minimum_discard_s"] == 20.0
    assert st["components"][0]["resolved"]
    assert "settling transient left after the discard" in quantities


def test_same_pump_run_same_bytes(tmp_path):
    # Archive re-analysis needs bit-for-bit reproducibility from the seed (scan MCMC, map draws,
    # Monte Carlo, plots).
    gate = np.linspace(-0.8, -0.3, 120)
    scan = simulate.plateau_scan(gate, 1.0e9, "decay_cascade", np.array([55.0, -0.7, -0.45]), seed=2)
    files = {"rec.csv": _record_lines(),
             "scan.csv": ["# frequency_Hz: 1e9", "gate_V,current_A"]
             + [f"{float(g)!r},{float(i)!r}" for g, i in zip(gate, scan, strict=True)]}
    run = _run(tmp_path, files)
    a = certify_run(load_run(run), seed=11, fast=True)
    b = certify_run(load_run(run), seed=11, fast=True)
    assert a.files() == b.files()
    assert a.record["sections"]["plateau_scans"][0]["working_point"]["samples"] > 0
