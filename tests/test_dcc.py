"""Renderings: DCC 3.3.0 XML validated against the published schema files (PTB's, not part of
the repository: COLDCERT_DCC_SCHEMA names them), our own completeness checks, and the PDF's page
footers."""

from __future__ import annotations

import copy
import io
import re
import shutil
from pathlib import Path

import pytest
from lxml import etree
from pypdf import PdfReader

from service.calibrations.certify import certify_run
from service.intake import load_run
from service.render.dcc import (
    DCC_NS,
    SI_NS,
    CertificateIncomplete,
    DccSchemaError,
    check_complete,
    render_dcc,
    si_unit,
    si_value,
)
from service.render.pdf import render_pdf

EXAMPLE = Path(__file__).resolve().parents[1] / "example_runs" / "cbt-hollowmere"
NS = {"dcc": DCC_NS, "si": SI_NS}


@pytest.fixture(scope="module")
def schema(dcc_schema_path) -> etree.XMLSchema:
    # PTB's schema files are not part of the repository: the path comes from COLDCERT_DCC_SCHEMA
    # (tests/conftest.py skips without it, and fails under CI=true).
    return etree.XMLSchema(etree.parse(str(dcc_schema_path)))


@pytest.fixture(scope="module")
def certified(tmp_path_factory):
    """A real draft from one sweep of the example run (short MCMC settings)."""
    folder = tmp_path_factory.mktemp("run")
    for name in ("run.toml", "sweep_03_60mK.csv", "sweep_04_120mK.csv"):
        shutil.copy(EXAMPLE / name, folder / name)
    return certify_run(load_run(folder), fast=True)


@pytest.fixture()
def issued_record(certified):
    record = copy.deepcopy(certified.record)
    record.update(certificate_id="CC-2026-00042", state="issued", revision=1)
    record["dates"]["issued"] = "2026-12-01"
    record["people"]["approver"] = "B. Approver"
    return record


def test_schema_check_is_live(schema, dcc_schema_path):
    # The bundled minimal example validates; without coreData it must not (README of the folder).
    example = etree.parse(str(dcc_schema_path.parent / "minimal-example.xml"))
    assert schema.validate(example)
    example.getroot().find("dcc:administrativeData/dcc:coreData", NS).getparent().remove(
        example.getroot().find("dcc:administrativeData/dcc:coreData", NS)
    )
    assert not schema.validate(example)


def test_validate_dcc_accepts_ours_and_names_the_first_violation(dcc_schema_path, issued_record):
    # The service-side check a lab turns on with COLDCERT_DCC_SCHEMA / DCC_SCHEMA.
    from service.render.dcc import validate_dcc

    document = render_dcc(issued_record)
    validate_dcc(document, dcc_schema_path)
    tree = etree.fromstring(document)
    core = tree.find("dcc:administrativeData/dcc:coreData", NS)
    core.getparent().remove(core)
    with pytest.raises(DccSchemaError, match=r"does not validate against .*line \d+"):
        validate_dcc(etree.tostring(tree), dcc_schema_path)


def test_a_missing_schema_file_is_named(tmp_path, issued_record):
    from service.render.dcc import validate_dcc

    missing = tmp_path / "nowhere" / "dcc.xsd"
    with pytest.raises(DccSchemaError, match="COLDCERT_DCC_SCHEMA"):
        validate_dcc(render_dcc(issued_record), missing)


def test_issued_certificate_validates_against_dcc_3_3_0(schema, issued_record):
    xml = render_dcc(issued_record)
    document = etree.fromstring(xml)
    assert schema.validate(document), schema.error_log
    assert document.get("schemaVersion") == "3.3.0"
    assert document.findtext(".//dcc:uniqueIdentifier", namespaces=NS) == "CC-2026-00042"
    assert document.findtext(".//dcc:issueDate", namespaces=NS) == "2026-12-01"
    assert document.findtext(".//dcc:receiptDate", namespaces=NS) == "2026-11-20"
    reals = document.findall(".//si:real", NS)
    assert len(reals) == len(issued_record["results"]) == 2
    for real, result in zip(reals, issued_record["results"], strict=True):
        # The XML carries the digits the printed certificate shows (GUM 7.2.6 rounding).
        assert real.findtext("si:value", namespaces=NS) == result["reported"]["value"]
        assert float(real.findtext("si:value", namespaces=NS)) == pytest.approx(
            result["value"], abs=result["expanded_uncertainty"] / 10)
        assert real.findtext("si:unit", namespaces=NS) == r"\kelvin"
        mu = real.find("si:measurementUncertaintyUnivariate/si:expandedMU", NS)
        assert (
            mu.findtext("si:valueExpandedMU", namespaces=NS)
            == result["reported"]["expanded_uncertainty"]
        )
        assert float(mu.findtext("si:coverageFactor", namespaces=NS)) == result["coverage_factor"]
        assert float(mu.findtext("si:coverageProbability", namespaces=NS)) == 0.95


