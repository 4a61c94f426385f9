"""Fleets: typed records (:mod:`.spec`, no CasADi), the keys of a fleet file (:mod:`.schema`, an agent's
keys from its model family in :mod:`agents.families`), the fleet-file reader (:mod:`.parse`, every mistake a
:class:`~negotiate.errors.FleetError`), building the agents (:mod:`.build`) and the generated key tables of
``docs/fleet.md`` (:mod:`.docs`)."""
