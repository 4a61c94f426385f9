"""Fleets: typed records (:mod:`.spec`, no CasADi), the fleet-file reader (:mod:`.parse`, every mistake a
:class:`~negotiate.errors.FleetError`) and building the agents from the model library."""
