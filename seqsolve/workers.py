"""Participants' searches side by side: the scheduling core shared by worker processes on this
machine (generate --workers) and a Dask cluster (seqsolve/cluster.py, generate --cluster).

Each search pins BLAS to one thread (efficiency.fast.one_blas_thread), so on a laptop the way to
use its other cores is more processes, one participant each. A search depends only on the study,
its seed and the shared references, so a participant's design is the same whichever process
runs it, on whichever machine, and however many there are.

`run_jobs` is the one scheduling loop: it submits every job to a `Backend`, passes the searches'
progress reports and each job's end to the caller, and on Ctrl-C raises the backend's stop flag
(each running search sees it at its next step, through its progress callback, and returns its best
design so far) and cancels the jobs not yet started. Workers ignore Ctrl-C themselves, so no signal
can land between a search's end and its result being sent back. A backend only says how to
submit, wait, cancel and pass messages.
"""

from __future__ import annotations

import multiprocessing
import os
import queue as queue_module
import signal
from collections.abc import Callable, Iterable
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Protocol

from seqsolve.errors import InternalError
from seqsolve.objective import References, Scorer, Weights, scoring_setup
from seqsolve.search import Progress, Search, SearchOptions, SearchResult, warm_up
from seqsolve.spec import Study
from seqsolve.timing import draw_gaps

#: seconds between the scheduling loop's looks at finished jobs and progress reports
POLL = 0.25


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


# ----------------------------------------------------------------------------------------------
# the worker's side: one job, its progress out and the stop flag in


class Channel(Protocol):
    """A worker's line to the main process: progress reports out, the stop flag in."""

    def put(self, p: Progress) -> None: ...

    def stopped(self) -> bool: ...


def run_job(
    study: Study, references: References, options: SearchOptions, job: Job, channel: Channel
) -> SearchResult | None:
    """One participant's search in a worker; None when the stop came before it could begin."""
    if channel.stopped():
        return None

    def report(p: Progress) -> None:
        channel.put(p)
        if channel.stopped():
            raise KeyboardInterrupt  # Search.run keeps its best design and returns

    try:
        return search_participant(study, references, options, job, report)
    except KeyboardInterrupt:  # the stop came while the search's starts were sampled
        return None


# ----------------------------------------------------------------------------------------------
# the main process's side: one scheduling loop for every backend


class Backend(Protocol):
    """Where the jobs run. Futures need only be hashable; `wait` returns (done, still pending)."""

    def submit_all(self, jobs: list[Job]) -> dict[Any, Job]: ...

    def wait(self, pending: set, timeout: float) -> tuple[set, set]: ...

    def steps(self) -> list[Progress]: ...

    def stop(self) -> None: ...

    def cancel(self, futures: Iterable) -> None: ...

    def result(self, future, interrupted: bool) -> SearchResult | None: ...

    def close(self) -> None: ...


def run_jobs(
    backend: Backend,
    jobs: list[Job],
    on_step: Callable[[Progress], None] | None = None,
    on_done: Callable[[Job], None] | None = None,
    on_start: Callable[[], None] | None = None,
) -> tuple[dict[int, SearchResult | None], bool]:
    """Run the jobs on `backend`. Returns each job's result by index (None for jobs that a Ctrl-C
    cancelled or stopped before their search began) and whether a Ctrl-C came.

    on_step gets the searches' progress reports, on_done each job as it ends and on_start the moment
    the jobs are submitted (the workers ready), all in this process; a Ctrl-C anywhere in here stops
    every running search at its next step."""
    results: dict[int, SearchResult | None] = {}
    interrupted = False
    futures: dict[Any, Job] = {}
    try:
        futures = backend.submit_all(jobs)
        if on_start:
            on_start()
        pending = set(futures)
        while pending:
            try:
                done, pending = backend.wait(pending, POLL)
                _forward(backend.steps(), on_step)
                for f in done:
                    results[futures[f].index] = backend.result(f, interrupted)
                    if on_done:
                        on_done(futures[f])
            except KeyboardInterrupt:
                interrupted = True
                backend.stop()
                backend.cancel(pending)
    finally:
        backend.stop()  # whatever ended this loop, no search may outlive it
        backend.close()
        _forward(backend.steps(), on_step)
    for f, job in futures.items():  # those a Ctrl-C caught between wait and collection
        if job.index not in results:
            results[job.index] = backend.result(f, interrupted)
    return results, interrupted


