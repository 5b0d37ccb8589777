"""Participants' searches on a Dask cluster (generate --cluster): a local one, or a running scheduler.

The scheduling loop, the job a worker runs and the participants-differ pass afterwards are the
ones of `generate --workers` (seqsolve/workers.py, seqsolve/generate.py); this module only says how
a Dask cluster takes jobs and passes messages: progress reports through a distributed Queue, the
stop flag through a distributed Event (each looked at no more than every `CHECK_EVERY` seconds,
since each look is a round trip to the scheduler). A search depends only on the study, its seed
and the shared references, so the designs are the same as on this machine, byte for byte.

dask.distributed is an optional extra (`pip install "seqsolve[cluster]"`); it is imported here
only when a cluster is asked for.
"""

from __future__ import annotations

import logging
import os
import re
import time
import uuid
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from seqsolve.errors import SeqsolveError, shorten
from seqsolve.objective import References
from seqsolve.search import Progress, SearchOptions, SearchResult, warm_up
from seqsolve.spec import Study
from seqsolve.workers import Job, run_job, run_jobs, signals_ignored

#: seconds a worker waits between looks at the stop flag, and between progress reports it sends
CHECK_EVERY = 0.2
#: seconds allowed to reach a running scheduler
CONNECT_TIMEOUT = 30.0
#: scheduler addresses we accept besides "local": scheme://host:port, or host:port (tcp)
_ADDRESS = re.compile(r"^([a-z][a-z0-9+.-]*://)?[A-Za-z0-9_.:\[\]-]+:\d{1,5}$")


class ClusterError(SeqsolveError):
    """The cluster cannot be used: dask.distributed missing, a bad address, or no scheduler there."""


@dataclass(frozen=True)
class ClusterOptions:
    """Where the searches run. address: "local" (a LocalCluster on this machine) or a scheduler's
    address such as tcp://10.0.0.5:8786. workers: worker processes of the local cluster (default:
    this machine's cores); for a running scheduler, how many workers to wait for before starting."""

    address: str = "local"
    workers: int | None = None

    def __post_init__(self) -> None:
        if self.address != "local" and not _ADDRESS.match(self.address):
            raise ClusterError(
                f"--cluster: {shorten(self.address)} is neither 'local' nor a scheduler address "
                "such as tcp://host:8786; give one of those"
            )
        if self.workers is not None and self.workers < 1:
            raise ClusterError(f"--cluster-workers must be at least 1; got {self.workers}")

    def describe(self) -> str:
        """One line for the command's plan."""
        if self.address == "local":
            return f"a local Dask cluster of {self.n_local()} worker process(es)"
        return f"the Dask scheduler at {self.address}"

    def n_local(self) -> int:
        return self.workers or os.cpu_count() or 1


def _distributed():
    """The dask.distributed module, or a ClusterError saying how to install it."""
    try:
        import distributed
    except ImportError as exc:
        raise ClusterError(
            'generate --cluster needs dask.distributed, which is not installed; pip install "seqsolve[cluster]" '
            "(or run without --cluster: --workers uses this machine's cores)"
        ) from exc
    return distributed


def dask_config():
    """dask's configuration module (dask comes with dask.distributed)."""
    import dask.config

    return dask.config


