"""The fridge-sensor calibration job: CBT reference temperatures -> a calibration curve T(R).

A run of kind ``sensor_calibration`` is a set of CBT sweeps, each taken while the fridge's own
resistance thermometer was read. The primary temperature of every sweep comes from the CBT job
(:mod:`service.calibrations.cbt`, reused as is); this module pairs each with the sensor's resistance,
sorts the CBT budget into what is independent from point to point (the posterior, Type A) and
what is common to all points (every Type B row: the same bias chain, lock-in, device and model
serve every sweep), fits the curve with :mod:`analysis.sensors`, cross-checks against PLTS-2000
where ³He melting pressures are given, and returns the certificate content plus
``calibration_table.csv``. Formats are documented in docs/sensor_calibration.md.

It also provides the secondary use: converting a log of sensor resistances to temperatures with
the curve stored in a certificate (``coldcert sensor-temperatures``).
"""

from __future__ import annotations

import io
import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import numpy as np
from scipy import special

from analysis import scales, sensors
from service.calibrations import cbt as thermometry
from service.calibrations.outcome import CalibrationOutcome, CertificationRefused
from service.intake import (
    DataFile,
    IntakeError,
    Run,
    is_cbt_sweep,
    manifest_field,
    manifest_number,
    real_parser,
)
from service.intake.table import iso_datetime
from service.record.results import result_entry
from service.record.sensor_curve import CertificateError, curve_from_record, curve_record
from service.record.terms import CALIBRATION_TABLE_HEADER, CRITERION_NAMES

Progress = Callable[[float, str], None]

DEFAULT_TABLE_POINTS = 25
#: Defaults used when run.toml does not state them (listed on the certificate as deviations).
DEFAULT_BRIDGE_RELATIVE_U = 2e-4
DEFAULT_READING_RELATIVE_U = 1e-4
DEFAULT_MELTING_PRESSURE_U_PA = 50.0
#: A curve whose χ² has a p-value below this is refused rather than enlarged by its Birge ratio.
REFUSE_CHI2_P_VALUE = 1e-4


_positive_real = real_parser(0.0, lo_open=True)


# --------------------------------------------------------------------------------------------
# Reading the run


@dataclass(frozen=True)
class SensorReading:
    """The sensor's resistance during one sweep and its independent relative uncertainty."""

    resistance_ohm: float
    u_ln_resistance: float
    source: str
    readings: int


def _metadata(f: DataFile, key: str):
    """A metadata value whether intake typed it or kept it as free text (unregistered then)."""
    if key in f.metadata:
        return f.metadata[key], f.metadata_lines.get(key)
    if key in f.free_text:
        return f.free_text[key], None
    return None, None


def _metadata_parsed(f: DataFile, key: str, parse):
    """A metadata value through ``parse``, or None; a bad value names its file, line and key."""
    value, line = _metadata(f, key)
    if value is None:
        return None
    try:
        return parse(str(value))
    except ValueError as exc:
        raise IntakeError(str(exc), file=f.name, line=line, field=key) from None


def _metadata_time(f: DataFile, key: str) -> datetime | None:
    return _metadata_parsed(f, key, iso_datetime)


def _metadata_positive(f: DataFile, key: str) -> float | None:
    return _metadata_parsed(f, key, _positive_real)


@dataclass(frozen=True)
class TimedLog:
    """A ``time_s,<quantity>`` log with its time origin."""

    file: DataFile
    column: str
    origin: datetime

    def window(self, start: datetime, end: datetime) -> np.ndarray:
        t0 = (start - self.origin).total_seconds()
        t1 = (end - self.origin).total_seconds()
        t = self.file.columns["time_s"]
        return self.file.columns[self.column][(t >= t0) & (t <= t1)]


