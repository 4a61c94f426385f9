"""Strictly convex QPs for the upper level, solved sparse by the interior-point solver PIQP, with the dual
active-set solver DAQP and then the primal active-set solver qpOASES as fallbacks (all three ship with
CasADi as ``conic`` plugins).

    min_z  1/2 z^T H z + g^T z   s.t.  lba <= A z <= uba,  lbz <= z <= ubz,     H positive (semi)definite

Used for projections onto the coupling polyhedron, bundle masters and Newton steps. ``H`` and ``A`` may be
dense arrays or SciPy sparse matrices; they are passed on sparse. The upper-level QPs are very sparse (a
bundle master of 128 trucks has 384 variables, ~1900 rows and ~2.5 nonzeros per row): PIQP solves one in
2-5 ms where the dense DAQP took 110-170 ms and left violations of ~6e-8 (``benchmarks/bench_scale.py``
prints the end-to-end effect). Every answer is re-checked for feasibility; when it is off, the QP is solved
again by the next solver (the dense ones only up to a size where they are still quick). Solvers are made
once per sparsity pattern and kept; a failed QP is a status, not an exception.
"""

from __future__ import annotations

import contextlib
import os
import sys
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import casadi as ca
import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

__all__ = ["QPResult", "solve_qp"]

# Tolerances well below what the callers test (PIQP's defaults are 1e-8 absolute / 1e-9 relative); DAQP's
# default primal tolerance is loose (violations of 1e-4 were seen on bundle masters).
_OPTIONS: dict[str, dict[str, Any]] = {
    "piqp": {"error_on_fail": False, "piqp": {"eps_abs": 1e-10, "eps_rel": 1e-12, "verbose": False}},
    "daqp": {"error_on_fail": False, "daqp": {"primal_tol": 1e-10}},
    "qpoases": {"error_on_fail": False, "printLevel": "none"},
}
_DENSE_LIMIT = 4_000_000  # entries of a dense A beyond which the dense fallbacks are not tried
_CACHE: dict[tuple[str, str, str], ca.Function] = {}


@dataclass(frozen=True)
class QPResult:
    """Solution ``z``, multipliers ``lam_a`` of the rows and ``lam_z`` of the bounds (CasADi's sign: positive
    where an upper bound is active), objective ``value``, ``success``."""

    z: np.ndarray
    lam_a: np.ndarray
    value: float
    success: bool
    message: str
    lam_z: np.ndarray


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


def _solver(H: ca.DM, A: ca.DM, plugin: str) -> ca.Function:
    key = (plugin, H.sparsity().serialize(), A.sparsity().serialize())
    fn = _CACHE.get(key)
    if fn is None:
        if len(_CACHE) >= 16:  # patterns of bundle masters change every round: keep a few
            _CACHE.pop(next(iter(_CACHE)))
        with _quiet_stdout():
            fn = ca.conic("upper_qp", plugin, {"h": H.sparsity(), "a": A.sparsity()}, _OPTIONS[plugin])
        _CACHE[key] = fn
    return fn


def _csr(M: np.ndarray | sp.spmatrix | sp.sparray, shape: tuple[int, int]) -> sp.csr_array:
    out = sp.csr_array(M, dtype=float) if sp.issparse(M) or np.size(M) else sp.csr_array(shape, dtype=float)
    out.eliminate_zeros()
    return out


def _infinite(v: np.ndarray, sign: int) -> np.ndarray:
    """Bounds of magnitude 1e20 or more as infinite ones (``sign`` -1 for lower, +1 for upper bounds)."""
    v = np.asarray(v, dtype=float)
    return np.where(sign * v >= 1e20, sign * np.inf, v)


def solve_qp(
    H: np.ndarray | sp.spmatrix | sp.sparray,
    g: np.ndarray,
    A: np.ndarray | sp.spmatrix | sp.sparray,
    lba: np.ndarray,
    uba: np.ndarray,
    lbz: np.ndarray,
    ubz: np.ndarray,
    z0: np.ndarray | None = None,
) -> QPResult:
    """Solve the QP above (``H`` symmetric positive semidefinite, and definite where a fallback must take
    over). Bounds of magnitude 1e20 or more count as infinite."""
    g = np.asarray(g, dtype=float)
    n = g.size
    lba, uba = np.asarray(lba, dtype=float), np.asarray(uba, dtype=float)
    A = _csr(A, (lba.size, n))
    H = _csr(H, (n, n))
    # Rows scaled to unit length (the solution is unchanged, the multipliers are scaled back): the rows mix
    # seconds and watts and the solvers' tolerances are absolute.
    norms = np.sqrt(np.asarray(A.multiply(A).sum(axis=1)).ravel()) if A.shape[0] else np.zeros(0)
    r = np.where(norms > 0, norms, 1.0)
    A = sp.csr_array(sp.diags_array(1.0 / r) @ A)
    lba, uba = lba / r, uba / r
    data = (H, g, A, _infinite(lba, -1), _infinite(uba, 1), _infinite(lbz, -1), _infinite(ubz, 1), z0)
    Hs, As = ca.DM(sp.csc_array(H)), ca.DM(sp.csc_array(A))
    res = _attempt("piqp", Hs, As, *data)
    if res.success:
        res = _polish(res, *data[:7])
    if not res.success and A.shape[0] * n <= _DENSE_LIMIT:
        Hd, Ad = ca.densify(Hs), ca.densify(As)
        for plugin in ("daqp", "qpoases"):
            res = _attempt(plugin, Hd, Ad, *data)
            if res.success:
                break
    return QPResult(res.z, res.lam_a / r, res.value, res.success, res.message, res.lam_z)


