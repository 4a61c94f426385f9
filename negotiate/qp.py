"""Small strictly convex QPs for the upper level, solved by the dual active-set solver DAQP (shipped with
CasADi as a ``conic`` plugin).

    min_z  1/2 z^T H z + g^T z   s.t.  lba <= A z <= uba,  lbz <= z <= ubz,     H positive definite

Used for projections onto the coupling polyhedron, bundle masters and Newton steps. DAQP is exact and fast
on these dense problems of a few hundred variables (CasADi's sparse ``qrqp`` took seconds on a dense
300-variable projection in our trials). The solver is made once per sparsity pattern and kept; a failed QP
is a status, not an exception.
"""

from __future__ import annotations

from dataclasses import dataclass

import casadi as ca
import numpy as np

__all__ = ["QPResult", "solve_qp"]

_OPTIONS = {"error_on_fail": False}
_CACHE: dict[tuple, ca.Function] = {}


@dataclass(frozen=True)
class QPResult:
    """Solution ``z``, constraint multipliers ``lam_a`` (CasADi sign), objective ``value``, ``success``."""

    z: np.ndarray
    lam_a: np.ndarray
    value: float
    success: bool
    message: str


def _solver(H: ca.DM, A: ca.DM) -> ca.Function:
    key = (H.sparsity().serialize(), A.sparsity().serialize())
    fn = _CACHE.get(key)
    if fn is None:
        if len(_CACHE) > 64:
            _CACHE.clear()
        fn = ca.conic("upper_qp", "daqp", {"h": H.sparsity(), "a": A.sparsity()}, _OPTIONS)
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
    """Solve the QP above (dense inputs; ``H`` symmetric positive semidefinite)."""
    Hd, Ad = ca.densify(ca.DM(H)), ca.densify(ca.DM(A))
    fn = _solver(Hd, Ad)
    args = {"h": Hd, "g": g, "a": Ad, "lba": lba, "uba": uba, "lbx": lbz, "ubx": ubz}
    if z0 is not None:
        args["x0"] = z0
    out = fn(**args)
    stats = fn.stats()
    ok = bool(stats.get("success", False))
    z = np.asarray(out["x"]).ravel()
    return QPResult(
        z=z,
        lam_a=np.asarray(out["lam_a"]).ravel(),
        value=float(out["cost"]),
        success=ok and bool(np.all(np.isfinite(z))),
        message=str(stats.get("return_status", "")),
    )
