"""The dask.distributed client for a run: local worker processes or a running cluster."""

from __future__ import annotations

import os
from contextlib import contextmanager

from ..errors import InputError


@contextmanager
def cluster(workers: int | None = None, scheduler: str | None = None):
    """The dask.distributed client for the duration of a ``with`` block.

    Parameters
    ----------
    workers : int, optional
        Start this many local worker processes (one thread each).
    scheduler : str, optional
        Address of a running cluster's scheduler, e.g. tcp://10.0.0.5:8786; wins over
        ``workers``.

    Yields
    ------
    distributed.Client or None
        The client; None when neither is given (boxes run here, one at a time, the
        kernel using every core).
    """
    import logging

    if not scheduler and workers is None:
        yield None
        return
    from distributed import Client

    logging.getLogger("distributed").setLevel(logging.ERROR)
    if scheduler:
        try:
            client = Client(scheduler, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise InputError(f"cannot reach the dask scheduler at {scheduler} ({exc}); "
                             f"start one (dask scheduler) or check the address") from None
        with client:
            yield client
        return
    if workers < 1:
        raise InputError(f"--workers must be at least 1, got {workers}")
    with _local_cluster(workers) as local, Client(local) as client:
        yield client


def _local_cluster(workers: int):
    """A LocalCluster of ``workers`` processes, each kernel given its share of the cores
    (NUMBA_NUM_THREADS, read when a worker imports numba; restored here afterwards)."""
    import logging

    from distributed import LocalCluster

    previous = os.environ.get("NUMBA_NUM_THREADS")
    os.environ["NUMBA_NUM_THREADS"] = str(max((os.cpu_count() or 1) // workers, 1))
    try:
        return LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, memory_limit=0,
                            dashboard_address=None, silence_logs=logging.ERROR)
    finally:
        if previous is None:
            os.environ.pop("NUMBA_NUM_THREADS", None)
        else:
            os.environ["NUMBA_NUM_THREADS"] = previous


def active_client():
    """The dask.distributed client in use here.

    Returns
    -------
    distributed.Client or None
        The client of this process or task; None without one, or without distributed
        installed.
    """
    try:
        from distributed import get_client

        return get_client()
    except (ImportError, ValueError):
        return None
