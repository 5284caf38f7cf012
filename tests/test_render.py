"""Renderings of the record: the PDF carries everything the HTML page carries, for every kind.

Both are made from the same blocks (service.render.content); these tests check that the PDF
layout drops nothing (every section title, every table cell, every paragraph and caption), that
the lifecycle banner comes from the template and is escaped, and that rendering is repeatable.
"""

from __future__ import annotations

import copy
import io
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from service.render.html import render_html
from service.render.pdf import render_pdf

pypdf = pytest.importorskip("pypdf")

EXAMPLES = Path(__file__).resolve().parents[1] / "example_runs"

# A small plot, enough to check that figures and their captions reach both renderings.
SVG = ('<svg xmlns="http://www.w3.org/2000/svg" width="200" height="80" viewBox="0 0 200 80">'
       '<rect x="10" y="10" width="180" height="60" fill="none" stroke="black"/></svg>')


def _record(name: str) -> dict:
    return json.loads((EXAMPLES / f"{name}-certificate" / "certificate.json").read_text())


def _cbt_record() -> dict:
    """A primary-thermometry record: the sensor example's CBT part (global fit, budgets)."""
    record = _record("sensor-larkspur")
    record["job"] = "cbt_thermometry"
    record["sections"].pop("sensor_calibration")
    return record


KINDS = {
    "cbt": _cbt_record,
    "sensor": lambda: _record("sensor-larkspur"),
    "pump": lambda: _record("pump-quillfen"),
}


class _Texts(HTMLParser):
    """Every text node of the page body, with the name of the element it sits in."""

    def __init__(self) -> None:
        super().__init__()
        self.stack: list[str] = []
        self.texts: list[tuple[str, str]] = []

    def handle_starttag(self, tag, attrs):
        self.stack.append(tag)

    def handle_endtag(self, tag):
        while self.stack and self.stack.pop() != tag:
            pass

    def handle_data(self, data):
        if self.stack and not {"style", "title", "svg"} & set(self.stack) and data.strip():
            self.texts.append((self.stack[-1], data.strip()))


def _squash(text: str) -> str:
    return re.sub(r"\s+", "", text)


def _pdf_text(pdf: bytes, certificate_id: str) -> str:
    pages = []
    for page in pypdf.PdfReader(io.BytesIO(pdf)).pages:
        text = page.extract_text()
        # The footer ("Certificate <id>", "page i of n", state) is drawn last on every page.
        text = re.sub(r"page \d+ of \d+", "", text)
        text = text.replace(f"Certificate {certificate_id}\n", "", 1) if text.count(
            f"Certificate {certificate_id}") > 1 else text
        text = re.sub(r"\n(DRAFT — NOT VALID|WITHDRAWN|SUPERSEDED)\s*$", "", text.rstrip())
        pages.append(text)
    return _squash("".join(pages))


def _plots(record: dict) -> dict[str, str]:
    first = record["results"][0].get("sweep", "")
    return {f"fit-{first}": SVG, "overview of the run": SVG}


@pytest.mark.parametrize("kind", sorted(KINDS))
def test_pdf_carries_every_title_and_value_of_the_html(kind):
    record = KINDS[kind]()
    plots = _plots(record)
    parser = _Texts()
    parser.feed(render_html(record, plots))
    assert any(tag == "h2" for tag, _ in parser.texts)
    pdf_text = _pdf_text(render_pdf(record, plots), record["certificate_id"])
    missing = [(tag, text) for tag, text in parser.texts if _squash(text) not in pdf_text]
    assert not missing, f"{kind}: in the HTML but not in the PDF: {missing[:5]}"


@pytest.mark.parametrize(("kind", "titles"), [
    ("sensor", ["Sensor calibration", "Valid range", "Coefficients", "Cross-check against PLTS-2000",
                "Calibration table", "Global fit (shared charging energy)"]),
    ("pump", ["What was verified", "Pump and operating point", "Precision record", "Error counting"]),
    ("cbt", ["Global fit (shared charging energy)", "Budget:"]),
])
def test_kind_sections_come_from_the_record(kind, titles):
    pdf_text = _pdf_text(render_pdf(KINDS[kind]()), "x")
    for title in titles:
        assert _squash(title) in pdf_text, title


def test_result_values_reach_both_renderings():
    record = _record("pump-quillfen")
    html = render_html(record)
    pdf_text = _pdf_text(render_pdf(record), record["certificate_id"])
    for result in record["results"]:
        for value in result["reported"].values():
            assert str(value) in html
            assert _squash(str(value)) in pdf_text


def test_lifecycle_banner_comes_from_the_template_and_is_escaped():
    record = copy.deepcopy(_record("pump-quillfen"))
    record.update(state="withdrawn", withdrawn_reason="<script>x</script> wrong ammeter")
    html = render_html(record)
    assert 'class="lifecycle"' in html
    assert "&lt;script&gt;x&lt;/script&gt; wrong ammeter" in html and "<script>" not in html
    assert html.index("lifecycle") < html.index("<h1>")
    pdf_text = _pdf_text(render_pdf(record), record["certificate_id"])
    assert _squash("Withdrawn: <script>x</script> wrong ammeter; do not use.") in pdf_text


def test_renderings_are_repeatable():
    record = _record("sensor-larkspur")
    assert render_html(record) == render_html(record)
    assert render_pdf(record) == render_pdf(record)
