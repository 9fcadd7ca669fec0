"""Independent fits side by side: in this process, on a Dask ``LocalCluster``, or on any
Dask scheduler by address.

:func:`run_jobs` maps a module-level function over a list of job inputs and returns the
results in input order.  It is used for the pairs of a one-vs-one multi-class model (and,
later, for the fits of a study).  No home-made pools: the parallel path is
``dask.distributed`` only.

Where the jobs run (``where``)
------------------------------
``"auto"`` (default)
    In this process, one job after the other, unless **all** of these hold: there are at
    least two jobs, this process may use at least two cores, and the estimated work
    Σ mᵢ² (mᵢ = training rows of job i) is at least :data:`CLUSTER_MIN_WORK`
    (4,000,000, i.e. about one fit of 2000 rows).  Starting a two-worker ``LocalCluster``
    costs 2–4 s on this project's 2-core machines, which a smaller batch does not earn back.
``"sequential"``
    Always in this process.
``"local"``
    Always on a new ``LocalCluster(n_workers=cores, threads_per_worker=1, processes=True)``,
    closed afterwards.
``"tcp://host:port"`` (any scheduler address)
    On that scheduler's workers (``Client(address)``).

In every worker process (and around the sequential loop when jobs run side by side)
``KKTRACE_THREADS=1``: each fit keeps its SMO to one thread, so fits side by side do not
compete for the same cores.  SMO gives bitwise the same α with one thread or two, so the
results do not depend on where the jobs ran (``tests/test_distributed.py``).

The returned :class:`Execution` records which path was used and why; multi-class parents
store it in their manifest (``info.execution``).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from .errors import InvalidInputError

__all__ = ["Execution", "run_jobs", "choose_execution", "CLUSTER_MIN_WORK"]

#: Σ mᵢ² below which ``where="auto"`` stays in this process.
CLUSTER_MIN_WORK = 4_000_000


@dataclass(frozen=True)
class Execution:
    """How a batch of jobs ran.

    mode : ``"sequential"`` (this process), ``"local_cluster"`` or ``"scheduler"``.
    workers : worker processes used (1 for sequential).
    reason : the rule that chose the mode, in words.
    address : the scheduler address (``"scheduler"`` mode) or None.
    """

    mode: str
    workers: int
    reason: str
    address: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """Plain data."""
        return {"mode": self.mode, "workers": self.workers, "reason": self.reason,
                "address": self.address}


def _cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - platforms without affinity masks
        return max(1, os.cpu_count() or 1)


def choose_execution(where: str, sizes: Sequence[int]) -> Execution:
    """The :class:`Execution` that ``where`` selects for jobs of these training sizes."""
    if not isinstance(where, str) or not where:
        raise InvalidInputError(f"where must be 'auto', 'sequential', 'local' or a scheduler "
                                f"address, got {where!r}")
    cores = _cores()
    work = sum(int(m) ** 2 for m in sizes)
    if where == "sequential":
        return Execution("sequential", 1, "asked for: in this process, one job after the other")
    if where == "local":
        return Execution("local_cluster", cores, f"asked for: LocalCluster, {cores} worker "
                         "process(es), one thread each")
    if "://" in where:
        return Execution("scheduler", 0, "asked for: the scheduler at this address",
                         address=where)
    if where != "auto":
        raise InvalidInputError(f"where must be 'auto', 'sequential', 'local' or a scheduler "
                                f"address such as tcp://127.0.0.1:8786, got {where!r}")
    if len(sizes) < 2 or cores < 2 or work < CLUSTER_MIN_WORK:
        why = ("one job" if len(sizes) < 2 else f"{cores} core" if cores < 2
               else f"work sum of squared training rows {work} < {CLUSTER_MIN_WORK}")
        return Execution("sequential", 1, f"auto: in this process ({why})")
    return Execution("local_cluster", cores, f"auto: {len(sizes)} jobs, work sum of squared "
                     f"training rows {work} >= {CLUSTER_MIN_WORK}, {cores} cores")


def _one_thread() -> None:
    """Worker set-up: one SMO thread per fit (and one BLAS thread)."""
    os.environ["KKTRACE_THREADS"] = "1"
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, "1")


def run_jobs(
    fn: Callable[[Any], Any], items: Sequence[Any], *, sizes: Sequence[int] | None = None,
    where: str = "auto", warm_up: Callable[[], Any] | None = None,
) -> tuple[list[Any], Execution]:
    """``[fn(item) for item in items]`` in input order, run as ``where`` selects.

    ``fn`` must be a module-level function (it is sent to worker processes).  ``sizes``
    are the jobs' training rows (for the ``"auto"`` rule; default 0 each).  ``warm_up``
    runs once in every worker before the jobs (e.g. to compile numba code outside the
    timed work).  An exception raised by a job is raised here.
    """
    items = list(items)
    ex = choose_execution(where, list(sizes) if sizes is not None else [0] * len(items))
    if ex.mode == "sequential":
        return [fn(it) for it in items], ex
    from dask.distributed import Client, LocalCluster

    cluster = None
    if ex.mode == "local_cluster":
        cluster = LocalCluster(n_workers=ex.workers, threads_per_worker=1, processes=True,
                               dashboard_address=None, silence_logs=40,
                               env={"KKTRACE_THREADS": "1"})
        client = Client(cluster)
    else:
        client = Client(ex.address)
    try:
        workers = len(client.scheduler_info().get("workers", {}))
        if ex.mode == "scheduler":
            ex = Execution("scheduler", workers, ex.reason, ex.address)
        client.run(_one_thread)
        if warm_up is not None:
            client.run(warm_up)
        futures = client.map(fn, items, pure=False)
        results = client.gather(futures)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return list(results), ex
