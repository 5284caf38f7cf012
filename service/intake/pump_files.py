"""What a pump run's files must be before any analysis (docs/pump_formats.md).

A precision record (time_s,current_A,pump_on) needs on and off readings in time order and enough
off–on–off cycles for a Type A evaluation; a plateau scan (gate_V,current_A, optionally a second
gate column) enough points. These are checked at intake, so ``coldcert check`` refuses them too.
"""

from __future__ import annotations

import numpy as np

from service.intake.core import DataFile, IntakeError

MIN_CYCLES = 3
MIN_SCAN_POINTS = 20


def is_record(f: DataFile) -> bool:
    return {"time_s", "current_A", "pump_on"} <= set(f.columns)


def is_scan(f: DataFile) -> bool:
    return "gate_V" in f.columns and "current_A" in f.columns and "time_s" not in f.columns


def second_gate_column(f: DataFile) -> str | None:
    extra = [c for c in f.columns if c.endswith("_V") and c != "gate_V"]
    if len(extra) > 1:
        raise IntakeError(
            f"a plateau map has one second gate column; found {', '.join(extra)}",
            file=f.name, line=f.header_line, field=extra[1],
        )
    unknown = [c for c in f.columns if c not in ("gate_V", "current_A") and not c.endswith("_V")]
    if unknown:
        raise IntakeError("unexpected column in a plateau scan (expected gate_V,current_A and "
                          "optionally a second gate column ending in _V)", file=f.name,
                          line=f.header_line, field=unknown[0])
    return extra[0] if extra else None


def check_record(f: DataFile) -> None:
    """Refuse records the analysis cannot use, pointing at the offending line."""
    t = f.columns["time_s"]
    on = f.columns["pump_on"]
    bad = np.flatnonzero((on != 0) & (on != 1))
    if bad.size:
        i = int(bad[0])
        raise IntakeError(f"expected 1 (pump on) or 0 (pump off), got {on[i]:g}", file=f.name,
                          line=f.line_of_row(i), field="pump_on")
    step = np.diff(t)
    back = np.flatnonzero(step <= 0)
    if back.size:
        i = int(back[0]) + 1
        what = "repeats the previous time" if step[i - 1] == 0 else "is earlier than the previous time"
        raise IntakeError(f"time {t[i]:g} s {what}; readings must be in time order",
                          file=f.name, line=f.line_of_row(i), field="time_s")
    if not np.any(on == 0):
        raise IntakeError("the record has no pump-off readings, so the ammeter offset cannot be "
                          "removed; switch the pump off between on segments", file=f.name,
                          field="pump_on")
    if not np.any(on == 1):
        raise IntakeError("the record has no pump-on readings", file=f.name, field="pump_on")
    state = on.astype(np.int8)
    change = np.flatnonzero(np.diff(state)) + 1
    states = state[np.concatenate(([0], change))]
    cycles = int(np.sum((states[1:-1] == 1) & (states[:-2] == 0) & (states[2:] == 0)))
    if cycles < MIN_CYCLES:
        raise IntakeError(
            f"the record holds {cycles} complete off–on–off cycle(s); at least {MIN_CYCLES} are "
            "needed (better 30 or more) for a Type A evaluation", file=f.name, field="pump_on")


def check_scan(f: DataFile) -> None:
    """Refuse plateau scans the analysis cannot use."""
    second_gate_column(f)
    if f.rows < MIN_SCAN_POINTS:
        raise IntakeError(f"only {f.rows} rows; a plateau scan needs at least {MIN_SCAN_POINTS}",
                          file=f.name, line=f.header_line)


def check_pump_files(files) -> None:
    """Every file a record or a scan, at least one record, each checked."""
    for f in files:
        if not (is_record(f) or is_scan(f)):
            raise IntakeError(
                "not a pump file: expected the columns time_s,current_A,pump_on (precision record) "
                f"or gate_V,current_A (plateau scan); found {','.join(f.columns)}",
                file=f.name, line=f.header_line)
    if not any(is_record(f) for f in files):
        raise IntakeError("a pump verification needs at least one precision record with columns "
                          "time_s,current_A,pump_on; plateau scans alone give a model prediction only")
    for f in files:
        if is_record(f):
            check_record(f)
        else:
            check_scan(f)