def test_amendment_names_the_certificate_it_replaces(schema, issued_record):
    record = dict(
        issued_record,
        certificate_id="CC-2026-00042-R2",
        revision=2,
        replaces="CC-2026-00042",
        amendment_reason="customer name corrected",
    )
    document = etree.fromstring(render_dcc(record))
    assert schema.validate(document), schema.error_log
    change = document.find(".//dcc:reportAmendedSubstituted", NS)
    assert change.findtext("dcc:typeOfChange", namespaces=NS) == "amended"
    assert change.findtext("dcc:replacedUniqueIdentifier", namespaces=NS) == "CC-2026-00042"


def test_schema_allows_what_our_check_refuses(schema, issued_record):
    # Without issue date and uncertainty the schema is still satisfied (both are optional)…
    document = etree.fromstring(render_dcc(issued_record))
    core = document.find(".//dcc:coreData", NS)
    core.remove(core.find("dcc:issueDate", NS))
    for real in document.findall(".//si:real", NS):
        real.remove(real.find("si:measurementUncertaintyUnivariate", NS))
    assert schema.validate(document)
    # …but ISO/IEC 17025 7.8.2.1 and 7.8.4.1 require them, and so do we.
    no_date = copy.deepcopy(issued_record)
    no_date["dates"]["issued"] = None
    with pytest.raises(CertificateIncomplete, match="no issue date"):
        render_dcc(no_date)
    no_uncertainty = copy.deepcopy(issued_record)
    no_uncertainty["results"][1]["expanded_uncertainty"] = None
    with pytest.raises(CertificateIncomplete, match=r"results\[1\].*no expanded uncertainty"):
        render_dcc(no_uncertainty)


@pytest.mark.parametrize(
    ("field", "value", "message"),
    [
        ("coverage_factor", 0.0, "coverage factor must be positive"),
        ("coverage_probability", 1.5, "coverage probability"),
        ("value", None, "value must be a finite number"),
        ("unit", "furlong", "no D-SI mapping"),
    ],
)
def test_incomplete_results_are_refused(issued_record, field, value, message):
    record = copy.deepcopy(issued_record)
    record["results"][0][field] = value
    with pytest.raises(CertificateIncomplete, match=message):
        check_complete(record)


def test_units_in_d_si_syntax():
    assert si_unit("K") == r"\kelvin"
    assert si_unit("mK") == r"\milli\kelvin"
    assert si_unit("A") == r"\ampere"
    assert si_unit("ppm") == r"\one"
    # ppm are written as exact decimal fractions, not as a float product.
    assert si_value(12.5, "ppm") == "0.0000125"
    assert float(si_value(0.1, "ppm")) == 1e-7
    assert si_value(0.1, "K") == "0.1"


def test_every_pdf_page_carries_id_and_page_i_of_n(certified, issued_record):
    pdf = render_pdf(issued_record, certified.plots)
    pages = PdfReader(io.BytesIO(pdf)).pages
    n = len(pages)
    assert n >= 2
    for i, page in enumerate(pages, start=1):
        text = page.extract_text()
        assert "Certificate CC-2026-00042" in text, i
        assert f"page {i} of {n}" in text, i
    last = pages[-1].extract_text()
    assert "end of certificate" in last
    # Laid out without clocks or random ids: the same record gives the same bytes.
    assert render_pdf(issued_record, {}) == render_pdf(issued_record, {})


def test_draft_pdf_is_marked_not_valid(certified):
    record = copy.deepcopy(certified.record)
    pdf = render_pdf(record, {})
    pages = PdfReader(io.BytesIO(pdf)).pages
    assert all("DRAFT" in page.extract_text() for page in pages)
    assert re.search(r"page 1 of \d+", pages[0].extract_text())