def _find_log(run: Run, column: str) -> TimedLog | None:
    logs = [f for f in run.files if "time_s" in f.columns and column in f.columns]
    if not logs:
        return None
    if len(logs) > 1:
        raise IntakeError(
            f"more than one time_s,{column} log ({', '.join(f.name for f in logs)}); "
            "merge them into one file",
            file=logs[1].name,
        )
    f = logs[0]
    origin = _metadata_time(f, "time_origin")
    if origin is None:
        raise IntakeError(
            "a log needs the line '# time_origin: <ISO 8601 date-time>' above the header, giving "
            "the moment at which time_s = 0, to be matched to the sweeps' times",
            file=f.name,
            field="time_origin",
        )
    t = f.columns["time_s"]
    if np.any(np.diff(t) <= 0):
        i = int(np.flatnonzero(np.diff(t) <= 0)[0]) + 1
        raise IntakeError(
            "time_s must increase from row to row",
            file=f.name,
            line=f.line_of_row(i),
            field="time_s",
        )
    values = f.columns[column]
    if np.any(values <= 0):
        i = int(np.flatnonzero(values <= 0)[0])
        raise IntakeError(
            f"must be positive, got {values[i]:g}", file=f.name, line=f.line_of_row(i), field=column
        )
    return TimedLog(f, column, origin)


def _sweep_span(f: DataFile, what: str) -> tuple[datetime, datetime]:
    start = _metadata_time(f, "sweep_started")
    end = _metadata_time(f, "sweep_ended")
    if start is None or end is None:
        raise IntakeError(
            f"to match the {what} log to this sweep, give '# sweep_started:' and "
            "'# sweep_ended:' (ISO 8601) above the header, or the value itself in the metadata",
            file=f.name,
            field="sweep_ended" if start is not None else "sweep_started",
        )
    if end <= start:
        raise IntakeError(
            "sweep_ended is not after sweep_started", file=f.name, field="sweep_ended"
        )
    return start, end


def sensor_reading(f: DataFile, log: TimedLog | None, reading_relative_u: float) -> SensorReading:
    """The sensor's resistance during a sweep: from its metadata, else from the matched log.

    From a log, the mean of the readings within the sweep's time span; its independent
    uncertainty is the relative spread (standard deviation) of those readings, not the standard
    error of their mean, because a drift of the fridge during the sweep is not averaged away;
    the bridge's own reading noise (``reading_relative_u``) is combined with it.
    """
    value = _metadata_positive(f, "sensor_resistance_ohm")
    if value is not None:
        return SensorReading(value, reading_relative_u, "sweep metadata", 1)
    if log is None:
        raise IntakeError(
            "no sensor resistance for this sweep: give '# sensor_resistance_ohm: R' above the "
            "header or a log file with columns time_s,resistance_ohm",
            file=f.name,
            field="sensor_resistance_ohm",
        )
    start, end = _sweep_span(f, "resistance")
    r = log.window(start, end)
    if r.size == 0:
        raise IntakeError(
            f"no readings of {log.file.name} fall within this sweep's time span "
            f"({start.isoformat()} to {end.isoformat()})",
            file=f.name,
            field="sweep_started",
        )
    mean = float(np.mean(r))
    spread = float(np.std(r, ddof=1) / mean) if r.size > 1 else 0.0
    return SensorReading(
        mean, math.hypot(spread, reading_relative_u), f"{log.file.name} ({r.size} readings)", r.size
    )


def melting_pressure(f: DataFile, log: TimedLog | None) -> tuple[float, int] | None:
    """The ³He melting pressure during a sweep (metadata, else the mean of the matched log)."""
    value = _metadata_positive(f, "melting_pressure_Pa")
    if value is not None:
        return value, 1
    if log is None:
        return None
    start, end = _sweep_span(f, "pressure")
    p = log.window(start, end)
    if p.size == 0:
        return None
    return float(np.mean(p)), int(p.size)


# --------------------------------------------------------------------------------------------
# From CBT results to calibration points


