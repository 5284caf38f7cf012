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
from pathlib import Path
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

from service.render import content

logger = logging.getLogger(__name__)

#: Bump when the layout changes, so cached PDFs are laid out again.
RENDERER_VERSION = 3



def _register_fonts() -> tuple[str, str]:
    """DejaVu Sans (regular, bold), the TrueType fonts matplotlib ships, embedded in the PDF.

    The 14 standard PDF fonts cover Latin-1 only; certificates use Greek letters, ⟨n⟩, Ω and
    other symbols, which would print as empty boxes. Falls back to Helvetica if the files are
    missing (the text stays extractable; some symbols then do not show).
    """
    try:
        import matplotlib
        from reportlab.pdfbase import pdfmetrics
        from reportlab.pdfbase.ttfonts import TTFont

        folder = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
        pdfmetrics.registerFont(TTFont("coldcert-sans", str(folder / "DejaVuSans.ttf")))
        pdfmetrics.registerFont(TTFont("coldcert-sans-bold", str(folder / "DejaVuSans-Bold.ttf")))
    except Exception:  # a missing font must not cost the certificate
        logger.warning("DejaVu Sans not found; the PDF falls back to Helvetica")
        return "Helvetica", "Helvetica-Bold"
    return "coldcert-sans", "coldcert-sans-bold"


FONT, BOLD_FONT = _register_fonts()
_STYLES = getSampleStyleSheet()
BODY = ParagraphStyle("body", parent=_STYLES["BodyText"], fontName=FONT, fontSize=9, leading=11.5)
SMALL = ParagraphStyle("small", parent=BODY, fontSize=7.5, leading=9.5)
CELL = ParagraphStyle("cell", parent=BODY, fontSize=7.5, leading=9)
H1 = ParagraphStyle("h1", parent=_STYLES["Title"], fontName=BOLD_FONT, fontSize=16, leading=20,
                    alignment=0)
H2 = ParagraphStyle("h2", parent=_STYLES["Heading2"], fontName=BOLD_FONT, fontSize=11, leading=14,
                    spaceBefore=8)
H3 = ParagraphStyle("h3", parent=_STYLES["Heading3"], fontName=BOLD_FONT, fontSize=9.5, leading=12,
                    spaceBefore=6)
WARN = ParagraphStyle("warn", parent=BODY, textColor=colors.HexColor("#8a4b00"))
DRAFT = ParagraphStyle("draft", parent=BODY, textColor=colors.HexColor("#a3261b"), fontSize=10)


def _p(text: Any, style: ParagraphStyle = BODY) -> Paragraph:
    return Paragraph(escape("" if text is None else str(text)), style)


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


def numbered_canvas(label: str, stamp: str = ""):
    """A canvas class that writes ``label`` and "page i of n" at the foot of every page once n
    is known, and ``stamp`` (in red) between them if given."""

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
            self.setFont(FONT, 8)
            self.setFillColor(colors.HexColor("#333333"))
            self.drawString(18 * mm, 10 * mm, label)
            self.drawRightString(width - 18 * mm, 10 * mm, f"page {number} of {total}")
            if stamp:
                self.setFillColor(colors.HexColor("#a3261b"))
                self.drawCentredString(width / 2, 10 * mm, stamp)

    return NumberedCanvas


def _numbered_canvas(certificate_id: str, state: str):
    """Every page: "Certificate <id>", "page i of n", and the state unless issued."""
    stamp = "" if state == "issued" else state.upper() + (" — NOT VALID" if state == "draft" else "")
    return numbered_canvas(f"Certificate {certificate_id}", stamp)


#: Width of the text column of an A4 page with our margins.
TEXT_WIDTH = A4[0] - 36 * mm


def a4_document(buffer: io.BytesIO, *, title: str, subject: str, author: str = ""):
    """An A4 document with our margins, in reportlab's invariant mode (no creation time or
    random id: the same content gives the same bytes)."""
    return SimpleDocTemplate(
        buffer,
        pagesize=A4,
        leftMargin=18 * mm,
        rightMargin=18 * mm,
        topMargin=16 * mm,
        bottomMargin=18 * mm,
        title=title,
        author=author,
        subject=subject,
        creator="coldcert",
        invariant=1,
    )


