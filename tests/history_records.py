"""Invented certificate records of one item over several calibrations (history tests only).

The fictional lab scenario: a RuO₂ sensor 'HX-RX-07' on the mixing chamber of the invented
fridge 'Heron' is recalibrated every few months while its resistance creeps up; the CBT
'HX-CBT-2' and the pump 'HX-P3' are checked alongside. The records carry the fields the
history reads, in the layout the jobs write; the numbers are made up, never references.
"""

from __future__ import annotations

import numpy as np

from analysis import sensors
from service.calibrations.sensor import curve_record

CUSTOMER = {"name": "Heron Fridge Group (fictional)", "address": "Mudford"}
LAB = {"name": "Larkspur Cryogenic Metrology Laboratory (fictional)", "address": "Larkspur"}


def _base(job: str, item: str, measured: str, software: str = "0.1.0") -> dict:
    return {
        "schema": "coldcert/certificate/1",
        "job": job,
        "title": "Calibration certificate",
        "item": {"identifier": item, "description": "invented test item"},
        "customer": CUSTOMER,
        "laboratory": LAB,
        "dates": {"measured": measured, "received": measured, "issued": None},
        "people": {"operator": "T. Tester", "approver": None},
        "reproducibility": {"seed": 1, "software": {"coldcert": software}},
        "method": {"name": job, "description": f"invented {job} record for history tests"},
        "statements": [],
        "deviations": [],
        "sections": {},
        "results": [],
    }


def sensor_record(item: str, measured: str, *, creep: float, seed: int) -> dict:
    """A sensor calibration whose resistance scale has crept by the factor (1 + creep)."""
    sensor = sensors.SimulatedSensor(r0_ohm=1000.0 * (1.0 + creep))
    sim = sensors.simulate_calibration(
        sensor, np.geomspace(0.01, 1.0, 14), seed, temperature_gain_uncertainty=0.002
    )
    fit = sensors.fit_calibration_curve(sim.data, degree=4, hopping_check=False)
    record = _base("sensor_calibration", item, measured)
    record["sections"]["sensor_calibration"] = {"curve": curve_record(fit.curve)}
    r = float(np.sqrt(np.prod(fit.curve.resistance_range_ohm)))
    t, u = fit.curve.temperature(r)
    record["results"] = [
        {
            "name": "temperature from the calibration curve",
            "quantity": "T",
            "unit": "K",
            "value": float(t[0]),
            "standard_uncertainty": float(u[0]),
            "expanded_uncertainty": 2 * float(u[0]),
            "coverage_factor": 2.0,
            "coverage_probability": 0.95,
            "resistance_ohm": r,
        }
    ]
    return record


def cbt_record(item: str, measured: str, *, charging_energy: float, conductance: float) -> dict:
    record = _base("cbt_thermometry", item, measured)
    record["results"] = [
        {
            "name": "electron temperature",
            "sweep": f"sweep_{i}.csv",
            "quantity": "T_e",
            "unit": "K",
            "value": t,
            "standard_uncertainty": 1e-4 * t,
            "expanded_uncertainty": 2e-4 * t,
            "coverage_factor": 2.0,
            "coverage_probability": 0.95,
            "fit": {
                "charging_energy_K": charging_energy,
                "charging_energy_std_K": 2e-6,
                "asymptotic_conductance_S": conductance,
                "asymptotic_conductance_std_S": 2e-10,
            },
        }
        for i, t in enumerate((0.03, 0.06, 0.12))
    ]
    return record


def pump_record(item: str, measured: str, *, deviation_ppm: float, gate_V: float) -> dict:
    record = _base("pump_verification", item, measured)
    record["results"] = [
        {
            "name": "relative deviation of the pump current from n·e·f",
            "quantity": "(I − n·e·f)/(n·e·f)",
            "unit": "ppm",
            "value": deviation_ppm,
            "standard_uncertainty": 0.4,
            "expanded_uncertainty": 0.8,
            "coverage_factor": 2.0,
            "coverage_probability": 0.95,
            "frequency_Hz": 1e9,
            "sweep": "record_1GHz.csv",
        }
    ]
    record["sections"]["plateau_scans"] = [
        {
            "kind": "plateau scan",
            "frequency_Hz": 1e9,
            "working_point": {"gate_V": gate_V, "gate_standard_uncertainty_V": 5e-5, "plateau": 1},
        }
    ]
    return record


def archive_certificate(lab, record: dict, *, issue: bool = True, submitter: str = "olga",
                        approver: str = "arno", replaces: str | None = None,
                        reason: str | None = None) -> str:
    """Put an invented record into a test lab's archive as a run + draft (+ issue).

    The history reads what the archive holds, whatever analysis produced it; going through the
    archive's own record_run / create_draft / issue keeps the chain and states real while
    sparing the tests an MCMC run per calibration.
    """
    from service.queue.jobs import new_id
    from service.web.auth import list_users

    storage, archive = lab.services.storage, lab.services.archive
    people = {u["username"]: u for u in list_users(storage)}
    item = record["item"]["identifier"]
    run_id = new_id("run")
    with storage.write() as conn:
        archive.record_run(
            conn,
            run_id=run_id,
            kind=record["job"],
            item=item,
            manifest={"run": {"kind": record["job"]}},
            files=[("run.toml", f"# invented run {run_id}\n".encode())],
            seed=1,
            submitter=people[submitter],
            replaces=replaces,
            amendment_reason=reason,
        )
        cid = archive.create_draft(
            conn,
            run_id=run_id,
            record=record,
            seed=1,
            software=record["reproducibility"]["software"],
            submitter=people[submitter],
            replaces=replaces,
            amendment_reason=reason,
        )
    if issue:
        archive.issue(cid, people[approver])
    return cid
