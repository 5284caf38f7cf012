"""PDF rendering of a certificate record (reportlab), with the plots (SVG via svglib).

ISO/IEC 17025:2017 7.8.2.1 b) asks for the unique identification on every page and a clear
recognition of each page as part of the whole and of the end of the document; hence the footer
"<id> · page i of n" on every page and the "end of certificate" line. The total page count is
only known after layout, so pages are laid out first and numbered when the document is saved.
"""

from __future__ import annotations

import io
import logging
from collections.abc import Mapping
from typing import Any
from xml.sax.saxutils import escape

from reportlab.lib import colors
from reportlab.lib.pagesizes import A4
from reportlab.lib.styles import ParagraphStyle, getSampleStyleSheet
from reportlab.lib.units import mm
from reportlab.pdfgen import canvas as rl_canvas
from reportlab.platypus import (
    KeepTogether,
    Paragraph,
    SimpleDocTemplate,
    Spacer,
    Table,
    TableStyle,
)

logger = logging.getLogger(__name__)

#: Bump when the layout changes, so cached PDFs are laid out again.
RENDERER_VERSION = 1

_STYLES = getSampleStyleSheet()
BODY = ParagraphStyle("body", parent=_STYLES["BodyText"], fontSize=9, leading=11.5)
SMALL = ParagraphStyle("small", parent=BODY, fontSize=7.5, leading=9.5)
CELL = ParagraphStyle("cell", parent=BODY, fontSize=7.5, leading=9)
H1 = ParagraphStyle("h1", parent=_STYLES["Title"], fontSize=16, leading=20, alignment=0)
H2 = ParagraphStyle("h2", parent=_STYLES["Heading2"], fontSize=11, leading=14, spaceBefore=8)
H3 = ParagraphStyle("h3", parent=_STYLES["Heading3"], fontSize=9.5, leading=12, spaceBefore=6)
WARN = ParagraphStyle("warn", parent=BODY, textColor=colors.HexColor("#8a4b00"))
DRAFT = ParagraphStyle("draft", parent=BODY, textColor=colors.HexColor("#a3261b"), fontSize=10)


def _p(text: Any, style: ParagraphStyle = BODY) -> Paragraph:
    return Paragraph(escape("" if text is None else str(text)), style)


def _g(value: Any, digits: int = 6) -> str:
    if value is None:
        return "∞"
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    return str(value)


def _grid(rows: list[list[Any]], widths: list[float] | None = None, header: bool = True) -> Table:
    cells = [[c if isinstance(c, Paragraph) else _p(c, CELL) for c in row] for row in rows]
    table = Table(cells, colWidths=widths, repeatRows=1 if header else 0, hAlign="LEFT")
    style = [
        ("GRID", (0, 0), (-1, -1), 0.4, colors.HexColor("#b5bcc6")),
        ("VALIGN", (0, 0), (-1, -1), "TOP"),
        ("LEFTPADDING", (0, 0), (-1, -1), 3),
        ("RIGHTPADDING", (0, 0), (-1, -1), 3),
    ]
    if header:
        style.append(("BACKGROUND", (0, 0), (-1, 0), colors.HexColor("#eceff3")))
    table.setStyle(TableStyle(style))
    return table


def _pairs(section: Mapping[str, Any] | None) -> Table | Paragraph:
    rows = [
        [k.replace("_", " "), v]
        for k, v in (section or {}).items()
        if not isinstance(v, dict | list) and v is not None
    ]
    if not rows:
        return _p("not stated")
    return _grid(rows, [45 * mm, 125 * mm], header=False)


def _svg_flowable(svg: str, max_width: float):
    """A reportlab drawing of an SVG plot, scaled to fit; None if it cannot be converted."""
    try:
        from svglib.svglib import svg2rlg

        drawing = svg2rlg(io.BytesIO(svg.encode("utf-8")))
    except Exception:  # a plot that cannot be drawn must not cost the certificate
        logger.exception("could not convert a plot for the PDF")
        return None
    if drawing is None or not drawing.width:
        return None
    scale = min(1.0, max_width / drawing.width)
    drawing.width, drawing.height = drawing.width * scale, drawing.height * scale
    drawing.scale(scale, scale)
    drawing.hAlign = "LEFT"
    return drawing


