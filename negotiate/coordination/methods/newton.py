"""Projected Newton (SQP-like) steps using the agents' value Hessians, where every certificate is smooth.

Where every agent certifies ``smooth``, its value Hessian ``d2V_i/dp_i2`` follows from the KKT sensitivity
system (:mod:`negotiate.core.sensitivity`). The upper step solves the QP ::

    min_P  g . (P - P_k) + 1/2 (P - P_k)^T B (P - P_k)    s.t. P in the coupling polyhedron

with ``B`` the block-diagonal matrix of the weighted Hessians, each block made positive definite by
raising its eigenvalues to at least ``1e-6`` of its largest one and of the metric of the first gradient
step (V_i need not be convex, and is linear in places), in scaled coordinates. The step is then
backtracked (Armijo on the true total) along the segment to the QP's solution, which stays feasible.
Where some agent is not smooth, or is flagged by the nonsmooth guard, that round falls back to the
projected-gradient step of :mod:`negotiate.coordination.methods.gradient`. Stopping measure: the
QP's predicted decrease ``-(g.d + d.B.d / 2)`` relative to ``max(1, |total|)``; it stops only when the
gradient method's step-independent measure is below the tolerance too (a Hessian that overstates the
curvature near a kink would promise too little).
"""

from __future__ import annotations

import numpy as np

from negotiate.coordination.methods.base import Evaluation, Proposal, register_method
from negotiate.coordination.methods.gradient import ProjectedGradient
from negotiate.core.qp import solve_qp


@register_method
class ProjectedNewton(ProjectedGradient):
    name = "newton"
    wants_hessian = True

    def start(self, first: Evaluation) -> None:
        super().start(first)
        # Curvature floor for agents whose value Hessian is (nearly) zero, e.g. linear pieces: the metric a
        # first gradient step of length first_step would imply, cost per scaled unit^2.
        self.mu0 = float(np.linalg.norm(first.gradient * self.s)) / self.first_step if first.ok else 1.0
        self.newton_steps = 0
        self.t = 1.0
        self.newton_pending: tuple[np.ndarray, float] | None = None
        self.newton_measure = float("inf")

    def hessian(self, ev: Evaluation) -> np.ndarray | None:
        # A flagged agent whose probes found no second one-sided gradient has a unique gradient here, and its
        # smooth certificate makes V_i twice differentiable around this point: its Hessian is valid (the guard
        # flags a changed active set, i.e. a kink somewhere between two points, which the line search handles).
        if any(r.hessian is None or len(r.gradients) > 1 for r in ev.reports):
            return None
        s, lay = self.s, self.feasible.layout
        B = np.zeros((lay.n, lay.n))
        for i, (w, rep) in enumerate(zip(ev.weights, ev.reports, strict=True)):
            sl = lay.slice(i)
            Hu = w * rep.hessian * np.outer(s[sl], s[sl])
            lam, Q = np.linalg.eigh(0.5 * (Hu + Hu.T))
            floor = max(1e-6 * float(np.max(np.abs(lam), initial=0.0)), 1e-6 * self.mu0, 1e-300)
            B[sl, sl] = (Q * np.maximum(lam, floor)) @ Q.T
        return B

    def newton_step(self) -> Proposal | None:
        assert self.x is not None
        B = self.hessian(self.x)
        if B is None:
            return None
        s = self.s
        P = self.x.P
        gu = self.x.gradient * s
        fs = self.feasible
        # The QP is posed in the scaled step d = (P+ - P) / s, not in the new point: near convergence the step
        # is tiny next to the point, and in the point's coordinates the objective's constant part (of order
        # u.B.u) swamps the decrease to be resolved, so the solver returned steps whose predicted decrease was
        # negative and the method fell back to gradient steps.
        lo, hi = (fs.lower - P) / s, (fs.upper - P) / s
        res = solve_qp(B, gu, fs.A * s[None, :], np.full(fs.b.size, -np.inf), fs.b - fs.A @ P, lo, hi)
        if not res.success:
            return None
        d = res.z
        Pn = np.clip(P + d * s, fs.lower, fs.upper)
        if not fs.contains(Pn, tol=1e-7 * max(1.0, float(np.max(np.abs(fs.b), initial=1.0)))):
            return None
        d = (Pn - P) / s
        pred = -float(gu @ d + 0.5 * d @ B @ d)
        measure = pred / max(1.0, abs(self.x.total))
        if self.tolerance_reached(measure):
            # A Hessian that overstates the curvature (near a kink) promises too little: stop only if the
            # gradient method's step-independent measure agrees, else take a gradient step from here.
            g = self.x.gradient
            g_max = float(np.max(np.abs(g * s)))
            _P, pred_ref = self.trial(g, 1.0 / g_max if g_max > 0 else 1.0)  # (g = 0: any step stays put)
            if self.tolerance_reached(pred_ref / max(1.0, abs(self.x.total))):
                return Proposal(None, measure, True, "Newton predicted decrease below tolerance")
            return None
        self.t = 1.0
        self.newton_measure = measure
        self.newton_pending = (d * s, float(self.x.gradient @ (d * s)))
        self.newton_steps += 1
        return Proposal(Pn, measure, False, "Newton step")

    def propose(self, latest: Evaluation) -> Proposal:
        if self.x is None:
            return Proposal(None, float("inf"), False, "an agent failed at the starting point")
        if self.newton_pending is not None:
            dP, slope = self.newton_pending
            if latest.ok and latest.total <= self.x.total + self.armijo * self.t * slope:
                self.newton_pending = None
                self.x = latest
                self.incumbent = latest
            else:
                self.t *= 0.5
                if self.t < 1e-6:
                    self.newton_pending = None  # give up on Newton here, take a gradient step
                    return self.step_from_current("Newton line search failed")
                # The measure is that of the current point, which backtracking does not move.
                return Proposal(self.x.P + self.t * dP, self.newton_measure, False, "Newton backtracking")
        elif self.pending is not None:
            # a gradient-method step is outstanding: let the parent judge it first
            before = self.x
            prop = super().propose(latest)
            if self.x is before or prop.converged or prop.point is None:
                return prop
            self.pending = None  # an accepted step: try Newton from the new point
        step = self.newton_step()
        if step is not None:
            return step
        return self.step_from_current("gradient fallback")
