"""Projected Newton (SQP-like) steps using the agents' value Hessians, where every certificate is smooth.

Where every agent certifies ``smooth``, its value Hessian ``d2V_i/dp_i2`` follows from the KKT sensitivity
system (:mod:`negotiate.core.sensitivity`). The upper step solves the QP ::

    min_P  g . (P - P_k) + 1/2 (P - P_k)^T B (P - P_k)    s.t. P in the coupling polyhedron

with ``B`` the block-diagonal matrix of the weighted Hessians, each block made positive definite by
raising its eigenvalues to at least ``1e-6`` of its largest one and of the metric of the first gradient
step (V_i need not be convex, and is linear in places), in scaled coordinates. The QP is posed in the
scaled step ``d = (P - P_k) / scale`` (bounds and rows shifted by ``P_k``), so that the solver's absolute
tolerances resolve the step however close to convergence. The step is then backtracked (Armijo on the true
total) along the segment to the QP's solution, which stays feasible; a backtracking round reports the
measure of the point it backtracks from.
Where some agent is not smooth, or the nonsmooth guard found several one-sided gradients of it, that round
falls back to the projected-gradient step of :mod:`negotiate.coordination.methods.gradient`. An agent the
guard flags only because its strictly active set changed since its previous solve keeps its Hessian: its
certificate is smooth here, so V_i is twice differentiable around this point (the kink lies between the two
points, and the line search deals with it). Stopping measure: the
QP's predicted decrease ``-(g.d + d.B.d / 2)`` relative to ``max(1, |total|)``; it stops only when the
gradient method's step-independent measure is below the tolerance too (a Hessian that overstates the
curvature near a kink would promise too little). Where the QP's decrease is below the tolerance and the
gradient measure is not, the Newton step is still taken (a *tail* step, up to ``TAIL_STEPS`` in a row): the
decrement vanishes like the square of the projected gradient and the gradient measure like the gradient
itself, so one more Newton step is what brings the latter down. A tail step promises less than the
tolerance resolves, so it is accepted unless the total rises by more than the tolerance (comparing totals
more finely would judge rounding and solver noise), and is not backtracked: if rejected, a gradient step
follows.
"""

from __future__ import annotations

import numpy as np

from negotiate.coordination.methods.base import Evaluation, Proposal, register_method
from negotiate.coordination.methods.gradient import ProjectedGradient
from negotiate.core.qp import solve_qp

TAIL_STEPS = 3
"""Newton steps in a row taken while the Newton decrement is below the tolerance but the gradient measure is not."""


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
        self.tail = False
        self.tail_steps = 0

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
        self.tail = self.tolerance_reached(measure)
        note = "Newton step"
        if self.tail:
            # A Hessian that overstates the curvature (near a kink) promises too little: stop only if the
            # gradient method's step-independent measure agrees. That measure is first order (it vanishes
            # like the projected gradient, the Newton decrement like its square), so where it does not agree
            # the Newton step is still the step to take: with exact Hessians it shrinks the gradient
            # quadratically, where a gradient step from here crawls. It is judged by the tail rule in
            # :meth:`propose`, at most ``TAIL_STEPS`` times in a row.
            g = self.x.gradient
            g_max = float(np.max(np.abs(g * s)))
            _P, pred_ref = self.trial(g, 1.0 / g_max if g_max > 0 else 1.0)  # (g = 0: any step stays put)
            measure = pred_ref / max(1.0, abs(self.x.total))
            if self.tolerance_reached(measure):
                return Proposal(None, measure, True, "Newton predicted decrease below tolerance")
            self.tail_steps += 1
            if self.tail_steps > TAIL_STEPS:
                return None
            note = "Newton step (gradient measure above tolerance)"
        else:
            self.tail_steps = 0
        self.t = 1.0
        self.newton_measure = measure
        self.newton_pending = (d * s, float(self.x.gradient @ (d * s)))
        self.newton_steps += 1
        return Proposal(Pn, measure, False, note)

    def propose(self, latest: Evaluation) -> Proposal:
        if self.x is None:
            return Proposal(None, float("inf"), False, "an agent failed at the starting point")
        if self.newton_pending is not None:
            dP, slope = self.newton_pending
            # A tail step promises less decrease than the tolerance resolves: comparing totals to that
            # precision would judge rounding and solver noise, so it is accepted unless the total rises by
            # more than the tolerance (bounded, and at most TAIL_STEPS times in a row); otherwise it is
            # not backtracked (a shorter step promises even less) and a gradient step is taken.
            resolution = self.settings.tolerance * max(1.0, abs(self.x.total))
            if latest.ok and latest.total <= self.x.total + self.armijo * self.t * slope:
                self.newton_pending = None
                self.x = latest
                self.incumbent = latest
            elif self.tail and latest.ok and latest.total <= self.x.total + resolution:
                self.newton_pending = None
                self.x = latest
                if latest.total < self.incumbent.total:  # type: ignore[union-attr]
                    self.incumbent = latest
            elif self.tail:
                self.newton_pending = None
                return self.step_from_current("Newton tail step rejected")
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