def points_from_cbt(
    sweeps: list[DataFile],
    entries: dict[str, dict],
    readings: dict[str, SensorReading],
    bridge_relative_u: float,
    posterior_correlation: np.ndarray | None = None,
) -> sensors.CalibrationData:
    """Calibration points with the CBT budget split into independent and common parts.

    The Type A rows of the sweeps' budgets (the posteriors) are independent from sweep to sweep,
    unless ``posterior_correlation`` (in sweep order) says otherwise: a global fit that shares
    the charging energy correlates the temperatures, and that correlation is kept. Every Type B
    row describes the same instrument, device or model for all sweeps (bias scale, excitation
    amplitude, junction non-uniformity, series resistance, model truncation) and is carried as
    one component fully correlated across the points, each point with its own size.
    """
    names = [f.name for f in sweeps]
    temperature = np.array([entries[n]["value"] for n in names])
    independent = np.zeros(len(names))
    common: dict[str, np.ndarray] = {}
    notes: dict[str, str] = {}
    for i, n in enumerate(names):
        t = temperature[i]
        for row in entries[n]["budget"]["rows"]:
            rel = row["contribution"] / t
            if row["type"] == "A":
                independent[i] = math.hypot(independent[i], rel)
            else:
                key = f"CBT: {row['quantity']}"
                common.setdefault(key, np.zeros(len(names)))[i] = rel
                notes[key] = row.get("note", "")
    components = [
        sensors.CorrelatedComponent(k, "temperature", v, notes[k]) for k, v in common.items()
    ]
    components.append(
        sensors.CorrelatedComponent.common(
            "sensor bridge: resistance scale",
            "resistance",
            bridge_relative_u,
            len(names),
            "calibration of the resistance bridge, common to every reading",
        )
    )
    covariance = None
    if posterior_correlation is not None:
        rho = np.asarray(posterior_correlation, dtype=float)
        if rho.shape != (len(names), len(names)):
            raise ValueError(f"posterior correlation must be {len(names)}x{len(names)}")
        covariance = rho * np.outer(independent, independent)
    return sensors.CalibrationData(
        resistance_ohm=[readings[n].resistance_ohm for n in names],
        temperature_K=temperature,
        u_ln_temperature=independent,
        ln_temperature_covariance=covariance,
        u_ln_resistance=[readings[n].u_ln_resistance for n in names],
        components=tuple(components),
        labels=tuple(names),
    )


def _table_bytes(resistance: np.ndarray, temperature: np.ndarray, expanded: np.ndarray) -> bytes:
    out = io.StringIO()
    out.write(CALIBRATION_TABLE_HEADER + "\n")
    for r, t, u in zip(resistance, temperature, expanded, strict=True):
        out.write(f"{r:.10g},{t:.10g},{u:.4g}\n")
    return out.getvalue().encode("utf-8")


def table_csv(table: sensors.CurveTable) -> bytes:
    """``calibration_table.csv``: the header exactly as documented, then one row per grid point."""
    return _table_bytes(table.resistance_ohm, table.temperature_K, table.expanded_uncertainty_K)


def table_csv_from_record(record: dict, source: str = "certificate.json") -> bytes:
    """``calibration_table.csv`` rebuilt from a certificate record (same bytes as certify wrote).

    For services that keep only the record: the table's rows are part of it.
    """
    if record.get("job") != "sensor_calibration":
        raise CertificateError(
            f"{source}: this certificate is for job {record.get('job')!r}, not a sensor calibration"
        )
    try:
        rows = record["sections"]["sensor_calibration"]["table"]["rows"]
        arrays = {
            k: np.array([float(r[k]) for r in rows])
            for k in ("resistance_ohm", "temperature_K", "expanded_uncertainty_K")
        }
    except (KeyError, TypeError, ValueError) as exc:
        raise CertificateError(
            f"{source}: the calibration table is missing or malformed ({exc})"
        ) from None
    return _table_bytes(
        arrays["resistance_ohm"], arrays["temperature_K"], arrays["expanded_uncertainty_K"]
    )


# --------------------------------------------------------------------------------------------
# Plot


