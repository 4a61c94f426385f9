"""The executor the command line asks for (in process, worker processes, a Dask cluster)."""

from __future__ import annotations

from negotiate.execution.base import Executor, InProcessExecutor
from negotiate.execution.dask import DaskExecutor
from negotiate.execution.processes import ProcessExecutor
from negotiate.fleet.spec import FleetSpec

__all__ = ["make_executor"]


def make_executor(
    spec: FleetSpec,
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    cluster: str | None = None,
    time_limit: float | None = None,
) -> Executor:
    """The executor the command line asks for: ``scheduler`` (an address) or ``cluster="local"`` gives a
    :class:`DaskExecutor` (``workers`` local workers, default 2), ``workers`` alone a
    :class:`ProcessExecutor`, nothing the :class:`InProcessExecutor`."""
    if scheduler is not None and cluster is not None:
        raise ValueError("give either a scheduler address or --cluster local, not both")
    if cluster is not None and cluster != "local":
        raise ValueError(f"'cluster' must be 'local', got {cluster!r}")
    if scheduler is not None and not scheduler.startswith(("tcp://", "tls://", "inproc://", "ucx://")):
        raise ValueError(f"'scheduler' must be an address like tcp://HOST:PORT, got {scheduler!r}")
    if scheduler is not None or cluster is not None:
        return DaskExecutor(spec, scheduler, workers or 2, time_limit=time_limit)
    if workers is not None:
        return ProcessExecutor(spec, workers, time_limit=time_limit)
    return InProcessExecutor()
