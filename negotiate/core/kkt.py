"""Reading a KKT point: active sets, polishing, and the certificate that says whether dV/dp can be trusted.

Sign convention (used everywhere in negotiate, the same as CasADi's)::

    L(x, lam_g, lam_x, p) = f(x, p) + lam_g^T g(x, p) + lam_x^T x

A multiplier is positive when its upper bound is active and negative when its lower bound is active, so
``-lam`` is the price of relaxing the bound: moving an active upper bound ``ubg[j]`` up by ``d`` changes the
optimal value by about ``-lam_g[j] * d``. Because the bounds are numbers (parameters enter through ``g``),
the value gradient is the partial derivative ``dV/dp = d/dp L = grad_p f + (d g / d p)^T lam_g``.

Every constraint side is one *row*: the ``m`` rows of ``g`` first, then the ``n`` simple bounds on ``x``.
A row is

* an **equality** when its two bounds coincide (always active);
* **active** when its relative slack ``slack / max(1, |bound|)`` is at most ``Tolerances.active``
  (``Tolerances.active_polished`` at a polished point);
* **strictly active** when also its relative multiplier ``|lam| * ||grad c|| / scale`` exceeds
  ``Tolerances.multiplier`` with the sign of its side, ``scale`` being the multipliers' own scale (the
  largest of ``||grad f||``, ``max_i |lam_i| ||grad c_i||`` and ``1e-8 max|H|``);
* **weakly active** when it is active but not strictly active (zero multiplier, or one of the wrong sign
  too small to count): the solution map has a kink there and ``V`` may have one.

An interior-point solver leaves inactive rows slightly off their bounds and multipliers slightly off zero,
so before classifying, :func:`polish` solves the KKT equalities on the identified active set by Newton's
method (a few steps from the solver's point) and keeps the result only if it is a better KKT point with
consistent signs. After polishing, active slacks are ~1e-15 and inactive multipliers exactly zero, which
makes the thresholds above safe margins rather than knife edges.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np
import scipy.linalg

__all__ = ["Certificate", "ConstraintRef", "Tolerances", "certify", "polish"]

Side = Literal["lower", "upper", "equal"]
SoscStatus = Literal["strict", "weak", "fails"]
Verdict = Literal["smooth", "value-differentiable", "nonsmooth"]


@dataclass(frozen=True)
class Tolerances:
    """Scale-aware thresholds for reading a KKT point (all dimensionless).

    Attributes
    ----------
    active : float
        A row is active when ``slack / max(1, |bound|) <= active`` at a point the polish did not sharpen.
    active_polished : float
        The same threshold at a polished point, where active slacks are at round-off level (so that a
        bound of 1e6 with a slack of 0.5 is not mistaken for active).
    multiplier : float
        An active row is strictly active when ``|lam| * ||grad c|| / scale > multiplier`` (``scale``: the
        largest of ``||grad f||_inf``, ``max_i |lam_i| ||grad c_i||`` and ``1e-8 max|H|``).
    licq : float
        LICQ holds when the smallest singular value of the active Jacobian, rows scaled to unit length,
        exceeds ``licq``.
    sosc_floor : float
        Reduced-Hessian eigenvalues below ``sosc_floor * max(1, max|H|)`` count as zero (round-off level).
    sosc_stability : float
        An eigenvalue ``ev`` of the reduced Hessian is only trusted as positive when it would not change by
        more than this fraction over the remaining distance to the exact KKT point: with ``r`` the reduced
        stationarity residual and ``T`` the third derivative along its eigenvector, ``|T| r / ev^2`` must
        stay below ``sosc_stability``. This is what tells ``min x^4`` (weak) from ``min x^2`` (strict).
    stationarity, feasibility : float
        Re-check thresholds: a solve the solver calls converged is downgraded to ``inaccurate`` when its
        scaled stationarity or feasibility residual exceeds these.
    """

    active: float = 1e-6
    active_polished: float = 1e-10
    multiplier: float = 1e-6
    licq: float = 1e-8
    sosc_floor: float = 1e-10
    sosc_stability: float = 0.1
    stationarity: float = 1e-6
    feasibility: float = 1e-6


@dataclass(frozen=True)
class ConstraintRef:
    """One constraint side: ``kind`` "g" (row of g) or "x" (simple bound), its index, side and name."""

    kind: Literal["g", "x"]
    index: int
    side: Side
    name: str

    def __str__(self) -> str:
        return self.name if self.side == "equal" else f"{self.name} ({self.side})"


@dataclass(frozen=True)
class Certificate:
    """What a KKT point says about the trust one may put in its value gradient.

    Attributes
    ----------
    stationarity : float
        ``||grad_x L||_inf / max(1, ||grad f||_inf)``.
    feasibility : float
        Largest bound violation, each relative to ``max(1, |bound|)``.
    complementarity : float
        Largest ``relative multiplier * min(relative slack, 1)`` over inequality rows.
    dual_sign : float
        Largest relative multiplier of the wrong sign on an active inequality (0 when signs are right).
    active, strictly_active, weakly_active : tuple of ConstraintRef
        Active rows (equalities included), strictly active inequalities plus equalities, weakly active
        inequalities (empty when there is none).
    licq : bool
        Linear independence of the active constraint gradients.
    licq_rank : int
        Numerical rank of the active Jacobian (rows scaled to unit length).
    licq_sigma_min : float or None
        Its smallest singular value (``None`` when nothing is active).
    dependent : tuple of ConstraintRef
        Active rows involved in a linear dependence (empty when LICQ holds).
    sosc : {"strict", "weak", "fails"}
        Second-order test on the reduced Hessian of L (null space of equalities and strictly active rows).
        With weakly active rows, both faces are tested (held active: in the null space; released: not) and
        the report is conservative: "fails" if the held face fails, "strict" only if the released face
        is strict, "weak" otherwise. An empty reduced space (an LP vertex the cost pushes against) is
        strict.
    sosc_eigenvalue : float or None
        Smallest eigenvalue of the reduced Hessian on the released face (``None`` for an empty space).
    sosc_held_eigenvalue : float or None
        The same on the held face, when weakly active rows exist.
    sosc_threshold : float
        The level below which an eigenvalue is not trusted to be positive at this point.
    reduced_dim : int
        Dimension of the reduced space (released face).
    verdict : {"smooth", "value-differentiable", "nonsmooth"}
        ``smooth``: LICQ, strict SOSC and strict complementarity, so x*(p), the multipliers and V are
        differentiable (V twice). ``value-differentiable``: the gradient is unique and V differentiable,
        but x*(p) is not (weakly active rows with strict SOSC, or flat directions along which dV/dp does
        not change). ``nonsmooth``: V may have a kink here; the reported gradient is one element of its
        generalised gradient.
    reason : str
        One line saying why, naming the constraint(s).
    polished : bool
        Whether the Newton polish on the active set was accepted.
    """

    stationarity: float
    feasibility: float
    complementarity: float
    dual_sign: float
    active: tuple[ConstraintRef, ...]
    strictly_active: tuple[ConstraintRef, ...]
    weakly_active: tuple[ConstraintRef, ...]
    licq: bool
    licq_rank: int
    licq_sigma_min: float | None
    dependent: tuple[ConstraintRef, ...]
    sosc: SoscStatus
    sosc_eigenvalue: float | None
    sosc_held_eigenvalue: float | None
    sosc_threshold: float
    reduced_dim: int
    verdict: Verdict
    reason: str
    polished: bool

    @property
    def gradient_trusted(self) -> bool:
        """Whether the value gradient is the unique gradient of a differentiable V here."""
        return self.verdict != "nonsmooth"

    def summary(self) -> str:
        """One line: verdict, reason and the key numbers."""
        ev = "n/a" if self.sosc_eigenvalue is None else f"{self.sosc_eigenvalue:.3g}"
        return (
            f"{self.verdict}: {self.reason} [LICQ {'yes' if self.licq else 'no'}, SOSC {self.sosc} "
            f"(min eig {ev}), {len(self.active)} active, stationarity {self.stationarity:.1e}]"
        )


# --------------------------------------------------------------------------------------------------------
# Rows: the m rows of g, then the n simple bounds on x, evaluated at one point.


@dataclass
class Point:
    """Evaluated data at one primal-dual point (internal; dense NumPy arrays)."""

    x: np.ndarray
    lam_g: np.ndarray
    lam_x: np.ndarray
    f: float
    g: np.ndarray
    grad_f: np.ndarray
    J: np.ndarray  # (m, n) Jacobian of g
    H: np.ndarray  # (n, n) Hessian of f + lam_g^T g w.r.t. x
    grad_p: np.ndarray  # partial_p L

    @property
    def lam(self) -> np.ndarray:
        return np.concatenate([self.lam_g, self.lam_x])

    @property
    def values(self) -> np.ndarray:
        return np.concatenate([self.g, self.x])

    def rows(self) -> np.ndarray:
        return np.vstack([self.J, np.eye(self.x.size)])

    def grad_lagrangian(self) -> np.ndarray:
        grad: np.ndarray = self.grad_f + self.J.T @ self.lam_g + self.lam_x
        return grad


@dataclass(frozen=True)
class Bounds:
    """Lower and upper bounds of all rows (g rows first, then x), with names."""

    lo: np.ndarray
    up: np.ndarray
    names: tuple[str, ...]
    m: int  # number of g rows

    def ref(self, i: int, side: Side) -> ConstraintRef:
        if i < self.m:
            return ConstraintRef("g", i, side, self.names[i])
        return ConstraintRef("x", i - self.m, side, self.names[i])


@dataclass
class _Classes:
    side: np.ndarray  # -1 lower, +1 upper, 2 equality, 0 unbounded row
    slack: np.ndarray  # relative slack on the chosen side (inf for unbounded rows)
    mult: np.ndarray  # relative multiplier
    active: np.ndarray
    strict: np.ndarray
    weak: np.ndarray
    wrong_sign: np.ndarray  # relative size of a wrong-signed multiplier


def _classify(pt: Point, bnd: Bounds, tol: Tolerances, polished: bool = False) -> _Classes:
    c, lam = pt.values, pt.lam
    lo, up = bnd.lo, bnd.up
    rownorm = np.concatenate([np.linalg.norm(pt.J, axis=1), np.ones(pt.x.size)])
    weighted = np.abs(lam) * rownorm
    # The multipliers' own scale: the cost gradient and the largest multiplier term (they balance at a KKT
    # point), with a floor at the curvature level so that round-off multipliers of a problem whose gradient
    # vanishes stay "zero". No absolute 1: a cost scaled by 1e-7 keeps its strict activity.
    gscale = max(
        float(np.max(np.abs(pt.grad_f), initial=0.0)),
        float(np.max(weighted, initial=0.0)),
        1e-8 * float(np.max(np.abs(pt.H), initial=0.0)),
        1e-300,
    )
    mult = weighted / gscale
    has_lo, has_up = np.isfinite(lo), np.isfinite(up)
    with np.errstate(invalid="ignore"):
        s_lo = np.where(has_lo, (c - lo) / np.maximum(1.0, np.abs(np.where(has_lo, lo, 0.0))), np.inf)
        s_up = np.where(has_up, (up - c) / np.maximum(1.0, np.abs(np.where(has_up, up, 0.0))), np.inf)
    equal = has_lo & has_up & (lo == up)
    # Side: the multiplier's sign decides where it is clear, otherwise the nearer bound.
    use_up = np.where(lam > 0, has_up, np.where(lam < 0, ~has_lo, s_up <= s_lo))
    use_up &= has_up
    side = np.where(use_up, 1, np.where(has_lo, -1, 0))
    side = np.where(equal, 2, side)
    slack = np.where(side == 1, s_up, np.where(side == -1, s_lo, np.where(equal, 0.0, np.inf)))
    active = (side != 0) & (np.maximum(slack, 0.0) <= (tol.active_polished if polished else tol.active))
    right_sign = np.where(side == 1, lam >= 0, np.where(side == -1, lam <= 0, True))
    strict = equal | (active & right_sign & (mult > tol.multiplier))
    weak = active & ~strict
    wrong = np.where(right_sign | (side == 2), 0.0, mult)
    return _Classes(side, slack, mult, active, strict, weak, wrong)


def near_active_count(pt: Point, bnd: Bounds, tol: Tolerances) -> int:
    """Rows and bounds whose relative slack is within ``tol.active`` (the threshold at a point that was not
    polished): what a solver's answer here would take as active."""
    return int(np.count_nonzero(_classify(pt, bnd, tol, polished=False).active))