def curve_svg(fit: sensors.CalibrationFit, table: sensors.CurveTable, title: str) -> str:
    """Curve and points (top); points relative to the curve with the curve's ±U band (bottom)."""
    from service.render.plots import plt, to_svg

    curve = fit.curve
    lo, hi = curve.resistance_range_ohm
    grid = np.geomspace(lo, hi, 300)
    grid[0], grid[-1] = lo, hi
    band = curve.table(grid)
    data = fit.data
    fig, (ax, axr) = plt.subplots(
        2, 1, figsize=(6.4, 5.6), sharex=True, gridspec_kw={"height_ratios": [2.2, 1.5]}
    )
    ax.plot(
        grid, band.temperature_K * 1e3, "-", color="tab:blue", lw=1.2, label="calibration curve"
    )
    ax.plot(
        data.resistance_ohm,
        data.temperature_K * 1e3,
        "o",
        ms=3.5,
        color="0.2",
        label="CBT reference points",
    )
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_ylabel("temperature (mK)")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    rel_u = band.expanded_uncertainty_K / band.temperature_K * 100
    axr.fill_between(
        grid, -rel_u, rel_u, color="tab:blue", alpha=0.2, lw=0, label="curve ± U (all components)"
    )
    axr.axhline(0.0, color="tab:blue", lw=0.8)
    deviation = np.expm1(fit.residuals_ln_T) * 100
    axr.errorbar(
        data.resistance_ohm,
        deviation,
        yerr=2 * data.u_ln_temperature * 100,
        fmt="o",
        ms=3,
        color="tab:red",
        elinewidth=0.8,
        label="points − curve (±2u, point's own part)",
    )
    axr.set_xscale("log")
    axr.set_xlabel("sensor resistance (Ω)")
    axr.set_ylabel("T / T_curve − 1 (%)")
    axr.legend(fontsize=7, frameon=False, loc="upper left")
    fig.align_ylabels()
    return to_svg(fig)


# --------------------------------------------------------------------------------------------
# The job



def _manifest_text(manifest: dict, section: str) -> dict:
    body = manifest.get(section, {})
    return {k: v for k, v in body.items() if isinstance(v, str | int | float | bool)}


def plts_cross_check(
    names: list[str],
    pressures: dict[str, tuple[float, int]],
    cbt: dict[str, dict],
    u_pressure: float,
) -> list[dict]:
    """CBT against PLTS-2000 where a melting pressure was read: differences and their ζ score.

    ζ = (T_CBT − T_PLTS) / sqrt(u²_CBT + u²_PLTS) with standard uncertainties; E_n is the same
    with expanded uncertainties (ISO 13528:2015, 9.6 and 9.7; from memory). The branch of the
    melting curve is taken from the CBT temperature.
    """
    rows = []
    for n in names:
        if n not in pressures:
            continue
        p, count = pressures[n]
        e = cbt[n]
        row = {
            "sweep": n,
            "pressure_Pa": p,
            "pressure_readings": count,
            "pressure_standard_uncertainty_Pa": u_pressure,
            "cbt_temperature_K": e["value"],
            "cbt_standard_uncertainty_K": e["standard_uncertainty"],
        }
        try:
            reading = scales.melting_temperature(
                p, temperature_hint=e["value"], pressure_uncertainty_Pa=u_pressure
            )
        except scales.ScaleRangeError as exc:
            row["status"] = f"not compared: {exc}"
            rows.append(row)
            continue
        u_plts = reading.standard_uncertainty(u_pressure)
        diff = e["value"] - reading.temperature_K
        u_diff = math.hypot(e["standard_uncertainty"], u_plts)
        big_u = math.hypot(e["expanded_uncertainty"], 2.0 * u_plts)
        row.update(
            {
                "status": "compared",
                "branch": reading.branch,
                "plts2000_temperature_K": reading.temperature_K,
                "plts2000_standard_uncertainty_K": u_plts,
                "difference_K": diff,
                "relative_difference": diff / reading.temperature_K,
                "normalised_difference_zeta": diff / u_diff if u_diff > 0 else None,
                "E_n": diff / big_u if big_u > 0 else None,
                "warnings": list(reading.warnings),
            }
        )
        rows.append(row)
    return rows


def _global_correlation(section: dict | None, names: list[str]) -> np.ndarray | None:
    """Correlation of the sweeps' posterior temperatures from the CBT global fit, if any."""
    if not section:
        return None
    order = list(section.get("correlation_order", []))
    matrix = np.asarray(section.get("temperature_correlation", []), dtype=float)
    if matrix.ndim != 2 or matrix.shape[0] != len(order) or not set(names) <= set(order):
        return None
    idx = [order.index(n) for n in names]
    return matrix[np.ix_(idx, idx)]


