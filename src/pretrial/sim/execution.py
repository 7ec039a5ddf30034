"""Where batches run: in this process, in local worker processes, or on a Dask cluster.

Every executor maps a picklable function over a list of work items and returns
the results in order. Work is cut into fixed chunks by the caller whatever the
number of workers, so results are bit-identical on all three executors.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import ctypes
import logging
import multiprocessing as mp
import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from typing import Any

from pretrial.errors import InputError, PretrialError


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


def _ignore_sigint() -> None:
    """A worker leaves Ctrl-C to the parent.

    A terminal sends SIGINT to the whole process group, workers included; a worker that
    raised KeyboardInterrupt would print its own traceback while the parent shuts it down.
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if hasattr(signal, "pthread_sigmask"):
        signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})  # see _sigint_blocked


#: prctl(2) option: the signal this process gets when its parent dies (<linux/prctl.h>)
_PR_SET_PDEATHSIG = 1
#: seconds between two looks at the parent where prctl(2) is not available
_PARENT_POLL_S = 0.5


def exit_with_parent(parent: int, use_prctl: bool = True) -> None:
    """Make this process end when process ``parent`` dies, however it dies.

    A parent killed by ``kill -9`` or the OOM killer runs no clean-up, and its orphaned workers
    would wait for work forever (holding the parent's stdout open, so ``| tee`` never ends). On
    Linux the kernel sends this process SIGKILL when the parent dies (``prctl(PR_SET_PDEATHSIG)``;
    strictly, when the parent's thread that started it ends: pools are started by the caller's
    thread). Elsewhere, or with ``use_prctl=False``, a daemon thread polls ``os.getppid()``, which
    changes when an orphan is re-parented.

    Parameters
    ----------
    parent : int
        The parent's process id, as the parent saw it (``os.getpid()`` there): if the parent is
        already gone when this runs, the process exits at once.
    use_prctl : bool
        Use ``prctl`` when it is available (False: the portable thread, for tests).
    """
    if not (use_prctl and _set_parent_death_signal()):
        threading.Thread(target=_watch_parent, args=(parent,), name="pretrial-parent-watch", daemon=True).start()
    if os.getppid() != parent:  # died before we were watching
        os._exit(1)