@contextmanager
def open_client(cluster: ClusterOptions) -> Iterator[Any]:
    """A distributed Client on a new LocalCluster (closed afterwards) or on a running scheduler."""
    distributed = _distributed()
    if cluster.address == "local":
        # workers started with Ctrl-C ignored, as local worker processes are (workers.py); loopback only
        # no statistical profiler in the workers: it wakes every 10 ms to sample the search's thread,
        # taking the GIL from it, and nobody reads its profiles here
        try:
            with signals_ignored(), dask_config().set({"distributed.worker.profile.enabled": False}):
                local = distributed.LocalCluster(
                    n_workers=cluster.n_local(),
                    threads_per_worker=1,  # one search per process: each search holds one core
                    processes=True,
                    host="127.0.0.1",
                    dashboard_address=None,
                    silence_logs=logging.ERROR,
                )
        except Exception as exc:  # distributed says what went wrong only in its logs
            raise ClusterError(
                f"--cluster local: the local Dask cluster did not start ({type(exc).__name__}: "
                f"{shorten(str(exc), 200)}); run without --cluster (--workers uses this machine's cores)"
            ) from exc
        try:
            with distributed.Client(local) as client:
                yield client
        finally:
            local.close()
        return
    try:
        client = distributed.Client(cluster.address, timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ClusterError(
            f"--cluster: no Dask scheduler answered at {shorten(cluster.address)} within {CONNECT_TIMEOUT:g} s "
            f"({type(exc).__name__}); start one (dask scheduler) or use --cluster local"
        ) from exc
    with client:
        client.wait_for_workers(cluster.workers or 1)
        yield client


# ----------------------------------------------------------------------------------------------
# the worker's side


class _DaskChannel:
    """Progress to a distributed Queue and the stop flag from a distributed Event, each at most
    every CHECK_EVERY seconds (a report in between is dropped: the display shows the latest)."""

    def __init__(self, names: tuple[str, str]):
        from distributed import Event, Queue

        self.queue, self.event = Queue(names[0]), Event(names[1])
        self.sent = self.looked = float("-inf")
        self.stop = False

    def put(self, p: Progress) -> None:
        now = time.monotonic()
        if now - self.sent >= CHECK_EVERY:
            self.sent = now
            self.queue.put(p)

    def stopped(self) -> bool:
        now = time.monotonic()
        if not self.stop and now - self.looked >= CHECK_EVERY:
            self.looked = now
            try:
                self.stop = self.event.is_set()
            except Exception:  # the scheduler is gone: nobody will collect this search, end it
                self.stop = True
        return self.stop


def _run_dask_job(
    study: Study, references: References, options: SearchOptions, job: Job, names: tuple[str, str]
) -> SearchResult | None:
    return run_job(study, references, options, job, _DaskChannel(names))


def _prepare_worker(study: Study) -> dict[str, str]:
    """Load the study's compiled kernels and pin BLAS to one thread, before the first job; returns
    the versions the worker's searches run on (seqsolve and what its designs depend on)."""
    from threadpoolctl import threadpool_limits

    from seqsolve.generate import versions

    threadpool_limits(limits=1, user_api="blas")  # one search per process; a second BLAS thread takes a core
    warm_up(study)
    return versions()


def check_versions(mine: dict[str, str], workers: dict[str, dict[str, str]]) -> None:
    """Every worker must run the versions this process runs: the same spec and seed give the same
    designs only on the same code. Raises ClusterError naming the first worker that differs."""
    for worker, theirs in sorted(workers.items()):
        differ = [f"{k} {theirs.get(k, 'missing')} there, {v} here" for k, v in mine.items() if theirs.get(k) != v]
        if differ:
            raise ClusterError(
                f"--cluster: worker {worker} runs other versions ({'; '.join(differ)}); its designs could "
                "differ from this machine's, so install the same versions there"
            )


# ----------------------------------------------------------------------------------------------
# the main process's side


class DaskBackend:
    """The jobs as tasks of a distributed Client (see workers.Backend)."""

    def __init__(self, client, study: Study, references: References, options: SearchOptions):
        from distributed import Event, Queue

        self.client = client
        token = uuid.uuid4().hex[:12]  # a shared scheduler may serve several runs at once
        self.names = (f"seqsolve-steps-{token}", f"seqsolve-stop-{token}")
        self.queue, self.event = Queue(self.names[0], client=client), Event(self.names[1], client=client)
        self.token = token
        warm_up(study)  # compiled once here: a local cluster's workers load it from the cache
        from seqsolve.generate import versions

        check_versions(versions(), client.run(_prepare_worker, study))
        # the study and the references travel to each worker once, not with each of the jobs
        self.payload = client.scatter([study, references, options], broadcast=True, hash=False)
        self.futures: list = []

    def submit_all(self, jobs: list[Job]) -> dict[Any, Job]:
        out = {}
        for job in jobs:
            key = f"seqsolve-{self.token}-{job.index}"
            out[self.client.submit(_run_dask_job, *self.payload, job, self.names, key=key, pure=False)] = job
        self.futures = list(out)
        return out

    def wait(self, pending: set, timeout: float) -> tuple[set, set]:
        done = {f for f in pending if f.done()}
        if not done:
            time.sleep(timeout)
            done = {f for f in pending if f.done()}
        return done, pending - done

    def steps(self) -> list[Progress]:
        try:
            return list(self.queue.get(batch=True))
        except Exception:  # the scheduler is gone: no reports; the results say what happened
            return []

    def stop(self) -> None:
        try:
            self.event.set()
        except Exception:  # the scheduler is gone, and with it every running search
            pass

    def cancel(self, futures: Iterable) -> None:
        """Nothing: the client cannot tell a queued task from a running one, and cancelling a running
        search would lose its best design so far. With the stop flag up, a job not yet begun returns
        None at once (run_job), a running one its best design at its next step."""

    def result(self, future, interrupted: bool) -> SearchResult | None:
        if future.cancelled():
            return None
        try:
            return future.result()
        except Exception as exc:  # a worker died (KilledWorker) or the scheduler went away
            if interrupted:
                return None
            raise ClusterError(
                f"the cluster lost a participant's search ({type(exc).__name__}: {shorten(str(exc), 200)}); "
                "the workers may have run out of memory or the scheduler stopped; run again"
            ) from exc

    def close(self) -> None:
        """Wait for the running searches (the stop flag is up: each ends at its next step)."""
        from distributed import wait

        running = [f for f in self.futures if not f.cancelled()]
        if running:
            wait(running)
        for release in (self.queue.close, self.event.clear):
            try:
                release()
            except Exception:  # the scheduler is gone; nothing of ours is left there
                pass


def search_on_cluster(
    study: Study,
    references: References,
    options: SearchOptions,
    jobs: list[Job],
    cluster: ClusterOptions,
    on_step: Callable[[Progress], None] | None = None,
    on_done: Callable[[Job], None] | None = None,
    on_start: Callable[[], None] | None = None,
) -> tuple[dict[int, SearchResult | None], bool]:
    """Run the jobs on a Dask cluster; the same results as workers.search_in_workers (see run_jobs)."""
    with open_client(cluster) as client:
        return run_jobs(DaskBackend(client, study, references, options), jobs, on_step, on_done, on_start)
