"""`coldcert check` refuses every input that `certify` refuses before fitting.

Table-driven: one case per metadata key and per run.toml field of the intake table
(service/intake/table.py), each given a value its kind cannot use, plus the file-level refusals
of pump records. For each case:
- intake (what `check` and the web upload run) refuses it, naming the key or field;
- the calibration kind itself, handed the same files *without* intake's checks, refuses it too
  before it starts fitting, or accepts it (intake may be stricter, never looser). A case where
  the kind reaches its fit raises a sentinel, so no case ever runs a fit.
"""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest

from service.calibrations import cbt, pump, sensor
from service.calibrations.registry import calibration_for
from service.intake import IntakeError, Run, detect_kind, load_files, parse_csv
from service.intake.table import MANIFEST_FIELDS, METADATA_KEYS, text

# --------------------------------------------------------------------------------------------
# Minimal runs of each kind (invented numbers; shapes only, never a reference value)


def _sweep(metadata: str = "", name_resistance: float | None = None) -> bytes:
    bias = np.linspace(-2e-3, 2e-3, 41)
    conductance = 1e-5 * (1 - 0.05 / np.cosh(bias / 4e-4) ** 2)
    lines = ["# junctions_in_series: 10"]
    if name_resistance is not None:
        lines.append(f"# sensor_resistance_ohm: {name_resistance}")
    lines += [m for m in metadata.splitlines() if m]
    lines.append("bias_V,conductance_S")
    lines += [f"{b:.9g},{g:.9g}" for b, g in zip(bias, conductance, strict=True)]
    return ("\n".join(lines) + "\n").encode()


def _record(metadata: str = "# frequency_Hz: 1.0e9") -> bytes:
    lines = [m for m in metadata.splitlines() if m]
    lines.append("time_s,current_A,pump_on")
    t = 0.0
    for cycle in range(8):
        for on in (0, 1):
            for _ in range(10):
                lines.append(f"{t!r},{(160.2e-12 if on else 0.0) + 1e-15 * cycle!r},{on}")
                t += 1.0
    lines += [f"{t + k!r},0.0,0" for k in range(10)]
    return ("\n".join(lines) + "\n").encode()


def _files(kind: str, metadata: str = "") -> dict[str, bytes]:
    if kind == "cbt_thermometry":
        return {"s1.csv": _sweep(metadata)}
    if kind == "sensor_calibration":
        return {f"s{i}.csv": _sweep(metadata if i == 0 else "", 1000.0 + 100 * i) for i in range(5)}
    return {"record.csv": _record("# frequency_Hz: 1.0e9\n" + metadata)}


def _kind_of(spec) -> str:
    return sorted(spec.kinds)[0] if len(spec.kinds) < 3 else "cbt_thermometry"


# --------------------------------------------------------------------------------------------
# The cases: a value the key's own parser refuses, for every key that is not free text.

def _bad_text_for(spec) -> str:
    return "1.0e9x"


METADATA_CASES = [
    pytest.param(key, _kind_of(spec), id=f"metadata-{key}")
    for key, spec in METADATA_KEYS.items()
    if spec.parse is not text
]


def _bad_toml_for(path: str) -> str:
    spec = MANIFEST_FIELDS[path]
    try:
        spec.parse(7.0)
    except ValueError:
        return "7.0"  # out of range, e.g. bias_scale_relative_u = 7.0
    try:
        spec.parse(2.5)
    except ValueError:
        return "2.5"  # not a whole number
    return '"1.0e9x"'  # not a number at all


MANIFEST_CASES = [
    pytest.param(path, _kind_of(spec), id=f"manifest-{path}")
    for path, spec in MANIFEST_FIELDS.items()
    if spec.parse is not text
]


def _manifest(kind: str, path: str, value: str) -> bytes:
    section, key = path.split(".", 1)
    body = {"run": [f'kind = "{kind}"']}
    if path == "run.kind":
        body["run"] = [f"kind = {value}"]
    else:
        body.setdefault(section, []).append(f"{key} = {value}")
    if section == "ammeter" and key != "kind":
        body["ammeter"].insert(0, 'kind = "transresistance"')
    if section == "error_counting" and key not in ("errors", "cycles"):
        body["error_counting"] += ["errors = 1", "cycles = 1000"]
    if section == "error_counting" and key == "errors":
        body["error_counting"].append("cycles = 1000")
    if section == "error_counting" and key == "cycles":
        body["error_counting"].append("errors = 1")
    return "\n".join(f"[{s}]\n" + "\n".join(lines) for s, lines in body.items()).encode() + b"\n"


