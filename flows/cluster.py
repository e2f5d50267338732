"""The Dask cluster a flow runs on.

By default an embedded local cluster of worker processes with one thread
each (segyio and much of numpy's I/O path hold the GIL, so parallelism comes
from processes), sized to the machine; or an existing scheduler given as
``tcp://HOST:PORT``.
"""

from __future__ import annotations

import contextlib
import logging
import os
from typing import Iterator

log = logging.getLogger(__name__)


def default_workers() -> int:
    return max(1, os.cpu_count() or 1)


@contextlib.contextmanager
def dask_client(
    cluster: str = "local", *, workers: int | None = None, memory_limit: str | None = None
) -> Iterator["distributed.Client"]:  # noqa: F821
    """Yield a ``distributed.Client`` for ``cluster`` and close what we opened.

    ``cluster`` is ``"local"`` (an embedded cluster of ``workers`` processes,
    default: one per core), ``"threads"`` (one in-process worker, for tests
    and debugging) or a scheduler address ``tcp://HOST:PORT``.
    """
    from distributed import Client, LocalCluster

    from descatter.tasks.errors import ConfigError

    if cluster.startswith(("tcp://", "tls://")):
        client = Client(cluster, timeout="30s")
        log.info("connected to Dask scheduler %s", cluster)
        try:
            yield client
        finally:
            client.close()
        return
    if cluster not in ("local", "threads"):
        raise ConfigError(
            f"--cluster {cluster!r}: expected 'local', 'threads' or a scheduler address tcp://HOST:PORT"
        )
    n = workers or default_workers()
    kwargs = dict(
        n_workers=n if cluster == "local" else 1,
        threads_per_worker=1,
        processes=cluster == "local",
        dashboard_address=":0",
        silence_logs=logging.WARNING,
    )
    if memory_limit:
        kwargs["memory_limit"] = memory_limit
    with LocalCluster(**kwargs) as lc, Client(lc) as client:
        log.info("local Dask cluster: %d worker(s), %s; %s", len(lc.workers),
                 "processes" if cluster == "local" else "threads", dashboard_text(client))
        yield client


def dashboard_text(client) -> str:
    """Where to watch the cluster: the scheduler and its dashboard (the
    dashboard needs the optional bokeh package)."""
    try:
        import bokeh  # noqa: F401

        link = client.dashboard_link
    except ImportError:
        link = "not available (pip install bokeh)"
    return f"Dask scheduler {client.scheduler.address}, dashboard {link}"
