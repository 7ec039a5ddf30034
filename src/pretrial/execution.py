"""Where batches run: in this process, in local worker processes, or on a Dask cluster.

Every executor maps a picklable function over a list of work items and returns
the results in order. Work is cut into fixed chunks by the caller whatever the
number of workers, so results are bit-identical on all three executors.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing as mp
import os
from collections.abc import Callable, Sequence
from typing import Any

from .errors import PretrialError


class Executor:
    """Ordered ``map`` over work items; subclasses decide where the work runs."""

    name = "serial"
    workers = 1

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        return [fn(item) for item in items]

    def close(self) -> None:
        pass

    def __enter__(self) -> Executor:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def describe(self) -> dict[str, Any]:
        return {"executor": self.name, "workers": self.workers}


class ProcessExecutor(Executor):
    """A pool of local worker processes; a pool whose worker died is rebuilt once."""

    name = "processes"

    def __init__(self, workers: int):
        self.workers = max(1, int(workers))
        self._pool: cf.ProcessPoolExecutor | None = None

    def _get_pool(self) -> cf.ProcessPoolExecutor:
        if self._pool is None:
            # spawn: workers start clean (no inherited threads or locks from the parent)
            self._pool = cf.ProcessPoolExecutor(self.workers, mp_context=mp.get_context("spawn"))
        return self._pool

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        for attempt in (1, 2):
            try:
                return list(self._get_pool().map(fn, items))
            except cf.process.BrokenProcessPool:
                self._discard()
                if attempt == 2:
                    raise PretrialError(
                        "a worker process died twice while evaluating the same batch; the last checkpoint is intact "
                        "(resume with --resume RUN_DIR, or run with --workers 1 to see the failure)"
                    ) from None
        raise AssertionError  # pragma: no cover

    def _discard(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=False, cancel_futures=True)
            self._pool = None

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


class DaskExecutor(Executor):
    """Work submitted to a Dask distributed scheduler (``local`` starts a LocalCluster)."""

    name = "dask"

    def __init__(self, address: str, workers: int | None = None):
        try:
            from dask.distributed import Client, LocalCluster
        except ImportError:
            raise PretrialError(
                "--dask needs Dask distributed: pip install 'pretrial[cluster]'"
            ) from None
        self._cluster = None
        try:
            if address == "local":
                n = workers or os.cpu_count() or 1
                self._cluster = LocalCluster(
                    n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None, silence_logs=40
                )
                self._client = Client(self._cluster)
            else:
                self._client = Client(address, timeout="20s")
        except OSError as exc:
            raise PretrialError(f"--dask {address}: cannot reach the scheduler ({exc})") from None
        self.address = address
        self.workers = len(self._client.scheduler_info().get("workers", {})) or (workers or 1)

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        futures = self._client.map(fn, list(items), pure=False, retries=2)
        try:
            return self._client.gather(futures)
        except Exception as exc:
            raise PretrialError(f"Dask work failed after retries: {type(exc).__name__}: {exc}") from None

    def close(self) -> None:
        self._client.close()
        if self._cluster is not None:
            self._cluster.close()

    def describe(self) -> dict[str, Any]:
        return {"executor": self.name, "workers": self.workers, "scheduler": self.address}


def resolve_workers(workers: int | str | None) -> int:
    """``"auto"`` -> the cores this process may use; else the given number (>= 1)."""
    if workers in (None, "auto"):
        try:
            return len(os.sched_getaffinity(0))
        except AttributeError:  # pragma: no cover - not Linux
            return os.cpu_count() or 1
    n = int(workers)
    if n < 1:
        raise PretrialError(f"workers: {workers!r} must be 'auto' or a whole number >= 1")
    return n


def make_executor(workers: int | str | None = "auto", dask: str | None = None) -> Executor:
    """Serial for one worker, a local pool for more, Dask when an address is given."""
    if dask:
        return DaskExecutor(dask, None if workers in (None, "auto") else resolve_workers(workers))
    n = resolve_workers(workers)
    return Executor() if n == 1 else ProcessExecutor(n)
