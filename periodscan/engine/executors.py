"""Where segments run: in this process, in local worker processes (joblib's loky), or on Dask.

All three share one small interface: ``submit(job) -> future``, ``wait_first(futures)``,
``slots`` (how many segments run at once), ``in_flight`` (how many to keep submitted: one queued
segment per worker beyond ``slots``, so a worker never idles while this process writes the
previous result's checkpoint and ledger rows), ``isolate_retries`` and ``close(abort)``. The
runner owns scheduling and the ledger; executors only move a pure function and its bytes to a
worker and back.

Why loky futures rather than ``joblib.Parallel``: a child segment may start the moment its
parent's checkpoint exists, so work is submitted one segment at a time as results arrive.
``Parallel(return_as="generator_unordered")`` needs the whole task list up front, which would
turn the run tree into waves (every trunk, then every branch) and leave cores idle. loky is
joblib's own process backend, and ``get_reusable_executor`` keeps its workers warm between
sweeps of one notebook session.
"""

from __future__ import annotations

import concurrent.futures as cf
import os
import threading
import time
from collections.abc import Iterable
from typing import Any

from periodscan.engine.allocator import keep_freed_memory
from periodscan.engine.segment import SegmentJob, SegmentResult, run_segment
from periodscan.errors import SweepError, bad_value

#: Seconds an idle local worker waits for work before it exits (joblib's own default).
IDLE_WORKER_TIMEOUT = 300

_ONE_AT_A_TIME = threading.Lock()


def run_segment_exclusive(job: SegmentJob) -> SegmentResult:
    """Run one segment at a time per process.

    Dropout draws from torch's per-process RNG, which training reseeds each epoch; two
    segments trained by two threads of one Dask worker would interleave their draws. The lock
    keeps results exact even on workers started with more than one thread. A Dask worker is a
    process periodscan uses for training only, so its allocator keeps freed memory too.
    """
    keep_freed_memory()
    with _ONE_AT_A_TIME:
        return run_segment(job)


def exit_with_parent(parent_pid: int, interval: float = 1.0) -> None:
    """Worker initializer: end this worker soon after the sweep process that owns it is gone.

    A SIGKILLed sweep cannot shut its pool down, and loky workers would otherwise keep
    training a lost segment (and then idle for minutes) on cores the rerun needs.
    """
    def watch() -> None:
        while os.getppid() == parent_pid:
            time.sleep(interval)
        os._exit(0)

    threading.Thread(target=watch, name="periodscan-exit-with-parent", daemon=True).start()


def start_worker(parent_pid: int) -> None:
    """Local worker initializer: keep freed memory (a training-only process), follow the parent."""
    keep_freed_memory()
    exit_with_parent(parent_pid)


class SerialExecutor:
    """Runs each segment in the calling process as soon as it is submitted."""

    slots = 1
    in_flight = 1
    isolate_retries = False

    def submit(self, job: SegmentJob) -> cf.Future:
        future: cf.Future = cf.Future()
        future.set_result(run_segment(job))
        return future

    def wait_first(self, futures: Iterable[cf.Future]) -> set[cf.Future]:
        return {f for f in futures if f.done()}

    def close(self, abort: bool = False) -> None:
        pass


class LocalExecutor:
    """A pool of worker processes (joblib's loky backend), one torch thread each by default.

    A worker that dies (out of memory, killed) breaks the whole pool: every segment in flight
    fails with it. The pool is then rebuilt on the next submit, and the runner retries the
    lost segments one at a time (``isolate_retries``) so a segment that kills its worker
    every time cannot take healthy ones down with it.
    """

    isolate_retries = True

    def __init__(self, workers: int | None = None, threads_per_worker: int = 1):
        self.slots = workers or os.cpu_count() or 1
        self.in_flight = 2 * self.slots
        self._env = {k: str(threads_per_worker) for k in ("OMP_NUM_THREADS", "MKL_NUM_THREADS")}
        self._pool = self._get_pool()

    def _get_pool(self):
        from joblib.externals.loky import get_reusable_executor

        return get_reusable_executor(max_workers=self.slots, env=self._env, reuse=True,
                                     timeout=IDLE_WORKER_TIMEOUT, initializer=start_worker,
                                     initargs=(os.getpid(),))

    def submit(self, job: SegmentJob) -> cf.Future:
        try:
            return self._pool.submit(run_segment, job)
        except RuntimeError:  # BrokenProcessPool / ShutdownExecutorError: a worker died
            self._pool = self._get_pool()
            return self._pool.submit(run_segment, job)

    def wait_first(self, futures: Iterable[cf.Future]) -> set[cf.Future]:
        done, _ = cf.wait(list(futures), return_when=cf.FIRST_COMPLETED)
        return set(done)

    def close(self, abort: bool = False) -> None:
        """Keep the pool warm for the next sweep, unless the sweep stopped early."""
        if abort:
            self._pool.shutdown(wait=False, kill_workers=True)


class DaskExecutor:
    """The same segments on a Dask cluster; each job carries its parent checkpoint as bytes.

    With an ``address`` it connects to a running scheduler and keeps two segments in flight per
    worker that is connected at the moment (at least one, so a batch-queue cluster whose jobs
    are still queued simply waits). With no ``address`` it starts a ``LocalCluster`` of
    ``workers`` single-threaded processes and closes it at the end.
    """

    isolate_retries = False  # a dead Dask worker takes only its own task with it

    def __init__(self, address: str | None = None, workers: int | None = None,
                 threads_per_worker: int = 1):
        import logging

        from distributed import Client, LocalCluster

        self._cluster = None
        self._fixed_slots: int | None = None
        try:
            if address:
                self._client = Client(address)
            else:
                n = workers or os.cpu_count() or 1
                self._cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                             dashboard_address=None,
                                             silence_logs=logging.ERROR)
                self._client = Client(self._cluster)
                self._fixed_slots = n
        except (OSError, TimeoutError) as err:
            where = f"the Dask scheduler at {address}" if address else "a Dask LocalCluster"
            raise SweepError(f"executor.address: cannot connect to {where} ({err}); start the "
                             "scheduler first or check the address") from None

    @property
    def slots(self) -> int:
        if self._fixed_slots is not None:
            return self._fixed_slots
        return max(len(self._client.nthreads()), 1)

    @property
    def in_flight(self) -> int:
        return 2 * self.slots

    def submit(self, job: SegmentJob) -> Any:
        return self._client.submit(run_segment_exclusive, job, pure=False)

    def wait_first(self, futures: Iterable[Any]) -> set[Any]:
        from distributed import wait

        done, _ = wait(list(futures), return_when="FIRST_COMPLETED")
        return set(done)

    def close(self, abort: bool = False) -> None:
        self._client.close()
        if self._cluster is not None:
            self._cluster.close()


#: The executor kinds ``make_executor`` builds (the config's executor.kind).
EXECUTORS = ("serial", "local", "dask")


def make_executor(settings: dict[str, Any]):
    """Build the executor named by the ``executor`` config group."""
    kind = settings.get("kind")
    threads = int(settings.get("threads_per_worker", 1))
    if kind == "serial":
        return SerialExecutor()
    if kind == "local":
        return LocalExecutor(settings.get("workers"), threads)
    if kind == "dask":
        return DaskExecutor(settings.get("address"), settings.get("workers"), threads)
    raise bad_value("executor.kind", f"one of {', '.join(map(repr, EXECUTORS))}", kind)
