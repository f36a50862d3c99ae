"""The dask.distributed client for a run: local worker processes or a running cluster."""

from __future__ import annotations

import os
from contextlib import contextmanager

from ..errors import InputError


@contextmanager
def cluster(workers: int | None = None, scheduler: str | None = None):
    """The dask.distributed client for the duration: ``scheduler`` (address of a running
    cluster) or ``workers`` local processes; neither: no client (boxes run here, one at
    a time, the kernel using every core)."""
    import logging

    if not scheduler and workers is None:
        yield None
        return
    from distributed import Client, LocalCluster

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
    previous = os.environ.get("NUMBA_NUM_THREADS")
    # each worker's kernel gets its share of the cores (read when the worker imports numba)
    os.environ["NUMBA_NUM_THREADS"] = str(max((os.cpu_count() or 1) // workers, 1))
    try:
        local = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, memory_limit=0,
                             dashboard_address=None, silence_logs=logging.ERROR)
    finally:
        if previous is None:
            os.environ.pop("NUMBA_NUM_THREADS", None)
        else:
            os.environ["NUMBA_NUM_THREADS"] = previous
    with local, Client(local) as client:
        yield client


def active_client():
    try:
        from distributed import get_client

        return get_client()
    except (ImportError, ValueError):
        return None