def _forward(steps: list[Progress], on_step) -> None:
    if on_step:
        for p in steps:
            on_step(p)


@contextmanager
def signals_ignored():
    """Ctrl-C and SIGTERM ignored while worker processes start: the disposition is kept across
    exec, so one pressed while a worker imports cannot kill it (the main process decides)."""
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    previous_term = signal.signal(signal.SIGTERM, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        signal.signal(signal.SIGTERM, previous_term)


# ----------------------------------------------------------------------------------------------
# worker processes on this machine (generate --workers)

_CHANNEL = None  # the worker process's _LocalChannel


class _LocalChannel:
    """A spawned worker's queue of progress reports and the main process's stop flag (an Event)."""

    def __init__(self, steps, stop):
        self.steps, self.stop, self.parent = steps, stop, os.getppid()

    def put(self, p: Progress) -> None:
        self.steps.put(p)

    def stopped(self) -> bool:
        return self.stop.is_set() or os.getppid() != self.parent  # a worker whose parent died stops too


def _start_worker(steps, stop) -> None:
    global _CHANNEL
    _CHANNEL = _LocalChannel(steps, stop)
    # the main process decides (a termination signal to the whole group included); see the module docstring
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)


def _run_local_job(study: Study, references: References, options: SearchOptions, job: Job) -> SearchResult | None:
    return run_job(study, references, options, job, _CHANNEL)


class ProcessBackend:
    """`workers` spawned processes on this machine (no fork of a process that holds solver threads)."""

    def __init__(self, study: Study, references: References, options: SearchOptions, workers: int):
        self.payload = (study, references, options)
        ctx = multiprocessing.get_context("spawn")
        self.queue, self.flag = ctx.Queue(), ctx.Event()
        warm_up(study)  # compiled once here, loaded from the cache by every worker
        with signals_ignored():
            self.pool = ProcessPoolExecutor(
                max_workers=workers, mp_context=ctx, initializer=_start_worker, initargs=(self.queue, self.flag)
            )

    def submit_all(self, jobs: list[Job]) -> dict[Any, Job]:
        with signals_ignored():  # the pool starts its processes as jobs arrive
            return {self.pool.submit(_run_local_job, *self.payload, job): job for job in jobs}

    def wait(self, pending: set, timeout: float) -> tuple[set, set]:
        return wait(pending, timeout=timeout, return_when=FIRST_COMPLETED)

    def steps(self) -> list[Progress]:
        out = []
        while True:
            try:
                out.append(self.queue.get_nowait())
            except (queue_module.Empty, OSError, ValueError):
                return out

    def stop(self) -> None:
        self.flag.set()

    def cancel(self, futures: Iterable) -> None:
        for f in futures:
            f.cancel()

    def result(self, future, interrupted: bool) -> SearchResult | None:
        if future.cancelled():
            return None
        try:
            return future.result()
        except BrokenProcessPool as exc:  # a worker was killed from outside (out of memory, say)
            if interrupted:
                return None
            raise InternalError(
                "a worker process died during the search (out of memory?); run again, with fewer --workers"
            ) from exc

    def close(self) -> None:
        self.pool.shutdown(wait=True, cancel_futures=True)


def search_in_workers(
    study: Study,
    references: References,
    options: SearchOptions,
    jobs: list[Job],
    workers: int,
    on_step: Callable[[Progress], None] | None = None,
    on_done: Callable[[Job], None] | None = None,
    on_start: Callable[[], None] | None = None,
) -> tuple[dict[int, SearchResult | None], bool]:
    """Run the jobs in `workers` processes on this machine (see run_jobs)."""
    return run_jobs(ProcessBackend(study, references, options, workers), jobs, on_step, on_done, on_start)
