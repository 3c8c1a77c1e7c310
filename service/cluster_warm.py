"""The search kernels loaded in every Dask worker process as it joins the cluster.

A worker's first chunk of a repair (or first scenario of a stress test) would otherwise
load, or on a machine without the cache compile, the numba kernels inside that call's
budget. :func:`register` installs a worker plugin whose ``setup`` runs
:func:`flipfix.repair.api.warm_up` in each worker, now and in every worker that joins
later; it returns once the current workers are warm. Imported only when Dask is used
(the ``cluster`` extra).
"""

from __future__ import annotations

from distributed.diagnostics.plugin import WorkerPlugin

__all__ = ["WarmKernels", "register"]


class WarmKernels(WorkerPlugin):
    """Worker plugin: the search kernels warm in the worker's process."""

    name = "flipfix-kernels"

    def setup(self, worker) -> None:
        from flipfix.repair.api import warm_up

        warm_up()


def register(client) -> None:
    """Warm the kernels on every worker of ``client``'s cluster, now and as workers join."""
    client.register_plugin(WarmKernels(), name=WarmKernels.name)
