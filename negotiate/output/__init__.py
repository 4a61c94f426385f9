"""What a run leaves behind: CSV and JSON files read back with checks (:mod:`.results`), the HTML report
(:mod:`.report`, :mod:`.plots`) and the data-only checkpoint for ``--resume`` (:mod:`.checkpoint`)."""