@dataclass(frozen=True)
class SensorSettings:
    """What run.toml says about the curve and the sensor side (docs/sensor_calibration.md)."""

    coverage: float
    bridge_u: float | None
    reading_u: float | None
    pressure_u: float | None
    table_points: int
    degree: int | None
    criterion: str

    @classmethod
    def from_manifest(cls, manifest: dict) -> SensorSettings:
        return cls(
            coverage=manifest_number(manifest, "run.coverage_probability", 0.95),
            bridge_u=manifest_number(manifest, "sensor.bridge_relative_u", None),
            reading_u=manifest_number(manifest, "sensor.reading_relative_u", None),
            pressure_u=manifest_number(manifest, "instruments.melting_pressure_u_Pa", None),
            table_points=manifest_field(manifest, "sensor.table_points", DEFAULT_TABLE_POINTS),
            degree=manifest_field(manifest, "sensor.degree"),
            criterion=manifest_field(manifest, "sensor.degree_criterion", "aicc"),
        )


def _sensor_side(run: Run, settings: SensorSettings):
    """The sweeps, the sensor reading and melting pressure of each: checked before any CBT fit."""
    sweeps = [f for f in run.files if is_cbt_sweep(f)]
    if len(sweeps) < 4:
        raise IntakeError(
            f"a sensor calibration needs at least 4 CBT sweeps (points), found {len(sweeps)}; "
            "12-20 spread over the range are recommended"
        )
    resistance_log = _find_log(run, "resistance_ohm")
    pressure_log = _find_log(run, "pressure_Pa")
    others = [
        f.name
        for f in run.files
        if not is_cbt_sweep(f)
        and f not in (getattr(resistance_log, "file", None), getattr(pressure_log, "file", None))
    ]
    if others:
        raise IntakeError(
            "not a CBT sweep, a time_s,resistance_ohm log or a time_s,pressure_Pa log; "
            f"found columns {sorted(run.file(others[0]).columns)}",
            file=others[0],
        )
    reading_u = DEFAULT_READING_RELATIVE_U if settings.reading_u is None else settings.reading_u
    readings = {f.name: sensor_reading(f, resistance_log, reading_u) for f in sweeps}
    pressures = {}
    for f in sweeps:
        p = melting_pressure(f, pressure_log)
        if p is not None:
            pressures[f.name] = p
    return sweeps, readings, pressures


def _fit_curve(data, settings: SensorSettings):
    """The calibration curve, or a refusal when it cannot follow the points."""
    try:
        fit = sensors.fit_calibration_curve(data, degree=settings.degree, criterion=settings.criterion)
    except sensors.CalibrationFitError as exc:
        raise CertificationRefused(f"calibration curve: {exc}") from None
    if fit.degrees_of_freedom > 0:
        p_value = float(special.chdtrc(fit.degrees_of_freedom, fit.chi_squared))
        if p_value < REFUSE_CHI2_P_VALUE:
            # Enlarging by the Birge ratio covers random excess scatter, not a curve that cannot
            # follow the points: that needs more points, a fixed higher degree or a look at the
            # points themselves, not a certificate.
            raise CertificationRefused(
                f"calibration curve: the degree-{fit.degree} curve misses the points far beyond "
                f"their uncertainties (chi2 = {fit.chi_squared:.3g} for {fit.degrees_of_freedom} "
                f"degrees of freedom, p = {p_value:.1e}; largest normalised residual "
                f"{np.max(np.abs(fit.normalised_residuals)):.3g} at "
                f"{data.labels[int(np.argmax(np.abs(fit.normalised_residuals)))]}). With "
                f"{data.n_points} points at most degree {sensors.maximum_degree(data.n_points)} "
                "is allowed: add calibration points, or check the points and their uncertainties"
            )
    return fit