def _check_flowable(check: Mapping[str, str], width: float) -> Table:
    """Where and how a holder checks this certificate, with a QR code of the check address
    (reportlab's own QR widget, ISO/IEC 18004)."""
    from reportlab.graphics.barcode.qr import QrCodeWidget
    from reportlab.graphics.shapes import Drawing

    size = 26 * mm
    widget = QrCodeWidget(check["url"], barLevel="M")
    x0, y0, x1, y1 = widget.getBounds()
    drawing = Drawing(size, size, transform=[size / (x1 - x0), 0, 0, size / (y1 - y0), 0, 0])
    drawing.add(widget)
    text = [
        _p("Check this certificate", H3),
        _p(
            f"Certificate number {check['certificate_id']}. SHA-256 of its signed record: "
            f"{check['signed_record_sha256']}.",
            SMALL,
        ),
        _p(
            f"Anyone holding this file can check that the laboratory issued it and whether it is "
            f"still in force, without an account, at {check['url']} (give the number and this "
            "file; the file is fingerprinted in the browser and not uploaded).",
            SMALL,
        ),
    ]
    table = Table([[text, drawing]], colWidths=[width - size - 6 * mm, size + 6 * mm])
    table.setStyle(
        TableStyle(
            [
                ("BOX", (0, 0), (-1, -1), 0.4, colors.HexColor("#b5bcc6")),
                ("VALIGN", (0, 0), (-1, -1), "TOP"),
            ]
        )
    )
    return table


STYLES = {"body": BODY, "small": SMALL, "warn": WARN, "id": BODY, "draft": DRAFT, "notice": DRAFT}


def _flowables(blocks: list[content.Block], width: float) -> list[Any]:
    """reportlab flowables for the blocks, in order; a budget heading keeps with its table."""
    story: list[Any] = []
    for block in blocks:
        if isinstance(block, content.Heading):
            story.append(_p(block.text, {1: H1, 2: H2}.get(block.level, H3)))
        elif isinstance(block, content.Text):
            story.append(_p(block.text, STYLES.get(block.style, BODY)))
        elif isinstance(block, content.Pairs):
            rows = [[name, value] for name, value in block.rows]
            story.append(_grid(rows, [45 * mm, width - 45 * mm], header=False) if rows
                         else _p("not stated"))
        elif isinstance(block, content.Grid):
            weights = block.weights or (1.0,) * len(block.header)
            widths = [width * w / sum(weights) for w in weights]
            table = _grid([list(block.header), *map(list, block.rows)], widths)
            if story and isinstance(story[-1], Paragraph) and story[-1].style is H3:
                story[-1] = KeepTogether([story[-1], table])
            else:
                story.append(table)
        elif isinstance(block, content.Bullets):
            story += [_p(f"• {item}") for item in block.items]
        elif isinstance(block, content.Figure):
            drawing = _svg_flowable(block.svg, width)
            if drawing is not None:
                story += [Spacer(1, 3 * mm), drawing, _p(block.caption, SMALL)]
    return story


def render_pdf(
    record: Mapping[str, Any],
    plots: Mapping[str, str] | None = None,
    check: Mapping[str, str] | None = None,
    seal: Mapping[str, Any] | None = None,
) -> bytes:
    """The certificate as PDF bytes (A4): the same blocks as the HTML page, laid out on pages.

    ``check`` (issued certificates) adds, below the certificate's number, where and how a holder
    checks the file: the number, the SHA-256 of the signed record, the address and its QR code.
    ``seal`` adds the signature details to the authorisation section (as on the HTML page).
    """
    cid = str(record.get("certificate_id", "unnumbered"))
    state = str(record.get("state", "draft"))
    buffer = io.BytesIO()
    doc = a4_document(
        buffer,
        title=f"{record.get('title', 'Calibration certificate')} {cid}",
        subject=f"Certificate {cid}",
        author=str((record.get("laboratory") or {}).get("name", "")),
    )
    blocks = content.certificate_blocks(record, plots, seal)
    story = _flowables(blocks, TEXT_WIDTH)
    if check:
        # Headings and texts map one to one onto flowables, so the place after the number line
        # is the same index in both lists.
        at = next(
            (i + 1 for i, b in enumerate(blocks) if isinstance(b, content.Text) and b.style == "id"),
            0,
        )
        story[at:at] = [Spacer(1, 2 * mm), _check_flowable(check, TEXT_WIDTH)]
    doc.build(story, canvasmaker=_numbered_canvas(cid, state))
    return buffer.getvalue()
