"""The reachable interval along a swept parameter (line through the reachable polytope)."""

from __future__ import annotations

import numpy as np
from fleets import slot_agent

from negotiate.sweep import line_window


def test_window_along_entry_by_hand():
    """Slot agent wanting [0, 10] with dwell >= 10: entry may go from -100 (box) to leave - 10 = 0 (by hand)."""
    a = slot_agent("a", 0.0, 10.0, 1.0, ["r"])
    assert line_window(a, a.free_optimum, 0) == (-100.0, 0.0)
    assert line_window(a, a.free_optimum, 1) == (10.0, 200.0)


def test_window_endpoints_are_on_the_boundary():
    """Points just inside the interval lie in the reachable set and points just outside do not."""
    a = slot_agent("a", 5.0, 10.0, 1.0, ["r1", "r2"])
    for k in range(4):
        lo, hi = line_window(a, a.free_optimum, k)
        if hi - lo < 1e-5:  # back-to-back slots pin leave_1 = enter_2: a single point
            assert np.isclose(lo, hi)
            continue
        for v, inside in ((lo + 1e-6, True), (hi - 1e-6, True), (lo - 1e-3, False), (hi + 1e-3, False)):
            p = a.free_optimum.copy()
            p[k] = v
            assert a.reachable.contains(p, tol=0.0) is inside, (k, v)
    # entry 1 moved to 55: leave_1 >= 65 but leave_1 <= enter_2 = 15, so the line misses the set
    assert np.isnan(line_window(a, a.free_optimum + np.array([50.0, 0, 0, 0]), 1)[0])