def _numbered_canvas(certificate_id: str, state: str):
    """A canvas class that stamps "<id> · page i of n" on every page once n is known."""

    class NumberedCanvas(rl_canvas.Canvas):
        def __init__(self, *args, **kwargs) -> None:
            super().__init__(*args, **kwargs)
            self._pages: list[dict] = []

        def showPage(self) -> None:  # noqa: N802 - reportlab's API name
            self._pages.append(dict(self.__dict__))
            self._startPage()

        def save(self) -> None:
            total = len(self._pages)
            for number, page in enumerate(self._pages, start=1):
                self.__dict__.update(page)
                self._footer(number, total)
                super().showPage()
            super().save()

        def _footer(self, number: int, total: int) -> None:
            width, _height = self._pagesize
            self.setFont("Helvetica", 8)
            self.setFillColor(colors.HexColor("#333333"))
            self.drawString(18 * mm, 10 * mm, f"Certificate {certificate_id}")
            self.drawRightString(width - 18 * mm, 10 * mm, f"page {number} of {total}")
            if state != "issued":
                self.setFillColor(colors.HexColor("#a3261b"))
                self.drawCentredString(
                    width / 2, 10 * mm, state.upper() + (" — NOT VALID" if state == "draft" else "")
                )

    return NumberedCanvas