def _set_parent_death_signal() -> bool:
    """``prctl(PR_SET_PDEATHSIG, SIGKILL)`` through libc; False where that is not available."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0) == 0
    except (OSError, AttributeError):  # pragma: no cover - a libc without prctl
        return False


def _watch_parent(parent: int) -> None:
    while os.getppid() == parent:
        time.sleep(_PARENT_POLL_S)
    os._exit(1)  # no clean-up: the parent that would use our results is gone


def _worker_start(parent: int) -> None:
    """Pool initializer: leave Ctrl-C to the parent, and never outlive it."""
    _ignore_sigint()
    exit_with_parent(parent)


@contextlib.contextmanager
def _sigint_blocked() -> Iterator[None]:
    """Hold back SIGINT in this thread while worker processes (or threads that start them) are started.

    Threads and spawned processes inherit the blocked mask, so a worker never sees a Ctrl-C meant
    for the parent, not even during its start-up (a pool worker then discards it in
    :func:`_ignore_sigint`); in the parent the Ctrl-C is delivered on leaving the block.
    """
    if not hasattr(signal, "pthread_sigmask"):  # pragma: no cover - not POSIX
        yield
        return
    from multiprocessing import resource_tracker

    # running first: starting multiprocessing's resource tracker unblocks SIGINT in the thread that starts it
    resource_tracker.ensure_running()
    old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)


class ProcessExecutor(Executor):
    """A pool of local worker processes; a pool whose worker died is rebuilt once."""

    name = "processes"

    def __init__(self, workers: int):
        self.workers = max(1, int(workers))
        self._pool: cf.ProcessPoolExecutor | None = None

    def _get_pool(self) -> cf.ProcessPoolExecutor:
        if self._pool is None:
            # spawn: workers start clean (no inherited threads or locks from the parent)
            self._pool = cf.ProcessPoolExecutor(self.workers, mp_context=mp.get_context("spawn"),
                                                initializer=_worker_start, initargs=(os.getpid(),))
        return self._pool

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        for attempt in (1, 2):
            try:
                with _sigint_blocked():
                    results = self._get_pool().map(fn, items)  # submits every item (starting workers) now
                return list(results)
            except cf.process.BrokenProcessPool:
                self._discard()
                if attempt == 2:
                    raise PretrialError(
                        "a worker process died twice while running the same batch (killed, out of memory, or a "
                        "crash in native code); run with --workers 1 to see the failure"
                    ) from None
        raise AssertionError  # pragma: no cover

    def _discard(self, kill: bool = False) -> None:
        pool, self._pool = self._pool, None
        if pool is None:
            return
        if kill:
            # after an error or Ctrl-C the results are not wanted: end the workers instead of waiting for them
            for proc in list((getattr(pool, "_processes", None) or {}).values()):
                proc.terminate()
        pool.shutdown(wait=kill, cancel_futures=True)  # kill: the pool's thread reaps the workers just ended

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None

    def __exit__(self, exc_type: type[BaseException] | None, *exc: object) -> None:
        if exc_type is None:
            self.close()
        else:
            self._discard(kill=True)


#: dask's config variable for the "distributed" logger (logging.distributed), read by each worker process
_DASK_WORKER_LOGS = "DASK_LOGGING__DISTRIBUTED"


class DaskExecutor(Executor):
    """Work submitted to a Dask distributed scheduler (``local`` starts a LocalCluster)."""

    name = "dask"

    def __init__(self, address: str, workers: int | None = None):
        # A local cluster starts with SIGINT blocked: dask's threads (some start at import) and through them
        # every worker they start, restarts too, inherit the mask, so Ctrl-C reaches this process alone and
        # no worker prints a traceback of its own. A Ctrl-C meanwhile is delivered at the end of the block.
        with _sigint_blocked() if address == "local" else contextlib.nullcontext():
            self._start(address, workers)
        self.address = address
        self.workers = len(self._client.scheduler_info().get("workers", {})) or (workers or 1)

    def _start(self, address: str, workers: int | None) -> None:
        try:
            from dask.distributed import Client, LocalCluster
        except ImportError:
            raise PretrialError(
                "--dask needs Dask distributed: pip install 'pretrial[cluster]'"
            ) from None
        self._cluster = None
        self._env_set = False
        if address != "local":
            check_dask_address(address)  # before any connection, run directory or cluster
        try:
            if address == "local":
                n = workers or os.cpu_count() or 1
                # Our own cluster: its failures reach the user as one-line errors from map(), so the workers'
                # INFO chatter and tracebacks (a worker that died is restarted, logging as it starts) stay
                # quiet. Workers are spawned processes that read this at import, restarts included.
                if _DASK_WORKER_LOGS not in os.environ:
                    os.environ[_DASK_WORKER_LOGS] = "critical"
                    self._env_set = True
                self._cluster = LocalCluster(
                    n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None,
                    silence_logs=logging.CRITICAL,
                    # no dashboard, but the scheduler's HTTP server (health checks) would take port 8787 and
                    # warn when another cluster holds it: any free port, on this machine only
                    scheduler_kwargs={"dashboard_address": "127.0.0.1:0"},
                )
                self._client = Client(self._cluster)
            else:
                self._client = Client(address, timeout="20s")
        except OSError as exc:
            self._restore_env()
            raise PretrialError(f"--dask {address}: cannot reach the scheduler ({exc})") from None
        except (ValueError, TypeError) as exc:  # an address dask's parser let through and its client did not
            self._restore_env()
            raise InputError(f"--dask {address!r}: not a scheduler address ({exc})") from None
        except BaseException:
            self._restore_env()
            raise

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        # retries: a task that raised is run again; a task whose worker died is rescheduled by the scheduler
        # on another worker up to distributed.scheduler.allowed-failures (3) times, then raises KilledWorker
        futures = self._client.map(fn, list(items), pure=False, retries=2)
        try:
            # one future at a time rather than client.gather: a gather interrupted by Ctrl-C leaves tasks on
            # dask's event loop that print "Task exception was never retrieved" when the client closes
            return [f.result() for f in futures]
        except BaseException as exc:
            # the map failed: its other tasks must not keep running (a task that kills its worker would go on
            # killing the restarted workers, and with them whatever work is submitted next)
            with contextlib.suppress(Exception):
                self._client.cancel(futures)
            if not isinstance(exc, Exception):
                raise
            if type(exc).__name__ == "KilledWorker":
                if self._cluster is not None:
                    # let our nannies finish restarting the dead workers: a worker closed while it starts
                    # crashes with a traceback of its own
                    with contextlib.suppress(Exception):
                        self._client.wait_for_workers(self.workers, timeout=30)
                tries = getattr(exc, "allowed_failures", None)
                times = f"{tries + 1} times" if isinstance(tries, int) else "repeatedly"
                logs = "" if self._cluster is not None else "check the workers' logs, or "
                raise PretrialError(
                    f"a Dask worker died {times} while running the same work item (KilledWorker: killed, out of "
                    f"memory, or a crash in native code); {logs}run with --workers 1 and no --dask to see the failure"
                ) from None
            raise PretrialError(f"Dask work failed after retries: {type(exc).__name__}: {exc}") from None

    def close(self) -> None:
        try:
            self._client.close()
            if self._cluster is not None:
                self._cluster.close()
        finally:
            self._restore_env()

    def _restore_env(self) -> None:
        if self._env_set:
            os.environ.pop(_DASK_WORKER_LOGS, None)
            self._env_set = False

    def describe(self) -> dict[str, Any]:
        return {"executor": self.name, "workers": self.workers, "scheduler": self.address}


def check_dask_address(address: str) -> None:
    """Refuse a Dask scheduler address that names no host and port (``tcp://``, ``:::``, ``host:x``).

    Parsed by dask's own address functions, so every scheme dask knows (tcp, tls, ws, ...) is
    accepted as dask would read it.

    Raises
    ------
    InputError
        One line naming the address.
    """
    from distributed.comm.addressing import get_address_host_port

    try:
        host, port = get_address_host_port(address)
    except (ValueError, TypeError) as exc:
        reason = str(exc)
    else:
        if host and 0 < port < 2**16:
            return
        reason = "no host" if not host else f"port {port} is not in 1-65535"
    raise InputError(f"--dask {address!r}: not a scheduler address ({reason}); expected 'local' or "
                      "tcp://HOST:PORT, e.g. tcp://10.0.0.5:8786")


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
