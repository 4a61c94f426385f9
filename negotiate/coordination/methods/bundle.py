"""Disaggregated proximal bundle method with downshifted cuts for nonconvex value functions.

The master keeps one cutting-plane model per agent (Kiwiel 1985, *Methods of Descent for Nondifferentiable
Optimization*, Springer LNM 1133, ch. 2 and 6 for disaggregate models; proximal form as in
Kiwiel 1990, Math. Programming 46:105-122). In scaled coordinates ``u = P / scale`` and around the centre
``c`` it solves the QP ::

    min  sum_i w_i r_i + kappa/2 sum_i (u_i - u_ci)^T M_i (u_i - u_ci)
    s.t. r_i >= V_i(c_i) - sigma_ij + g_ij . (p_i - c_i)      for every cut j of agent i
         P in the coupling polyhedron

Because the ``V_i`` are in general not convex, a cut taken at ``p_j`` can lie above ``V_i(c_i)`` at the
centre. Each cut is therefore *downshifted* (Kiwiel 1996, "Restricted step and Levenberg-Marquardt
techniques in proximal bundle methods for nonconvex nondifferentiable optimization", SIAM J. Optim.
6(1):227-249; also Schramm & Zowe 1992): its value at the centre is ``V_i(c_i) - sigma_ij`` with ::

    sigma_ij = max(e_ij, gamma * ||(c_i - p_j) / scale_i||^2),
    e_ij     = V_i(c_i) - V_i(p_j) - g_ij . (c_i - p_j)        (linearisation error)

so every cut passes below the value at the centre and the predicted decrease is never negative. Cuts are
re-shifted whenever the centre moves. A cut is only ever taken from a converged solve; the nonsmooth
guard's one-sided gradients enter as extra cuts at the same point.

The proximal term is a variable metric, one block per agent: ``kappa/2 sum_i (u_i - u_ci)^T M_i (u_i - u_ci)``, in
the manner of the variable-metric bundle methods of Lemarechal & Sagastizabal (1997, Math. Programming
76:393-410). Where agent i certifies ``smooth`` and the guard did not flag it, ``M_i`` is its value Hessian from
the KKT sensitivity system, made positive definite (eigenvalues raised to 1e-6 of the largest, and to 1e-8 of the
first step's scale: a floor set by the first gradient's size can exceed the true curvature and make the steps
crawl). An agent flagged only for a changed active set keeps a unique gradient, but its Hessian is that of one
piece next to a kink: measured on generated crossings of 64 vehicles, taking it as the metric there ended at the
round limit 1.2 % above the optimum where the BFGS estimate converged; elsewhere it is a damped BFGS estimate
updated from successive gradients of that agent (Powell's damping keeps it positive definite where ``V_i`` is not
convex). A trial where an agent failed (or missed what it can reach) multiplies that agent's ``M_i`` by 4 until it
solves again: its step was too long, whatever the others'. The cutting planes still carry the kinks; the metric
supplies the curvature that plain cuts need many rounds to learn on smooth pieces.

Serious step when the trial total is at most ``total(c) - m * delta`` (``delta`` = predicted decrease, the
centre's total minus the model's value at the trial), null step otherwise. The proximity factor ``kappa`` is
halved after a serious step that realised most of the prediction and doubled after a trial that increased the
total (a trial where an agent failed stiffens that agent's metric instead, see above). It is also doubled after a
null step whose new cuts, downshifted around the centre, still promise at least half the predicted decrease at
that trial (the proximity control test of Noll, Prot & Apkarian 2008, "A proximity control algorithm to minimize
nonsmooth and nonconvex functions", Pacific J. Optim. 4(3):571-604): the model did not learn there, and the same
master would give the same trial again, round after round, until max-rounds. Stopping measure: the larger of
``delta`` and ``max(kappa, 1)^2 d.M.d / 2`` for the step ``d`` taken (what the step would promise without the
extra damping, which does not vanish just because ``kappa`` grew), relative to ``max(1, |total(c)|)``. Before it
stops, the method resets the metric to that of a plain first step from the centre and asks once more (a learned
metric can overstate the curvature on kinked or flat pieces and so promise too little).

Options: :class:`BundleOptions` (``[coordinator.options]``; the table is in docs/methods.md).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from negotiate.coordination.methods.base import Evaluation, Method, Proposal, option, register_method
from negotiate.core.qp import solve_qp


@dataclass(frozen=True)
class BundleOptions:
    """Options of the proximal bundle method."""

    serious: float = option(0.1, "serious-step test m: accept a trial realising at least m of the predicted decrease")
    downshift: float = option(1e-3, "downshift gamma, relative to the initial metric scale (nonconvex cuts)")
    max_cuts: int = option(25, "most cuts kept per agent")
    keep_cuts: int = option(6, "beyond this many (at least 2 n_i + 2), an agent keeps only its active and newest cuts")
    first_step: float = option(0.1, "length of the first step, in scaled units")
    hessian_metric: bool = option(True, "use smooth agents' value Hessians as their proximal metric")


@register_method
class ProximalBundle(Method):
    name = "bundle"
    wants_hessian = True
    Options = BundleOptions

    def start(self, first: Evaluation) -> None:
        self.s = self.feasible.scale
        self.m = self.options["serious"]
        self.m_tilde = 0.5
        self.gamma_rel = self.options["downshift"]
        self.max_cuts = self.options["max_cuts"]
        self.keep_cuts = self.options["keep_cuts"]
        self.first_step = self.options["first_step"]
        self.use_hessian = self.options["hessian_metric"]
        self.lay = self.feasible.layout
        self.cuts: list[list[tuple[np.ndarray, float, np.ndarray]]] = [[] for _ in self.lay.names]
        self.center = first if first.ok else None
        self.incumbent = self.center
        self.mu: float | None = None  # scale of the initial metric, cost per scaled unit^2
        self.kappa = 1.0
        self.delta = float("inf")
        self.waiting = False
        self.reset_since_serious = False
        self.M: list[np.ndarray] = []
        self.last: list[tuple[np.ndarray, np.ndarray] | None] = [None] * len(self.lay.names)
        if self.center is not None:
            self.add_cuts(first)
            gu = np.linalg.norm(first.gradient * self.s)
            self.mu = max(gu / self.first_step, 1e-12)
            self.M = [self.mu * np.eye(k) for k in self.lay.sizes]
            self.update_metric(first)

    def update_metric(self, ev: Evaluation) -> None:
        """Each agent's metric: its value Hessian where it is smooth, else a damped BFGS update."""
        assert self.mu is not None
        for i, rep in enumerate(ev.reports):
            if rep.gradient is None:
                continue
            sl = self.lay.slice(i)
            u, g = rep.p / self.s[sl], ev.weights[i] * rep.gradient * self.s[sl]
            prev, self.last[i] = self.last[i], (u, g)
            # the value Hessian where the agent is smooth and not flagged (module docstring)
            if self.use_hessian and rep.hessian is not None and not rep.flagged:
                Hu = ev.weights[i] * rep.hessian * np.outer(self.s[sl], self.s[sl])
                lam, Q = np.linalg.eigh(0.5 * (Hu + Hu.T))
                floor = max(1e-6 * float(np.max(np.abs(lam), initial=0.0)), 1e-8 * self.mu)
                self.M[i] = (Q * np.clip(lam, floor, 1e8 * self.mu)) @ Q.T
                continue
            if prev is None:
                continue
            d, y = u - prev[0], g - prev[1]
            if np.linalg.norm(d) < 1e-10:
                continue
            M = self.M[i]
            Md = M @ d
            dMd = float(d @ Md)
            dy = float(d @ y)
            if dy < 0.2 * dMd:  # Powell damping
                theta = 0.8 * dMd / (dMd - dy)
                y = theta * y + (1 - theta) * Md
                dy = float(d @ y)
            M = M - np.outer(Md, Md) / dMd + np.outer(y, y) / dy
            lam, Q = np.linalg.eigh(0.5 * (M + M.T))
            self.M[i] = (Q * np.clip(lam, 1e-8 * self.mu, 1e8 * self.mu)) @ Q.T

    def add_cuts(self, ev: Evaluation) -> None:
        for i, rep in enumerate(ev.reports):
            for g in rep.gradients:  # empty for a failed solve: never a cut from it
                self.cuts[i].append((rep.p.copy(), float(rep.value), np.asarray(g, dtype=float).copy()))
            if len(self.cuts[i]) > self.max_cuts:
                self.cuts[i] = self.cuts[i][-self.max_cuts :]

    def shifted(self, i: int, c_i: np.ndarray, V_c: float, gamma: float) -> tuple[np.ndarray, np.ndarray]:
        """Cut slopes G (k, n_i) and offsets a (k,) so that cut_j(p) = V_c + a_j + G_j . (p - c_i)."""
        sl = self.lay.slice(i)
        G, a = [], []
        for p_j, V_j, g_j in self.cuts[i]:
            e = V_c - V_j - g_j @ (c_i - p_j)
            d2 = float(np.sum(((c_i - p_j) / self.s[sl]) ** 2))
            G.append(g_j)
            a.append(-max(e, gamma * d2))
        return np.array(G).reshape(-1, c_i.size), np.array(a)

    def model_at(self, P: np.ndarray) -> float:
        """Weighted value of the cutting-plane model (cuts shifted around the current centre) at ``P``."""
        assert self.center is not None and self.mu is not None
        c = self.center
        model = 0.0
        for i in range(len(self.lay.names)):
            sl = self.lay.slice(i)
            G, a = self.shifted(i, c.P[sl], c.reports[i].value, self.gamma_rel * self.mu)
            model += c.weights[i] * (c.reports[i].value + float(np.max(a + G @ (P[sl] - c.P[sl]))))
        return model

    def master(self) -> tuple[np.ndarray | None, float, str]:
        assert self.center is not None and self.mu is not None
        c = self.center
        n, N = self.lay.n, len(self.lay.names)
        s = self.s
        gamma = self.gamma_rel * self.mu
        uc = c.P / s
        # Variables (u, rho / C): the model's decrease per agent in units of C = max(1, |total(c)|), so that
        # a small strictly convex term eps/2 (rho/C)^2 keeps the QP well conditioned without biasing rho.
        # Every cut touches one agent's parameters and its rho: the rows are assembled sparse.
        C = max(1.0, abs(c.total))
        ri, ci, vals, models = [], [], [], []
        ub: list[float] = []
        for i in range(N):
            sl = self.lay.slice(i)
            G, a = self.shifted(i, c.P[sl], c.reports[i].value, gamma)
            models.append((G, a))
            cols = np.arange(sl.start, sl.stop)
            for G_j, a_j in zip(G, a, strict=True):
                # V_c + a_j + G_j.(s_i u_i - c_i) <= r_i = V_c + rho_i   <=>   G_j s_i . u_i - rho_i <= G_j.c_i - a_j
                ri += [len(ub)] * (cols.size + 1)
                ci += [*cols, n + i]
                vals += [*(G_j * s[sl]), -C]
                ub.append(float(G_j @ c.P[sl] - a_j))
        owner = [(i, j) for i, (G, a) in enumerate(models) for j in range(len(a))]
        R = sp.csr_array((vals, (ri, ci)), shape=(len(ub), n + N))
        A_c = sp.hstack([sp.csr_array(self.feasible.A * s[None, :]), sp.csr_array((self.feasible.A.shape[0], N))])
        A = sp.vstack([R, A_c], format="csr")
        uba = np.concatenate([ub, self.feasible.b])
        H = sp.block_diag([self.kappa * M / C for M in self.M if M.size] + [1e-6 * sp.eye_array(N)], format="csr")
        q = np.concatenate([-(H[:n, :n] @ uc), c.weights])
        big = 1e20
        lbz = np.concatenate([self.feasible.lower / s, np.full(N, -big)])
        ubz = np.concatenate([self.feasible.upper / s, np.full(N, big)])
        res = solve_qp(H, q, A, np.full(uba.size, -np.inf), uba, lbz, ubz)
        if not res.success:
            return None, float("nan"), res.message
        P = np.clip(res.z[:n] * s, self.feasible.lower, self.feasible.upper)
        model = 0.0
        for i, (G, a) in enumerate(models):
            sl = self.lay.slice(i)
            model += c.weights[i] * (c.reports[i].value + float(np.max(a + G @ (P[sl] - c.P[sl]))))
        self.compress(owner, res.lam_a[: len(owner)])
        return P, model, ""

    def compress(self, owner: list[tuple[int, int]], lam: np.ndarray) -> None:
        """Bundle selection: an agent with more than ``keep`` cuts keeps those with a nonzero multiplier in
        the last master plus its ``keep`` newest (Kiwiel 1985, ch. 2: the selected cuts carry the model's
        information at the trial). Keeps the master small for large fleets."""
        tol = 1e-9 * max(float(np.max(np.abs(lam), initial=0.0)), 1e-300)  # below it: an interior point's rounding
        active: dict[int, set[int]] = {}
        for (i, j), mult in zip(owner, lam, strict=True):
            if abs(mult) > tol:
                active.setdefault(i, set()).add(j)
        for i, cuts in enumerate(self.cuts):
            keep = max(self.keep_cuts, 2 * self.lay.sizes[i] + 2)
            if len(cuts) > keep:
                k0 = len(cuts) - keep
                self.cuts[i] = [cut for j, cut in enumerate(cuts) if j >= k0 or j in active.get(i, ())]

    def propose(self, latest: Evaluation) -> Proposal:
        if self.center is None:
            return Proposal(None, float("inf"), False, "an agent failed at the starting point")
        note = ""
        if self.waiting:
            self.waiting = False
            self.add_cuts(latest)
            self.update_metric(latest)
            c = self.center
            assert self.mu is not None
            if latest.ok and latest.total <= c.total - self.m * self.delta:
                ratio = (c.total - latest.total) / max(self.delta, 1e-300)
                if ratio >= 0.5:
                    self.kappa = max(0.5 * self.kappa, 1e-3)
                self.center = latest
                self.incumbent = latest
                self.reset_since_serious = False
                note = "serious"
            else:
                if not latest.ok:
                    # the agents that failed at the trial were asked to go too far: stiffen their metric
                    for i, rep in enumerate(latest.reports):
                        if not rep.ok:
                            self.M[i] = 4.0 * self.M[i]
                elif latest.total > c.total:
                    self.kappa *= 2.0
                elif c.total - self.model_at(latest.P) >= self.m_tilde * self.delta:
                    # The new cuts, downshifted around the centre, leave the model at the trial nearly where it
                    # was: the same master would give the same trial again. Only a tighter proximity term moves
                    # it (proximity control test of Noll, Prot & Apkarian 2008).
                    self.kappa *= 2.0
                note = "null" if latest.ok else "null (agent failed)"
        return self.propose_from_center(note)

    def projected_gradient_norm(self, c: Evaluation) -> float:
        """Length of the centre's projected gradient in scaled units (Calamai & More 1987, "Projected gradient
        methods for linearly constrained problems", Math. Programming 39:93-116): ``|u_c - proj(u_c - t g)| / t``
        for the step ``t`` of a first step (``first_step / |g|``). At a constrained point the plain gradient
        keeps the prices of the binding rows, which no step along the coupling polyhedron can realise; a
        metric scaled by it would promise too little and stop early."""
        gu = c.gradient * self.s
        norm = float(np.linalg.norm(gu))
        if norm == 0.0:
            return 0.0
        t = self.first_step / norm
        try:
            Q = self.feasible.project(c.P - t * gu * self.s)
        except RuntimeError:
            return norm
        return float(np.linalg.norm((c.P - Q) / self.s)) / t

    def propose_from_center(self, note: str) -> Proposal:
        """Solve the master around the current centre and return the trial (or stop)."""
        P, model, why = self.master()
        if P is None:
            return Proposal(None, float("inf"), False, f"bundle master QP failed: {why}")
        c = self.center
        assert c is not None  # the first evaluation made the centre
        self.delta = max(c.total - model, 0.0)
        # delta alone shrinks when kappa grows (short steps promise little); the decrease a step with kappa = 1
        # would promise, kappa^2 d.M.d / 2 for the step d taken, does not. Both must be small.
        d = (P - c.P) / self.s
        quad = 0.0
        for i in range(len(self.lay.names)):
            sl = self.lay.slice(i)
            quad += 0.5 * max(self.kappa, 1.0) ** 2 * float(d[sl] @ self.M[i] @ d[sl])
        measure = max(self.delta, quad) / max(1.0, abs(c.total))
        if self.tolerance_reached(measure) and not self.reset_since_serious:
            # A learned metric can overstate the curvature (on kinked or flat pieces) and so promise too
            # little: before stopping, ask again with the plain metric of a first step from here.
            self.reset_since_serious = True
            mu = max(self.projected_gradient_norm(c) / self.first_step, 1e-12)
            self.M = [mu * np.eye(k) for k in self.lay.sizes]
            self.kappa = 1.0
            return self.propose_from_center("metric reset before stopping")
        if self.tolerance_reached(measure):
            return Proposal(None, measure, True, "predicted decrease below tolerance")
        self.waiting = True
        return Proposal(P, measure, False, note)