def _violation(c: np.ndarray, bnd: Bounds) -> np.ndarray:
    """Relative bound violation of every row (negative when satisfied)."""
    lo, up = np.nan_to_num(bnd.lo), np.nan_to_num(bnd.up)
    with np.errstate(invalid="ignore"):
        v_lo = np.where(np.isfinite(bnd.lo), (lo - c) / np.maximum(1.0, np.abs(lo)), -np.inf)
        v_up = np.where(np.isfinite(bnd.up), (c - up) / np.maximum(1.0, np.abs(up)), -np.inf)
    return np.maximum(v_lo, v_up)


def _residuals(pt: Point, bnd: Bounds, cl: _Classes) -> tuple[float, float, float, float]:
    gscale = max(1.0, float(np.max(np.abs(pt.grad_f), initial=0.0)))
    stat = float(np.max(np.abs(pt.grad_lagrangian()), initial=0.0)) / gscale
    feas = float(np.max(np.maximum(_violation(pt.values, bnd), 0.0), initial=0.0))
    ineq = (cl.side == 1) | (cl.side == -1)
    comp = float(np.max(np.where(ineq, cl.mult * np.minimum(np.maximum(cl.slack, 0.0), 1.0), 0.0), initial=0.0))
    sign = float(np.max(np.where(cl.active, cl.wrong_sign, 0.0), initial=0.0))
    return stat, feas, comp, sign