def _results(sweeps, entries: dict, readings: dict, curve, table, coverage: float) -> list[dict]:
    """The reference temperatures first (as the CBT gave them), then the table's points."""
    results = []
    for f in sweeps:
        e = dict(entries[f.name])
        e["name"] = "reference temperature (CBT)"
        e["sensor_resistance_ohm"] = readings[f.name].resistance_ohm
        results.append(e)
    for i, r in enumerate(table.resistance_ohm):
        results.append(
            result_entry(
                name="temperature from the calibration curve",
                sweep=f"sensor at R = {r:.6g} ohm",
                quantity="T",
                unit="K",
                budget=curve.budget(float(r), coverage_probability=coverage),
                resistance_ohm=float(r),
                sensitivity_dlnR_dlnT=float(table.sensitivity_dlnR_dlnT[i]),
            )
        )
    return results


def _fit_record(fit, data) -> dict:
    return {
        "method": "generalised least squares on ln T with the full covariance of the points; "
        "resistance uncertainty through the curve's slope, iterated to convergence "
        "(effective variance)",
        "degree_criterion": fit.criterion,
        "degree": fit.degree,
        "maximum_degree_allowed": sensors.maximum_degree(data.n_points),
        "scores": [
            {
                "degree": s.degree,
                "chi_squared": s.chi_squared,
                "degrees_of_freedom": s.degrees_of_freedom,
                "aicc": s.aicc,
                "leave_one_out": s.loo,
                "monotonic": s.monotonic,
            }
            for s in fit.scores
        ],
        "chi_squared": fit.chi_squared,
        "degrees_of_freedom": fit.degrees_of_freedom,
        "birge_ratio": fit.birge_ratio,
        "iterations": fit.iterations,
        "warnings": list(fit.warnings),
    }


def _points_record(names: list[str], data, fit, readings: dict) -> list[dict]:
    return [
        {
            "sweep": n,
            "resistance_ohm": float(data.resistance_ohm[i]),
            "resistance_relative_u": float(data.u_ln_resistance[i]),
            "resistance_source": readings[n].source,
            "temperature_K": float(data.temperature_K[i]),
            "temperature_relative_u_independent": float(data.u_ln_temperature[i]),
            "temperature_relative_u_common": {
                c.name: float(c.relative_uncertainties[i])
                for c in data.components
                if c.quantity == "temperature"
            },
            "residual_ln_T": float(fit.residuals_ln_T[i]),
            "normalised_residual": float(fit.normalised_residuals[i]),
        }
        for i, n in enumerate(names)
    ]


def _table_record(table, coverage: float) -> dict:
    return {
        "file": "calibration_table.csv",
        "coverage_probability": coverage,
        "rows": [
            {
                "resistance_ohm": float(table.resistance_ohm[i]),
                "temperature_K": float(table.temperature_K[i]),
                "standard_uncertainty_K": float(table.standard_uncertainty_K[i]),
                "expanded_uncertainty_K": float(table.expanded_uncertainty_K[i]),
                "coverage_factor": float(table.coverage_factor[i]),
                "sensitivity_dlnR_dlnT": float(table.sensitivity_dlnR_dlnT[i]),
            }
            for i in range(table.resistance_ohm.size)
        ],
    }


def _hopping_record(hop) -> dict | None:
    if hop is None:
        return None
    return {
        "form": "R = R0 exp[(T0/T)^p] (variable-range hopping), a sanity check only",
        "r0_ohm": hop.r0_ohm,
        "t0_K": hop.t0_K,
        "exponent_p": hop.exponent,
        "chi_squared": hop.chi_squared,
        "degrees_of_freedom": hop.degrees_of_freedom,
        "max_relative_difference": hop.max_relative_difference,
        "max_normalised_difference": hop.max_normalised_difference,
        "at_resistance_ohm": hop.at_resistance_ohm,
        "note": hop.note,
    }


def _deviations(cbt, fit, settings: SensorSettings, pressures: dict) -> list[str]:
    deviations = list(cbt.deviations)
    if settings.bridge_u is None:
        deviations.append(
            f"bridge resistance-scale uncertainty not stated: {DEFAULT_BRIDGE_RELATIVE_U:g} "
            "relative assumed (common to all points)"
        )
    if settings.reading_u is None:
        deviations.append(
            f"sensor reading noise not stated: {DEFAULT_READING_RELATIVE_U:g} relative assumed"
        )
    if pressures and settings.pressure_u is None:
        deviations.append(
            f"melting-pressure uncertainty not stated: {DEFAULT_MELTING_PRESSURE_U_PA:g} Pa assumed"
        )
    deviations.extend(f"calibration curve: {w}" for w in fit.warnings)
    return deviations


