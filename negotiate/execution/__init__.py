"""Where the agents are solved: in process, in worker processes or on a Dask cluster, behind one interface
(:mod:`.executor`). Knows agents and fleets, not coordination methods."""
