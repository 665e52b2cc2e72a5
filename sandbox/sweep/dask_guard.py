"""What every worker of a local Dask cluster does when it starts, restarted ones too.

Registered once as a worker plugin (the scheduler hands it to each worker that joins,
including one its nanny starts again after a crash): leave when upright's process
dies, however it dies, and say that the worker is one of a pool filling the cores (an
isolated controller then waits on its pipe; see :mod:`sandbox.wire`).
"""

from __future__ import annotations

from typing import Any

from distributed.diagnostics.plugin import WorkerPlugin


class LocalWorkerGuard(WorkerPlugin):
    """The plugin: ``parent`` is the process id of the upright process that owns the cluster."""

    name = "upright-local-worker-guard"

    def __init__(self, parent: int):
        self.parent = parent

    def setup(self, worker: Any) -> None:
        from ..interrupts import end_with_parent
        from ..wire import no_spare_core

        no_spare_core()
        end_with_parent(self.parent)
