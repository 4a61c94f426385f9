"""Scaled spectral projected gradient with a nonmonotone line search; subgradient fallback.

Works in scaled coordinates ``u = P / scale`` (scale: width of each parameter's reachable box) so that
seconds and watts are comparable. The total ``F(P) = sum_i w_i V_i(p_i)`` is separable by agent (only the
coupling polyhedron ties the agents together), so its Hessian is block diagonal. The step uses one observed
curvature per agent, ``D_i = s_i . y_i / s_i . s_i`` (the Barzilai-Borwein quotient of that agent's block:
``s_i`` its last accepted scaled step, ``y_i`` the change of its scaled gradient; Barzilai & Borwein 1988,
"Two-point step size gradient methods", IMA J. Numer. Anal. 8:141-148), kept where it is positive and
clipped to a safe range. A single step length for all agents, as plain Barzilai-Borwein gives, is set by
the stiffest agent and leaves agents of small curvature or small gradient almost where they are; one
length per agent does not. The direction is the scaled projected gradient step (a QP posed in the step)::

    d = argmin_{u_x + d feasible}  g_u . d + 1/2 d^T diag(D) d,        g_u = scale * dF/dP,

and the trial ``u_x + t d`` (``t = 1`` first; feasible for every ``0 < t <= 1``) is accepted by the
nonmonotone test of Grippo, Lampariello & Lucidi (1986, "A nonmonotone line search technique for Newton's
method", SIAM J. Numer. Anal. 23(4):707-716) ::

    F(trial) <= max(F of the last ``memory`` accepted points) + armijo * t * g_u . d,

otherwise ``t`` shrinks by safeguarded quadratic interpolation. This is the spectral projected gradient
method of Birgin, Martinez & Raydan (2000, "Nonmonotone spectral projected gradient methods on convex
sets", SIAM J. Optim. 10(4):1196-1211, algorithm SPG2) with a diagonal scaling as in the scaled gradient
projection method of Bonettini, Zanella & Zanni (2009, Inverse Problems 25:015002). The best point seen is
the incumbent (a nonmonotone run may accept a point above it).

When the nonsmooth guard flags an agent and its probes find several one-sided gradients at the current
point, its gradient is not unique: the step is then a subgradient step on the local model
``sum_i w_i max_j g_ij . (p_i - x_i)`` (a proximal QP over the feasible set, so the direction is the
constrained steepest descent over the generalised gradient) with a diminishing length ``alpha_k = alpha_0 /
(1 + k)`` and no line search (a subgradient step need not descend), started from the best point seen (a
nonmonotone run may stand above it), which is kept as the incumbent; in that step the measure is the decrease
its local model promises for a step of unit length.

Stopping measure: the first-order criticality measure of Conn, Gould, Sartenaer & Toint (1993, "Global
convergence of a class of trust region algorithms for optimization using inexact projections on convex
constraints", SIAM J. Optim. 3(1):164-221; Conn, Gould & Toint 2000, *Trust-Region Methods*, SIAM,
section 12.1) ::

    chi(P) = max { -g_u . d :  u_x + d feasible,  |d_j| <= 1 for every j }

(a linear program), the decrease the linear model promises for a move of at most one window width in every
parameter, relative to ``max(1, |total|)``. It vanishes exactly at a first-order critical point, every
parameter counts in it by its own gradient (none is normalised by the largest one), and it does not shrink
because a line search shortened the step.

Options: :class:`GradientOptions` (``[coordinator.options]``; the table is in docs/methods.md).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.optimize import linprog

from negotiate.coordination.methods.base import AgentReport, Evaluation, Method, Proposal, option, register_method
from negotiate.core.qp import solve_qp


@dataclass(frozen=True)
class GradientOptions:
    """Options of the projected gradient and projected Newton methods."""

    armijo: float = option(1e-4, "sufficient-decrease constant of the (nonmonotone) line search")
    first_step: float = option(0.05, "length of each agent's first step, in scaled units")
    guard_fallback: bool = option(True, "take subgradient steps when the guard flags agents")
    memory: int = option(10, "accepted totals the nonmonotone line search compares with (1: monotone Armijo)")


CURVATURE_RANGE = 1e10
"""Each agent's observed curvature is kept within this factor of its first-step metric, both ways."""