@pytest.fixture
def no_fitting(monkeypatch):
    """Reaching a fit is a failure of this test: the refusal must come before it."""

    class ReachedFit(Exception):
        pass

    def boom(*args, **kwargs):
        raise ReachedFit("the calibration reached its fit")

    monkeypatch.setattr(cbt, "fit_file", boom)
    monkeypatch.setattr(sensor.thermometry, "analyse", boom)
    monkeypatch.setattr(pump.R, "analyse_record", boom)
    return ReachedFit


def _unchecked_run(named: dict[str, bytes]) -> Run:
    """The files as certify's kind sees them, but without intake's run-level checks."""
    manifest = tomllib.loads(named["run.toml"].decode()) if "run.toml" in named else {}
    files = tuple(parse_csv(n, raw) for n, raw in sorted(named.items()) if n.endswith(".csv"))
    kind = manifest.get("run", {}).get("kind") if isinstance(manifest.get("run", {}).get("kind"), str) \
        else detect_kind(list(files), {})
    return Run(path="", manifest=manifest, files=files, kind=kind)


def _certify_refuses(named, no_fitting) -> IntakeError | None:
    run = _unchecked_run(named)
    try:
        calibration_for(run.kind).analyse(run, 1, fast=True)
    except IntakeError as exc:
        return exc
    except no_fitting:
        return None
    except NotImplementedError:
        return None
    return None


@pytest.mark.parametrize(("key", "kind"), METADATA_CASES)
def test_check_refuses_each_bad_metadata_value(key, kind):
    named = _files(kind, f"# {key}: 1.0e9x")
    with pytest.raises(IntakeError) as refused:
        load_files(named)
    assert refused.value.field == key and refused.value.line is not None


@pytest.mark.parametrize(("path", "kind"), MANIFEST_CASES)
def test_check_refuses_each_bad_manifest_field(path, kind, no_fitting):
    value = _bad_toml_for(path)
    named = {**_files(kind), "run.toml": _manifest(kind, path, value)}
    certify_error = None if path == "run.kind" else _certify_refuses(named, no_fitting)
    with pytest.raises(IntakeError) as refused:
        load_files(named)
    assert refused.value.file == "run.toml"
    assert refused.value.field == path, refused.value.describe()
    if certify_error is not None:
        assert certify_error.field == path, certify_error.describe()


def test_the_two_reported_cases():
    # A pump file with frequency_Hz: 1.0e9x and a manifest with bias_scale_relative_u = 7.0
    # both passed `check` before the intake table existed.
    with pytest.raises(IntakeError, match="expected a number") as bad_frequency:
        load_files({"record.csv": _record("# frequency_Hz: 1.0e9x")})
    assert bad_frequency.value.field == "frequency_Hz"
    manifest = b"[instruments]\nbias_scale_relative_u = 7.0\n"
    with pytest.raises(IntakeError, match=r"in \[0, 0.5\]") as bad_scale:
        load_files({"s1.csv": _sweep(), "run.toml": manifest})
    assert bad_scale.value.field == "instruments.bias_scale_relative_u"


PUMP_FILE_CASES = [
    pytest.param("time_s,current_A,pump_on\n" + "".join(f"{k},1e-10,{k % 2 * 2}\n" for k in range(40)),
                 "pump_on", id="pump_on-not-0-or-1"),
    pytest.param("time_s,current_A,pump_on\n" + "".join(f"{40 - k},1e-10,{k // 5 % 2}\n" for k in range(40)),
                 "time_s", id="time-not-increasing"),
    pytest.param("time_s,current_A,pump_on\n" + "".join(f"{k},1e-10,1\n" for k in range(40)),
                 "pump_on", id="no-off-readings"),
    pytest.param("time_s,current_A,pump_on\n" + "".join(f"{k},1e-10,{int(k >= 20)}\n" for k in range(40)),
                 "pump_on", id="too-few-cycles"),
]


@pytest.mark.parametrize(("body", "field"), PUMP_FILE_CASES)
def test_check_refuses_pump_records_certify_refuses(body, field, no_fitting):
    named = {"record.csv": ("# frequency_Hz: 1.0e9\n" + body).encode()}
    certify_error = _certify_refuses(named, no_fitting)
    assert certify_error is not None and certify_error.field == field
    with pytest.raises(IntakeError) as refused:
        load_files(named)
    assert refused.value.field == field


def test_valid_minimal_runs_pass_check():
    for kind in ("cbt_thermometry", "sensor_calibration", "pump_verification"):
        assert load_files(_files(kind)).kind == kind
    assert math.isfinite(float(METADATA_KEYS["frequency_Hz"].parse("1.0e9")))
