"""Where segments run: in this process, in local worker processes (joblib's loky), or on Dask.

All three share one tiny interface: ``submit(job) -> future``, ``wait_first(futures)``, ``slots``
(how many segments to keep in flight) and ``close()``. The runner owns scheduling and the
ledger; executors only move a pure function and its bytes to a worker and back.
"""

from __future__ import annotations

import concurrent.futures as cf
import os
from collections.abc import Iterable
from typing import Any

from periodscan.engine.segment import SegmentJob, run_segment
from periodscan.errors import ConfigError


class SerialExecutor:
    """Runs each segment in the calling process as soon as it is submitted."""

    slots = 1

    def submit(self, job: SegmentJob) -> cf.Future:
        future: cf.Future = cf.Future()
        future.set_result(run_segment(job))
        return future

    def wait_first(self, futures: Iterable[cf.Future]) -> set[cf.Future]:
        return {f for f in futures if f.done()}

    def close(self) -> None:
        pass


class LocalExecutor:
    """A pool of worker processes (joblib's loky backend), one torch thread each by default."""

    def __init__(self, workers: int | None = None, threads_per_worker: int = 1):
        from joblib.externals.loky import get_reusable_executor

        self.slots = workers or os.cpu_count() or 1
        env = {k: str(threads_per_worker) for k in ("OMP_NUM_THREADS", "MKL_NUM_THREADS")}
        self._pool = get_reusable_executor(max_workers=self.slots, env=env, reuse=True)

    def submit(self, job: SegmentJob) -> cf.Future:
        return self._pool.submit(run_segment, job)

    def wait_first(self, futures: Iterable[cf.Future]) -> set[cf.Future]:
        done, _ = cf.wait(list(futures), return_when=cf.FIRST_COMPLETED)
        return set(done)

    def close(self) -> None:
        pass  # the reusable pool stays warm for the next sweep in this process


class DaskExecutor:
    """The same segments on a Dask cluster; each job carries its parent checkpoint as bytes.

    With no ``address`` a ``LocalCluster`` of ``workers`` processes is started and closed here.
    """

    def __init__(self, address: str | None = None, workers: int | None = None,
                 threads_per_worker: int = 1):
        from distributed import Client, LocalCluster

        self._cluster = None
        if address:
            self._client = Client(address)
        else:
            self._cluster = LocalCluster(n_workers=workers or os.cpu_count() or 1,
                                         threads_per_worker=1, processes=True,
                                         dashboard_address=None)
            self._client = Client(self._cluster)
        n_workers = len(self._client.scheduler_info().get("workers", {})) or 1
        self.slots = workers or n_workers

    def submit(self, job: SegmentJob) -> Any:
        return self._client.submit(run_segment, job, pure=False)

    def wait_first(self, futures: Iterable[Any]) -> set[Any]:
        from distributed import wait

        done, _ = wait(list(futures), return_when="FIRST_COMPLETED")
        return set(done)

    def close(self) -> None:
        self._client.close()
        if self._cluster is not None:
            self._cluster.close()


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
    raise ConfigError(f"The 'executor.kind' parameter must be one of 'serial', 'local', 'dask'. "
                      f"Got {kind!r} instead.")
