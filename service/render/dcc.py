"""Machine-readable rendering: the Digital Calibration Certificate (DCC) XML, schema 3.3.0.

The DCC is the open XML schema for calibration certificates published by PTB (namespace
``https://ptb.de/dcc``); numbers inside it are D-SI quantities (``https://ptb.de/si``, version
2.2.0): ``si:real`` with ``si:value``, ``si:unit`` in D-SI unit syntax (``\\kelvin``,
``\\milli\\kelvin``) and the expanded uncertainty as ``si:expandedMU`` (value, coverage factor,
coverage probability). This module maps our canonical JSON record onto that structure; the record
stays the authoritative document and the XML is regenerated from it on demand.

The schema leaves the issue date and every uncertainty optional. ISO/IEC 17025:2017 7.8.2.1 and
7.8.4.1 do not, so :func:`check_complete` refuses a record without them before any XML is
written. Results are written with the digits the printed certificate shows (the record's GUM
7.2.6 ``reported`` strings); other numbers with Python's shortest round-trip ``repr``.

The schema files themselves are not shipped with coldcert (they are PTB's). A laboratory that
wants every DCC it serves checked against its own copy names the main ``dcc.xsd`` in the
environment variable ``COLDCERT_DCC_SCHEMA`` or as ``DCC_SCHEMA`` in the instance's
``config.py``; :func:`validate_dcc` then refuses any rendering the schema does not accept.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from decimal import Decimal
from functools import lru_cache
from importlib import metadata as importlib_metadata
from pathlib import Path
from typing import Any

from lxml import etree

DCC_NS = "https://ptb.de/dcc"
SI_NS = "https://ptb.de/si"
SCHEMA_VERSION = "3.3.0"
NSMAP = {"dcc": DCC_NS, "si": SI_NS}

#: Environment variable naming the laboratory's copy of the DCC 3.3.0 ``dcc.xsd``.
SCHEMA_ENV = "COLDCERT_DCC_SCHEMA"


class DccSchemaError(ValueError):
    """The configured schema cannot be read, or a rendering does not validate against it."""


def configured_schema(explicit: str | Path | None = None) -> Path | None:
    """The schema file to validate against: ``explicit`` if given, else ``$COLDCERT_DCC_SCHEMA``."""
    import os

    chosen = explicit or os.environ.get(SCHEMA_ENV)
    return Path(chosen) if chosen else None


@lru_cache(maxsize=4)
def load_schema(path: Path) -> etree.XMLSchema:
    """Parse the DCC schema at ``path`` (its imports are resolved relative to it)."""
    if not path.is_file():
        raise DccSchemaError(
            f"DCC schema not found at {path}: set {SCHEMA_ENV} (or DCC_SCHEMA in the instance "
            "config.py) to the dcc.xsd of your copy of the DCC 3.3.0 schema files"
        )
    try:
        return etree.XMLSchema(etree.parse(str(path)))
    except (etree.XMLSchemaParseError, etree.XMLSyntaxError, OSError) as exc:
        raise DccSchemaError(f"DCC schema at {path} could not be read: {exc}") from exc


def validate_dcc(document: bytes, schema_path: str | Path) -> None:
    """Raise :class:`DccSchemaError` naming the first violation if ``document`` is not valid."""
    schema = load_schema(Path(schema_path).resolve())
    tree = etree.fromstring(document)
    if not schema.validate(tree):
        first = schema.error_log.filter_from_errors()[0]
        raise DccSchemaError(
            f"DCC rendering does not validate against {schema_path}: line {first.line}: "
            f"{first.message}"
        )


#: ISO 3166-1 user-assigned code, used when the laboratory gives no country: it states
#: "unknown" without pretending to a real country.
UNKNOWN_COUNTRY = "ZZ"

#: Our record units → D-SI unit strings (D-SI 2.2.0 base and derived units with SI prefixes).
#: Relative quantities in ppm are written as dimensionless "\one" values scaled exactly by 1e-6.
SI_UNITS = {
    "K": r"\kelvin",
    "mK": r"\milli\kelvin",
    "uK": r"\micro\kelvin",
    "µK": r"\micro\kelvin",
    "A": r"\ampere",
    "nA": r"\nano\ampere",
    "pA": r"\pico\ampere",
    "V": r"\volt",
    "mV": r"\milli\volt",
    "uV": r"\micro\volt",
    "µV": r"\micro\volt",
    "S": r"\siemens",
    "ohm": r"\ohm",
    "Ω": r"\ohm",
    "Pa": r"\pascal",
    "MPa": r"\mega\pascal",
    "Hz": r"\hertz",
    "s": r"\second",
    "J": r"\joule",
    "1": r"\one",
    "": r"\one",
}
_SCALED = {"ppm": -6, "ppb": -9, "%": -2}

_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


class CertificateIncomplete(ValueError):
    """The record lacks something a certificate must state; the message says what."""


def _number(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise CertificateIncomplete(f"{where} must be a finite number, found {value!r}")
    return float(value)


#: Placeholder texts the record builder writes where the manifest says nothing; a certificate
#: carrying one of them is not complete.
PLACEHOLDERS = ("not stated", "not stated in the run manifest")

#: What ISO/IEC 17025:2017 7.8.2.1 asks every certificate to state, as (record field, what it is,
#: how an operator supplies it). The issue date and the approver (7.8.2.1 o) are set by issuing.
REQUIRED_FIELDS = (
    ("title", "a title (7.8.2.1 a)", "title"),
    ("laboratory.name", "the laboratory's name (7.8.2.1 b)", "[laboratory] name"),
    ("laboratory.address", "the laboratory's address (7.8.2.1 b)", "[laboratory] address"),
    ("customer.name", "the customer's name (7.8.2.1 f)", "[customer] name"),
    ("customer.address", "the customer's contact address (7.8.2.1 f)", "[customer] address"),
    ("item.description", "a description of the item (7.8.2.1 g)", "[item] description"),
    ("item.identifier", "the item's unambiguous identification (7.8.2.1 g)", "[item] identifier"),
    ("dates.measured", "the date of the measurement (7.8.2.1 i)", "[dates] measured"),
    ("method.description", "the method used (7.8.2.1 e)", "(set by the analysis)"),
)


def _field(record: Mapping[str, Any], path: str) -> Any:
    value: Any = record
    for part in path.split("."):
        value = value.get(part) if isinstance(value, Mapping) else None
    return value


def missing_for_issue(record: Mapping[str, Any]) -> list[dict[str, str]]:
    """What a draft still lacks before it may be issued (ISO/IEC 17025:2017 7.8.2.1).

    Each entry names the record ``field``, ``what`` it is and ``how`` to supply it (the run.toml
    table and key, or a correction of the draft). Results without unit or expanded uncertainty
    are listed too (7.8.2.1 m, 7.8.4.1 a). An empty list means the draft is complete.
    """
    missing = []
    for path, what, key in REQUIRED_FIELDS:
        value = _field(record, path)
        text = str(value).strip() if value is not None else ""
        if not text or text.lower() in PLACEHOLDERS:
            missing.append({"field": path, "what": what, "how": key})
        elif path.startswith("dates.") and not _DATE.match(text):
            missing.append({"field": path, "what": f"{what} as YYYY-MM-DD", "how": key})
    try:
        _check_results(record)
    except CertificateIncomplete as exc:
        missing.append({"field": "results", "what": str(exc), "how": "(a new run)"})
    return missing


def check_complete(record: Mapping[str, Any]) -> None:
    """Refuse a record that lacks its id, issue date, or any result's uncertainty and unit.

    ISO/IEC 17025:2017 7.8.2.1 b) and h): a unique identification and the date of issue;
    7.8.4.1 a) with 7.8.2.1 m): results with units and their measurement uncertainty.
    """
    if not str(record.get("certificate_id") or "").strip():
        raise CertificateIncomplete("the certificate has no identifier")
    issued = (record.get("dates") or {}).get("issued")
    if not issued or not _DATE.match(str(issued)):
        raise CertificateIncomplete(
            "the certificate has no issue date (dates.issued): only an issued certificate can "
            "be written as a DCC"
        )
    _check_results(record)


def _check_results(record: Mapping[str, Any]) -> None:
    """Every result has a finite value, a unit and an expanded uncertainty with k and p."""
    results = record.get("results") or []
    if not results:
        raise CertificateIncomplete("the certificate states no results")
    for index, result in enumerate(results):
        where = f"results[{index}] ({result.get('name', '?')}, {result.get('sweep', '')})"
        _number(result.get("value"), f"{where} value")
        if result.get("unit") is None:
            raise CertificateIncomplete(f"{where} has no unit")
        expanded = result.get("expanded_uncertainty")
        if expanded is None:
            raise CertificateIncomplete(f"{where} has no expanded uncertainty")
        if _number(expanded, f"{where} expanded uncertainty") < 0:
            raise CertificateIncomplete(f"{where} expanded uncertainty is negative")
        if _number(result.get("coverage_factor"), f"{where} coverage factor") <= 0:
            raise CertificateIncomplete(f"{where} coverage factor must be positive")
        p = _number(result.get("coverage_probability"), f"{where} coverage probability")
        if not 0 < p < 1:
            raise CertificateIncomplete(f"{where} coverage probability must lie in (0, 1)")
        si_unit(result["unit"])


def si_unit(unit: str) -> str:
    """D-SI unit string for a record unit; refuses units we cannot express faithfully."""
    if unit in SI_UNITS:
        return SI_UNITS[unit]
    if unit in _SCALED:
        return r"\one"
    raise CertificateIncomplete(
        f"unit {unit!r} has no D-SI mapping here; known units: "
        f"{', '.join(sorted({k for k in SI_UNITS if k} | set(_SCALED)))}"
    )


def si_value(value: float | str, unit: str) -> str:
    """Decimal text of a value in the D-SI unit (exact decimal scaling for ppm and %); a string
    (a GUM 7.2.6 rounded value from the record's ``reported``) is kept digit for digit."""
    text = value if isinstance(value, str) else repr(float(value))
    if unit in _SCALED:
        return str(Decimal(text).scaleb(_SCALED[unit]))
    return text


def _el(parent: etree._Element, tag: str, text: str | None = None, **attrs: str):
    prefix, _, local = tag.partition(":")
    element = etree.SubElement(parent, f"{{{NSMAP[prefix]}}}{local}", **attrs)
    if text is not None:
        element.text = text
    return element


def _text(parent, tag: str, content: str):
    holder = _el(parent, tag)
    _el(holder, "dcc:content", _nonempty(content), lang="en")
    return holder


def _nonempty(text: Any) -> str:
    # notEmptyStringType: no leading/trailing blanks and not empty.
    cleaned = " ".join(str(text if text is not None else "").split())
    return cleaned or "not stated"


def _location(parent, address: Any) -> None:
    location = _el(parent, "dcc:location")
    further = _el(location, "dcc:further")
    _el(further, "dcc:content", _nonempty(address), lang="en")


def render_dcc(record: Mapping[str, Any]) -> bytes:
    """The DCC 3.3.0 XML document of an issued certificate record (UTF-8 bytes).

    The administrative data come in the schema's order (software, core data, items,
    laboratory, responsible persons, customer, statements), then the measurement results."""
    check_complete(record)
    root = etree.Element(f"{{{DCC_NS}}}digitalCalibrationCertificate", nsmap=NSMAP)
    root.set("schemaVersion", SCHEMA_VERSION)
    admin = _el(root, "dcc:administrativeData")
    _software(admin)
    _core_data(admin, record)
    _item(admin, record.get("item") or {})
    lab = record.get("laboratory") or {}
    contact = _el(_el(admin, "dcc:calibrationLaboratory"), "dcc:contact")
    _text(contact, "dcc:name", lab.get("name") or "not stated")
    _location(contact, lab.get("address"))
    _responsible_persons(admin, record.get("people") or {})
    customer = record.get("customer") or {}
    customer_el = _el(admin, "dcc:customer")
    _text(customer_el, "dcc:name", customer.get("name") or "not stated")
    _location(customer_el, customer.get("address"))
    _statements(admin, record)
    _measurement_results(root, record)
    return etree.tostring(root, xml_declaration=True, encoding="UTF-8", pretty_print=True)


def _software(admin) -> None:
    software = _el(_el(admin, "dcc:dccSoftware"), "dcc:software")
    _text(software, "dcc:name", "coldcert")
    try:
        release = importlib_metadata.version("coldcert")
    except importlib_metadata.PackageNotFoundError:
        release = "unknown"
    _el(software, "dcc:release", release)


def _core_data(admin, record: Mapping[str, Any]) -> None:
    """Country, languages, identifier, dates and the revision it amends."""
    lab = record.get("laboratory") or {}
    dates = record.get("dates") or {}
    core = _el(admin, "dcc:coreData")
    country = str(lab.get("country_code") or UNKNOWN_COUNTRY).upper()
    _el(core, "dcc:countryCodeISO3166_1", country if re.match(r"^[A-Z]{2}$", country) else "ZZ")
    _el(core, "dcc:usedLangCodeISO639_1", "en")
    _el(core, "dcc:mandatoryLangCodeISO639_1", "en")
    _el(core, "dcc:uniqueIdentifier", _nonempty(record["certificate_id"]))
    received = dates.get("received")
    if received and _DATE.match(str(received)):
        _el(core, "dcc:receiptDate", str(received))
    measured = dates.get("measured")
    if not (measured and _DATE.match(str(measured))):
        raise CertificateIncomplete("the certificate has no date of measurement (dates.measured)")
    _el(core, "dcc:beginPerformanceDate", str(dates.get("measurement_began") or measured))
    _el(core, "dcc:endPerformanceDate", str(measured))
    _el(core, "dcc:performanceLocation", "laboratory")
    _el(core, "dcc:issueDate", str(dates["issued"]))
    if record.get("replaces"):
        change = _el(core, "dcc:reportAmendedSubstituted")
        _el(change, "dcc:typeOfChange", "amended")
        _el(change, "dcc:replacedUniqueIdentifier", _nonempty(record["replaces"]))


def _item(admin, item: Mapping[str, Any]) -> None:
    item_el = _el(_el(admin, "dcc:items"), "dcc:item")
    _text(item_el, "dcc:name", item.get("description") or item.get("name") or "not stated")
    if item.get("condition"):
        description = _el(item_el, "dcc:description")
        _el(description, "dcc:content", "Condition: " + _nonempty(item["condition"]), lang="en")
    if item.get("manufacturer"):
        _text(_el(item_el, "dcc:manufacturer"), "dcc:name", item["manufacturer"])
    identification = _el(_el(item_el, "dcc:identifications"), "dcc:identification")
    _el(identification, "dcc:issuer", "customer")
    _el(identification, "dcc:value", _nonempty(item.get("identifier") or "not stated"))


def _responsible_persons(admin, people: Mapping[str, Any]) -> None:
    persons = _el(admin, "dcc:respPersons")
    approver = _el(persons, "dcc:respPerson")
    _text(_el(approver, "dcc:person"), "dcc:name", people.get("approver") or "not stated")
    _el(approver, "dcc:role", "approved and issued the certificate")
    _el(approver, "dcc:mainSigner", "true")
    if people.get("operator"):
        operator = _el(persons, "dcc:respPerson")
        _text(_el(operator, "dcc:person"), "dcc:name", people["operator"])
        _el(operator, "dcc:role", "performed the measurement")


def _statements(admin, record: Mapping[str, Any]) -> None:
    """Traceability, the record's statements and deviations, and the lifecycle notices."""
    statements = [str(s) for s in record.get("statements") or []]
    if record.get("traceability"):
        statements.insert(0, "Traceability: " + str(record["traceability"]))
    statements += ["Deviation: " + str(d) for d in record.get("deviations") or []]
    if record.get("amendment_reason"):
        statements.append(
            f"This revision replaces {record.get('replaces')}: {record['amendment_reason']}"
        )
    if record.get("state") == "superseded":
        statements.append(f"Superseded by certificate {record.get('superseded_by')}; do not use.")
    if record.get("state") == "withdrawn":
        statements.append(f"Withdrawn: {record.get('withdrawn_reason') or ''}; do not use.")
    if statements:
        statement_list = _el(admin, "dcc:statements")
        for text in statements:
            declaration = _el(_el(statement_list, "dcc:statement"), "dcc:declaration")
            _el(declaration, "dcc:content", _nonempty(text), lang="en")


def _measurement_results(root, record: Mapping[str, Any]) -> None:
    method = record.get("method") or {}
    results_root = _el(root, "dcc:measurementResults")
    measurement = _el(results_root, "dcc:measurementResult")
    _text(measurement, "dcc:name", method.get("name") or record.get("title") or "Calibration")
    if method.get("description"):
        description = _el(measurement, "dcc:description")
        _el(description, "dcc:content", _nonempty(method["description"]), lang="en")
    models = method.get("models") or []
    if models:
        used = _el(measurement, "dcc:usedMethods")
        for model in models:
            _text(_el(used, "dcc:usedMethod"), "dcc:name", model)
    results_el = _el(measurement, "dcc:results")
    for result in record["results"]:
        _result(results_el, result)


def _result(results_el, result: Mapping[str, Any]) -> None:
    """One result as a D-SI real with its expanded uncertainty."""
    result_el = _el(results_el, "dcc:result")
    label = str(result.get("name") or "result")
    if result.get("sweep"):
        label += f" ({result['sweep']})"
    _text(result_el, "dcc:name", label)
    quantity = _el(_el(result_el, "dcc:data"), "dcc:quantity")
    real = _el(quantity, "si:real")
    unit = result["unit"]
    _el(real, "si:label", _nonempty(result.get("quantity") or result.get("name")))
    # The same digits as the printed certificate (GUM 7.2.6: two significant digits of U,
    # the value rounded to match); the unrounded numbers stay in the JSON record.
    reported = result.get("reported") or {}
    _el(real, "si:value", si_value(reported.get("value", result["value"]), unit))
    _el(real, "si:unit", si_unit(unit))
    mu = _el(_el(real, "si:measurementUncertaintyUnivariate"), "si:expandedMU")
    expanded = reported.get("expanded_uncertainty", result["expanded_uncertainty"])
    _el(mu, "si:valueExpandedMU", si_value(expanded, unit))
    _el(mu, "si:coverageFactor", repr(float(result["coverage_factor"])))
    _el(mu, "si:coverageProbability", repr(float(result["coverage_probability"])))
