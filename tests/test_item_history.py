"""An item's history built from its certificate records (service/archive/history.py).

The science (drift, intervals, ΔT) is checked against outside references in test_drift.py,
test_intervals.py and test_curve_comparison.py; here the invented records check that the history
picks the right certificates, reads the right fields and reports what the analysis found.
"""

import json
from datetime import date

import pytest

from service.archive import history as ih
from tests import history_records as hr


def _entry(cid, record, state="issued", revision=1, **kw):
    return ih.CertificateEntry(cid, revision, state, record["job"], "X", record, **kw)


POLICY = {
    "max_permissible_change": {
        "temperature": {"max_change": 0.01, "relative": True},
        "charging_energy": {"max_change": 0.005, "relative": True},
        "deviation": {"max_change": 1.0},
    },
    "maximum_interval_days": 730,
    "minimum_interval_days": 30,
}


@pytest.fixture(scope="module")
def sensor_entries():
    dates = ["2024-01-10", "2024-07-02", "2025-01-15", "2025-07-20"]
    creeps = [0.0, 0.01, 0.02, 0.03]
    return [
        _entry(f"CC-2025-{i:05d}", hr.sensor_record("HX-RX-07", d, creep=c, seed=10 + i))
        for i, (d, c) in enumerate(zip(dates, creeps, strict=True), start=1)
    ]


def test_sensor_history_follows_the_creep_and_compares_curves(sensor_entries):
    h = ih.build_history("HX-RX-07", sensor_entries, policy=POLICY, today=date(2025, 9, 1))
    assert h["in_force"] == [e.certificate_id for e in sensor_entries]
    temps = [q for q in h["quantities"] if q["key"] == "temperature"]
    assert len(temps) == ih.SENSOR_REFERENCE_POINTS
    for q in temps:
        assert [p["certificate_id"] for p in q["points"]] == h["in_force"]
    # A resistance scale growing by (1 + creep) means a fixed R is reached at a higher T; the
    # effect is clearest at the warm end, where the sensor is least sensitive.
    warm = temps[0]
    values = [p["value"] for p in warm["points"]]
    assert values == sorted(values)
    assert warm["chosen_model"] == "linear" and warm["changed"]
    assert warm["interval"]["limited_by"] == "drift" and warm["interval"]["model"] == "linear"
    assert len(h["curve_differences"]) == 3
    diff = h["curve_differences"][0]
    assert diff["first"] == h["in_force"][0] and diff["second"] == h["in_force"][1]
    assert sum(row["difference_K"] for row in diff["rows"]) > 0
    assert h["recall"]["due_date"] is not None
    assert h["recall"]["last_calibration"] == "2025-07-20"
    json.dumps(ih.public_history(h), allow_nan=False)  # plain JSON, no NaN


def test_only_certificates_in_force_enter_the_series(sensor_entries):
    e = sensor_entries
    entries = [
        e[0],
        ih.CertificateEntry(
            "CC-2025-00002",
            1,
            "superseded",
            e[1].kind,
            "X",
            e[1].record,
            superseded_by="CC-2025-00002-R2",
        ),
        ih.CertificateEntry(
            "CC-2025-00002-R2", 2, "issued", e[1].kind, "X", e[1].record, replaces="CC-2025-00002"
        ),
        ih.CertificateEntry(
            "CC-2025-00003",
            1,
            "withdrawn",
            e[2].kind,
            "X",
            e[2].record,
            withdrawn_reason="wrong bridge channel",
        ),
        ih.CertificateEntry("CC-2025-00004", 1, "draft", e[3].kind, "X", e[3].record),
    ]
    h = ih.build_history("HX-RX-07", entries, policy=POLICY, today=date(2025, 9, 1))
    assert h["in_force"] == ["CC-2025-00001", "CC-2025-00002-R2"]
    states = {c["certificate_id"]: c["state"] for c in h["certificates"]}
    assert states["CC-2025-00003"] == "withdrawn" and states["CC-2025-00004"] == "draft"
    withdrawn = next(c for c in h["certificates"] if c["certificate_id"] == "CC-2025-00003")
    assert withdrawn["withdrawn_reason"] == "wrong bridge channel"
    # Timeline in calibration-date order, revisions of one date together.
    assert [c["calibration_date"] for c in h["certificates"]] == sorted(
        c["calibration_date"] for c in h["certificates"]
    )


