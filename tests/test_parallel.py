"""Independent pieces of a job on worker processes (service.calibrations.parallel)."""

import os

import pytest

from service.calibrations.parallel import WORKERS_VARIABLE, WorkersError, run_pieces, worker_count
from service.intake import IntakeError


def square_and_report(piece, report):
    report(0.5, f"half of {piece}")
    report(1.0, f"done {piece}")
    return piece * piece, os.getpid()


def fail_on_odd(piece, report):
    if piece % 2:
        raise IntakeError(f"piece {piece} is odd", file=f"sweep_{piece}.csv", line=piece + 1,
                          field="conductance_S")
    return piece


@pytest.mark.parametrize("workers", [1, 2, 3])
def test_results_in_piece_order_and_progress_from_every_piece(workers):
    seen = []
    out = run_pieces(square_and_report, [3, 1, 4, 1, 5], lambda i, f, s: seen.append((i, f, s)),
                     workers=workers)
    assert [value for value, _ in out] == [9, 1, 16, 1, 25]
    assert sorted(seen) == sorted([(i, f, f"{w} {p}") for i, p in enumerate([3, 1, 4, 1, 5])
                                   for f, w in ((0.5, "half of"), (1.0, "done"))])
    pids = {pid for _, pid in out}
    assert (pids == {os.getpid()}) if workers == 1 else (os.getpid() not in pids)


@pytest.mark.parametrize("workers", [1, 2])
def test_first_failure_in_piece_order_is_raised_with_its_location(workers):
    with pytest.raises(IntakeError) as err:
        run_pieces(fail_on_odd, [0, 2, 3, 4, 5], workers=workers)
    exc = err.value
    assert (exc.file, exc.line, exc.field) == ("sweep_3.csv", 4, "conductance_S")
    assert str(exc) == "sweep_3.csv:4: conductance_S: piece 3 is odd"


def test_worker_count_from_argument_environment_or_cpus(monkeypatch):
    monkeypatch.setenv(WORKERS_VARIABLE, "3")
    assert worker_count() == 3 and worker_count(2) == 2
    monkeypatch.delenv(WORKERS_VARIABLE)
    assert worker_count() >= 1
    for bad in ("0", "two", "-1"):
        monkeypatch.setenv(WORKERS_VARIABLE, bad)
        with pytest.raises(WorkersError, match=WORKERS_VARIABLE):
            worker_count()
    with pytest.raises(WorkersError):
        worker_count(0)


def test_from_a_threaded_process_the_workers_come_from_a_fork_server():
    # The web service calls jobs from worker threads; forking a threaded process is unsafe, so
    # there the pool starts its workers from a fork server. Same results.
    import threading

    box = {}

    def job():
        try:
            box["out"] = run_pieces(square_and_report, [2, 7], workers=2)
        except Exception as exc:  # handed to the main thread's assertion below
            box["error"] = exc

    thread = threading.Thread(target=job)
    thread.start()
    thread.join(timeout=300)
    assert "error" not in box, box.get("error")
    assert [value for value, _ in box["out"]] == [4, 49]


def call_from_daemon(conn):
    conn.send([value for value, _ in run_pieces(square_and_report, [5, 6], workers=2)])


def test_a_daemonic_process_runs_its_pieces_itself():
    # The service's queue workers are daemonic processes, which may not start children.
    import multiprocessing

    ctx = multiprocessing.get_context("fork")
    here, there = ctx.Pipe()
    proc = ctx.Process(target=call_from_daemon, args=(there,), daemon=True)
    proc.start()
    assert here.poll(300)
    assert here.recv() == [25, 36]
    proc.join(60)
