"""Small strictly convex QPs for the upper level, solved by the dual active-set solver DAQP, with the
primal active-set solver qpOASES as the fallback (both ship with CasADi as ``conic`` plugins).

    min_z  1/2 z^T H z + g^T z   s.t.  lba <= A z <= uba,  lbz <= z <= ubz,     H positive definite

Used for projections onto the coupling polyhedron, bundle masters and Newton steps. DAQP is exact and fast
on these dense problems of a few hundred variables (CasADi's sparse ``qrqp`` took seconds on a dense
300-variable projection in our trials). Every answer is re-checked for feasibility; when DAQP's is off
(it happened on ill-conditioned bundle masters), the QP is solved again by qpOASES. Solvers are made once
per sparsity pattern and kept; a failed QP is a status, not an exception.
"""

from __future__ import annotations

import contextlib
import os
import sys
from collections.abc import Iterator
from dataclasses import dataclass

import casadi as ca
import numpy as np

__all__ = ["QPResult", "solve_qp"]

# DAQP's default primal tolerance is loose (violations of 1e-4 were seen on bundle masters): tighten it.
_OPTIONS = {"error_on_fail": False, "daqp": {"primal_tol": 1e-10}}
_CACHE: dict[tuple, ca.Function] = {}


@dataclass(frozen=True)
class QPResult:
    """Solution ``z``, constraint multipliers ``lam_a`` (CasADi sign), objective ``value``, ``success``."""

    z: np.ndarray
    lam_a: np.ndarray
    value: float
    success: bool
    message: str


_FALLBACK_OPTIONS = {"error_on_fail": False, "printLevel": "none"}


@contextlib.contextmanager
def _quiet_stdout() -> Iterator[None]:
    """Silence the C-level standard output (qpOASES prints a notice whenever a solver is made)."""
    try:
        fd = sys.stdout.fileno()
    except (AttributeError, OSError, ValueError):  # no real file descriptor (e.g. captured): nothing to do
        yield
        return
    sys.stdout.flush()
    saved = os.dup(fd)
    try:
        with open(os.devnull, "w") as null:
            os.dup2(null.fileno(), fd)
            yield
    finally:
        os.dup2(saved, fd)
        os.close(saved)


def _solver(H: ca.DM, A: ca.DM, plugin: str = "daqp") -> ca.Function:
    key = (plugin, H.sparsity().serialize(), A.sparsity().serialize())
    fn = _CACHE.get(key)
    if fn is None:
        if len(_CACHE) >= 8:  # patterns of bundle masters change every round: keep few (they hold dense data)
            _CACHE.pop(next(iter(_CACHE)))
        if plugin == "daqp":
            fn = ca.conic("upper_qp", "daqp", {"h": H.sparsity(), "a": A.sparsity()}, _OPTIONS)
        else:
            with _quiet_stdout():
                fn = ca.conic("upper_qp", plugin, {"h": H.sparsity(), "a": A.sparsity()}, _FALLBACK_OPTIONS)
        _CACHE[key] = fn
    return fn


def solve_qp(
    H: np.ndarray,
    g: np.ndarray,
    A: np.ndarray,
    lba: np.ndarray,
    uba: np.ndarray,
    lbz: np.ndarray,
    ubz: np.ndarray,
    z0: np.ndarray | None = None,
) -> QPResult:
    """Solve the QP above (dense inputs; ``H`` symmetric positive definite)."""
    # Rows scaled to unit length (the solution is unchanged, the multipliers are scaled back): the rows mix
    # seconds and watts and the solvers' tolerances are absolute.
    A = np.asarray(A, dtype=float)
    norms = np.linalg.norm(A, axis=1) if A.size else np.zeros(A.shape[0])
    r = np.where(norms > 0, norms, 1.0)
    A, lba, uba = A / r[:, None], np.asarray(lba, dtype=float) / r, np.asarray(uba, dtype=float) / r
    Hd, Ad = ca.densify(ca.DM(H)), ca.densify(ca.DM(A))
    res = _attempt("daqp", Hd, Ad, H, g, A, lba, uba, lbz, ubz, z0)
    if not res.success:
        res = _attempt("qpoases", Hd, Ad, H, g, A, lba, uba, lbz, ubz, z0)
    return QPResult(res.z, res.lam_a / r, res.value, res.success, res.message)


def _attempt(plugin: str, Hd: ca.DM, Ad: ca.DM, H: np.ndarray, g: np.ndarray, A: np.ndarray, lba: np.ndarray,
             uba: np.ndarray, lbz: np.ndarray, ubz: np.ndarray, z0: np.ndarray | None) -> QPResult:  # fmt: skip
    fn = _solver(Hd, Ad, plugin)
    args = {"h": Hd, "g": g, "a": Ad, "lba": lba, "uba": uba, "lbx": lbz, "ubx": ubz}
    if z0 is not None:
        args["x0"] = z0
    out = fn(**args)
    stats = fn.stats()
    ok = bool(stats.get("success", False))
    z = np.asarray(out["x"]).ravel()
    # Re-check the answer: a point that violates the rows or bounds is not a solution, whatever the status.
    Az = np.asarray(A) @ z if np.size(A) else np.zeros(0)
    scale = 1.0 + float(np.max(np.abs(A), initial=0.0)) * max(float(np.max(np.abs(z), initial=0.0)), 1.0)
    viol = max(
        float(np.max(np.asarray(lba) - Az, initial=0.0)),
        float(np.max(Az - np.asarray(uba), initial=0.0)),
        float(np.max(np.asarray(lbz) - z, initial=0.0)),
        float(np.max(z - np.asarray(ubz), initial=0.0)),
    )
    feasible = viol <= 1e-8 * scale
    return QPResult(
        z=z,
        lam_a=np.asarray(out["lam_a"]).ravel(),
        value=float(out["cost"]),
        success=ok and feasible and bool(np.all(np.isfinite(z))),
        message=f"{plugin}: {stats.get('return_status', '')}"
        + ("" if feasible else f"; infeasible answer (violation {viol:.1e})"),
    )