def test_cbt_history_notices_a_conductance_jump():
    records = [
        hr.cbt_record("HX-CBT-2", d, charging_energy=7.0e-3, conductance=g)
        for d, g in (
            ("2024-01-01", 1.37700e-5),
            ("2024-06-01", 1.37702e-5),
            ("2025-01-01", 1.3770e-5),
            ("2025-06-01", 1.3900e-5),
        )
    ]
    entries = [_entry(f"CC-{i}", r) for i, r in enumerate(records)]
    h = ih.build_history("HX-CBT-2", entries, policy=POLICY, today=date(2025, 7, 1))
    by_key = {q["key"]: q for q in h["quantities"]}
    assert not by_key["charging_energy"]["changed"]
    assert by_key["asymptotic_conductance"]["changed"]
    assert "CC-3 differs from CC-2" in by_key["asymptotic_conductance"]["changed_reasons"][0]
    assert h["changed"]
    # E_C is stable; its interval comes from the drift its history cannot exclude.
    assert by_key["charging_energy"]["chosen_model"] == "stable"
    assert by_key["charging_energy"]["interval"]["model"] == "linear"


def test_pump_history_and_the_due_status():
    records = [
        hr.pump_record("HX-P3", d, deviation_ppm=v, gate_V=-0.3874 + 1e-5 * i)
        for i, (d, v) in enumerate(
            (("2024-01-01", -1.0), ("2024-06-01", -0.8), ("2024-12-01", -1.1), ("2025-05-01", -0.9))
        )
    ]
    entries = [_entry(f"P-{i}", r) for i, r in enumerate(records)]
    h = ih.build_history("HX-P3", entries, policy=POLICY, today=date(2025, 5, 2))
    names = [q["name"] for q in h["quantities"]]
    assert names == [
        "relative deviation from n·e·f, f = 1 GHz",
        "working-point gate voltage, plateau 1, f = 1 GHz",
    ]
    recall = h["recall"]
    assert recall["status"] == "in date"
    assert recall["limiting_quantity"] == names[0]
    later = ih.build_history("HX-P3", entries, policy=POLICY, today=date(2030, 1, 1))
    assert later["recall"]["status"] == "overdue" and later["recall"]["days_remaining"] < 0


def test_without_a_stated_change_the_default_interval_applies_and_says_so():
    records = [
        hr.pump_record("HX-P3", d, deviation_ppm=-1.0, gate_V=-0.3874)
        for d in ("2024-01-01", "2024-06-01")
    ]
    h = ih.build_history(
        "HX-P3", [_entry(f"P-{i}", r) for i, r in enumerate(records)], today=date(2024, 7, 1)
    )
    assert h["recall"]["interval_days"] == ih.DEFAULT_POLICY["default_interval_days"]
    assert h["recall"]["due_date"] == "2025-06-01"
    assert "no maximum permissible change" in h["recall"]["limited_by"]
    assert any("no maximum permissible change" in n for q in h["quantities"] for n in q["notes"])


def test_a_record_without_its_curve_is_named_and_left_out(sensor_entries):
    broken = dict(sensor_entries[1].record)
    broken["sections"] = {}
    entries = [sensor_entries[0], _entry("CC-BROKEN", broken), sensor_entries[2]]
    h = ih.build_history("HX-RX-07", entries, policy=POLICY, today=date(2025, 9, 1))
    assert any("CC-BROKEN" in n for n in h["notes"])
    assert len(h["curve_differences"]) == 1


@pytest.mark.parametrize(
    ("policy", "message"),
    [
        ({"max_permissible_change": {"temprature": 0.01}}, "names 'temprature'; tracked"),
        ({"max_permissible_change": {"deviation": {"max_change": 0}}}, "must be a positive"),
        ({"maximum_interval_days": 10}, "minimum_interval_days <= default_interval_days"),
        ({"reliability_target": 95}, "reliability_target must lie between 0 and 1"),
        ({"shared_components": {"CBT gain": 2}}, "correlations in \\[-1, 1\\]"),
        ({"max_interval": 365}, "unknown setting"),
    ],
)
def test_a_wrong_recall_policy_is_named(policy, message):
    with pytest.raises(ih.HistoryInputError, match=message):
        ih.checked_policy(policy)


def test_the_bundled_sensor_certificate_reads_and_compares_with_itself():
    # The record layout the sensor job really writes (example_runs, invented lab scenario).
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "example_runs" / "sensor-larkspur-certificate"
    record = json.loads((path / "certificate.json").read_text())
    later = json.loads(json.dumps(record))
    later["dates"]["measured"] = "2027-05-20"
    entries = [_entry("A", record), _entry("B", later)]
    shared = "CBT: bias-voltage scale factor"
    h = ih.build_history(
        "SMU-MXC-RX-14",
        entries,
        today=date(2027, 6, 1),
        policy={"shared_components": {shared: 1.0}},
    )
    (d,) = h["curve_differences"]
    assert d["shared_components"] == [{"name": shared, "correlation": 1.0}]
    assert all(row["difference_K"] == 0.0 for row in d["rows"])
    # The same calibration twice: the shared scale factor cancels in the difference.
    assert all(
        row["standard_uncertainty_K"] < row["uncorrelated_standard_uncertainty_K"]
        for row in d["rows"]
    )
    assert [len(q["points"]) for q in h["quantities"]] == [2, 2, 2]
