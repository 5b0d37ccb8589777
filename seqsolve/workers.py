"""Participants' searches side by side in worker processes (one core each).

Each search pins BLAS to one thread (efficiency.fast.one_blas_thread), so on a laptop the way to
use its other cores is more processes, one participant each. A search depends only on the study,
its seed and the shared references, so a participant's design is the same whichever process
runs it and however many there are.

Workers ignore Ctrl-C themselves: the main process catches it, cancels the jobs not yet started
and raises a stop flag that each running search sees at its next step (through its progress
callback), so that it returns its best design so far. No signal can land between a search's end
and its result being sent back.
"""

from __future__ import annotations

import multiprocessing
import os
import queue as queue_module
import signal
from collections.abc import Callable
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass

from seqsolve.errors import InternalError
from seqsolve.objective import References, Scorer, Weights, scoring_setup
from seqsolve.search import Progress, Search, SearchOptions, SearchResult, warm_up
from seqsolve.spec import Study
from seqsolve.timing import draw_gaps


@dataclass(frozen=True)
class Job:
    """One participant's search, with nothing of the others'."""

    index: int
    label: str
    seed: int


def search_participant(
    study: Study,
    references: References,
    options: SearchOptions,
    job: Job,
    on_step: Callable[[Progress], None] | None = None,
    earlier: list | None = None,
) -> SearchResult:
    """Search one participant's design (valid, and different from `earlier` participants' ones)."""
    earlier = earlier or []
    setup = scoring_setup(study)
    starts = Search.sample_starts(study, job.seed, earlier, options)
    # no analysis (no TR): gaps do not bear on the score, so the search leaves them as drawn
    gaps = draw_gaps(study, starts[0], job.seed) if setup is not None else None
    scorer = Scorer(study, Weights.from_study(study), references, job.seed, gaps, setup)
    return Search(study, scorer, job.label, job.seed, earlier, options, on_step).run(starts)


_STEPS = None  # the worker's queue of progress reports to the main process
_STOP = None  # the main process's stop flag (an Event)
_PARENT = None  # the main process's pid: a worker whose parent died stops too


def _start_worker(steps, stop) -> None:
    global _STEPS, _STOP, _PARENT
    _STEPS, _STOP, _PARENT = steps, stop, os.getppid()
    # the main process decides (a termination signal to the whole group included); see the module docstring
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)


def _run_job(study: Study, references: References, options: SearchOptions, job: Job) -> SearchResult | None:
    if _STOP.is_set():
        return None
    return search_participant(study, references, options, job, _report)


def _report(p: Progress) -> None:
    """A search step's progress: to the main process, and a stop there ends the search here."""
    _STEPS.put(p)
    if _STOP.is_set() or os.getppid() != _PARENT:
        raise KeyboardInterrupt  # Search.run keeps its best design and returns


def search_in_workers(
    study: Study,
    references: References,
    options: SearchOptions,
    jobs: list[Job],
    workers: int,
    on_step: Callable[[Progress], None] | None = None,
    on_done: Callable[[Job], None] | None = None,
) -> tuple[dict[int, SearchResult | None], bool]:
    """Run the jobs in `workers` processes. Returns each job's result by index (None for jobs
    that a Ctrl-C cancelled or stopped before their search began) and whether a Ctrl-C came.

    on_step gets the searches' progress reports and on_done each job as it ends, both in this
    process; a Ctrl-C anywhere in here stops every running search at its next step."""
    ctx = multiprocessing.get_context("spawn")  # no fork of a process that holds solver threads
    steps, stop = ctx.Queue(), ctx.Event()
    results: dict[int, SearchResult | None] = {}
    interrupted = False
    # the workers start with Ctrl-C ignored (a disposition kept across exec), so that one pressed
    # while they import cannot kill them before _start_worker runs
    warm_up(study)  # compiled once here, loaded from the cache by every worker
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    previous_term = signal.signal(signal.SIGTERM, signal.SIG_IGN)
    try:
        pool = ProcessPoolExecutor(
            max_workers=workers, mp_context=ctx, initializer=_start_worker, initargs=(steps, stop)
        )
        futures = {pool.submit(_run_job, study, references, options, job): job for job in jobs}
    finally:
        signal.signal(signal.SIGINT, previous)
        signal.signal(signal.SIGTERM, previous_term)
    pending = set(futures)
    try:
        while pending:
            try:
                done, pending = wait(pending, timeout=0.25, return_when=FIRST_COMPLETED)
                _drain(steps, on_step)
                for f in done:
                    results[futures[f].index] = _result(f, interrupted)
                    if on_done:
                        on_done(futures[f])
            except KeyboardInterrupt:
                interrupted = True
                stop.set()
                for f in pending:
                    f.cancel()
    finally:
        stop.set()  # whatever ended this loop, no search may outlive it
        pool.shutdown(wait=True, cancel_futures=True)
        _drain(steps, on_step)
    for f, job in futures.items():  # those a Ctrl-C caught between wait and collection
        if job.index not in results:
            results[job.index] = _result(f, interrupted)
    return results, interrupted


def _result(future, interrupted: bool) -> SearchResult | None:
    if future.cancelled():
        return None
    try:
        return future.result()
    except KeyboardInterrupt:  # the stop came while the search's starts were sampled
        return None
    except BrokenProcessPool as exc:  # a worker was killed from outside (out of memory, say)
        if interrupted:
            return None
        raise InternalError(
            "a worker process died during the search (out of memory?); run again, with fewer --workers"
        ) from exc


def _drain(steps, on_step) -> None:
    while True:
        try:
            p = steps.get_nowait()
        except (queue_module.Empty, OSError, ValueError):
            return
        if on_step:
            on_step(p)
