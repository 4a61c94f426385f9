"""``python -m negotiate.fleet [FILE ...]``: rewrite the generated key tables of ``docs/fleet.md`` (or of
each FILE) from the fleet schema and the registered model families."""

from __future__ import annotations

import sys

from negotiate.fleet.docs import update_doc

for target in sys.argv[1:] or ["docs/fleet.md"]:
    print(f"{target}: {'updated' if update_doc(target) else 'up to date'}")