def _method(cbt, fit) -> dict:
    return {
        "name": "Resistance-thermometer calibration against Coulomb-blockade primary thermometry",
        "description": (
            cbt.method.get("description", "")
            + " The fridge sensor's calibration curve, ln T as a Chebyshev series in normalised "
            "ln R, is fitted to these reference temperatures by generalised least squares with "
            "the full covariance of the points: the posterior parts are independent, the Type B "
            "parts (bias scale, excitation, non-uniformity, model) and the bridge's scale are "
            "common to all points and carried as correlated. The degree is chosen by "
            + CRITERION_NAMES.get(fit.criterion, fit.criterion)
            + " with at least two points per coefficient. Temperatures are given only inside "
            "the calibrated resistance range."
        ),
        "models": cbt.method.get("models", []),
    }


def analyse(
    run: Run, seed: int, progress: Progress | None = None, fast: bool = False
) -> CalibrationOutcome:
    """Sensor calibration: CBT temperature per sweep (the cbt kind), then the curve and table."""
    manifest = run.manifest
    settings = SensorSettings.from_manifest(manifest)
    # The sensor side is checked before spending minutes on the CBT fits.
    sweeps, readings, pressures = _sensor_side(run, settings)

    def cbt_progress(frac: float, step: str) -> None:
        if progress:
            progress(0.9 * frac, step)

    cbt = thermometry.analyse(run, seed, progress=cbt_progress, fast=fast)
    entries = {e["sweep"]: e for e in cbt.results}
    if progress:
        progress(0.92, "fitting the calibration curve")
    names = [f.name for f in sweeps]
    data = points_from_cbt(
        sweeps,
        entries,
        readings,
        DEFAULT_BRIDGE_RELATIVE_U if settings.bridge_u is None else settings.bridge_u,
        _global_correlation(cbt.sections.get("global_fit"), names),
    )
    fit = _fit_curve(data, settings)
    curve = fit.curve
    lo, hi = curve.resistance_range_ohm
    grid = np.geomspace(lo, hi, settings.table_points)
    grid[0], grid[-1] = lo, hi
    table = curve.table(grid, coverage_probability=settings.coverage)
    t_lo, t_hi = curve.temperature_range_K

    outcome = CalibrationOutcome(
        results=_results(sweeps, entries, readings, curve, table, settings.coverage))
    pressure_u = DEFAULT_MELTING_PRESSURE_U_PA if settings.pressure_u is None else settings.pressure_u
    section = {
        "sensor": _manifest_text(manifest, "sensor") or {"identifier": "not stated"},
        "valid_range": {
            "resistance_ohm": [lo, hi],
            "temperature_K": [t_lo, t_hi],
            "statement": "temperatures are given only for resistances inside this range; "
            "the curve is not extrapolated",
        },
        "curve": curve_record(curve),
        "fit": _fit_record(fit, data),
        "points": _points_record(names, data, fit, readings),
        "correlated_components": [
            {"name": c.name, "quantity": c.quantity, "note": c.note} for c in data.components
        ],
        "table": _table_record(table, settings.coverage),
        "hopping_check": _hopping_record(fit.hopping),
        "plts2000_cross_check": plts_cross_check(names, pressures, entries, pressure_u),
        "posterior_correlation": "from the CBT global fit (shared charging energy)"
        if data.ln_temperature_covariance is not None
        else "none: independent fits",
    }
    outcome.sections = {**cbt.sections, "sensor_calibration": section}
    title = (
        f"sensor calibration: degree {fit.degree}, {data.n_points} points, "
        f"{t_lo * 1e3:.3g}–{t_hi * 1e3:.4g} mK"
    )
    outcome.plots = {**cbt.plots,
                     "sensor calibration curve and deviations of the points": curve_svg(fit, table, title)}
    outcome.extra_files = {"calibration_table.csv": table_csv(table)}
    outcome.diagnostics = {**cbt.diagnostics, "curve_warnings": list(fit.warnings)}
    outcome.deviations = _deviations(cbt, fit, settings, pressures)
    outcome.method = _method(cbt, fit)
    outcome.conditions = {**cbt.conditions, "sensor": _manifest_text(manifest, "sensor")}
    if progress:
        progress(1.0, "done")
    return outcome




