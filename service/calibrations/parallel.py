"""Independent pieces of a job (e.g. the sweeps of a run) on a pool of worker processes.

Each piece carries everything it needs, its own seed included, so its result does not depend on
which process ran it or in what order: a certificate is the same, byte for byte, whatever the number
of workers. Results come back in the order of the pieces, and an error is raised for the first
failing piece in that order (not the first to fail in time), so the message is reproducible too.

Progress stays live: the workers post (piece, fraction, step) on a queue that the calling process
drains while it waits, and hands on to the job's progress callback.

The number of workers is the ``workers`` argument, else the environment variable
``COLDCERT_WORKERS``, else the number of CPUs this process may use. One worker (or a single piece)
runs in the calling process, with no pool at all, and so does every piece inside a daemonic process
(the service's queue workers, which may not have children: the service scales by its number of
queue workers instead). Workers are forked when the calling process has a single thread (the CLI);
from a threaded process they come from a fork server, since forking a process whose other threads
may hold locks is unsafe.
"""

from __future__ import annotations

import multiprocessing
import os
import queue
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_EXCEPTION, ProcessPoolExecutor, wait
from typing import Any

WORKERS_VARIABLE = "COLDCERT_WORKERS"

Progress = Callable[[float, str], None]

_progress_queue: Any = None  # set in each worker by _start_worker


class WorkersError(ValueError):
    """The requested number of worker processes is not a positive integer."""


def worker_count(requested: int | None = None) -> int:
    """Workers to use: ``requested``, else $COLDCERT_WORKERS, else the CPUs available to us."""
    source = "workers"
    if requested is None:
        text = os.environ.get(WORKERS_VARIABLE, "").strip()
        if text:
            source = WORKERS_VARIABLE
            try:
                requested = int(text)
            except ValueError:
                requested = text  # type: ignore[assignment]  (refused just below)
        else:
            requested = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1
    if isinstance(requested, bool) or not isinstance(requested, int) or requested < 1:
        raise WorkersError(f"{source} = {requested!r}: expected a whole number of worker processes "
                           "(1 or more)")
    return requested


def _start_worker(progress_queue) -> None:
    global _progress_queue
    _progress_queue = progress_queue


def _run_piece(function, index: int, piece):
    def report(fraction: float, step: str) -> None:
        if _progress_queue is not None:
            _progress_queue.put((index, float(fraction), str(step)))

    return function(piece, report)


def run_pieces(
    function: Callable[[Any, Progress], Any],
    pieces: Sequence[Any],
    progress: Callable[[int, float, str], None] | None = None,
    workers: int | None = None,
) -> list:
    """``[function(piece, report) for piece in pieces]``, spread over worker processes.

    ``function`` must be a module-level function and the pieces picklable. ``report(fraction,
    step)`` inside a piece reaches ``progress(index, fraction, step)`` in the calling process.
    """
    count = min(worker_count(workers), len(pieces))
    if multiprocessing.current_process().daemon:
        count = 1  # a daemonic process (a queue worker of the service) may not start children
    if count <= 1:
        out = []
        for index, piece in enumerate(pieces):
            def report(fraction: float, step: str, index=index) -> None:
                if progress is not None:
                    progress(index, fraction, step)
            out.append(function(piece, report))
        return out
    method = "fork" if threading.active_count() == 1 else "forkserver"
    context = multiprocessing.get_context(method)
    messages = context.Queue()
    try:
        with ProcessPoolExecutor(count, mp_context=context, initializer=_start_worker,
                                 initargs=(messages,)) as pool:
            futures = [pool.submit(_run_piece, function, i, piece) for i, piece in enumerate(pieces)]
            pending = set(futures)
            while pending:
                _, pending = wait(pending, timeout=0.2, return_when=FIRST_EXCEPTION)
                _drain(messages, progress)
                failed = [i for i, f in enumerate(futures) if f.done() and not f.cancelled()
                          and f.exception() is not None]
                if failed:  # pieces after the first failure cannot change the outcome
                    for f in futures[failed[0] + 1:]:
                        f.cancel()
                    pending = {f for f in pending if not f.cancelled()}
        # The workers have exited, so whatever they reported is in the queue now.
        _drain(messages, progress)
    finally:
        messages.close()
        messages.join_thread()
    # The first failure in piece order (so the message does not depend on timing).
    for f in futures:
        if not f.cancelled() and f.exception() is not None:
            raise f.exception()
    return [f.result() for f in futures]


def _drain(messages, progress) -> None:
    while True:
        try:
            index, fraction, step = messages.get_nowait()
        except queue.Empty:
            return
        except (OSError, ValueError):  # queue closed while the pool was shutting down
            return
        if progress is not None:
            progress(index, fraction, step)
