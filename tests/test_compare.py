"""Tests of the method comparison (negotiate.tools.compare, ``negotiate compare``) on the mixed test fleet.

Reference: the centralized IPOPT solve of the monolithic NLP with the same orders (``solve_centralized``);
the gap of each method is checked against a recomputation from it, and the methods that converged must be
close to it. The orders must be the first-come-first-served ones for every method.
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import ClassVar

import numpy as np
import pytest
from test_report import mixed_run

from negotiate import cli
from negotiate.coordination.methods import Evaluation, Method, Proposal, register_method
from negotiate.resources.coupling import fcfs_orders
from negotiate.tools.compare import COMPARE_COLUMNS, Comparison, compare_methods, write_comparison


class _Broken(Method):
    """A method whose step breaks down numerically (stands for a failing projection)."""

    name: ClassVar[str] = "test-broken"

    def start(self, first: Evaluation) -> None:
        self.incumbent = first

    def propose(self, latest: Evaluation) -> Proposal:
        raise RuntimeError("projection failed on purpose")


@pytest.fixture(scope="module")
def comparison() -> Comparison:
    run, _ = mixed_run()
    register_method(_Broken)
    return compare_methods(run.spec, list(run.agents), methods=["bundle", "gradient", "newton", "test-broken"])


class TestCompareMethods:
    """compare_methods and write_comparison."""

    def test_rows_and_orders(self, comparison: Comparison) -> None:
        """One row per method plus the centralized one; every method used the fcfs orders."""
        run, _ = mixed_run()
        assert [r.method for r in comparison.rows] == ["bundle", "gradient", "newton", "test-broken", "centralized"]
        assert comparison.orders == fcfs_orders(list(run.agents), run.spec.resources)
        for name, res in comparison.results.items():
            assert res.orders == comparison.orders, name

    def test_gaps_against_centralized(self, comparison: Comparison) -> None:
        """Each gap is (total - centralized) / |centralized|; converged methods are within 1e-3 of it.

        1e-3: the methods stop on a predicted decrease of 1e-6 relative, but a method may stop at a
        neighbouring point of a nonsmooth value function; a larger gap means a wrong answer, not noise.
        """
        ref = comparison.centralized
        assert ref is not None and ref.success
        for r in comparison.rows:
            if r.method in comparison.results:
                res = comparison.results[r.method]
                assert r.total == res.total and r.rounds == res.rounds and r.agent_solves == res.agent_solves
                assert r.relative_gap == pytest.approx((res.total - ref.total) / abs(ref.total), rel=1e-12)
                if res.status == "converged":
                    assert abs(r.relative_gap) < 1e-3, r
        assert comparison.rows[-1].total == ref.total and comparison.rows[-1].relative_gap == 0.0

    def test_breakdown_is_a_status(self, comparison: Comparison) -> None:
        """A method that raises a numerical error is reported as an error row; the others still run."""
        row = next(r for r in comparison.rows if r.method == "test-broken")
        assert row.status == "error" and np.isnan(row.total) and row.relative_gap is None
        assert row.message == "RuntimeError: projection failed on purpose"
        assert "test-broken: RuntimeError: projection failed on purpose" in comparison.to_text()

    def test_csv_round_trip(self, comparison: Comparison, tmp_path: Path) -> None:
        """compare.csv holds every row's numbers exactly; compare.png is a PNG."""
        csv_path, png = write_comparison(comparison, tmp_path)
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        with csv_path.open(newline="") as fh:
            reader = csv.DictReader(fh)
            assert tuple(reader.fieldnames or ()) == COMPARE_COLUMNS
            rows = list(reader)
        for got, want in zip(rows, comparison.rows, strict=True):
            assert got["method"] == want.method and got["status"] == want.status
            assert int(got["rounds"]) == want.rounds and int(got["agent_solves"]) == want.agent_solves
            assert float(got["wall_time_s"]) == want.wall_time
            assert float(got["total_cost"]) == want.total or (np.isnan(want.total) and got["total_cost"] == "nan")
            assert got["relative_gap"] == ("" if want.relative_gap is None else repr(want.relative_gap))

    def test_unknown_method(self) -> None:
        """An unknown method name is refused before anything runs."""
        run, _ = mixed_run()
        with pytest.raises(ValueError, match=r"unknown coordination method\(s\) \['simplex'\]"):
            compare_methods(run.spec, list(run.agents), methods=["simplex"])


def test_cli(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``negotiate compare FLEET --out DIR`` prints the table with the orders and writes both files."""
    _, folder = mixed_run()
    assert cli.main(["compare", str(folder.parent / "tiny_mixed.toml"), "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "method" in out and "gap to centralized" in out and "centralized" in out
    assert "same orders for every method (first come, first served by free optimum)" in out
    assert (tmp_path / "compare.csv").is_file() and (tmp_path / "compare.png").is_file()