def render_pdf(record: Mapping[str, Any], plots: Mapping[str, str] | None = None) -> bytes:
    """The certificate as PDF bytes (A4)."""
    plots = dict(plots or {})
    cid = str(record.get("certificate_id", "unnumbered"))
    state = str(record.get("state", "draft"))
    buffer = io.BytesIO()
    doc = SimpleDocTemplate(
        buffer,
        pagesize=A4,
        leftMargin=18 * mm,
        rightMargin=18 * mm,
        topMargin=16 * mm,
        bottomMargin=18 * mm,
        title=f"{record.get('title', 'Calibration certificate')} {cid}",
        author=str((record.get("laboratory") or {}).get("name", "")),
        subject=f"Certificate {cid}",
        creator="coldcert",
        invariant=1,  # no creation time or random id: the same record gives the same bytes
    )
    width = A4[0] - 36 * mm
    story: list[Any] = [
        _p(record.get("title", "Calibration certificate"), H1),
        _p(f"Certificate {cid} · revision {record.get('revision', 1)} · state: {state}", BODY),
    ]
    if state == "draft":
        story.append(_p("DRAFT — not valid until issued by an authorised approver.", DRAFT))
    if state in ("superseded", "withdrawn"):
        detail = record.get("superseded_by") or record.get("withdrawn_reason") or ""
        story.append(_p(f"This certificate is {state}: {detail}", DRAFT))
    if record.get("replaces"):
        story.append(
            _p(
                f"This revision replaces certificate {record['replaces']}. Reason: "
                f"{record.get('amendment_reason', '')}",
                WARN,
            )
        )
    for heading, key in (
        ("Laboratory", "laboratory"),
        ("Customer", "customer"),
        ("Item calibrated", "item"),
    ):
        story += [_p(heading, H2), _pairs(record.get(key))]
    dates = {k: v or "—" for k, v in (record.get("dates") or {}).items()}
    story += [_p("Dates", H2), _pairs(dates)]
    method = record.get("method") or {}
    story += [_p("Method", H2), _p(method.get("description", method.get("name", "")))]

    results = record.get("results") or []
    story.append(_p("Results", H2))
    rows: list[list[Any]] = [["quantity", "source", "value", "unit", "u", "U", "k", "p"]]
    for r in results:
        reported = r.get("reported") or {}
        rows.append(
            [
                r.get("name", ""),
                r.get("sweep", ""),
                reported.get("value", _g(r.get("value"))),
                r.get("unit", ""),
                reported.get("standard_uncertainty", _g(r.get("standard_uncertainty"), 2)),
                reported.get("expanded_uncertainty", _g(r.get("expanded_uncertainty"), 2)),
                _g(r.get("coverage_factor"), 3),
                f"{100 * float(r.get('coverage_probability', 0)):g} %",
            ]
        )
    story.append(
        _grid(rows, [34 * mm, 34 * mm, 20 * mm, 12 * mm, 20 * mm, 20 * mm, 14 * mm, 14 * mm])
    )
    story.append(
        _p(
            "u: combined standard uncertainty; U = k·u, the expanded uncertainty, with k from "
            "Student's t at the effective degrees of freedom for coverage probability p "
            "(JCGM 100:2008).",
            SMALL,
        )
    )
    for r in results:
        block: list[Any] = [_p(f"Budget: {r.get('name', '')} — {r.get('sweep', '')}", H3)]
        budget = r.get("budget")
        if budget:
            unit = budget.get("unit", "")
            brows: list[list[Any]] = [
                ["input", "estimate", "unit", "u(x)", "type", "distribution", "c", "c·u", "ν"]
            ]
            for row in budget.get("rows", []):
                brows.append(
                    [
                        row.get("quantity", ""),
                        _g(row.get("estimate")),
                        row.get("unit", ""),
                        _g(row.get("standard_uncertainty"), 3),
                        row.get("type", ""),
                        row.get("distribution", ""),
                        f"{_g(row.get('sensitivity_coefficient'), 4)} "
                        f"{row.get('sensitivity_unit', '')}",
                        f"{_g(row.get('contribution'), 3)} {unit}",
                        _g(row.get("degrees_of_freedom"), 3),
                    ]
                )
            brows.append(
                [
                    "combined",
                    "",
                    "",
                    f"{_g(budget.get('combined_standard_uncertainty'), 3)} {unit}",
                    "",
                    f"ν_eff {_g(budget.get('effective_degrees_of_freedom'), 3)}",
                    f"k {_g(budget.get('coverage_factor'), 3)}",
                    f"U {_g(budget.get('expanded_uncertainty'), 3)} {unit}",
                    "",
                ]
            )
            block.append(
                _grid(
                    brows,
                    [
                        36 * mm,
                        18 * mm,
                        10 * mm,
                        17 * mm,
                        10 * mm,
                        19 * mm,
                        24 * mm,
                        22 * mm,
                        14 * mm,
                    ],
                )
            )
        for warning in (r.get("diagnostics") or {}).get("warnings", []):
            block.append(_p(f"Warning: {warning}", WARN))
        story.append(KeepTogether(block))
        key = f"fit-{r.get('sweep', '')}"
        if key in plots:
            drawing = _svg_flowable(plots.pop(key), width)
            if drawing is not None:
                story += [
                    Spacer(1, 3 * mm),
                    drawing,
                    _p(f"Fit and residuals, {r.get('sweep')}", SMALL),
                ]
    for key, svg in plots.items():
        drawing = _svg_flowable(svg, width)
        if drawing is not None:
            story += [Spacer(1, 3 * mm), drawing, _p(key, SMALL)]

    conditions = record.get("conditions") or {}
    story.append(_p("Conditions of measurement", H2))
    story.append(_pairs({k: v for k, v in conditions.items() if not isinstance(v, list)}))
    for sweep in conditions.get("sweeps", []) or []:
        story += [Spacer(1, 2 * mm), _pairs(sweep)]
    deviations = record.get("deviations") or []
    story.append(_p("Deviations and assumptions", H2))
    story += [_p(f"• {d}") for d in deviations] or [_p("None.")]
    story += [_p("Traceability", H2), _p(record.get("traceability", "not stated"))]
    story.append(_p("Statements and cautions", H2))
    story += [_p(f"• {s}") for s in record.get("statements") or []]
    people = record.get("people") or {}
    story += [
        _p("Authorisation", H2),
        _p(
            f"Operator: {people.get('operator') or '—'}. Approved and issued by: "
            f"{people.get('approver') or 'not yet issued'}."
        ),
    ]
    files = (record.get("inputs") or {}).get("files") or []
    if files:
        story.append(_p("Records", H2))
        story.append(
            _grid(
                [["input file", "SHA-256"]] + [[f["name"], f["sha256"]] for f in files],
                [45 * mm, 125 * mm],
            )
        )
    reproducibility = record.get("reproducibility") or {}
    if reproducibility:
        software = ", ".join(f"{k} {v}" for k, v in (reproducibility.get("software") or {}).items())
        story.append(_p(f"Seed {reproducibility.get('seed')}; software {software}.", SMALL))
    story += [Spacer(1, 4 * mm), _p(f"Certificate {cid} — end of certificate", BODY)]
    doc.build(story, canvasmaker=_numbered_canvas(cid, state))
    return buffer.getvalue()
