"""Projected gradient with Armijo backtracking and Barzilai-Borwein steps; subgradient fallback.

Works in scaled coordinates ``u = P / scale`` (scale: width of each parameter's reachable box) so that
seconds and watts are comparable. A step is ``u+ = Proj(u - alpha * g_u)`` with ``g_u = scale * dF/dP``;
it is accepted when the true total decreases by at least ``armijo * g . (P - P+)`` (Armijo along the
projection arc, Bertsekas 1976), otherwise ``alpha`` is halved. After an accepted step ``alpha`` is the
Barzilai-Borwein length ``s.s / s.y`` (Barzilai & Borwein 1988), clipped to a safe range.

When the nonsmooth guard flags an agent, its gradient is not unique: the step then uses, for every
flagged agent, the minimum-norm element of the convex hull of its one-sided gradients (a subgradient), with
a diminishing length ``alpha_k = alpha_0 / (1 + k)`` and no line search (a subgradient step need not
descend); the best point seen is kept as the incumbent. Stopping measure: the first-order predicted
decrease ``g . (P - P+)`` of the current step, relative to ``max(1, |total|)``.

Options (``[coordinator.options]``): ``armijo`` (1e-4), ``first_step`` (0.05, length of the first step in
scaled units), ``guard_fallback`` (True: take subgradient steps when agents are flagged).
"""

from __future__ import annotations

import numpy as np

from negotiate.coordinate import Evaluation, Method, Proposal, register_method
from negotiate.guard import min_norm_element


@register_method
class ProjectedGradient(Method):
    name = "gradient"

    def start(self, first: Evaluation) -> None:
        self.s = self.feasible.scale
        self.armijo = float(self.options.get("armijo", 1e-4))
        self.first_step = float(self.options.get("first_step", 0.05))
        self.fallback = bool(self.options.get("guard_fallback", True))
        self.x: Evaluation | None = first if first.ok else None
        self.incumbent = self.x
        self.alpha: float | None = None
        self.pending: tuple[str, np.ndarray, float] | None = None
        self.n_sub = 0
        self.alpha_sub0: float | None = None

    # -- helpers -----------------------------------------------------------------------------------
    def direction(self, ev: Evaluation) -> tuple[np.ndarray, bool]:
        """Stacked descent-defining gradient and whether it is a subgradient (some agent flagged)."""
        lay = self.feasible.layout
        parts, sub = [], False
        for i, (w, rep) in enumerate(zip(ev.weights, ev.reports, strict=True)):
            grads = rep.gradients
            if self.fallback and rep.flagged and len(grads) > 1:
                parts.append(w * min_norm_element(grads, self.s[lay.slice(i)]))
                sub = True
            else:
                parts.append(w * rep.gradient)
                sub = sub or (self.fallback and rep.flagged)
        return lay.stack(parts), sub

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
            self.alpha = self.first_step / max(gu, 1e-300)
            self.alpha_sub0 = self.alpha
        scale = max(1.0, abs(self.x.total))
        if sub:
            alpha = float(self.alpha_sub0) / (1 + self.n_sub)  # type: ignore[arg-type]
            Pn, pred = self.trial(g, alpha)
            measure = pred / scale
            if self.tolerance_reached(measure):
                return Proposal(None, measure, True, "subgradient step below tolerance")
            self.pending = ("sub", g, pred)
            self.n_sub += 1
            return Proposal(Pn, measure, False, (note + " subgradient step").strip())
        Pn, pred = self.trial(g, self.alpha)
        measure = pred / scale
        if self.tolerance_reached(measure):
            return Proposal(None, measure, True, "predicted decrease below tolerance")
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
