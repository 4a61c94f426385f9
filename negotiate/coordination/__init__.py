"""The upper level: the engine (:mod:`.engine`, one front over every method), the methods
(:mod:`.methods`), the order search on exclusive resources (:mod:`.orders`) and the centralized reference
solve (:mod:`.centralized`)."""
