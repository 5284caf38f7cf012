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
        # The footer ("Certificate <id>", "page i of n", state) is drawn last on every page, so
        # it ends the page's text (even where a paragraph runs on to the next page).
        footer = (rf"\n?Certificate {re.escape(certificate_id)}\npage \d+ of \d+"
                  r"(\n(DRAFT — NOT VALID|WITHDRAWN|SUPERSEDED))?\s*$")
        pages.append(re.sub(footer, "", text.rstrip()))
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


def test_fields_in_a_defined_order_and_the_manifest_among_the_records():
    # The canonical JSON sorts keys; the certificate must not (ISO/IEC 17025 7.8.2.1: name and
    # address of the laboratory; dates of receipt, measurement and issue in that order).
    record = _record("sensor-larkspur")
    record["dates"]["issued"] = "2026-12-01"
    html = render_html(record)
    lab, cust = record["laboratory"], record["customer"]
    assert html.index(lab["name"]) < html.index(lab["address"])
    assert html.index(cust["name"]) < html.index(cust["address"])
    assert html.index("item received") < html.index("date of measurement") < html.index("date of issue")
    assert "run.toml (manifest)" in html and record["inputs"]["manifest_sha256"] in html
    # A dimensionless sensitivity coefficient reads "1", never "1 1".
    assert "<td class=\"num\">1 1</td>" not in html


def test_issued_certificate_states_its_electronic_signature_in_html_and_pdf():
    from service.render.content import certificate_blocks

    record = _record("sensor-larkspur")
    record.update(state="issued", certificate_id="CC-2026-00077")
    record["dates"]["issued"] = "2026-12-01"
    record["people"]["approver"] = "B. Approver"
    seal = {"sequence": 12, "sha256": "ab" * 32, "key_id": "ed25519:0123456789abcdef",
            "public_key_url": "https://lab.example/api/public-key"}
    html = render_html(record, None, seal)
    pdf_text = _pdf_text(render_pdf(record, None, seal=seal), record["certificate_id"])
    for text in ("signed electronically", "B. Approver (approver", "entry 12", "ab" * 32,
                 "ed25519:0123456789abcdef", "coldcert verify CC-2026-00077",
                 "https://lab.example/api/public-key"):
        assert text in html, text
        assert _squash(text) in pdf_text, text
    # A draft says it is not yet authorised, and carries no signature details.
    draft = _record("sensor-larkspur")
    texts = " ".join(getattr(b, "text", "") for b in certificate_blocks(draft))
    assert "Not yet issued" in texts and "signed electronically" not in texts


def test_temperatures_below_one_kelvin_read_in_millikelvin_with_the_same_digits():
    # The record keeps kelvin (SI); the certificate shows mK below 1 K, shifting the GUM 7.2.6
    # rounded strings exactly (no new rounding, no binary float re-entering).
    from service.render.numbers import as_millikelvin, label

    shifted = as_millikelvin({"value": "0.015001", "standard_uncertainty": "0.000011",
                              "expanded_uncertainty": "0.000021"})
    assert shifted == {"value": "15.001", "standard_uncertainty": "0.011",
                       "expanded_uncertainty": "0.021", "unit": "mK"}
    record = _record("sensor-larkspur")
    first = record["results"][0]
    assert first["unit"] == "K" and first["value"] < 1
    html = render_html(record)
    assert as_millikelvin(first["reported"])["value"] in html and ">mK<" in html
    assert label("frequency_Hz") == "frequency (Hz)" and label("electrons_per_cycle") == "electrons per cycle"


def _settling_record() -> tuple[dict, dict]:
    record = _record("pump-quillfen")
    entry = next(r for r in record["results"] if (r.get("record") or {}).get("settling_transient"))
    return record, entry["record"]["settling_transient"]


def test_settling_fits_read_in_a_unit_that_fits_them_and_as_a_share_of_the_step():
    # The demo's first fit is the ammeter following the whole 160 pA step (A ≈ −e⁻¹ n·e·f one
    # time constant after the switch): it reads in pA and as a share of n·e·f, not as 1e4 fA.
    record, st = _settling_record()
    st["components"][0].update(amplitude_after_switch_on_A=-5.894e-11,
                               amplitude_after_switch_on_u_A=8.6e-16)
    html = render_html(record)
    assert "-58.9 ± 0.00086 pA (-36.8 % of n·e·f)" in html
    assert "e+04" not in html
    st["components"][0].update(amplitude_after_switch_on_A=-8.99e-16)  # a small one stays in fA
    assert "-0.899 ± 0.86 fA" in render_html(record)


def test_a_fit_below_the_reading_resolution_is_reported_as_no_resolvable_transient():
    record, st = _settling_record()
    c = st["components"][0]
    c.update(amplitude_after_switch_on_A=-7.77e-13, time_constant_s=0.3,
             time_constant_below_reading_resolution=True, time_constant_search_floor_s=0.3)
    html = render_html(record)
    pdf_text = _pdf_text(render_pdf(record), record["certificate_id"])
    for text in (html, pdf_text):
        flat = _squash(text)
        assert _squash("no resolvable transient") in flat
        assert _squash("no: faster than the readings") in flat
        assert "-777" not in flat and "-0.777" not in flat  # the degenerate amplitude is not shown
