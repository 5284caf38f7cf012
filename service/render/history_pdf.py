"""The PDF history report of one item (reportlab, the certificate PDF's styles and helpers).

A report, not a certificate: it restates what the archive holds about the item and what the
drift analysis advises, for an audit. Every page carries the item, the date of the report and
"page i of n"; the report is a pure function of the history and its plots (invariant mode).
"""

from __future__ import annotations

import io
from collections.abc import Mapping
from typing import Any

from reportlab.lib.units import mm
from reportlab.platypus import Spacer

from service.render.numbers import g as _g
from service.render.pdf import (
    BODY,
    H1,
    H2,
    H3,
    SMALL,
    TEXT_WIDTH,
    WARN,
    _grid,
    _p,
    _svg_flowable,
    a4_document,
    numbered_canvas,
)

NOT_ACCREDITATION = (
    "This report restates archived certificates and a statistical analysis of them; it is not a "
    "certificate and not an accreditation. Recall intervals are advice to the laboratory's "
    "quality system (ILAC-G24 leaves the choice of intervals to the laboratory)."
)


def render_history_pdf(history: Mapping[str, Any], plots: Mapping[str, str]) -> bytes:
    """The item's history report as PDF bytes (A4): recall, certificates, each tracked
    quantity's drift, and the comparisons of sensor curves."""
    item = str(history.get("item", ""))
    today = str(history.get("today", ""))
    buffer = io.BytesIO()
    doc = a4_document(
        buffer,
        title=f"Calibration history of {item}",
        subject=f"Calibration history of {item}",
    )
    story: list[Any] = [
        _p(f"Calibration history of {item}", H1),
        _p(f"Report of {today}. Kinds: {', '.join(history.get('kinds') or []) or '—'}.", BODY),
        _p(NOT_ACCREDITATION, SMALL),
        *_recall(history.get("recall") or {}),
    ]
    for note in history.get("notes") or []:
        story.append(_p(f"Note: {note}", WARN))
    story += _certificates(history.get("certificates") or [])
    for i, q in enumerate(history.get("quantities") or []):
        story += _quantity(q, plots.get(f"drift-{i}"))
    for i, d in enumerate(history.get("curve_differences") or []):
        story += _curve_difference(d, plots.get(f"difference-{i}"))
    story += [Spacer(1, 4 * mm), _p(f"History of {item} — end of report", BODY)]
    doc.build(story, canvasmaker=numbered_canvas(f"History of {item} · {today}"))
    return buffer.getvalue()


def _recall(recall: Mapping[str, Any]) -> list[Any]:
    limited_by = f"{recall.get('limited_by') or '—'}" + (
        f" ({recall['limiting_quantity']})" if recall.get("limiting_quantity") else ""
    )
    return [
        _p("Recall", H2),
        _grid(
            [
                ["status", recall.get("status", "—")],
                ["last calibration", recall.get("last_calibration") or "—"],
                ["recommended interval", f"{recall.get('interval_days') or '—'} days"],
                ["due", recall.get("due_date") or "—"],
                ["method", recall.get("method") or "—"],
                ["limited by", limited_by],
            ],
            [45 * mm, 125 * mm],
            header=False,
        ),
    ]


def _certificates(certificates: list[Mapping[str, Any]]) -> list[Any]:
    rows: list[list[Any]] = [
        ["certificate", "rev.", "state", "measured", "issued", "customer", "remark"]
    ]
    for c in certificates:
        rows.append(
            [
                c["certificate_id"],
                c.get("revision", ""),
                c.get("state", ""),
                c.get("calibration_date") or "—",
                (c.get("issued_at") or "—")[:10],
                c.get("customer") or "—",
                c.get("remark", ""),
            ]
        )
    return [
        _p("Certificates", H2),
        _grid(rows, [30 * mm, 10 * mm, 18 * mm, 20 * mm, 20 * mm, 38 * mm, 34 * mm]),
    ]


def _quantity(q: Mapping[str, Any], svg: str | None) -> list[Any]:
    """One tracked quantity: its points, the drift model chosen, prediction, interval, the
    departures and changes found, and its drift plot."""
    unit = q.get("unit", "")
    prows: list[list[Any]] = [["certificate", "date", f"value ({unit})", f"U ({unit})"]]
    for p in q.get("points") or []:
        prows.append(
            [p["certificate_id"], p["date"], _g(p["value"], 7), _g(p["expanded_uncertainty"], 2)]
        )
    story: list[Any] = [
        _p(f"{q['name']}", H2),
        _grid(prows, [40 * mm, 25 * mm, 40 * mm, 30 * mm]),
        _p(_model_sentence(q, unit), BODY),
    ]
    pred = q.get("prediction")
    if pred:
        story.append(
            _p(
                f"Predicted on {pred['date']}: {_g(pred['value'], 7)} ± "
                f"{_g(pred['expanded_uncertainty'], 2)} {unit} (U, k = "
                f"{_g(pred['coverage_factor'], 3)}).",
                BODY,
            )
        )
    interval = q.get("interval")
    if interval:
        story.append(
            _p(
                f"Interval: {_g(interval['interval_days'], 4)} days for a maximum "
                f"permissible change of {_g(interval['max_permissible_change'], 3)} "
                f"{unit} at reliability {interval['reliability_target']} "
                f"(limited by {interval['limited_by']}).",
                BODY,
            )
        )
    for d in q.get("departures") or []:
        if d["departs"]:
            story.append(
                _p(
                    f"{d['certificate_id']} departs from the prediction of the "
                    f"calibrations before it: E_n = {d['en']:.2f}.",
                    WARN,
                )
            )
    for reason in q.get("changed_reasons") or []:
        story.append(_p(f"Changed: {reason}.", WARN))
    for note in q.get("notes") or []:
        story.append(_p(note, SMALL))
    return story + _figure(svg)


def _model_sentence(q: Mapping[str, Any], unit: str) -> str:
    chosen = next((m for m in q.get("models") or [] if m["model"] == q["chosen_model"]), {})
    text = f"Model chosen ({q.get('criterion')}): {q['chosen_model'].replace('_', ' ')}"
    if "drift_per_year" in chosen:
        text += (
            f"; drift {_g(chosen['drift_per_year'], 3)} ± "
            f"{_g(chosen['drift_per_year_standard_uncertainty'], 2)} {unit} per year"
        )
    if "diffusion_per_year" in chosen:
        text += f"; diffusion {_g(chosen['diffusion_per_year'], 3)} {unit}² per year"
    return text + "."


def _curve_difference(d: Mapping[str, Any], svg: str | None) -> list[Any]:
    """ΔT(R) between two sensor curves: the inputs they share, the largest normalised
    difference and the plot (or why it could not be computed)."""
    story: list[Any] = [_p(f"Curve comparison: {d['second']} − {d['first']}", H3)]
    if d.get("error"):
        return story + [_p(d["error"], WARN)]
    shared = (
        ", ".join(
            f"{s['name']} (ρ = {s['correlation']:g})" for s in d.get("shared_components") or []
        )
        or "none declared"
    )
    story.append(
        _p(
            f"Inputs shared by the two calibrations: {shared}. Largest |ΔT|/U(ΔT): "
            f"{d['max_normalised_difference']:.2f}.",
            BODY,
        )
    )
    return story + _figure(svg)


def _figure(svg: str | None) -> list[Any]:
    drawing = _svg_flowable(svg, TEXT_WIDTH) if svg else None
    return [Spacer(1, 2 * mm), drawing] if drawing is not None else []
