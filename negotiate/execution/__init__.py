"""Where the agents are solved: in process, in worker processes or on a Dask cluster, behind one interface.

:mod:`.base` (the interface, :class:`~.base.AgentOutcome`, :func:`~.base.evaluate_agent`, the in-process
executor: what the coordination engine imports); :mod:`.remote` (the one remote executor: batching, time budget,
retries, hung batches, over a small transport interface); :mod:`.processes` and :mod:`.dask` (the transports and
their executors, :class:`~.processes.ProcessExecutor` and :class:`~.dask.DaskExecutor`); :mod:`.worker` (what runs
in a worker); :mod:`.make` (:func:`~.make.make_executor`, the command line's choice). Knows agents and fleets,
not coordination methods."""