def _solve_kkt(H: np.ndarray, C: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve ``[[H, C^T], [C, 0]] z = rhs`` (dense LU); least squares when it is singular (LICQ failure)."""
    k = C.shape[0]
    K = np.block([[H, C.T], [C, np.zeros((k, k))]])
    if not (np.all(np.isfinite(K)) and np.all(np.isfinite(rhs))):  # no step from a point that did not evaluate
        return np.full(rhs.size, np.nan)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", scipy.linalg.LinAlgWarning)  # singular: take least squares below
            sol: np.ndarray = scipy.linalg.lu_solve(scipy.linalg.lu_factor(K, check_finite=False), rhs,
                                                    check_finite=False)  # fmt: skip
        if np.all(np.isfinite(sol)) and np.allclose(K @ sol, rhs, rtol=1e-8, atol=1e-10 * max(1.0, np.abs(rhs).max())):
            return sol
    except (np.linalg.LinAlgError, ValueError, scipy.linalg.LinAlgWarning):
        pass
    least: np.ndarray = np.linalg.lstsq(K, rhs, rcond=None)[0]
    return least


# --------------------------------------------------------------------------------------------------------
# Polishing: Newton's method on the KKT equalities of a guessed active set.

Evaluate = Callable[[np.ndarray, np.ndarray, np.ndarray], Point]


def polish(pt: Point, bnd: Bounds, evaluate: Evaluate, tol: Tolerances, max_newton: int = 4) -> tuple[Point, bool]:
    """Sharpen a solver's KKT point on its active set; return ``(point, accepted)``.

    The active set is guessed by complementarity (a row whose relative slack is below its relative
    multiplier, or below ``tol.active``), then ``grad_x L = 0, c_A(x) = bound_A`` is solved by Newton's
    method with the multipliers of all other rows set to zero. Rows that come out violated are added and
    rows whose multiplier comes out with the wrong sign are dropped, up to three times. The polished point
    is kept only when its KKT error is no larger than the original's.
    """
    cl = _classify(pt, bnd, tol)
    guess = (cl.side == 2) | ((cl.side != 0) & ((cl.slack <= cl.mult) | (cl.slack <= tol.active)))
    err0 = max(_residuals(pt, bnd, cl))
    n, m = pt.x.size, bnd.m
    for _attempt in range(3):
        A = np.flatnonzero(guess)
        target = np.where(cl.side[A] == 1, bnd.up[A], bnd.lo[A])
        x, lam = pt.x.copy(), np.zeros(m + n)
        lam[A] = pt.lam[A]
        # The other multipliers are set to zero; the Hessian keeps their (tiny) curvature until the first
        # re-evaluation, which does not matter for a Newton step.
        cur = replace(pt, lam_g=lam[:m].copy(), lam_x=lam[m:].copy())
        for _ in range(max_newton):
            C = cur.rows()[A]
            stat, rows = cur.grad_lagrangian(), cur.values[A] - target
            # Each half in its own units: stationarity against the objective's gradient, a row against its
            # bound (a cost of 1e9 must not let a row of 6e4 m^2 stop 1e-4 short of its bound).
            if np.max(np.abs(stat), initial=0.0) <= 1e-13 * max(1.0, float(np.max(np.abs(cur.grad_f), initial=0))) \
                    and np.all(np.abs(rows) <= 1e-13 * np.maximum(1.0, np.abs(target))):
                break
            r = np.concatenate([stat, rows])
            step = _solve_kkt(cur.H, C, -r)
            if not np.all(np.isfinite(step)):
                return pt, False
            x = x + step[:n]
            lam[A] = lam[A] + step[n:]
            cur = evaluate(x, lam[:m], lam[m:])
        new = _classify(cur, bnd, tol)
        viol = _violation(cur.values, bnd)
        violated = ~guess & (viol > tol.active)
        wrong = guess & (new.wrong_sign > tol.multiplier)
        if not violated.any() and not wrong.any():
            if max(_residuals(cur, bnd, new)) <= max(err0, 1e-12):
                return cur, True
            return pt, False
        guess = (guess | violated) & ~wrong
        cl = new
    return pt, False


# --------------------------------------------------------------------------------------------------------
# The certificate.


def _null_space(C: np.ndarray, n: int, rcond: float) -> np.ndarray:
    """Orthonormal basis of the null space of C (rows scaled to unit length), by SVD."""
    if C.shape[0] == 0:
        return np.eye(n)
    norms = np.linalg.norm(C, axis=1)
    _U, s, Vt = np.linalg.svd(C / np.where(norms > 0, norms, 1.0)[:, None], full_matrices=True)
    rank = int(np.sum(s > rcond))
    return Vt[rank:].T


def _face(H: np.ndarray, Z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    if Z.shape[1] == 0:
        return np.zeros(0), np.zeros((Z.shape[0], 0))
    Hr = Z.T @ H @ Z
    return np.linalg.eigh(0.5 * (Hr + Hr.T))


def certify(
    pt: Point,
    bnd: Bounds,
    tol: Tolerances,
    *,
    polished: bool,
    hessian_at: Callable[[np.ndarray], np.ndarray],
    cross_derivative: Callable[[], np.ndarray],
) -> Certificate:
    """Build the :class:`Certificate` of a KKT point.

    ``hessian_at(x)`` returns the Hessian of L in x at another primal point with the same multipliers
    (used for the third-derivative stability test of the smallest eigenvalue); ``cross_derivative()``
    returns ``d/dx (partial_p L)`` of shape (n_p, n) (used only when the second-order test is weak, to
    see whether dV/dp changes along the flat directions).
    """
    n = pt.x.size
    cl = _classify(pt, bnd, tol, polished)
    stat, feas, comp, sign = _residuals(pt, bnd, cl)
    C_all = pt.rows()
    side_name = {1: "upper", -1: "lower", 2: "equal"}
    act = np.flatnonzero(cl.active)
    refs = {int(i): bnd.ref(int(i), side_name[int(cl.side[i])]) for i in act}  # type: ignore[arg-type]
    active = tuple(refs[int(i)] for i in act)
    strict_idx = np.flatnonzero(cl.strict)
    weak_idx = np.flatnonzero(cl.weak)
    strictly = tuple(refs[int(i)] for i in strict_idx)
    weakly = tuple(refs[int(i)] for i in weak_idx)

    # One QR of the active Jacobian (rows scaled to unit length), strictly active rows first, serves LICQ
    # and both faces of the second-order test: Q[:, |S|:] spans null(C_S), Q[:, |S|+|W|:] spans null(C_A).
    order = np.concatenate([strict_idx, weak_idx])
    C = C_all[order]
    norms = np.linalg.norm(C, axis=1)
    C = C / np.where(norms > 0, norms, 1.0)[:, None]
    k_s, k_a = strict_idx.size, order.size
    dependent: tuple[ConstraintRef, ...] = ()
    if k_a == 0:
        licq, rank, smin = True, 0, None
        Q = np.eye(n)
    else:
        Q, R = scipy.linalg.qr(C.T, mode="full", check_finite=False)
        if k_a <= n:
            s = scipy.linalg.svdvals(R[:k_a, :k_a], check_finite=False)
        else:
            s = scipy.linalg.svdvals(C, check_finite=False)
        rank = int(np.sum(s > tol.licq))
        smin = float(s[-1]) if k_a <= n else 0.0
        licq = k_a <= n and smin > tol.licq
        if not licq:
            U, _s, _Vt = np.linalg.svd(C, full_matrices=True)
            involved = np.flatnonzero(np.max(np.abs(U[:, rank:]), axis=1) > 0.1)
            dependent = tuple(refs[int(order[i])] for i in involved)

    # Second-order test on the released face (null space of equalities + strictly active rows) and,
    # with weakly active rows, on the held face (their gradients added).
    Hscale = max(1.0, float(np.max(np.abs(pt.H), initial=0.0)))
    floor = tol.sosc_floor * Hscale
    if licq:
        Z = Q[:, k_s:]
    else:  # rank-deficient: the QR's trailing columns miss null directions, use the SVD
        Z = _null_space(C_all[strict_idx], n, tol.licq)
    evals, evecs = _face(pt.H, Z)
    threshold = floor
    if evals.size:
        z = Z @ evecs[:, 0]
        r = float(np.linalg.norm(Z.T @ pt.grad_lagrangian()))
        h = 1e-5 * max(1.0, float(np.max(np.abs(pt.x))))
        T = float(z @ (hessian_at(pt.x + h * z) - pt.H) @ z) / h
        threshold = max(floor, float(np.sqrt(abs(T) * r / tol.sosc_stability)))

    def grade(ev: np.ndarray) -> SoscStatus:
        if ev.size == 0 or ev[0] > threshold:
            return "strict"
        return "weak" if ev[0] >= -threshold else "fails"

    released = grade(evals)
    held_ev: float | None = None
    if weak_idx.size:
        Zh = Q[:, k_a:] if licq else _null_space(C_all[order], n, tol.licq)
        ev_h, _ = _face(pt.H, Zh)
        held = grade(ev_h)
        held_ev = float(ev_h[0]) if ev_h.size else None
        sosc: SoscStatus = "fails" if held == "fails" else ("strict" if released == "strict" else "weak")
    else:
        sosc = released
    min_ev = float(evals[0]) if evals.size else None

    def names(rs: tuple[ConstraintRef, ...]) -> str:
        return ", ".join(str(r) for r in rs)

    verdict: Verdict
    if not licq:
        verdict, reason = "nonsmooth", f"active constraints linearly dependent (LICQ fails): {names(dependent)}"
    elif sosc == "fails":
        verdict = "nonsmooth"
        reason = f"second-order test fails (reduced-Hessian eigenvalue {min_ev:.3g}): not a strict local minimum"
    elif weakly and sosc == "strict":
        verdict = "value-differentiable"
        reason = f"weakly active (zero multiplier): {names(weakly)}; V is differentiable, x*(p) has a kink"
    elif weakly:
        verdict = "nonsmooth"
        reason = f"weakly active (zero multiplier): {names(weakly)}, and the second-order test is only weak"
    elif sosc == "weak":
        flat = evecs[:, np.abs(evals) <= threshold]
        variation = np.max(np.abs(cross_derivative() @ (Z @ flat)), initial=0.0) * max(1.0, np.max(np.abs(pt.x)))
        if variation > 1e-6 * max(1.0, float(np.max(np.abs(pt.grad_p), initial=0.0))):
            verdict = "nonsmooth"
            reason = (
                f"flat directions of the solution ({flat.shape[1]}) along which dV/dp changes: "
                "the solution set is not a point and V may have a kink"
            )
        else:
            verdict = "value-differentiable"
            reason = f"second-order test weak (eigenvalue {min_ev:.3g}) but dV/dp is constant along flat directions"
    else:
        verdict, reason = "smooth", "LICQ, strict second-order sufficiency and strict complementarity hold"

    return Certificate(
        stationarity=stat,
        feasibility=feas,
        complementarity=comp,
        dual_sign=sign,
        active=active,
        strictly_active=strictly,
        weakly_active=weakly,
        licq=bool(licq),
        licq_rank=rank,
        licq_sigma_min=smin,
        dependent=dependent,
        sosc=sosc,
        sosc_eigenvalue=min_ev,
        sosc_held_eigenvalue=held_ev,
        sosc_threshold=float(threshold),
        reduced_dim=int(Z.shape[1]),
        verdict=verdict,
        reason=reason,
        polished=polished,
    )


def active_rows(cert: Certificate, m: int) -> tuple[np.ndarray, np.ndarray]:
    """Indices (into the stacked g-then-x rows) of the strictly active rows and their sides (+1/-1/2)."""
    idx, side = [], []
    code = {"upper": 1, "lower": -1, "equal": 2}
    for r in cert.strictly_active:
        idx.append(r.index if r.kind == "g" else m + r.index)
        side.append(code[r.side])
    return np.asarray(idx, dtype=int), np.asarray(side, dtype=int)