def _polish(res: QPResult, H: sp.csr_array, g: np.ndarray, A: sp.csr_array, lba: np.ndarray, uba: np.ndarray,
            lbz: np.ndarray, ubz: np.ndarray) -> QPResult:  # fmt: skip
    """Refine an interior-point answer to the exact solution of its active set (solution polishing as in
    Stellato et al. 2020, "OSQP: an operator splitting solver for quadratic programs", Math. Prog. Comp.
    12:637-672, sec. 5.2): take the rows and bounds whose multiplier exceeds their slack as equalities, solve
    the equality-constrained QP's KKT system (regularised, with iterative refinement against the exact one),
    add any row the new point violates and repeat. The polished point is kept only if it is feasible and its
    multipliers have the right signs; otherwise the interior-point answer stands. Active constraints then
    hold to rounding, as at an active-set solver's vertex (a projection onto a bound lands on it)."""
    n = g.size
    C = sp.vstack([A, sp.eye_array(n, format="csr")], format="csr")
    lo, hi = np.concatenate([lba, lbz]), np.concatenate([uba, ubz])
    lam = np.concatenate([res.lam_a, res.lam_z])
    # Multipliers are negligible relative to the size of the stationarity condition's terms.
    big = max(float(np.max(np.abs(lam), initial=0.0)), float(np.max(np.abs(g), initial=0.0)),
              float(np.max(np.abs(H @ res.z), initial=0.0)), 1e-300)  # fmt: skip
    # A constraint is taken as active where its multiplier exceeds its slack (the interior point's product
    # of the two is small, so one of them is clearly the larger; the test of OSQP's polishing).
    Cz0 = C @ res.z
    upper, lower = lam > np.maximum(hi - Cz0, 0.0), -lam > np.maximum(Cz0 - lo, 0.0)
    for _ in range(6):
        W = np.flatnonzero(upper | lower)
        CW = C[W]
        rhs_c = np.where(upper[W], hi[W], lo[W])
        m = W.size
        K = sp.block_array([[H, CW.T], [CW, None]], format="csc") if m else sp.csc_array(H)
        delta = 1e-11 * max(1.0, float(np.max(np.abs(H.data), initial=1.0)))
        Kreg = (K + sp.diags_array(np.concatenate([np.full(n, delta), np.full(m, -delta)]))).tocsc()
        try:
            lu = spla.splu(Kreg)
        except RuntimeError:  # singular even with the regularisation
            return res
        b = np.concatenate([-g, rhs_c])
        sol = lu.solve(b)
        for _ in range(5):
            sol = sol + lu.solve(b - K @ sol)
        zp, y = sol[:n], sol[n:]
        if not np.all(np.isfinite(sol)):
            return res
        Cz = C @ zp
        tol = 1e-12 * (1.0 + float(np.max(np.abs(zp), initial=0.0)))
        bad = (Cz > hi + tol) | (Cz < lo - tol)
        if bad[W].any():  # the active set's system has no exact solution (dependent rows)
            return res
        # Multipliers of the wrong sign (CasADi's: positive at an upper bound): that constraint is not active.
        wrong = np.zeros(C.shape[0], dtype=bool)
        wrong[W] = np.where(upper[W], y < -1e-9 * big, y > 1e-9 * big)
        if not bad.any() and not wrong.any():
            # Stationarity holds to rounding (the system was solved after a regularisation): check it.
            if float(np.max(np.abs(H @ zp + g + CW.T @ y), initial=0.0)) > 1e-9 * big:
                return res
            z = np.clip(zp, lbz, ubz)
            full = np.zeros(C.shape[0])
            full[W] = y
            value = float(0.5 * z @ (H @ z) + g @ z)
            return QPResult(z, full[: A.shape[0]], value, True, res.message + " (polished)", full[A.shape[0] :])
        upper = (upper & ~wrong) | (bad & (Cz > hi))
        lower = (lower & ~wrong) | (bad & (Cz < lo))
    return res


def _attempt(plugin: str, Hc: ca.DM, Ac: ca.DM, H: sp.csr_array, g: np.ndarray, A: sp.csr_array, lba: np.ndarray,
             uba: np.ndarray, lbz: np.ndarray, ubz: np.ndarray, z0: np.ndarray | None) -> QPResult:  # fmt: skip
    fn = _solver(Hc, Ac, plugin)
    args: dict[str, Any] = {"h": Hc, "g": g, "a": Ac, "lba": lba, "uba": uba, "lbx": lbz, "ubx": ubz}
    if z0 is not None:
        args["x0"] = z0
    out = fn(**args)
    stats = fn.stats()
    ok = bool(stats.get("success", False))
    z = np.asarray(out["x"]).ravel()
    # Re-check the answer: a point that violates the rows or bounds is not a solution, whatever the status.
    Az = A @ z if A.shape[0] else np.zeros(0)
    scale = 1.0 + max(float(np.max(np.abs(z), initial=0.0)), 1.0)  # rows have unit length
    viol = max(
        float(np.max(lba - Az, initial=0.0)),
        float(np.max(Az - uba, initial=0.0)),
        float(np.max(lbz - z, initial=0.0)),
        float(np.max(z - ubz, initial=0.0)),
    )
    feasible = viol <= 1e-8 * scale
    return QPResult(
        z=z,
        lam_a=np.asarray(out["lam_a"]).ravel(),
        value=float(out["cost"]),
        success=ok and feasible and bool(np.all(np.isfinite(z))),
        message=f"{plugin}: {stats.get('return_status', '')}"
        + ("" if feasible else f"; infeasible answer (violation {viol:.1e})"),
        lam_z=np.asarray(out["lam_x"]).ravel(),
    )