@register_method
class ProjectedGradient(Method):
    name = "gradient"
    Options = GradientOptions

    def start(self, first: Evaluation) -> None:
        self.s = self.feasible.scale
        self.lay = self.feasible.layout
        self.armijo = self.options["armijo"]
        self.first_step = self.options["first_step"]
        self.fallback = self.options["guard_fallback"]
        self.memory = max(1, int(self.options["memory"]))
        self.x: Evaluation | None = first if first.ok else None
        self.incumbent = self.x
        self.alpha: float | None = None
        self.pending: tuple[str, np.ndarray, float] | None = None
        self.n_sub = 0
        self.alpha_sub0: float | None = None
        self.recent: list[float] = []  # totals of the last accepted points (the nonmonotone reference)
        self.D = np.ones(self.lay.n)  # per-entry metric: each agent's observed curvature, cost per scaled unit^2
        self.D_ref = np.ones(self.lay.n)
        self.t = 1.0
        self.step_d = np.zeros(self.lay.n)
        self.last_measure = float("inf")
        if self.x is not None:
            self.recent = [self.x.total]
            gu = np.abs(self.x.gradient * self.s)
            top = float(np.max(gu, initial=0.0))
            for i in range(len(self.lay.names)):
                sl = self.lay.slice(i)
                # A first step of first_step window widths for each agent's largest entry (an agent with no
                # gradient gets the fleet's largest, so that it stays put until its gradient says otherwise).
                gi = float(np.max(gu[sl], initial=0.0))
                self.D[sl] = (gi if gi > 0 else top if top > 0 else 1.0) / self.first_step
            self.D_ref = self.D.copy()

    # -- helpers -----------------------------------------------------------------------------------
    def direction(self, ev: Evaluation) -> tuple[np.ndarray, bool]:
        """Stacked weighted gradient and whether some agent reported several one-sided gradients."""
        sub = self.fallback and any(len(self.local_gradients(r)) > 1 for r in ev.reports)
        return ev.gradient, sub

    @staticmethod
    def local_gradients(rep: AgentReport) -> list[np.ndarray]:
        """The agent's plain gradient and the guard's one-sided gradients at the same point."""
        return rep.gradients

    def subgradient_trial(self, alpha: float) -> tuple[np.ndarray, float]:
        """Proximal step on the local model sum_i w_i max_j g_ij.(p_i - x_i) over the feasible set.

        Its solution moves along the constrained steepest-descent direction of the generalised gradient
        spanned by the one-sided gradients (and is the current point when that hull holds a stationary
        element); ``alpha`` (scaled length per unit slope) diminishes from step to step.
        """
        assert self.x is not None
        x, s, lay, fs = self.x, self.s, self.feasible.layout, self.feasible
        n, N = lay.n, len(lay.names)
        # Variables (u, alpha * rho_i): the objective alpha * (sum_i rho_i) + ||u - u_x||^2 / 2 keeps every
        # variable of order one, so a small term 1e-6/2 (alpha rho)^2 makes the QP strictly convex without
        # biasing rho (a term in rho itself would be scaled by the costs and suppress the model's decrease).
        rows, ub = [], []
        for i, rep in enumerate(x.reports):
            sl = lay.slice(i)
            for g in self.local_gradients(rep):
                row = np.zeros(n + N)
                row[sl] = alpha * x.weights[i] * g * s[sl]
                row[n + i] = -1.0
                rows.append(row)
                ub.append(float(alpha * x.weights[i] * g @ x.P[sl]))
        A = np.vstack([np.array(rows), np.hstack([fs.A * s[None, :], np.zeros((fs.A.shape[0], N))])])
        uba = np.concatenate([ub, fs.b])
        H = np.diag(np.concatenate([np.ones(n), np.full(N, 1e-6)]))
        u = x.P / s
        q = np.concatenate([-u, np.ones(N)])
        big = 1e20
        res = solve_qp(
            H, q, A, np.full(uba.size, -np.inf), uba,
            np.concatenate([fs.lower / s, np.full(N, -big)]), np.concatenate([fs.upper / s, np.full(N, big)]),
        )  # fmt: skip
        if not res.success:
            return self.trial(x.gradient, alpha)
        Pn = np.clip(res.z[:n] * s, fs.lower, fs.upper)
        model = 0.0
        for i, rep in enumerate(x.reports):
            sl = lay.slice(i)
            model += max(float(x.weights[i] * g @ (Pn[sl] - x.P[sl])) for g in self.local_gradients(rep))
        return Pn, max(-model, 0.0)

    def trial(self, g: np.ndarray, alpha: float) -> tuple[np.ndarray, float]:
        assert self.x is not None
        P = self.x.P
        Pn = self.feasible.project(P - alpha * self.s**2 * g)
        return Pn, float(g @ (P - Pn))

    def criticality(self, g: np.ndarray) -> float:
        """``chi = max {-g_u . d : u_x + d feasible, |d| <= 1}`` in cost units (see the module docstring): the
        decrease the linear model promises for a move of at most one window width in every parameter."""
        assert self.x is not None
        fs, s, P = self.feasible, self.s, self.x.P
        gu = g * s
        lo = np.minimum(np.maximum((fs.lower - P) / s, -1.0), 0.0)
        hi = np.maximum(np.minimum((fs.upper - P) / s, 1.0), 0.0)
        A = fs.A * s[None, :]
        b = np.maximum(fs.b - fs.A @ P, 0.0)  # the point itself stays feasible (rounding)
        res = linprog(gu, A_ub=A if A.shape[0] else None, b_ub=b if A.shape[0] else None,
                      bounds=np.column_stack([lo, hi]), method="highs")  # fmt: skip
        if res.status != 0 or res.x is None:
            _P, pred = self.trial(g, 1.0 / max(float(np.max(np.abs(gu))), 1e-300))
            return pred
        return max(-float(res.fun), 0.0)

    def metric_step(self, g: np.ndarray) -> np.ndarray | None:
        """The scaled step ``d = argmin g_u.d + d.diag(D).d / 2`` over the feasible set (scaled units)."""
        assert self.x is not None
        fs, s, P = self.feasible, self.s, self.x.P
        lo, hi = (fs.lower - P) / s, (fs.upper - P) / s
        lo, hi = np.minimum(lo, 0.0), np.maximum(hi, 0.0)
        res = solve_qp(sp.diags_array(self.D), g * s, fs.A * s[None, :], np.full(fs.b.size, -np.inf),
                       fs.b - fs.A @ P, lo, hi)  # fmt: skip
        if not res.success:
            return None
        return (np.clip(P + res.z * s, fs.lower, fs.upper) - P) / s

    def update_curvature(self, old: Evaluation, new: Evaluation) -> None:
        """Each agent's Barzilai-Borwein quotient ``s_i.y_i / s_i.s_i`` from an accepted step (kept where positive)."""
        su = (new.P - old.P) / self.s
        yu = (new.gradient - old.gradient) * self.s
        for i in range(len(self.lay.names)):
            sl = self.lay.slice(i)
            ss = float(su[sl] @ su[sl])
            if ss <= 1e-24:
                continue  # the agent did not move: nothing observed
            q = float(su[sl] @ yu[sl]) / ss
            if q > 0:
                ref = self.D_ref[sl]
                self.D[sl] = np.clip(q, ref / CURVATURE_RANGE, ref * CURVATURE_RANGE)

    def step_from_current(self, note: str = "") -> Proposal:
        assert self.x is not None
        g, sub = self.direction(self.x)
        if sub and self.incumbent is not None and self.incumbent.total < self.x.total:
            # A nonmonotone run may stand above its best point; the subgradient steps (no line search) start
            # from the best point instead, and the nonmonotone memory starts afresh there.
            self.x = self.incumbent
            self.recent = [self.x.total]
            g, sub = self.direction(self.x)
        gu = np.max(np.abs(g * self.s))
        if self.alpha is None:
            self.alpha = self.first_step / gu if gu > 0 else self.first_step  # (g = 0: any step stays put)
            self.alpha_sub0 = self.alpha
        scale = max(1.0, abs(self.x.total))
        if sub:
            _P_ref, pred_ref = self.subgradient_trial(1.0 / gu if gu > 0 else 1.0)  # measure at a unit step, as below
            measure = pred_ref / scale
            alpha = float(self.alpha_sub0) / (1 + self.n_sub)  # type: ignore[arg-type]
            Pn, pred = self.subgradient_trial(alpha)
            if self.tolerance_reached(measure):
                return Proposal(None, measure, True, "subgradient step below tolerance")
            self.pending = ("sub", g, pred)
            self.n_sub += 1
            return Proposal(Pn, measure, False, (note + " subgradient step").strip())
        # Model-free: a metric grown large across a kink would make a model's predicted decrease vanish there.
        measure = self.criticality(g) / scale
        if self.tolerance_reached(measure):
            return Proposal(None, measure, True, "criticality measure below tolerance")
        d = self.metric_step(g)
        if d is None:
            Pn, _pred = self.trial(g, self.alpha)
            d = (Pn - self.x.P) / self.s
        slope = float((g * self.s) @ d)
        self.step_d = d
        self.t = 1.0
        self.pending = ("spg", g, -slope)
        self.last_measure = measure
        return Proposal(self.x.P + d * self.s, measure, False, note)

    # -- protocol ----------------------------------------------------------------------------------
    def propose(self, latest: Evaluation) -> Proposal:
        if self.x is None:
            return Proposal(None, float("inf"), False, "an agent failed at the starting point")
        if self.pending is None:
            return self.step_from_current()
        kind, g_old, pred = self.pending
        if kind == "sub":
            self.pending = None
            if latest.ok:
                self.x = latest
                self.recent = [*self.recent, latest.total][-self.memory :]
                if latest.total < self.incumbent.total:  # type: ignore[union-attr]
                    self.incumbent = latest
            return self.step_from_current()
        reference = max([*self.recent, self.x.total])
        if latest.ok and latest.total <= reference - self.armijo * self.t * pred:
            self.pending = None
            self.update_curvature(self.x, latest)
            self.x = latest
            self.recent = [*self.recent, latest.total][-self.memory :]
            if latest.total < self.incumbent.total:  # type: ignore[union-attr]
                self.incumbent = latest
            return self.step_from_current("accepted")
        # Backtrack along the segment: the minimiser of the quadratic through F(x), the slope and F(trial),
        # kept within [0.1, 0.5] of the current t (Birgin, Martinez & Raydan 2000, SPG2); halving when an
        # agent failed there.
        t = self.t
        if latest.ok:
            excess = latest.total - self.x.total + t * pred
            t_new = 0.5 * t * t * pred / excess if excess > 0 else 0.5 * t
            self.t = float(np.clip(t_new, 0.1 * t, 0.5 * t))
        else:
            self.t = 0.5 * t
        reason = "agent failed, step shortened" if not latest.ok else "backtracking"
        if self.t < 1e-10:
            self.pending = None
            return Proposal(None, pred / max(1.0, abs(self.x.total)), False, "line search failed: step too small")
        return Proposal(self.x.P + self.t * self.step_d * self.s, self.last_measure, False, reason)
