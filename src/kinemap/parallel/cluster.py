"""Where the per-block work runs: this process (default), a local cluster, or a scheduler.

``--workers N`` starts a dask.distributed LocalCluster of N single-threaded worker
processes for the run; ``--scheduler tcp://host:port`` connects to a running scheduler.
The compiled kernels of each task use as many threads as the worker has.  An unreachable
scheduler fails within ``CONNECT_TIMEOUT`` seconds with a clear message.
"""
from __future__ import annotations

import contextlib
import logging

from kinemap.errors import KinemapError

__all__ = ["open_client", "CONNECT_TIMEOUT"]

CONNECT_TIMEOUT = 5


def _connect(Client, scheduler: str):
    """A Client of the scheduler at ``scheduler``, or one line saying why there is none."""
    try:
        return Client(scheduler, timeout=f"{CONNECT_TIMEOUT}s")
    except (OSError, TimeoutError, ValueError) as exc:
        raise KinemapError(
            f"cannot reach the dask scheduler at {scheduler!r} ({type(exc).__name__}); "
            "check the address (tcp://host:port) and that the scheduler is running") from None
    except Exception as exc:  # noqa: BLE001 - MemoryError too: garbage read as a frame length
        raise KinemapError(
            f"{scheduler!r} is not a dask scheduler (its reply is not dask's protocol: "
            f"{type(exc).__name__}); give the address of a running dask.distributed scheduler "
            "(tcp://host:port)") from None


@contextlib.contextmanager
def open_client(*, scheduler: str | None = None, workers: int | None = None):
    """Yield a distributed Client (or None for in-process runs) and close what was opened."""
    if scheduler is None and not workers:
        yield None
        return
    if scheduler is not None and workers:
        raise KinemapError("give either --scheduler or --workers, not both")
    from distributed import Client, LocalCluster

    # distributed logs connection attempts loudly; the user gets one line from us instead
    for name in ("distributed", "distributed.comm", "distributed.client", "distributed.core"):
        logging.getLogger(name).setLevel(logging.CRITICAL)
    cluster = None
    try:
        if workers:
            if int(workers) < 1:
                raise KinemapError(f"'workers' must be at least 1, got {workers}")
            cluster = LocalCluster(n_workers=int(workers), threads_per_worker=1, processes=True,
                                   dashboard_address=None)
            client = Client(cluster)
        else:
            client = _connect(Client, scheduler)
    except KinemapError:
        if cluster is not None:
            cluster.close()
        raise
    try:
        yield client
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
