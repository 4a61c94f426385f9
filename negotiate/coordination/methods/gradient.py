"""Projected gradient with Armijo backtracking and Barzilai-Borwein steps; subgradient fallback.

Works in scaled coordinates ``u = P / scale`` (scale: width of each parameter's reachable box) so that
seconds and watts are comparable. A step is ``u+ = Proj(u - alpha * g_u)`` with ``g_u = scale * dF/dP``;
it is accepted when the true total decreases by at least ``armijo * g . (P - P+)`` (Armijo along the
projection arc, Bertsekas 1976), otherwise ``alpha`` is halved. After an accepted step ``alpha`` is the
Barzilai-Borwein length ``s.s / s.y`` (Barzilai & Borwein 1988), clipped to a safe range.

When the nonsmooth guard flags an agent and its probes find several one-sided gradients at the current
point, its gradient is not unique: the step is then a
subgradient step on the local model ``sum_i w_i max_j g_ij . (p_i - x_i)`` (a proximal QP over the
feasible set, so the direction is the constrained steepest descent over the generalised gradient) with a
diminishing length ``alpha_k = alpha_0 / (1 + k)`` and no line search (a subgradient step need not
descend); the best point seen is kept as the incumbent. Stopping measure: the first-order predicted
decrease ``g . (P - Proj(P - alpha scale^2 g))`` of a step of unit length in scaled units
(``alpha = 1 / max|scale g|``; not the backtracked step), relative to ``max(1, |total|)``; in a
subgradient step, the decrease its local model promises for a step of that length. Because the step is
normalised by the largest entry, parameters with much smaller gradients move little in it: the test can
stop early when one agent's gradient dominates (the bundle and Newton methods do not share this).

Options: :class:`GradientOptions` (``[coordinator.options]``; the table is in docs/methods.md).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from negotiate.coordination.methods.base import AgentReport, Evaluation, Method, Proposal, option, register_method
from negotiate.core.qp import solve_qp


@dataclass(frozen=True)
class GradientOptions:
    """Options of the projected gradient and projected Newton methods."""

    armijo: float = option(1e-4, "sufficient-decrease constant of the backtracking (Armijo) test")
    first_step: float = option(0.05, "length of the first step, in scaled units")
    guard_fallback: bool = option(True, "take subgradient steps when the guard flags agents")


@register_method
class ProjectedGradient(Method):
    name = "gradient"
    Options = GradientOptions

    def start(self, first: Evaluation) -> None:
        self.s = self.feasible.scale
        self.armijo = self.options["armijo"]
        self.first_step = self.options["first_step"]
        self.fallback = self.options["guard_fallback"]
        self.x: Evaluation | None = first if first.ok else None
        self.incumbent = self.x
        self.alpha: float | None = None
        self.pending: tuple[str, np.ndarray, float] | None = None
        self.n_sub = 0
        self.alpha_sub0: float | None = None

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

    def step_from_current(self, note: str = "") -> Proposal:
        assert self.x is not None
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
        # The stopping measure uses a step of unit length in scaled units along the largest gradient entry
        # (up to one window width, so the projection QP stays well scaled), so that it does not shrink just
        # because the line search shortened the step (it would "converge" at a kink it cannot resolve).
        _P_ref, pred_ref = self.trial(g, 1.0 / gu if gu > 0 else 1.0)
        measure = pred_ref / scale
        if self.tolerance_reached(measure):
            return Proposal(None, measure, True, "predicted decrease below tolerance")
        Pn, pred = self.trial(g, self.alpha)
        self.pending = ("armijo", g, pred)
        return Proposal(Pn, measure, False, note)

    # -- protocol ----------------------------------------------------------------------------------
    def propose(self, latest: Evaluation) -> Proposal:
        if self.x is None:
            return Proposal(None, float("inf"), False, "an agent failed at the starting point")
        if self.pending is None:
            return self.step_from_current()
        kind, g_old, pred = self.pending
        self.pending = None
        if kind == "sub":
            if latest.ok:
                self.x = latest
                if latest.total < self.incumbent.total:  # type: ignore[union-attr]
                    self.incumbent = latest
            return self.step_from_current()
        assert self.alpha is not None
        if latest.ok and latest.total <= self.x.total - self.armijo * pred:
            s = (latest.P - self.x.P) / self.s
            g_new, _ = self.direction(latest)
            y = (g_new - g_old) * self.s
            sy = float(s @ y)
            bb = float(s @ s) / sy if sy > 0 else 2.0 * self.alpha
            self.alpha = float(np.clip(bb, 1e-3 * self.alpha, 1e3 * self.alpha))
            self.x = latest
            self.incumbent = latest
            return self.step_from_current("accepted")
        self.alpha *= 0.5
        reason = "agent failed, step halved" if not latest.ok else "backtracking"
        if self.alpha < 1e-14 * max(1.0, self.alpha_sub0 or 1.0):
            return Proposal(None, pred / max(1.0, abs(self.x.total)), False, "line search failed: step too small")
        return self.step_from_current(reason)
