"""The Dask client for everything that spreads work over processes or machines (scans, umbrella
windows): an embedded LocalCluster on loopback, or a given scheduler.  The only dask import."""

from __future__ import annotations

import os

from sigmasim.errors import ConfigError

__all__ = ["make_client", "cores"]


def cores() -> int:
    """CPUs this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def _quiet_dask_logs() -> None:
    import logging

    for name in ("distributed", "distributed.nanny", "distributed.worker", "distributed.scheduler",
                 "distributed.core", "distributed.comm", "tornado"):
        logging.getLogger(name).setLevel(logging.CRITICAL)


def make_client(*, scheduler: str | None = None, workers: int | None = None, threads: int | None = 1,
                host: str = "127.0.0.1", dashboard: bool = False):
    """(client, cluster or None, numba threads per task).

    With ``scheduler`` (an address) connect to it; otherwise start a LocalCluster of ``workers``
    single-threaded worker processes (0 or None: one per core) on ``host``.  ``threads = 0`` means
    the cores shared out over the workers.
    """
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise ConfigError("this command needs Dask distributed: pip install 'sigmasim[cluster]'") from None
    _quiet_dask_logs()
    address = scheduler
    if address:
        try:
            client = Client(address, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise ConfigError(f"cannot connect to the Dask scheduler at {address}: {exc}") from None
        return client, None, threads or 1
    ncores = cores()
    n = workers or ncores
    if threads == 0:
        threads = max(1, ncores // n)
    one = {k: "1" for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")}
    try:
        # the scheduler's HTTP server (health and metrics; the dashboard too when asked for and
        # bokeh is installed) always starts: keep it on scan.host, on a free port
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host=host,
                               dashboard_address=f"{host}:0", scheduler_kwargs={"dashboard": dashboard},
                               silence_logs=50, env=one)
    except OSError as exc:
        raise ConfigError(f"cannot start the local Dask cluster on {host}: {exc}") from None
    client = Client(cluster)
    return client, cluster, threads
