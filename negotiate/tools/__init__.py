"""Tools over the main job: check a fleet file (:mod:`.check`), sweep one agent's value (:mod:`.sweep`),
compare methods (:mod:`.compare`), generate fleets (:mod:`.generate`)."""
