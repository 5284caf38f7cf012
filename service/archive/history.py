"""An item's life in the archive: its certificates in time order and what they say together.

Given every certificate of one item (all revisions and states), this module builds the history
an auditor reads: the timeline, the series of the quantities that characterise the item across
calibrations, their drift models and predictions (analysis.drift), the recommended recall
interval and due date (analysis.intervals), and for a resistance thermometer the differences
ΔT(R) between successive calibration curves (analysis.curve_comparison).

What enters the series: only certificates in force (state ``issued``). A superseded revision is
replaced by its successor, a withdrawn certificate is not valid, a draft is not yet valid; all
are listed in the timeline with their state. The date of a calibration is the record's
``dates.measured`` (the date the item was measured), else the issue date.

What is tracked, by kind of run:

* CBT thermometry: the charging energy E_C (from the global fit, else the weighted mean of the
  sweeps) and the asymptotic conductance G_T (weighted mean of the sweeps);
* sensor calibration: T at reference resistances spread over the range all curves share, with
  u(T) from each curve's covariance, and ΔT(R) between successive curves;
* pump verification: the relative deviation from n·e·f per frequency, and the working-point gate
  voltage of each plateau scan.

The laboratory's recall policy (maximum permissible change of each quantity, interval bounds)
comes from the service configuration; without a stated maximum permissible change no drift
interval is computed and the item falls back on the policy's default interval, which the history
says. Pure functions of the records and the policy: no database, no web.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, timedelta
from typing import Any

import numpy as np

from analysis import curve_comparison as cc
from analysis import drift
from analysis import intervals as iv
from analysis.sensors import CalibrationCurve
from service.record.sensor_curve import CertificateError, curve_from_record

KIND_CBT = "cbt_thermometry"
KIND_SENSOR = "sensor_calibration"
KIND_PUMP = "pump_verification"

#: The laboratory's recall policy when its configuration states none. No maximum permissible
#: change is assumed: the interval is then the default interval, and the history says so.
DEFAULT_POLICY: dict[str, Any] = {
    "default_interval_days": 365,
    "maximum_interval_days": 730,
    "minimum_interval_days": 30,
    "reliability_target": 0.95,
    # quantity key -> {"max_change": number, "relative": bool}; keys are listed in QUANTITY_KEYS.
    "max_permissible_change": {},
    # names of covariance parts two sensor calibrations share -> correlation coefficient
    "shared_components": {},
}

QUANTITY_KEYS = {
    KIND_CBT: ("charging_energy", "asymptotic_conductance"),
    KIND_SENSOR: ("temperature",),
    KIND_PUMP: ("deviation", "working_point"),
}

#: Reference resistances per sensor history (log-spaced over the range all curves share).
SENSOR_REFERENCE_POINTS = 3


class HistoryInputError(ValueError):
    """A record that cannot enter the history as it stands; names the certificate and field."""


@dataclass(frozen=True)
class CertificateEntry:
    """One certificate of the item as the archive holds it."""

    certificate_id: str
    revision: int
    state: str
    kind: str
    item: str
    record: Mapping[str, Any]
    issued_at: str | None = None
    created_at: str | None = None
    replaces: str | None = None
    superseded_by: str | None = None
    withdrawn_reason: str | None = None

    @property
    def calibration_date(self) -> date | None:
        measured = (self.record.get("dates") or {}).get("measured")
        for text in (measured, self.issued_at, self.created_at):
            if text:
                try:
                    return date.fromisoformat(str(text)[:10])
                except ValueError:
                    continue
        return None


@dataclass
class Series:
    """Values of one quantity across the certificates in force."""

    key: str
    name: str
    unit: str
    certificate_ids: list[str] = field(default_factory=list)
    dates: list[date] = field(default_factory=list)
    values: list[float] = field(default_factory=list)
    uncertainties: list[float] = field(default_factory=list)
    note: str = ""

    def add(self, certificate_id: str, day: date, value: float, u: float) -> None:
        if not (math.isfinite(value) and math.isfinite(u) and u > 0):
            return
        self.certificate_ids.append(certificate_id)
        self.dates.append(day)
        self.values.append(float(value))
        self.uncertainties.append(float(u))

    def history(self) -> drift.CalibrationHistory:
        return drift.CalibrationHistory(
            np.array([d.toordinal() for d in self.dates], dtype=float),
            np.array(self.values),
            np.array(self.uncertainties),
            tuple(self.certificate_ids),
            self.name,
            self.unit,
        )


# --------------------------------------------------------------------------------------------
# Reading quantities from records


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or value is None:
        return None
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out if math.isfinite(out) else None


def _weighted_mean(pairs: Sequence[tuple[float, float]]) -> tuple[float, float] | None:
    """Weighted mean and its standard uncertainty, enlarged by the Birge ratio when the values
    scatter more than their uncertainties allow (common practice, no source)."""
    pairs = [(v, u) for v, u in pairs if u > 0]
    if not pairs:
        return None
    v = np.array([p[0] for p in pairs])
    w = 1.0 / np.array([p[1] for p in pairs]) ** 2
    mean = float(np.sum(w * v) / np.sum(w))
    u = math.sqrt(1.0 / float(np.sum(w)))
    if v.size > 1:
        birge2 = float(np.sum(w * (v - mean) ** 2)) / (v.size - 1)
        u *= math.sqrt(max(birge2, 1.0))
    return mean, u


def _cbt_quantities(record: Mapping[str, Any]) -> dict[str, tuple[float, float]]:
    out: dict[str, tuple[float, float]] = {}
    section = (record.get("sections") or {}).get("global_fit") or {}
    ec, u_ec = (
        _number(section.get("charging_energy_K")),
        _number(section.get("charging_energy_std_K")),
    )
    fits = [r.get("fit") or {} for r in record.get("results") or [] if isinstance(r, Mapping)]

    def over_sweeps(value_key: str, std_key: str) -> tuple[float, float] | None:
        pairs = [(_number(f.get(value_key)), _number(f.get(std_key))) for f in fits]
        return _weighted_mean([(v, u) for v, u in pairs if v is not None and u])

    if ec is not None and u_ec:
        out["charging_energy"] = (ec, u_ec)
    elif mean := over_sweeps("charging_energy_K", "charging_energy_std_K"):
        out["charging_energy"] = mean
    if mean := over_sweeps("asymptotic_conductance_S", "asymptotic_conductance_std_S"):
        out["asymptotic_conductance"] = mean
    return out


def _pump_quantities(record: Mapping[str, Any]) -> dict[str, tuple[float, float, str]]:
    """(value, u, label) by series key; one deviation per frequency, one working point per scan."""
    out: dict[str, tuple[float, float, str]] = {}
    for r in record.get("results") or []:
        if not isinstance(r, Mapping) or "n·e·f" not in str(r.get("quantity", "")):
            continue
        v, u = _number(r.get("value")), _number(r.get("standard_uncertainty"))
        f = _number(r.get("frequency_Hz"))
        if v is None or not u:
            continue
        label = f"f = {f / 1e9:g} GHz" if f else str(r.get("sweep", ""))
        out[f"deviation|{label}"] = (v, u, label)
    for scan in (record.get("sections") or {}).get("plateau_scans") or []:
        if not isinstance(scan, Mapping):
            continue
        wp = scan.get("working_point") or {}
        v, u = _number(wp.get("gate_V")), _number(wp.get("gate_standard_uncertainty_V"))
        if v is None or not u:
            continue
        f = _number(scan.get("frequency_Hz"))
        label = f"plateau {wp.get('plateau', '?')}" + (f", f = {f / 1e9:g} GHz" if f else "")
        out[f"working_point|{label}"] = (v, u, label)
    return out


# --------------------------------------------------------------------------------------------
# The history


def checked_policy(policy: Mapping[str, Any] | None) -> dict[str, Any]:
    """The laboratory's recall policy merged over the defaults, or HistoryInputError naming the
    setting that is wrong (RECALL_POLICY in the instance's config.py)."""
    if policy is not None and not isinstance(policy, Mapping):
        raise HistoryInputError("RECALL_POLICY must be a mapping (see docs/history.md)")
    merged = dict(DEFAULT_POLICY)
    merged.update(policy or {})
    unknown = sorted(set(merged) - set(DEFAULT_POLICY))
    if unknown:
        raise HistoryInputError(
            f"RECALL_POLICY: unknown setting(s) {', '.join(unknown)}; known: "
            f"{', '.join(sorted(DEFAULT_POLICY))}"
        )
    for key in ("default_interval_days", "maximum_interval_days", "minimum_interval_days"):
        value = _number(merged[key])
        if value is None or value < 0 or (value == 0 and key != "minimum_interval_days"):
            raise HistoryInputError(f"RECALL_POLICY: {key} must be a positive number of days")
    if not (
        merged["minimum_interval_days"]
        <= merged["default_interval_days"]
        <= merged["maximum_interval_days"]
    ):
        raise HistoryInputError(
            "RECALL_POLICY: need minimum_interval_days <= default_interval_days <= "
            "maximum_interval_days"
        )
    target = _number(merged["reliability_target"])
    if target is None or not 0 < target < 1:
        raise HistoryInputError("RECALL_POLICY: reliability_target must lie between 0 and 1")
    known = sorted({k for keys in QUANTITY_KEYS.values() for k in keys})
    changes = merged["max_permissible_change"]
    if not isinstance(changes, Mapping):
        raise HistoryInputError("RECALL_POLICY: max_permissible_change must map quantities")
    for key in changes:
        if key not in known:
            raise HistoryInputError(
                f"RECALL_POLICY: max_permissible_change names {key!r}; tracked quantities are "
                f"{', '.join(known)}"
            )
        if _max_change(merged, key, 1.0) is None:  # raises for other non-positive values
            raise HistoryInputError(
                f"RECALL_POLICY: max_permissible_change[{key!r}] must be a positive number"
            )
    shared = merged["shared_components"]
    if not isinstance(shared, Mapping) or not all(
        (rho := _number(v)) is not None and -1 <= rho <= 1 for v in shared.values()
    ):
        raise HistoryInputError(
            "RECALL_POLICY: shared_components must map component names to correlations in [-1, 1]"
        )
    return merged


def _fmt_date(day: date | None) -> str | None:
    return day.isoformat() if day else None


def _model_dict(model: drift.DriftModel) -> dict[str, Any]:
    out: dict[str, Any] = {
        "model": model.kind,
        "aicc": None if math.isinf(model.aicc) else model.aicc,
        "log_likelihood": model.log_likelihood,
        "chi_squared": model.chi_squared,
        "birge_ratio": None if math.isnan(model.birge_ratio) else model.birge_ratio,
        "scaled_by_residuals": model.scaled,
        "level": float(model.coefficients[0]),
    }
    if model.kind == "linear":
        out["drift_per_year"] = model.drift_per_day * drift.DAYS_PER_YEAR
        out["drift_per_year_standard_uncertainty"] = (
            model.drift_standard_uncertainty_per_day * drift.DAYS_PER_YEAR
        )
    if model.kind == "random_walk":
        out["diffusion_per_year"] = model.diffusion_per_day * drift.DAYS_PER_YEAR
    return out


def _max_change(policy: Mapping[str, Any], key: str, reference: float) -> float | None:
    stated = (policy.get("max_permissible_change") or {}).get(key)
    if not stated:
        return None
    value = _number(stated.get("max_change")) if isinstance(stated, Mapping) else _number(stated)
    if value is None or value <= 0:
        raise HistoryInputError(
            f"recall policy: max_permissible_change[{key!r}] must be a positive number"
        )
    relative = bool(stated.get("relative")) if isinstance(stated, Mapping) else False
    return value * abs(reference) if relative else value


def _analyse_series(
    series: Series, policy: Mapping[str, Any], today: date, departures: bool = True
) -> dict[str, Any]:
    """One tracked quantity: its points, drift models, departures and trend, the prediction
    for today and the recall interval the policy gives."""
    h = series.history()
    analysis = drift.analyse_drift(h)
    out: dict[str, Any] = {
        "key": series.key,
        "name": series.name,
        "unit": series.unit,
        "note": series.note,
        "points": _points(series),
        "criterion": analysis.criterion,
        "chosen_model": analysis.chosen.kind,
        "models": [_model_dict(m) for m in analysis.candidates],
        "stable_chi_squared": analysis.stable_chi_squared,
        "stable_p_value": None if math.isnan(analysis.stable_p_value) else analysis.stable_p_value,
        "notes": list(analysis.notes),
    }
    if h.n > 1:
        out["successive_en"] = [float(e) for e in drift.successive_en(h)]
        checks = drift.sequential_checks(h) if h.n >= 3 and departures else ()
        out["departures"] = [
            {
                "certificate_id": c.label,
                "en": c.en,
                "departs": c.departs,
                "predicted": c.prediction.value,
                "predicted_expanded_uncertainty": c.prediction.expanded_uncertainty,
                "model": c.model,
            }
            for c in checks
        ]
    trend = drift.judge_trend(h, analysis=analysis)
    out["changed"] = trend.changed
    out["changed_reasons"] = list(trend.reasons)
    if h.n >= 2 and h.span_days > 0:
        predict_at = max(today, series.dates[-1])
        p = analysis.chosen.predict(float(predict_at.toordinal()))
        out["prediction"] = {
            "date": predict_at.isoformat(),
            "value": p.value,
            "standard_uncertainty": p.standard_uncertainty,
            "expanded_uncertainty": p.expanded_uncertainty,
            "coverage_factor": p.coverage_factor,
            "model": analysis.chosen.kind,
        }
    out["interval"] = _interval(series, analysis, policy, out["notes"])
    out["_analysis"] = analysis
    return out


def _points(series: Series) -> list[dict[str, Any]]:
    return [
        {
            "certificate_id": cid,
            "date": d.isoformat(),
            "value": v,
            "standard_uncertainty": u,
            "expanded_uncertainty": 2.0 * u,
        }
        for cid, d, v, u in zip(
            series.certificate_ids, series.dates, series.values, series.uncertainties, strict=True
        )
    ]


def _interval(
    series: Series, analysis: Any, policy: Mapping[str, Any], notes: list[str]
) -> dict[str, Any] | None:
    """The recall interval of one quantity from its drift model and the policy's maximum
    permissible change (None, with a note saying why, when there is none)."""
    max_change = _max_change(policy, series.key, series.values[-1])
    model = analysis.interval_model
    if max_change is None:
        notes.append("no maximum permissible change stated for this quantity")
        return None
    if model is None:
        notes.append("one calibration date only: no drift interval yet")
        return None
    r = iv.drift_interval(
        model,
        max_change,
        reliability_target=float(policy["reliability_target"]),
        maximum_interval_days=float(policy["maximum_interval_days"]),
        minimum_interval_days=float(policy["minimum_interval_days"]),
    )
    return {
        "method": r.method,
        "interval_days": r.interval_days,
        "limited_by": r.limited_by,
        "unlimited_interval_days": None
        if math.isinf(r.unlimited_interval_days)
        else r.unlimited_interval_days,
        "max_permissible_change": max_change,
        "reliability_target": r.reliability_target,
        "model": r.model,
        "note": r.note,
    }


def _sensor_series(
    in_force: list[CertificateEntry], curves: dict[str, CalibrationCurve]
) -> tuple[list[Series], list[str]]:
    notes: list[str] = []
    ids = [e.certificate_id for e in in_force if e.certificate_id in curves]
    if not ids:
        return [], notes
    lo = max(curves[i].ln_resistance_min for i in ids)
    hi = min(curves[i].ln_resistance_max for i in ids)
    if not hi > lo:
        notes.append(
            "the calibrated resistance ranges of the curves share no common part; T(R) cannot be "
            "followed at fixed resistances"
        )
        return [], notes
    # Reference points inside the shared range, away from its ends by a tenth of its width.
    ln_r = np.linspace(lo + 0.1 * (hi - lo), hi - 0.1 * (hi - lo), SENSOR_REFERENCE_POINTS)
    out = []
    for lr in ln_r:
        r = float(np.exp(lr))
        s = Series("temperature", f"T at R = {r:.6g} ohm", "K")
        for e in in_force:
            if e.certificate_id not in curves:
                continue
            t, u = curves[e.certificate_id].temperature(r)
            s.add(e.certificate_id, e.calibration_date, float(t[0]), float(u[0]))
        s.note = (
            "u(T) from each curve's covariance; components shared between calibrations "
            "are treated as independent here"
        )
        out.append(s)
    return out, notes


def _curve_differences(
    in_force: list[CertificateEntry], curves: dict[str, CalibrationCurve], policy: Mapping
) -> list[dict[str, Any]]:
    shared_policy = dict(policy.get("shared_components") or {})
    ordered = [e for e in in_force if e.certificate_id in curves]
    out = []
    for first, second in zip(ordered, ordered[1:], strict=False):
        c1, c2 = curves[first.certificate_id], curves[second.certificate_id]
        names1 = {p.name for p in c1.covariance_parts}
        names2 = {p.name for p in c2.covariance_parts}
        shared = {k: float(v) for k, v in shared_policy.items() if k in names1 and k in names2}
        entry: dict[str, Any] = {
            "first": first.certificate_id,
            "second": second.certificate_id,
            "shared_components": [{"name": k, "correlation": v} for k, v in sorted(shared.items())],
        }
        try:
            d = cc.curve_difference(
                c1, c2, cc.common_resistances(c1, c2, 15), shared_components=shared
            )
        except (cc.CurveComparisonError, ValueError) as exc:
            entry["error"] = str(exc)
            out.append(entry)
            continue
        entry["rows"] = [
            {
                "resistance_ohm": float(d.resistance_ohm[i]),
                "first_temperature_K": float(d.first_temperature_K[i]),
                "second_temperature_K": float(d.second_temperature_K[i]),
                "difference_K": float(d.difference_K[i]),
                "standard_uncertainty_K": float(d.standard_uncertainty_K[i]),
                "uncorrelated_standard_uncertainty_K": float(
                    d.uncorrelated_standard_uncertainty_K[i]
                ),
                "expanded_uncertainty_K": float(d.expanded_uncertainty_K[i]),
                "normalised_difference": float(d.normalised_difference[i]),
            }
            for i in range(d.resistance_ohm.size)
        ]
        entry["max_normalised_difference"] = float(np.max(d.normalised_difference))
        entry["differ"] = bool(np.any(d.normalised_difference > 1.0))
        out.append(entry)
    return out


def _timeline_entry(e: CertificateEntry) -> dict[str, Any]:
    record = e.record
    results = []
    for r in (record.get("results") or [])[:50]:
        if isinstance(r, Mapping):
            results.append(
                {
                    "name": r.get("name"),
                    "sweep": r.get("sweep"),
                    "value": r.get("value"),
                    "unit": r.get("unit"),
                    "standard_uncertainty": r.get("standard_uncertainty"),
                    "expanded_uncertainty": r.get("expanded_uncertainty"),
                }
            )
    software = (record.get("reproducibility") or {}).get("software") or {}
    return {
        "certificate_id": e.certificate_id,
        "revision": e.revision,
        "state": e.state,
        "kind": e.kind,
        "calibration_date": _fmt_date(e.calibration_date),
        "issued_at": e.issued_at,
        "created_at": e.created_at,
        "customer": (record.get("customer") or {}).get("name"),
        "replaces": e.replaces,
        "superseded_by": e.superseded_by,
        "withdrawn_reason": e.withdrawn_reason,
        "remark": f"superseded by {e.superseded_by}"
        if e.superseded_by
        else f"withdrawn: {e.withdrawn_reason}"
        if e.withdrawn_reason
        else f"replaces {e.replaces}"
        if e.replaces
        else "",
        "software": software.get("coldcert"),
        "results_count": len(record.get("results") or []),
        "results": results,
    }


def build_history(
    item: str,
    entries: Iterable[CertificateEntry],
    *,
    policy: Mapping[str, Any] | None = None,
    today: date | None = None,
    departures: bool = True,
) -> dict[str, Any]:
    """The item's history as plain data (JSON-ready once ``_analysis`` keys are dropped).

    ``departures=False`` skips judging each calibration against the ones before it (a drift
    fit per calibration), which the due list does not show.
    """
    policy = checked_policy(policy)
    today = today or date.today()
    entries = list(entries)
    undated = [e.certificate_id for e in entries if e.calibration_date is None]

    def order(e: CertificateEntry):
        return (e.calibration_date or date.max, e.created_at or "", e.revision)

    entries.sort(key=order)
    in_force = [e for e in entries if e.state == "issued" and e.calibration_date is not None]
    kinds = sorted({e.kind for e in entries})
    notes: list[str] = []
    if undated:
        notes.append(f"no calibration date on {', '.join(undated)}; left out of the series")
    if len(kinds) > 1:
        notes.append(
            f"certificates of several kinds ({', '.join(kinds)}) carry this item identifier; "
            "each kind is followed separately"
        )
    series: list[Series] = []
    differences: list[dict[str, Any]] = []
    for kind in kinds:
        of_kind = [e for e in in_force if e.kind == kind]
        if kind == KIND_CBT:
            series += _cbt_series(of_kind)
        elif kind == KIND_SENSOR:
            curves = _sensor_curves(of_kind, notes)
            sensor_series, sensor_notes = _sensor_series(of_kind, curves)
            series += sensor_series
            notes += sensor_notes
            differences += _curve_differences(of_kind, curves, policy)
        elif kind == KIND_PUMP:
            series += _pump_series(of_kind)
    analysed = [_analyse_series(s, policy, today, departures) for s in series if s.values]
    last_date = max((e.calibration_date for e in in_force), default=None)
    recall = _recall(analysed, policy, last_date, today, bool(in_force))
    return {
        "item": item,
        "kinds": kinds,
        "today": today.isoformat(),
        "certificates": [_timeline_entry(e) for e in entries],
        "in_force": [e.certificate_id for e in in_force],
        "quantities": analysed,
        "curve_differences": differences,
        "recall": recall,
        "policy": {k: v for k, v in policy.items()},
        "notes": notes,
        "changed": any(q["changed"] for q in analysed) or any(d.get("differ") for d in differences),
    }



def _cbt_series(entries: list[CertificateEntry]) -> list[Series]:
    """A CBT's charging energy and asymptotic conductance over its certificates."""
    ec = Series("charging_energy", "charging energy E_C", "K")
    gt = Series("asymptotic_conductance", "asymptotic conductance G_T", "S")
    for e in entries:
        q = _cbt_quantities(e.record)
        if "charging_energy" in q:
            ec.add(e.certificate_id, e.calibration_date, *q["charging_energy"])
        if "asymptotic_conductance" in q:
            gt.add(e.certificate_id, e.calibration_date, *q["asymptotic_conductance"])
    return [s for s in (ec, gt) if s.values]


def _sensor_curves(
    entries: list[CertificateEntry], notes: list[str]
) -> dict[str, CalibrationCurve]:
    """Each sensor certificate's curve; one that cannot be rebuilt is noted and left out."""
    curves: dict[str, CalibrationCurve] = {}
    for e in entries:
        try:
            curves[e.certificate_id] = curve_from_record(dict(e.record), e.certificate_id)
        except CertificateError as exc:
            notes.append(f"{exc}; left out of the curve comparison")
    return curves


def _pump_series(entries: list[CertificateEntry]) -> list[Series]:
    """A pump's deviation from n·e·f and working-point gate voltage, one series per
    operating point."""
    found: dict[str, Series] = {}
    for e in entries:
        for key, (v, u, label) in _pump_quantities(e.record).items():
            base = key.split("|", 1)[0]
            if key not in found:
                name = (
                    f"relative deviation from n·e·f, {label}"
                    if base == "deviation"
                    else f"working-point gate voltage, {label}"
                )
                found[key] = Series(base, name, "ppm" if base == "deviation" else "V")
            found[key].add(e.certificate_id, e.calibration_date, v, u)
    return list(found.values())

def _recall(
    analysed: list[dict[str, Any]],
    policy: Mapping[str, Any],
    last: date | None,
    today: date,
    any_in_force: bool,
) -> dict[str, Any]:
    if not any_in_force or last is None:
        return {"status": "no certificate in force", "due_date": None, "interval_days": None}
    limits = [(q["interval"]["interval_days"], q) for q in analysed if q.get("interval")]
    if limits:
        days, q = min(limits, key=lambda x: x[0])
        basis = {
            "method": q["interval"]["method"],
            "limiting_quantity": q["name"],
            "limited_by": q["interval"]["limited_by"],
        }
    else:
        days = float(policy["default_interval_days"])
        basis = {
            "method": "the laboratory's default interval",
            "limiting_quantity": None,
            "limited_by": "no maximum permissible change stated, or too short a history",
        }
    whole_days = int(math.floor(days))
    due = last + timedelta(days=whole_days)
    remaining = (due - today).days
    status = "overdue" if remaining < 0 else "due" if remaining <= 30 else "in date"
    return {
        "status": status,
        "last_calibration": last.isoformat(),
        "interval_days": whole_days,
        "due_date": due.isoformat(),
        "days_remaining": remaining,
        **basis,
    }


def public_history(history: Mapping[str, Any]) -> dict[str, Any]:
    """The history without the in-memory analysis objects (for JSON)."""
    out = dict(history)
    out["quantities"] = [
        {k: v for k, v in q.items() if not k.startswith("_")} for q in history["quantities"]
    ]
    return out
