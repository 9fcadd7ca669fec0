"""Running the fit jobs of a study on Dask (``dask.distributed``), or in this process.

Where (``where``): ``"local"`` (default) starts a ``LocalCluster`` with one worker process
per core (or ``workers``) and one thread each, closed afterwards; a scheduler address
(``tcp://host:port``) uses that cluster; ``"sequential"`` runs in this process (tests,
tiny studies).  The :class:`StudyData` are scattered once to every worker
(``broadcast=True``, so losing a worker loses no data) and each job refers to them.

Retries: a job whose worker process dies is rescheduled by the Dask scheduler on another
worker up to ``distributed.scheduler.allowed-failures`` times (Dask's default 3); a job
that raises is resubmitted :data:`RETRIES` more times.  Results are sent back to the
client, which writes the store: the workers need no shared disk.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from typing import Any

from ..distributed import Execution, _cores, _one_thread
from ..errors import InvalidInputError

__all__ = ["RETRIES", "CONNECT_TIMEOUT_S", "connect", "run_study_jobs"]

#: extra attempts for a job that raised (a dead worker is retried by the scheduler itself)
RETRIES = 2
#: seconds to wait for a scheduler given by address before giving up
CONNECT_TIMEOUT_S = 10.0


def connect(where: str, workers: int | None = None,
            timeout: float = CONNECT_TIMEOUT_S) -> tuple[Any, Any, Execution]:
    """(client, cluster or None, Execution) for ``where`` (not ``"sequential"``).

    An address that does not answer within ``timeout`` seconds is one clear
    :class:`InvalidInputError`; nothing has been written at that point."""
    from dask.distributed import Client, LocalCluster

    if where == "local":
        n = int(workers) if workers else _cores()
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                               dashboard_address=":0", silence_logs=40,
                               env={"KKTRACE_THREADS": "1"})
        return Client(cluster), cluster, Execution(
            "local_cluster", n, f"LocalCluster, {n} worker process(es), one thread each")
    if "://" not in where:
        raise InvalidInputError(f"scheduler must be 'local', 'sequential' or an address "
                                f"such as tcp://127.0.0.1:8786, got {where!r}")
    try:
        client = Client(where, timeout=timeout)
    except (OSError, TimeoutError) as exc:
        raise InvalidInputError(
            f"cannot reach the Dask scheduler at {where} within {timeout:g} s "
            f"({type(exc).__name__}); check the address, or leave out --scheduler to use a "
            "local cluster; nothing was written") from None
    n = len(client.scheduler_info().get("workers", {}))
    return client, None, Execution("scheduler", n, "the scheduler at this address",
                                   address=where)


def run_study_jobs(
    fn: Callable[[Any, Any], list[Any]], data: Any, jobs: Sequence[Any], *, where: str,
    workers: int | None = None, timeout: float = CONNECT_TIMEOUT_S,
    on_done: Callable[[int, list[Any]], None] | None = None,
    warm_up: Callable[[], Any] | None = None, connected: Any = None,
) -> Execution:
    """Run ``fn(data, job)`` for every job; ``on_done(index, result)`` is called in this
    process as each job finishes (in completion order).  Raises the first job error."""
    if where == "sequential":
        ex = Execution("sequential", 1, "asked for: in this process, one job after the other")
        for i, job in enumerate(jobs):
            res = fn(data, job)
            if on_done is not None:
                on_done(i, res)
        return ex
    from dask.distributed import as_completed

    client, cluster, ex = connected if connected is not None else connect(where, workers,
                                                                          timeout)
    try:
        if not jobs:
            return ex
        client.run(_one_thread)
        if warm_up is not None:
            client.run(warm_up)
        shared = client.scatter(data, broadcast=True)
        stamp = f"{time.time_ns():x}"
        futures = [client.submit(fn, shared, job, retries=RETRIES, pure=False,
                                 key=f"kktrace-study-fit-{stamp}-{i}")
                   for i, job in enumerate(jobs)]
        index = {f.key: i for i, f in enumerate(futures)}
        for fut in as_completed(futures):
            res = fut.result()
            if on_done is not None:
                on_done(index[fut.key], res)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return ex
