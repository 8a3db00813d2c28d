"""The Dask cluster a comparison runs on: a local cluster sized to the cores, or a scheduler.

:class:`dask_client` opens a ``dask.distributed.Client`` on an embedded ``LocalCluster``
(worker processes, one thread each) or on a running scheduler; :func:`split_threads`
divides the cores between worker processes and CP-SAT threads per task.
"""

from __future__ import annotations

import logging
import os
from typing import Any

from spatialplan.errors import SettingsError

__all__ = ["dask_client", "split_threads"]


def _cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def split_threads(
    n_tasks: int, cores: int | None = None, threads_per_task: int | None = None
) -> tuple[int, int]:
    """How many single-threaded Dask workers and how many CP-SAT threads per task.

    Each Dask worker process runs one task at a time (``threads_per_worker=1``); CP-SAT
    inside the task uses ``solver.workers`` threads. Workers x threads stay within the
    cores: with more tasks than cores every task gets one thread (most parallel); with
    fewer tasks the spare cores go to CP-SAT's portfolio.

    Parameters
    ----------
    n_tasks
        Number of tasks that can run at once.
    cores
        Cores to use (default: the cores this process may run on).
    threads_per_task
        Fixed CP-SAT threads per task (``--workers-per-scenario``).

    Returns
    -------
    (n_workers, threads_per_task)

    Examples
    --------
    >>> split_threads(8, cores=2)
    (2, 1)
    >>> split_threads(2, cores=16)
    (2, 8)
    >>> split_threads(8, cores=8, threads_per_task=4)
    (2, 4)
    """
    cores = cores or _cores()
    n_tasks = max(1, int(n_tasks))
    if threads_per_task is None:
        threads_per_task = max(1, cores // min(n_tasks, cores))
    n_workers = max(1, min(n_tasks, cores // max(1, threads_per_task)))
    return n_workers, int(threads_per_task)


def _quiet_dask() -> None:
    """Keep Dask's own INFO chatter (scheduler, nanny, worker start and stop) off the terminal.

    Dask configures levels on its child loggers, so the parent level alone is not enough.
    With ``-vv`` (root logger at DEBUG) everything stays visible.
    """
    if logging.getLogger().getEffectiveLevel() <= logging.DEBUG:
        return
    names = [n for n in logging.root.manager.loggerDict if n.split(".")[0] == "distributed"]
    for n in {"distributed", *names}:
        logging.getLogger(n).setLevel(logging.ERROR)


class dask_client:  # noqa: N801 - used like a function: ``with dask_client(...) as client``
    """Context manager: a Client on an embedded ``LocalCluster`` or on ``scheduler``.

    Parameters
    ----------
    scheduler
        ``tcp://HOST:PORT`` of a running scheduler, or ``None`` for a local cluster.
    n_workers
        Worker processes of the local cluster (one thread each).
    timeout_s
        How long to wait for the scheduler and its first worker.
    """

    def __init__(
        self, scheduler: str | None = None, n_workers: int = 1, timeout_s: float = 60.0
    ) -> None:
        self.scheduler = scheduler
        self.n_workers = n_workers
        self.timeout_s = timeout_s
        self.cluster: Any = None
        self.client: Any = None

    def __enter__(self) -> Any:
        from distributed import Client, LocalCluster

        _quiet_dask()

        if self.scheduler:
            try:
                self.client = Client(self.scheduler, timeout=f"{self.timeout_s}s")
                self.client.wait_for_workers(1, timeout=self.timeout_s)
            except (OSError, TimeoutError) as exc:
                self._close()
                msg = f"cannot use the Dask scheduler at {self.scheduler}: {exc}"
                raise SettingsError(msg) from None
        else:
            # Loopback only; the scheduler's HTTP server takes a free port (not 8787, which a
            # user's own Dask dashboard may hold).
            self.cluster = LocalCluster(
                n_workers=self.n_workers,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=":0",
                silence_logs=logging.ERROR,
            )
            self.client = Client(self.cluster)
        return self.client

    def _close(self) -> None:
        if self.client is not None:
            self.client.close()
        if self.cluster is not None:
            self.cluster.close()

    def __exit__(self, *exc: object) -> None:
        self._close()
