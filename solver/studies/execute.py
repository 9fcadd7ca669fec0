"""Running the fit jobs of a study on Dask (``dask.distributed``), or in this process.

Where (``where``): ``"local"`` (default) starts a ``LocalCluster`` with one worker process
per core (or ``workers``) and one thread each, closed afterwards; a scheduler address
(``tcp://host:port``) uses that cluster; ``"sequential"`` runs in this process (tests,
tiny studies).  A :class:`StudySession` holds one client (and its cluster) for the whole
study — the grid's fits, the warm-start check and the stability refits — and scatters the
:class:`StudyData` once to every worker (``broadcast=True``, so losing a worker loses no
data) on its first batch; every later job refers to the same scattered data.

Retries: a job whose worker process dies is rescheduled by the Dask scheduler on another
worker up to ``distributed.scheduler.allowed-failures`` times (Dask's default 3); a job
that raises is resubmitted :data:`RETRIES` more times.  Each fit comes back as the files
of its run folder, encoded on the worker; the client checks them against their manifest
and writes the store, so the workers need no shared disk and a retried fit is written
once (only the result that arrives is stored).
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from typing import Any

from ..distributed import Execution, _cores, _one_thread
from ..errors import InvalidInputError

__all__ = ["RETRIES", "CONNECT_TIMEOUT_S", "connect", "run_study_jobs", "StudySession"]

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


class StudySession:
    """One place where a study's fits run (see the module docstring); a context manager
    that closes the client and the cluster it started.

    where : ``"sequential"``, ``"local"`` or an address; ``connected`` : what
    :func:`connect` returned (None connects on the first batch)."""

    def __init__(self, data: Any, *, where: str, workers: int | None = None,
                 timeout: float = CONNECT_TIMEOUT_S, warm_up: Callable[[], Any] | None = None,
                 connected: Any = None) -> None:
        self.data, self.where, self.workers, self.timeout = data, where, workers, timeout
        self.warm_up, self.connected = warm_up, connected
        self.shared: Any = None
        self.scatters = 0
        self.execution: Execution | None = None
        self._closing: Any = None
        self._close_error: BaseException | None = None
        if where == "sequential":
            self.execution = Execution("sequential", 1, "asked for: in this process, one "
                                       "job after the other")

    def __enter__(self) -> StudySession:
        return self

    def __exit__(self, *exc: Any) -> None:
        if self._closing is None or exc[0] is not None:
            self.close()

    def close_later(self) -> None:
        """Start closing the client and the cluster in a thread, so that the caller can
        write its results meanwhile (a cluster takes ~0.6 s to stop); :meth:`close` waits
        for it.  Leaving the ``with`` block without an error does not wait."""
        import threading

        def run() -> None:
            try:
                self._close_now()
            except BaseException as exc:  # noqa: BLE001 - raised again by close()
                self._close_error = exc

        if self.connected is not None and self._closing is None:
            self._closing = threading.Thread(target=run, name="kktrace-close")
            self._closing.start()

    def close(self) -> None:
        """Close the client and the cluster this session started (idempotent); waits for a
        close begun by :meth:`close_later`."""
        if self._closing is not None:
            self._closing.join()
            if self._close_error is not None:
                err, self._close_error = self._close_error, None
                raise err
        self._close_now()

    def _close_now(self) -> None:
        if self.connected is not None:
            client, cluster, _ = self.connected
            self.connected = None
            client.close()
            if cluster is not None:
                cluster.close()

    def _client(self) -> Any:
        if self.connected is None:
            self.connected = connect(self.where, self.workers, self.timeout)
        client, _, ex = self.connected
        self.execution = ex
        if self.shared is None:
            client.run(_one_thread)
            if self.warm_up is not None:
                client.run(self.warm_up)
            self.shared = client.scatter(self.data, broadcast=True)
            self.scatters += 1
        return client

    def run(self, fn: Callable[[Any, Any], Any], jobs: Sequence[Any],
            on_done: Callable[[int, Any], None] | None = None) -> Execution:
        """``fn(data, job)`` for every job; ``on_done(index, result)`` in this process as
        each finishes (completion order).  Raises the first job error."""
        if self.where == "sequential":
            for i, job in enumerate(jobs):
                res = fn(self.data, job)
                if on_done is not None:
                    on_done(i, res)
            assert self.execution is not None
            return self.execution
        from dask.distributed import as_completed

        client = self._client()
        if not jobs:
            assert self.execution is not None
            return self.execution
        stamp = f"{time.time_ns():x}"
        futures = [client.submit(fn, self.shared, job, retries=RETRIES, pure=False,
                                 key=f"kktrace-study-fit-{stamp}-{i}")
                   for i, job in enumerate(jobs)]
        index = {f.key: i for i, f in enumerate(futures)}
        for fut in as_completed(futures):
            res = fut.result()
            if on_done is not None:
                on_done(index[fut.key], res)
        assert self.execution is not None
        return self.execution


def run_study_jobs(
    fn: Callable[[Any, Any], list[Any]], data: Any, jobs: Sequence[Any], *, where: str,
    workers: int | None = None, timeout: float = CONNECT_TIMEOUT_S,
    on_done: Callable[[int, list[Any]], None] | None = None,
    warm_up: Callable[[], Any] | None = None, connected: Any = None,
) -> Execution:
    """Run ``fn(data, job)`` for every job in a :class:`StudySession` of its own (closed
    afterwards); ``on_done(index, result)`` as each job finishes."""
    with StudySession(data, where=where, workers=workers, timeout=timeout,
                      warm_up=warm_up, connected=connected) as session:
        if where != "sequential" and not jobs:
            session._client()
        return session.run(fn, jobs, on_done)
