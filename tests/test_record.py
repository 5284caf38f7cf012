"""The record's results[] builder: one entry shape for every calibration kind."""

from __future__ import annotations

import math

import pytest

from analysis.budget import BudgetRow, combine
from service.record.results import result_entry


def _budget():
    rows = [BudgetRow("a", 1.0, 0.012, "K", "A", "normal", 1.0, 9),
            BudgetRow("b", 0.0, 0.005, "K", "B", "rectangular", 1.0)]
    return combine("T", "K", 0.123456, rows)


def test_entry_carries_the_budget_figures_and_their_rounding():
    budget = _budget()
    entry = result_entry(name="electron temperature", sweep="s.csv", quantity="T_e", unit="K",
                         budget=budget, model="m")
    assert entry["value"] == budget.estimate and entry["model"] == "m"
    assert entry["expanded_uncertainty"] == budget.expanded_uncertainty
    assert entry["budget"]["rows"][0]["quantity"] == "a"
    # GUM 7.2.6: u to two significant digits, the value rounded to match (0.013 -> 0.123).
    u = math.hypot(0.012, 0.005)
    assert entry["reported"] == {"value": f"{0.123456:.3f}", "standard_uncertainty": f"{u:.3f}",
                                 "expanded_uncertainty": entry["reported"]["expanded_uncertainty"],
                                 "unit": "K"}
    assert entry["effective_degrees_of_freedom"] == pytest.approx(budget.effective_degrees_of_freedom)


def test_infinite_degrees_of_freedom_become_none():
    rows = [BudgetRow("b", 0.0, 0.005, "K", "B", "rectangular", 1.0)]
    entry = result_entry(name="x", sweep="", quantity="x", unit="K", budget=combine("x", "K", 1.0, rows))
    assert entry["effective_degrees_of_freedom"] is None


def test_a_kind_cannot_overwrite_the_common_fields():
    with pytest.raises(ValueError, match="value"):
        result_entry(name="x", sweep="", quantity="x", unit="K", budget=_budget(), value=3.0)


def test_magnetic_field_caution_only_when_a_field_is_applied():
    # Common practice, no source: a magnet area needs its own caution; "no applied field" needs none.
    from service.record.certificate import MAGNET_CAUTION, mentions_magnetic_field, statements_for

    quiet = {"conditions": {"environment": "mixing-chamber plate, no applied field"}}
    assert not mentions_magnetic_field(quiet)
    assert MAGNET_CAUTION not in statements_for(quiet)
    for loud in (
        {"conditions": {"environment": "sample in 1.5 T from the solenoid"}},
        {"conditions": {"magnetic_field_T": 0.25}},
        {"item": {"condition": "mounted in the bore of a superconducting magnet"}},
    ):
        assert mentions_magnetic_field(loud), loud
        statements = statements_for(loud)
        assert MAGNET_CAUTION in statements
        assert statements[-1].startswith("This certificate was produced by the coldcert software")
    assert not mentions_magnetic_field({"conditions": {"magnetic_field_T": 0.0}})
