"""The one way threefold's jobs reach Dask: a local cluster of N processes, or a running scheduler.

Sweeps (:mod:`threefold.pipeline.sweep`), batch scoring
(:mod:`threefold.pipeline.score`) and structure selection
(:mod:`threefold.pipeline.select`) open their client here. A local cluster
has one thread per worker process and holds numba, OpenMP and BLAS to one
thread in each (two workers on two cores, not two times two threads). A
scheduler that does not answer within :data:`CONNECT_TIMEOUT` seconds is one
:class:`SchedulerUnreachable` message.
"""

from __future__ import annotations

from contextlib import contextmanager
from typing import Iterator

from threefold.core.checks import check_int

__all__ = ["dask_client", "SchedulerUnreachable", "CONNECT_TIMEOUT"]

#: Seconds to wait for a scheduler given by address.
CONNECT_TIMEOUT = 10

_ONE_THREAD = {name: "1" for name in ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                                      "MKL_NUM_THREADS")}


class SchedulerUnreachable(RuntimeError):
    """No Dask scheduler answered at the given address."""


@contextmanager
def dask_client(workers: int | None = None, scheduler: str | None = None, *, owner: str = "threefold") -> Iterator:
    """A Dask client on a new local cluster (``workers``) or a running scheduler (``scheduler``).

    Closes the client, and the local cluster it started, on exit.

    Raises
    ------
    ValueError
        When both or neither are given, or ``workers`` is not a positive integer
        (a ``TypeError`` for a non-integer, from :func:`~threefold.core.checks.check_int`).
    SchedulerUnreachable
        When ``scheduler`` does not answer within :data:`CONNECT_TIMEOUT` seconds.
    """
    from distributed import Client, LocalCluster

    if workers is not None and scheduler is not None:
        raise ValueError("Give workers= (a local Dask cluster) or scheduler= (a running one), not both.")
    if workers is None and scheduler is None:
        raise ValueError("Give workers= (a local Dask cluster) or scheduler= (a running one).")
    cluster = None
    if scheduler is not None:
        try:
            client = Client(scheduler, timeout=CONNECT_TIMEOUT)
        except (OSError, TimeoutError, ValueError) as error:
            raise SchedulerUnreachable(
                f"No Dask scheduler answered at {scheduler!r} within {CONNECT_TIMEOUT} s ({type(error).__name__}). "
                "Check the address (e.g. tcp://10.0.0.5:8786) and that the scheduler runs, or use --workers N "
                "for a local cluster."
            ) from None
    else:
        workers = check_int("workers", workers, low=1, owner=owner)
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address=None, env=_ONE_THREAD, silence_logs=40)
        client = Client(cluster)
    try:
        yield client
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
