"""The Dask engine shared by ``apply --cluster`` and ``lm build --cluster``: a client of a
running scheduler at an address, or of a cluster of worker processes on this machine.

Tasks get plain picklable values (paths, byte ranges, settings), never loaded models, and
read their input files themselves, so every worker must see the files at the same paths
(a shared or replicated file system).
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any

from rescore.errors import ParameterError

LOCAL = "local"


@contextlib.contextmanager
def dask_client(address: str, workers: int) -> Iterator[Any]:
    """A ``distributed.Client`` of the scheduler at ``address`` (``tcp://host:8786``), or
    with ``"local"`` of a new cluster of ``workers`` single-threaded processes here, closed
    (and the local cluster shut down) when the block ends."""
    try:
        import distributed
    except ImportError:
        raise ParameterError("needs dask.distributed: pip install 'rescore[cluster]'",
                             field="cluster") from None
    import dask

    Client: Any = distributed.Client
    LocalCluster: Any = distributed.LocalCluster
    with dask.config.set({"distributed.worker.daemon": False,
                          "logging.distributed": "error"}):
        if address == LOCAL:
            cluster = LocalCluster(n_workers=max(workers, 1), threads_per_worker=1,
                                   processes=True, host="127.0.0.1", dashboard_address=None)
            client = Client(cluster)
            try:
                yield client
            finally:
                client.close()
                cluster.close()
        else:
            try:
                client = Client(address, timeout="20s")
            except OSError as exc:
                raise ParameterError(f"{address}: cannot connect ({exc})",
                                     field="cluster") from None
            try:
                yield client
            finally:
                client.close()


def worker_count(client: Any) -> int:
    """Workers the scheduler knows of now (at least 1)."""
    return max(1, len(client.scheduler_info().get("workers", {})))
