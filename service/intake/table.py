"""The fixed table of what a run may say: file metadata keys and run.toml fields, per kind.

Every key and field a calibration kind reads is listed here once, with its type and range. Intake
checks all of them when a run is loaded, so ``coldcert check`` (and the web upload) refuse
exactly what ``certify`` would refuse before fitting; the calibration kinds read their values
through :func:`manifest_number` and the typed ``DataFile.metadata``, never parse them again.
Formats: docs/formats.md (CBT, sensor) and docs/pump_formats.md (pump).
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime

KIND_CBT = "cbt_thermometry"
KIND_SENSOR = "sensor_calibration"
KIND_PUMP = "pump_verification"
KINDS = (KIND_CBT, KIND_SENSOR, KIND_PUMP)
THERMOMETRY = frozenset({KIND_CBT, KIND_SENSOR})
PUMP = frozenset({KIND_PUMP})
ALL = frozenset(KINDS)


# --------------------------------------------------------------------------------------------
# Value parsers: text (CSV metadata) or TOML values to typed values, ValueError with a message.


def integer_parser(lo: int, hi: int | None = None) -> Callable[[object], int]:
    """Whole numbers in [lo, hi]; accepts text ('4', '4.0') and TOML integers (not booleans)."""

    def parse(value: object) -> int:
        if isinstance(value, bool):
            raise ValueError(f"expected a whole number, got {value!r}")
        _ascii_number(value)
        try:
            number = float(value)  # type: ignore[arg-type]
        except (TypeError, ValueError):
            raise ValueError(f"expected a whole number, got {value!r}") from None
        if not number.is_integer():
            raise ValueError(f"expected a whole number, got {value!r}")
        number = int(number)
        if number < lo or (hi is not None and number > hi):
            bound = f"≥ {lo}" if hi is None else f"from {lo} to {hi}"
            raise ValueError(f"expected a whole number {bound}, got {number}")
        return number

    return parse


def real_parser(lo: float = -math.inf, hi: float = math.inf, lo_open: bool = False) -> Callable[[object], float]:
    """Finite numbers in a range; accepts text and TOML numbers (not booleans)."""

    def parse(value: object) -> float:
        if isinstance(value, bool):
            raise ValueError(f"expected a number, got {value!r}")
        _ascii_number(value)
        try:
            number = float(value)  # type: ignore[arg-type]
        except (TypeError, ValueError):
            raise ValueError(f"expected a number, got {value!r}") from None
        if not math.isfinite(number):
            raise ValueError(f"expected a finite number, got {value!r}")
        if number < lo or (lo_open and number == lo) or number > hi:
            if lo == 0 and lo_open and hi == math.inf:
                raise ValueError(f"expected a positive number, got {number:g}")
            bound = f"{'>' if lo_open else '≥'} {lo:g}" if hi == math.inf else f"in [{lo:g}, {hi:g}]"
            raise ValueError(f"expected a number {bound}, got {number:g}")
        return number

    return parse


def _ascii_number(value: object) -> None:
    # float() also reads full-width and other scripts' digits ("１２"); a lab file holding them
    # was most likely pasted from somewhere it should not have been, so say so.
    if isinstance(value, str) and not value.isascii():
        raise ValueError(f"expected a number written in ASCII digits, got {value!r}")


def choice_parser(*options: str) -> Callable[[object], str]:
    def parse(value: object) -> str:
        if value not in options:
            raise ValueError(f"expected {' or '.join(repr(o) for o in options)}, got {value!r}")
        return str(value)

    return parse


def boolean(value: object) -> bool:
    if not isinstance(value, bool):
        raise ValueError(f"expected true or false, got {value!r}")
    return value


def text(value: object) -> str:
    if not isinstance(value, str | int | float) or isinstance(value, bool):
        raise ValueError(f"expected text, got {value!r}")
    return str(value)


def iso_datetime(value: object) -> datetime:
    """An ISO 8601 date-time; without a zone it is taken as UTC."""
    try:
        parsed = datetime.fromisoformat(str(value).strip().replace("Z", "+00:00"))
    except ValueError:
        raise ValueError(
            f"expected an ISO 8601 date-time such as 2026-11-24T09:00:00Z, got {value!r}"
        ) from None
    return parsed if parsed.tzinfo is not None else parsed.replace(tzinfo=UTC)


def iso_datetime_text(value: object) -> str:
    """An ISO 8601 date or date-time, checked and kept as written (e.g. 2026-11-24T13:00:00Z)."""
    iso_datetime(value)
    return str(value).strip()


@dataclass(frozen=True)
class KeySpec:
    """One entry of the table: how to parse it, what it means, which kinds read it."""

    parse: Callable[[object], object]
    description: str
    kinds: frozenset[str] = ALL


# --------------------------------------------------------------------------------------------
# CSV metadata keys ('# key: value' above the header). Unknown keys close to one of these are
# refused as likely typos; others are kept as free text.

_positive = real_parser(0.0, lo_open=True)
_non_negative = real_parser(0.0)


def _electrons(value: object) -> int:
    """n, electrons per cycle: a whole number from 1 to the largest the pump model accepts."""
    # Imported here: the CLI reads this table at start-up, and analysis pulls in scipy.
    from analysis.pump.quantized import MAX_ELECTRONS_PER_CYCLE

    return integer_parser(1, MAX_ELECTRONS_PER_CYCLE)(value)


METADATA_KEYS: dict[str, KeySpec] = {
    # CBT sweeps (docs/formats.md)
    "junctions_in_series": KeySpec(integer_parser(2, 10_000), "N, tunnel junctions in series in one row", THERMOMETRY),
    "parallel_rows": KeySpec(integer_parser(1, 100_000), "M, identical rows in parallel (default 1)", THERMOMETRY),
    "excitation_rms_V": KeySpec(_non_negative, "lock-in excitation, rms volts across the whole device", THERMOMETRY),
    "series_resistance_ohm": KeySpec(_non_negative, "two-wire lead resistance in series with the array", THERMOMETRY),
    "ground_capacitance_ratio": KeySpec(_non_negative, "C_0/C, island-to-ground over junction capacitance", THERMOMETRY),
    "sensor_resistance_ohm": KeySpec(_positive, "fridge sensor's resistance during the sweep", THERMOMETRY),
    "sweep_started": KeySpec(iso_datetime_text, "ISO 8601 date-time when the sweep began", THERMOMETRY),
    "sweep_ended": KeySpec(iso_datetime_text, "ISO 8601 date-time when the sweep ended", THERMOMETRY),
    "bath_temperature_K": KeySpec(_positive, "fridge reading, for information only", THERMOMETRY),
    "device": KeySpec(text, "device identifier"),
    "note": KeySpec(text, "free text"),
    # Sensor calibration (docs/sensor_calibration.md)
    "melting_pressure_Pa": KeySpec(_positive, "³He melting pressure read during the sweep (PLTS-2000 cross-check)",
                                   frozenset({KIND_SENSOR})),
    "time_origin": KeySpec(lambda v: iso_datetime(v).isoformat(), "ISO 8601 date-time at which time_s = 0",
                           frozenset({KIND_SENSOR})),
    # Pump records and scans (docs/pump_formats.md)
    "frequency_Hz": KeySpec(_positive, "pump drive frequency f in hertz (required)", PUMP),
    "electrons_per_cycle": KeySpec(_electrons, "n, electrons per cycle (default 1)", PUMP),
    "settling_s": KeySpec(_non_negative, "least time dropped after each pump switch, seconds "
                          "(the transient measured in the record may call for more)", PUMP),
    "operating_gate_V": KeySpec(real_parser(), "gate voltage at which a record was taken", PUMP),
    "second_gate_V": KeySpec(real_parser(), "second gate voltage at which a record or scan was taken", PUMP),
    "magnetic_field_T": KeySpec(real_parser(), "applied magnetic field", PUMP),
}


# --------------------------------------------------------------------------------------------
# run.toml fields, by dotted path.

_ppm = real_parser(-1e5, 1e5)
_ppm_u = real_parser(0.0, 1e5)
_coverage = real_parser(0.5, 0.9999)

MANIFEST_FIELDS: dict[str, KeySpec] = {
    "run.kind": KeySpec(choice_parser(*KINDS), "calibration kind (detected from the files if absent)"),
    # Stored in a 64-bit signed integer column.
    "run.seed": KeySpec(integer_parser(0, 2**63 - 1), "seed of every random draw"),
    "run.coverage_probability": KeySpec(_coverage, "coverage probability of U (default 0.95)"),
    "run.linear_background": KeySpec(boolean, "fit a linear background under the dip", THERMOMETRY),
    "run.traceability": KeySpec(text, "traceability statement replacing the default"),
    # CBT device and instruments (docs/formats.md)
    "device.coupling_W_per_K5": KeySpec(_positive, "electron-phonon coupling Σ·Ω", THERMOMETRY),
    "device.electron_phonon_constant_W_per_K5_m3": KeySpec(_positive, "Σ (with island_volume_m3)", THERMOMETRY),
    "device.island_volume_m3": KeySpec(_positive, "Ω (with electron_phonon_constant_W_per_K5_m3)", THERMOMETRY),
    "device.heat_leak_W": KeySpec(_non_negative, "parasitic heat into the islands (default 0)", THERMOMETRY),
    "device.coupling_relative_u": KeySpec(real_parser(0.0, 1.0), "relative u of the coupling (default 0.3)", THERMOMETRY),
    "device.resistance_spread": KeySpec(real_parser(0.0, 0.5), "relative spread of junction resistances", THERMOMETRY),
    "device.series_resistance_u_ohm": KeySpec(_non_negative, "u of the lead resistance", THERMOMETRY),
    "instruments.bias_scale_relative_u": KeySpec(real_parser(0.0, 0.5), "relative u of the bias-voltage scale", THERMOMETRY),
    "instruments.excitation_relative_u": KeySpec(real_parser(0.0, 1.0), "relative u of the lock-in excitation", THERMOMETRY),
    # Sensor calibration (docs/sensor_calibration.md)
    "sensor.bridge_relative_u": KeySpec(real_parser(0.0, 0.1), "relative u of the bridge's scale", frozenset({KIND_SENSOR})),
    "sensor.reading_relative_u": KeySpec(real_parser(0.0, 0.1), "relative u of one sensor reading", frozenset({KIND_SENSOR})),
    "sensor.table_points": KeySpec(integer_parser(2, 10_000), "rows of calibration_table.csv", frozenset({KIND_SENSOR})),
    "sensor.degree": KeySpec(integer_parser(0), "fixed curve degree (else chosen)", frozenset({KIND_SENSOR})),
    "sensor.degree_criterion": KeySpec(choice_parser("aicc", "loo"), "how the degree is chosen", frozenset({KIND_SENSOR})),
    "instruments.melting_pressure_u_Pa": KeySpec(real_parser(0.0, 1e5), "u of the melting pressure", frozenset({KIND_SENSOR})),
    # Pump (docs/pump_formats.md)
    "pump.frequency_Hz": KeySpec(_positive, "drive frequency for files that do not state it", PUMP),
    "pump.electrons_per_cycle": KeySpec(_electrons, "n for files that do not state it (default 1)", PUMP),
    "pump.settling_s": KeySpec(_non_negative, "least time dropped after each switch", PUMP),
    "pump.operating_gate_V": KeySpec(real_parser(), "gate voltage of the records", PUMP),
    "pump.second_gate_V": KeySpec(real_parser(), "second gate voltage", PUMP),
    "pump.magnetic_field_T": KeySpec(real_parser(), "applied magnetic field", PUMP),
    "pump.temperature_K": KeySpec(real_parser(0.0), "bath temperature", PUMP),
    "pump.description": KeySpec(text, "free text", PUMP),
    "pump.note": KeySpec(text, "free text", PUMP),
    "ammeter.kind": KeySpec(choice_parser("transresistance", "reference_resistor"), "the chain's kind", PUMP),
    "ammeter.description": KeySpec(text, "free text", PUMP),
    "ammeter.calibration": KeySpec(text, "calibration certificate reference", PUMP),
    "ammeter.gain_correction_ppm": KeySpec(_ppm, "(A − A_nom)/A_nom in ppm", PUMP),
    "ammeter.gain_u_ppm": KeySpec(_ppm_u, "u of the gain correction, ppm", PUMP),
    "ammeter.gain_dof": KeySpec(real_parser(1.0), "degrees of freedom of the gain calibration", PUMP),
    "ammeter.gain_drift_ppm": KeySpec(_ppm_u, "half-width of the drift allowance, ppm", PUMP),
    "ammeter.voltmeter_correction_ppm": KeySpec(_ppm, "voltmeter relative correction, ppm", PUMP),
    "ammeter.voltmeter_u_ppm": KeySpec(_ppm_u, "its standard uncertainty, ppm", PUMP),
    "ammeter.frequency_u_ppm": KeySpec(_ppm_u, "relative u of the frequency reference, ppm", PUMP),
    "ammeter.leakage_A": KeySpec(real_parser(0.0, 1e-9), "half-width of the leakage allowance, A", PUMP),
    "error_counting.errors": KeySpec(integer_parser(0), "pump errors counted", PUMP),
    "error_counting.cycles": KeySpec(integer_parser(1), "cycles counted", PUMP),
    "error_counting.confidence": KeySpec(real_parser(0.5, 0.9999), "confidence of the upper bound", PUMP),
    "error_counting.detector": KeySpec(text, "free text", PUMP),
    "error_counting.note": KeySpec(text, "free text", PUMP),
}

#: Sections whose keys are all in MANIFEST_FIELDS: anything else in them is refused.
CLOSED_SECTIONS = ("pump", "ammeter", "error_counting")


class FieldError(ValueError):
    """A manifest field that the table refuses: ``field`` is its dotted path."""

    def __init__(self, message: str, field: str) -> None:
        super().__init__(message)
        self.field = field


def lookup(manifest: Mapping, path: str) -> tuple[bool, object]:
    """(present, value) of a dotted path in the manifest."""
    node: object = manifest
    for part in path.split("."):
        if not isinstance(node, Mapping) or part not in node:
            return False, None
        node = node[part]
    return True, node


def manifest_value(manifest: Mapping, path: str, default: object = None) -> object:
    """The typed value of a listed field, or ``default`` if absent; FieldError if refused."""
    present, raw = lookup(manifest, path)
    if not present:
        return default
    try:
        return MANIFEST_FIELDS[path].parse(raw)
    except ValueError as exc:
        raise FieldError(str(exc), path) from None


def check_manifest_fields(manifest: Mapping, kind: str) -> None:
    """Every listed field present, unknown keys of the closed sections, and the rules that tie
    fields together; FieldError at the first problem."""
    for section in CLOSED_SECTIONS:
        body = manifest.get(section) or {}
        known = [p.split(".", 1)[1] for p in MANIFEST_FIELDS if p.startswith(section + ".")]
        for key in body:
            if key not in known:
                close = difflib.get_close_matches(key, known, n=1, cutoff=0.7)
                hint = f"; did you mean {close[0]!r}?" if close else f"; known keys: {', '.join(sorted(known))}"
                raise FieldError("unknown key" + hint, f"{section}.{key}")
    for path in MANIFEST_FIELDS:
        manifest_value(manifest, path)
    _check_rules(manifest, kind)


def _check_rules(manifest: Mapping, kind: str) -> None:
    device = manifest.get("device") or {}
    if kind in THERMOMETRY and "coupling_W_per_K5" not in device and (
        ("electron_phonon_constant_W_per_K5_m3" in device) != ("island_volume_m3" in device)
    ):
        raise FieldError("give both electron_phonon_constant_W_per_K5_m3 and island_volume_m3, or "
                         "coupling_W_per_K5", "device")
    if kind != KIND_PUMP:
        return
    if manifest.get("ammeter") and "kind" not in manifest["ammeter"]:
        raise FieldError("expected 'transresistance' or 'reference_resistor'", "ammeter.kind")
    counts = manifest.get("error_counting") or {}
    if counts:
        for key in ("errors", "cycles"):
            if key not in counts:
                raise FieldError("expected a whole number", f"error_counting.{key}")
        if counts["errors"] > counts["cycles"]:
            raise FieldError(f"more errors ({counts['errors']}) than cycles ({counts['cycles']})",
                             "error_counting")
