"""Tests of the value-function sweep (negotiate.tools.sweep, ``negotiate sweep``).

Reference for the kinks: an LP with a parametric cost, solved point by point with SciPy's ``linprog``
(HiGHS). Its value V(p) = min_x c(p)^T x over a fixed polygon is continuous and piecewise linear in p; its
slope is -x2 at the optimal vertex (envelope theorem: dV/dp = partial_p f) and jumps exactly where the
optimal vertex changes. The sweep must find active-set changes within one step of every vertex change the
reference shows, and none elsewhere.

The LP (invented for the test): minimise -x1 - p x2 subject to x1 + x2 <= 4, x1 + 3 x2 <= 9, 0 <= x1 <= 3,
x2 >= 0. Enumerating its vertices by hand, (3, 0), (3, 1), (1.5, 2.5), (0, 3) are optimal for p < 0,
0 < p < 1, 1 < p < 3 and p > 3: kinks at p = 0, 1, 3. These hand-derived values only choose the grids
(kinks between grid points, or on them); the assertions use linprog's answers.
"""

from __future__ import annotations

import csv
from pathlib import Path

import casadi as ca
import numpy as np
import pytest
from scipy.optimize import linprog
from test_report import mixed_run

from negotiate import ParametricNLP, cli
from negotiate.tools.sweep import SweepResult, sweep_agent, sweep_problem, write_sweep

A_UB = [[1.0, 1.0], [1.0, 3.0]]
B_UB = [4.0, 9.0]
BOUNDS = [(0.0, 3.0), (0.0, None)]


def lp_problem() -> ParametricNLP:
    x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
    nlp = {"x": x, "p": p, "f": -x[0] - p * x[1], "g": ca.vertcat(x[0] + x[1], x[0] + 3 * x[1])}
    return ParametricNLP(nlp, lbx=0, ubx=[3, np.inf], ubg=B_UB, x_names=["x1", "x2"],
                         g_names=["sum", "weighted sum"], p_names=["p"], name="lp")  # fmt: skip