# --------------------------------------------------------------------------------------------
# Secondary use: resistance log -> temperatures


def load_certificate(path: str | Path) -> dict:
    """Read a certificate.json (or the folder holding one)."""
    import json

    p = Path(path)
    if p.is_dir():
        p = p / "certificate.json"
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise CertificateError(f"{p}: no such certificate") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise CertificateError(f"{p}: not a JSON certificate ({exc})") from None


def convert_log(
    record: dict,
    log: DataFile,
    *,
    reading_relative_u: float = 0.0,
    skip_out_of_range: bool = False,
    source: str = "certificate.json",
) -> tuple[bytes, int, int]:
    """Temperatures for a ``resistance_ohm`` log with the certificate's curve, as CSV bytes.

    Refuses the whole log if any reading lies outside the calibrated range (the error names the
    lines), unless ``skip_out_of_range``: those rows then keep their resistance with empty
    temperature cells and ``in_range`` 0. Returns (csv, rows converted, rows outside).
    """
    curve = curve_from_record(record, source)
    if "resistance_ohm" not in log.columns:
        raise IntakeError(
            f"expected a column resistance_ohm; found {', '.join(log.columns)}",
            file=log.name,
            line=log.header_line,
        )
    r = log.columns["resistance_ohm"]
    lo, hi = curve.resistance_range_ohm
    with np.errstate(divide="ignore", invalid="ignore"):
        x = sensors.normalise_log_resistance(r, curve.ln_resistance_min, curve.ln_resistance_max)
    outside = ~(np.isfinite(x) & (np.abs(x) <= 1.0 + 1e-9))
    if np.any(outside) and not skip_out_of_range:
        bad = np.flatnonzero(outside)
        shown = ", ".join(f"line {log.line_of_row(int(i))} ({r[i]:.6g} Ω)" for i in bad[:5])
        more = f" and {bad.size - 5} more" if bad.size > 5 else ""
        raise IntakeError(
            f"{bad.size} reading(s) outside the calibrated range {lo:.6g}–{hi:.6g} Ω: "
            f"{shown}{more}; the curve is not extrapolated (use --skip-out-of-range to convert "
            "the rest and leave these rows empty)",
            file=log.name,
            field="resistance_ohm",
        )
    coverage = (
        record["sections"]["sensor_calibration"].get("table", {}).get("coverage_probability", 0.95)
    )
    result = sensors.convert_resistance_log(
        curve,
        r,
        u_ln_resistance=reading_relative_u,
        coverage_probability=coverage,
        out_of_range="mark",
    )
    columns = [c for c in log.columns if c != "resistance_ohm"]
    out = io.StringIO()
    out.write(f"# certificate_id: {record.get('certificate_id', 'unknown')}\n")
    out.write(f"# calibrated_range_ohm: {lo:.10g} to {hi:.10g}\n")
    out.write(f"# coverage_probability: {coverage:g}\n")
    out.write(
        ",".join(
            [
                *columns,
                "resistance_ohm",
                "temperature_K",
                "standard_uncertainty_K",
                "expanded_uncertainty_K",
                "in_range",
            ]
        )
        + "\n"
    )
    for i in range(r.size):
        cells = [f"{log.columns[c][i]:.12g}" for c in columns] + [f"{r[i]:.12g}"]
        if result.in_range[i]:
            cells += [
                f"{result.temperature_K[i]:.10g}",
                f"{result.standard_uncertainty_K[i]:.4g}",
                f"{result.expanded_uncertainty_K[i]:.4g}",
                "1",
            ]
        else:
            cells += ["", "", "", "0"]
        out.write(",".join(cells) + "\n")
    n_out = int(np.sum(~result.in_range))
    return out.getvalue().encode("utf-8"), int(r.size - n_out), n_out
