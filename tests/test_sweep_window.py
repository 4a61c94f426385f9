"""The reachable interval along a swept parameter (line through the reachable polytope)."""

from __future__ import annotations

import numpy as np
from fleets import slot_agent

from negotiate.tools.sweep import line_window


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


def window_by_lp(agent, base: np.ndarray, index: int) -> tuple[float, float]:
    """Smallest and largest value of parameter ``index`` in the agent's ReachableSet, the others fixed at ``base``.

    Reference: two linear programs solved by SciPy's ``linprog`` (HiGHS) over the set's box and rows
    ``A p <= b``, independent of ``line_window``'s row-by-row bounds."""
    from scipy.optimize import linprog

    R = agent.reachable
    bounds = [(float(R.lower[j]), float(R.upper[j])) if j == index else (float(base[j]), float(base[j]))
              for j in range(base.size)]  # fmt: skip
    ends = []
    for sign in (1.0, -1.0):
        c = np.zeros(base.size)
        c[index] = sign
        res = linprog(c, A_ub=R.A if R.A.shape[0] else None, b_ub=R.b if R.A.shape[0] else None, bounds=bounds,
                      method="highs")  # fmt: skip
        assert res.status == 0, res.message
        ends.append(float(res.x[index]))
    return ends[0], ends[1]


class TestInWindow:
    """A sweep that leaves the reachable window marks exactly the points outside it (CSV, plot, command line)."""

    def test_marks_exactly_the_points_outside(self, tmp_path):
        """Entry of the first slot swept across the window's upper end (enter <= leave - duration).

        The slot agent's NLP is unconstrained, so every point converges, inside the window or not: only the
        reachable set tells them apart. Grid step 2 s with the window's ends on no grid point (odd numbers),
        so that no point is within rounding of an end."""
        import csv

        from negotiate.output import plots
        from negotiate.tools.sweep import sweep_agent, write_sweep

        a = slot_agent("a", 5.0, 10.0, 1.0, ["r1", "r2"])
        sw = sweep_agent(a, "r1.enter", -20.0, 30.0, 26)
        lo, hi = window_by_lp(a, a.free_optimum, 0)
        want = (sw.values >= lo) & (sw.values <= hi)
        assert sw.converged.all()
        assert 0 < want.sum() < want.size  # the sweep crosses the edge
        np.testing.assert_array_equal(sw.in_window, want)
        path, _png = write_sweep(sw, tmp_path)
        with path.open(newline="") as fh:
            rows = list(csv.DictReader(fh))
        assert [r["in_window"] for r in rows] == [str(int(w)) for w in want]
        fig = plots.sweep_chart(sw)
        labels = [t.get_text() for t in fig.legends[0].get_texts()]
        assert f"outside the reachable window ({int((~want).sum())} of 26 points)" in labels

    def test_bare_problem_has_no_window(self, tmp_path):
        """A sweep of a bare ParametricNLP has no reachable set: every point counts as inside, the cells are empty."""
        import csv

        from negotiate.tools.sweep import sweep_problem, write_sweep

        a = slot_agent("a", 5.0, 10.0, 1.0, ["r1"])
        sw = sweep_problem(a.problem, a.free_optimum, 0, [0.0, 50.0])
        assert sw.window is None and sw.in_window.all()
        path, = write_sweep(sw, tmp_path, plot=False)
        with path.open(newline="") as fh:
            assert [r["in_window"] for r in csv.DictReader(fh)] == ["", ""]

    def test_cli_counts_points_outside(self, tmp_path, capsys):
        """``negotiate sweep`` on a machine prints how many points lie outside its window (counted by LP here)."""
        from test_report import mixed_run

        from negotiate import cli

        run, folder = mixed_run()
        lathe = next(a for a in run.agents if a.name == "lathe")
        lo, hi = window_by_lp(lathe, lathe.free_optimum, 0)
        start, stop = lo + 0.5 * (hi - lo), hi + 0.5 * (hi - lo) + 1.0  # the last point well outside
        values = np.linspace(start, stop, 9)
        outside = int(np.sum((values < lo) | (values > hi)))
        assert 0 < outside < 9
        code = cli.main(["sweep", str(folder.parent / "tiny_mixed.toml"), "--agent", "lathe", "--param",
                         "furnace.enter", "--from", repr(start), "--to", repr(stop), "--steps", "9", "--out",
                         str(tmp_path)])  # fmt: skip
        out = capsys.readouterr().out
        assert code == 0, out
        assert f"  {outside} of 9 points lie outside the reachable window (in_window = 0 in the CSV" in out