def reference(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """linprog (HiGHS) at each p: optimal values and vertices."""
    fun, xs = [], []
    for v in values:
        r = linprog([-1.0, -v], A_ub=A_UB, b_ub=B_UB, bounds=BOUNDS, method="highs")
        assert r.status == 0, r.message
        fun.append(r.fun)
        xs.append(r.x)
    return np.array(fun), np.array(xs)


def vertex_changes(xs: np.ndarray) -> list[int]:
    """Indices k where the reference vertex differs from the one at k - 1 (HiGHS vertices are exact to 1e-9)."""
    return [k for k in range(1, len(xs)) if np.max(np.abs(xs[k] - xs[k - 1])) > 1e-6]


@pytest.fixture(scope="module")
def lp() -> ParametricNLP:
    return lp_problem()


GRIDS = {
    "kinks between points": np.linspace(-0.45, 3.65, 42),  # step 0.1, points at -0.45, -0.35, ...
    "kinks on points": np.linspace(-0.5, 3.7, 43),  # step 0.1, 0.0, 1.0 and 3.0 are grid points
}


class TestSweepProblem:
    """sweep_problem on the parametric-cost LP against linprog."""

    @pytest.mark.parametrize("grid", list(GRIDS), ids=list(GRIDS))
    def test_kinks_match_reference_within_one_step(self, lp: ParametricNLP, grid: str) -> None:
        """Every vertex change of the reference has an active-set change within one step, and vice versa."""
        values = GRIDS[grid]
        step = values[1] - values[0]
        sw = sweep_problem(lp, [0.0], 0, values)
        _fun, xs = reference(values)
        ref = vertex_changes(xs)
        assert len(ref) == 3  # three kinks on both grids
        ours = list(sw.changes)
        assert ours
        ref_at = [0.5 * (values[k - 1] + values[k]) for k in ref]
        our_at = sw.kinks()
        tol = step * (1 + 1e-9)  # "within one step"; 1e-9 for the rounding of linspace
        for r in ref_at:
            assert min(abs(r - o) for o in our_at) <= tol, (r, our_at)
        for o in our_at:
            assert min(abs(o - r) for r in ref_at) <= tol, (o, ref_at)

    @pytest.mark.parametrize("grid", list(GRIDS), ids=list(GRIDS))
    def test_value_and_slope_match_reference(self, lp: ParametricNLP, grid: str) -> None:
        """V equals linprog's optimum at every point; dV/dp equals -x2 of linprog's vertex off the kinks.

        Tolerance 1e-7: IPOPT's tolerance (1e-8) after the active-set polish, on values of order 10.
        """
        values = GRIDS[grid]
        sw = sweep_problem(lp, [0.0], 0, values)
        fun, xs = reference(values)
        assert sw.converged.all(), sw.status
        np.testing.assert_allclose(sw.value, fun, atol=1e-7)
        ref = set(vertex_changes(xs))
        unique = [k for k in range(1, len(values) - 1) if k not in ref and k + 1 not in ref]
        assert len(unique) > 30
        np.testing.assert_allclose(sw.slope[unique], -xs[unique, 1], atol=1e-7)

    def test_piecewise_linear_and_continuous(self, lp: ParametricNLP) -> None:
        """Second differences of V vanish inside each piece; V has no jump anywhere (|dV| <= max|slope| step)."""
        values = GRIDS["kinks between points"]
        sw = sweep_problem(lp, [0.0], 0, values)
        _fun, xs = reference(values)
        ref = set(vertex_changes(xs))
        d2 = sw.value[2:] - 2 * sw.value[1:-1] + sw.value[:-2]
        inside = [k - 1 for k in range(1, len(values) - 1) if k not in ref and k + 1 not in ref]
        np.testing.assert_allclose(d2[inside], 0.0, atol=1e-7)
        step = values[1] - values[0]
        assert np.all(np.abs(np.diff(sw.value)) <= 3.0 * step + 1e-7)  # |slope| <= max x2 = 3

    def test_multipliers_of_active_rows(self, lp: ParametricNLP) -> None:
        """Multipliers are recorded for every constraint active somewhere, with CasADi's sign (upper: > 0)."""
        sw = sweep_problem(lp, [0.0], 0, GRIDS["kinks between points"])
        assert set(sw.multipliers) == {"x1", "x2", "sum", "weighted sum"}
        assert np.all(sw.multipliers["sum"] >= -1e-9)  # an upper bound: never negative
        assert np.all(sw.multipliers["x2"] <= 1e-9)  # x2 >= 0 is a lower bound: never positive

    def test_bad_arguments(self, lp: ParametricNLP) -> None:
        """A wrong-sized base or an index out of range is refused with the expected shape."""
        with pytest.raises(ValueError, match=r"'base' must have shape \(1,\), got \(2,\)"):
            sweep_problem(lp, [0.0, 1.0], 0, [0.0])
        with pytest.raises(ValueError, match=r"'index' must be in 0..0, got 1"):
            sweep_problem(lp, [0.0], 1, [0.0])


@pytest.fixture(scope="module")
def machine_sweep() -> SweepResult:
    """The mixed test fleet's lathe, its furnace entry swept over 600 s of its reachable window."""
    run, _ = mixed_run()
    lathe = next(a for a in run.agents if a.name == "lathe")
    k = lathe.param_names.index("furnace.enter")
    lo = lathe.reachable.lower[k]
    return sweep_agent(lathe, "furnace.enter", lo + 100.0, lo + 700.0, 25)


class TestSweepAgent:
    """sweep_agent on a built machine, write_sweep and the CLI."""

    def test_slope_matches_finite_differences(self, machine_sweep: SweepResult) -> None:
        """dV/d(enter) from the KKT point equals central differences of the swept V.

        Reference: central finite differences of V on the sweep's own grid (step 25 s). Tolerance 1 % of
        the slope's range: the O(h^2) error of the difference quotient at this curvature.
        """
        sw = machine_sweep
        assert sw.converged.all(), sw.status
        assert sw.window is not None and sw.unit == "s"
        h = sw.values[1] - sw.values[0]
        fd = (sw.value[2:] - sw.value[:-2]) / (2 * h)
        smooth = [k for k in range(1, sw.values.size - 1) if not ({k, k + 1} & set(sw.changes))]
        assert len(smooth) > 10
        scale = np.ptp(sw.slope) + np.max(np.abs(sw.slope)) * 1e-3
        np.testing.assert_allclose(sw.slope[smooth], fd[[k - 1 for k in smooth]], atol=0.01 * scale)

    def test_csv_round_trip(self, machine_sweep: SweepResult, tmp_path: Path) -> None:
        """The CSV holds the path, V, every gradient component and multiplier exactly; the PNG is written."""
        paths = write_sweep(machine_sweep, tmp_path)
        assert [p.name for p in paths] == ["sweep-lathe-furnace.enter.csv", "sweep-lathe-furnace.enter.png"]
        assert paths[1].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        with paths[0].open(newline="") as fh:
            rows = list(csv.DictReader(fh))
        sw = machine_sweep
        assert len(rows) == sw.values.size
        np.testing.assert_array_equal([float(r["p"]) for r in rows], sw.values)
        np.testing.assert_array_equal([float(r["value"]) for r in rows], sw.value)
        for j, name in enumerate(sw.p_names):
            np.testing.assert_array_equal([float(r[f"d_{name}"]) for r in rows], sw.gradient[:, j])
        for name, col in sw.multipliers.items():
            np.testing.assert_array_equal([float(r[f"lam[{name}]"]) for r in rows], col)
        assert [int(r["active_set_changed"]) for r in rows] == [int(k in sw.changes) for k in range(len(rows))]

    def test_unknown_parameter(self, machine_sweep: SweepResult) -> None:
        """An unknown parameter name is refused with the agent's parameter names."""
        run, _ = mixed_run()
        lathe = next(a for a in run.agents if a.name == "lathe")
        with pytest.raises(ValueError, match=r"agent 'lathe' has no parameter 'oven.enter'; expected one of \["):
            sweep_agent(lathe, "oven.enter", 0.0, 1.0, 3)
        with pytest.raises(ValueError, match="'steps' must be an integer >= 2, got 1"):
            sweep_agent(lathe, "furnace.enter", 0.0, 1.0, 1)

    def test_cli(self, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
        """``negotiate sweep`` builds the one agent, sweeps, writes CSV and PNG; a bad agent exits 1."""
        _, folder = mixed_run()
        fleet = str(folder.parent / "tiny_mixed.toml")
        args = ["sweep", fleet, "--agent", "tractor-1", "--param", "grid.share[3]", "--from", "0", "--to",
                "150000", "--steps", "7", "--out", str(tmp_path)]  # fmt: skip
        code = cli.main(args)
        out = capsys.readouterr().out
        assert code == 0, out
        assert "tractor-1: grid.share[3] from 0 to 150000 W in 7 points; 7 converged, 0 failed" in out
        assert (tmp_path / "sweep-tractor-1-grid.share_3_.csv").is_file()
        assert cli.main(["sweep", fleet, "--agent", "nobody", "--param", "x", "--from", "0", "--to", "1"]) == 1
        assert "fleet 'tiny-mixed' has no agent 'nobody'" in capsys.readouterr().err
