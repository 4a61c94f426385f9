"""Machine job: process one batch at a controlled rate, then pass it through shared stations in sequence.

The machine works on a batch of ``work`` kg from its release time ``t_r`` until the finishing time ``T_f``
(a decision variable, s), split into ``K`` equal blocks of length ``h = (T_f - t_r) / K`` with a constant
processing rate in each. The decision variables are the work done per block ``w_k`` (kg) and ``T_f``; the
rate is ``r_k = w_k / h`` (kg/s). Processing draws the power ``power_coeff * r^2`` (W), a convex power law,
so block ``k`` uses the energy ``power_coeff * w_k^2 / h`` (J), priced at the tariff multiplier at the
block's midpoint ``t_k = t_r + (k + 1/2) h``. The tariff is a smooth peak (two logistic ramps of time scale
``price_ramp``): ``price(t) = base + (peak - base) sigma((t - peak_start)/ramp) sigma((peak_end - t)/ramp)``.
Because the block grid stretches with ``T_f``, the value is smooth in the slot times (a fixed grid would
put kinks at block boundaries).

Constraints: ``sum_k w_k = work``; ``w_k <= max_rate * h`` (rate limit, linear in ``(w, T_f)``); ``w_k >=
0``; and the hand-over ``T_f + transfer_1 <= enter_1``: the batch must be finished (and carried over) when
its slot at the first station opens. The cost, in J-equivalent, is

    sum_k price(t_k) power_coeff w_k^2 / h                                energy
  + holding_1 (enter_1 - T_f - transfer_1)                                waiting for the first station
  + sum_{j>1} holding_j (enter_j - leave_{j-1} - transfer_j)              waiting between stations
  + tardiness_weight * pos(leave_last - due)                              lateness

with ``pos`` the smooth positive part of width ``tardiness_smoothing`` (:func:`agents._common.smooth_pos`).
The last two terms depend on the parameters only; they belong to the agent's value all the same.

Parameters ``p = (enter_1, leave_1, enter_2, leave_2, ...)`` (s): the slot at each station. The station's
own rules -- ``leave_j - enter_j >= duration_j`` and ``enter_{j+1} - leave_j >= transfer_{j+1}`` -- involve
the parameters only, so they are rows of the reachable set, not of the NLP (a constraint without ``x`` would
break LICQ whenever it is active).

Reachable set (exact, in closed form): ``enter_1 >= t_r + work / max_rate + transfer_1 + margin`` (the
earliest hand-over at full rate; the margin of 2 % of the fastest processing time keeps the rate limits from
all being active at once, a point where LICQ fails), the duration and transfer rows above, and
``leave_last <= horizon``. The NLP is feasible exactly when the first inequality holds.

Free optimum: one joint solve over the schedule and the slot times within the reachable set. There every
slot is as short as its duration and follows the previous step immediately (waiting and lateness only
grow otherwise), and ``enter_1`` balances energy (which falls as the batch gets more time) against lateness.
At that ``p`` the hand-over constraint is strictly active (its multiplier is the holding cost plus the
energy saved by one more second), so the certificate is strict.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import casadi as ca
import numpy as np

from agents._common import NLPSpec, joint_optimum, smooth_pos
from agents.params import MachineParams
from negotiate.core.agent import AgentModel, ReachableSet, SlotParam

__all__ = ["MachineModel", "build_machine"]

_MARGIN = 0.02  # earliest hand-over margin, as a fraction of the fastest processing time


def _sigmoid(z: Any) -> Any:
    return 1.0 / (1.0 + ca.exp(-z))


class MachineModel:
    """The machine's problem: expressions, bounds and the closed-form reachable set.

    Parameters
    ----------
    prm : MachineParams
        Batch, machine, tariff, stations and cost weights (SI units, see :mod:`agents.params`).
    """

    def __init__(self, prm: MachineParams) -> None:
        self.prm = prm
        K = prm.blocks
        self.K = K
        w = ca.SX.sym("w", K)
        T_f = ca.SX.sym("T_f")
        self.x = ca.vertcat(w, T_f)
        n_st = len(prm.stations)
        p = ca.SX.sym("p", 2 * n_st)
        self.p = p
        h = (T_f - prm.release) / K
        mids = [prm.release + (k + 0.5) * h for k in range(K)]
        price = [self.price(tk) for tk in mids]
        energy = sum(price[k] * prm.power_coeff * w[k] ** 2 / h for k in range(K))
        st = prm.stations
        waiting = st[0].holding_cost * (p[0] - T_f - st[0].transfer)
        for j in range(1, n_st):
            waiting += st[j].holding_cost * (p[2 * j] - p[2 * j - 1] - st[j].transfer)
        lateness = prm.tardiness_weight * smooth_pos(p[2 * n_st - 1] - prm.due, prm.tardiness_smoothing)
        self.cost = energy + waiting + lateness
        self.cost_terms = ca.Function("cost_terms", [self.x, p], [energy, waiting, lateness])
        # Energy drawn per block in J (before pricing), for trajectories and tests.
        self.block_energy = ca.Function("block_energy", [self.x],
                                        [ca.vertcat(*[prm.power_coeff * w[k] ** 2 / h for k in range(K)])])

        g = [ca.sum1(w) - prm.work]
        g += [w[k] - prm.max_rate * h for k in range(K)]
        g += [p[0] - T_f - st[0].transfer]
        self.g = ca.vertcat(*g)
        self.lbg = np.r_[0.0, np.full(K, -np.inf), 0.0]
        self.ubg = np.r_[0.0, np.zeros(K), np.inf]
        self.g_names = ["work"] + [f"rate_limit[{k}]" for k in range(K)] + [f"{st[0].resource}.handover"]
        fastest = prm.work / prm.max_rate
        self.fastest = fastest
        self.lbx = np.r_[np.zeros(K), prm.release + 0.5 * fastest]
        self.ubx = np.r_[np.full(K, np.inf), prm.horizon]
        T_guess = prm.release + 2.0 * fastest
        self.x0 = np.r_[np.full(K, prm.work / K), T_guess]
        self.x_names = [f"w[{k}]" for k in range(K)] + ["T_f"]
        self.p_names = []
        for s_ in st:
            self.p_names += [f"{s_.resource}.enter", f"{s_.resource}.leave"]

    def price(self, t: Any) -> Any:
        """Tariff multiplier at time ``t`` (s), dimensionless; works on numbers and CasADi expressions."""
        prm = self.prm
        bump = _sigmoid((t - prm.peak_start) / prm.price_ramp) * _sigmoid((prm.peak_end - t) / prm.price_ramp)
        return prm.base_price + (prm.peak_price - prm.base_price) * bump

    def spec(self) -> NLPSpec:
        """The agent's parametric NLP."""
        return NLPSpec(
            x=self.x, p=self.p, f=self.cost, g=self.g, lbx=self.lbx, ubx=self.ubx, lbg=self.lbg,
            ubg=self.ubg, x0=self.x0, x_names=list(self.x_names), g_names=list(self.g_names),
            p_names=list(self.p_names),
        )

    def reachable(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """``(lower, upper, A, b)`` of the reachable slot times (see module doc), in s."""
        prm = self.prm
        st = prm.stations
        n = 2 * len(st)
        earliest = prm.release + self.fastest * (1 + _MARGIN) + st[0].transfer
        rows, rhs = [], []
        for j, s_ in enumerate(st):
            row = np.zeros(n)
            row[2 * j], row[2 * j + 1] = 1.0, -1.0  # enter - leave <= -duration
            rows.append(row)
            rhs.append(-s_.duration)
            if j > 0:
                row = np.zeros(n)
                row[2 * j - 1], row[2 * j] = 1.0, -1.0  # leave_prev - enter <= -transfer
                rows.append(row)
                rhs.append(-s_.transfer)
        # Box: forward chain from the earliest hand-over, backward chain from the horizon.
        lower = np.zeros(n)
        t = earliest
        for j, s_ in enumerate(st):
            if j > 0:
                t += s_.transfer
            lower[2 * j] = t
            t += s_.duration
            lower[2 * j + 1] = t
        upper = np.zeros(n)
        t = prm.horizon
        for j in range(len(st) - 1, -1, -1):
            upper[2 * j + 1] = t
            t -= st[j].duration
            upper[2 * j] = t
            t -= st[j].transfer
        return lower, upper, np.array(rows), np.array(rhs)

    def trajectory(self, result: Any) -> Mapping[str, np.ndarray]:
        """Block-boundary series: time, processing rate (zero-order hold), progress, power."""
        prm = self.prm
        x = np.asarray(result.x, dtype=float).ravel()
        w, T_f = x[: self.K], x[self.K]
        h = (T_f - prm.release) / self.K
        rate = w / h
        return {
            "time_s": prm.release + h * np.arange(self.K + 1),
            "rate_kg_per_s": np.r_[rate, rate[-1]],
            "progress_kg": np.r_[0.0, np.cumsum(w)],
            "power_W": prm.power_coeff * np.r_[rate, rate[-1]] ** 2,
        }


def build_machine(name: str, prm: MachineParams | None = None, weight: float = 1.0,
                  solver_options: dict[str, Any] | None = None) -> AgentModel:
    """Build a machine-job agent.

    Parameters
    ----------
    name : str
        Agent name, unique in the fleet.
    prm : MachineParams, optional
        Batch, machine, tariff and station data (SI units); the invented demo defaults when omitted.
    weight : float
        Weight of the agent's cost in the fleet total (dimensionless, > 0).
    solver_options : dict, optional
        Passed to :class:`~negotiate.core.nlp.ParametricNLP`.

    Returns
    -------
    negotiate.core.agent.AgentModel
        Parameters ``(<station>.enter, <station>.leave)`` per station in s, the closed-form reachable set
        and the free optimum of the module docstring.
    """
    prm = MachineParams() if prm is None else prm
    model = MachineModel(prm)
    spec = model.spec()
    lower, upper, A, b = model.reachable()
    # Start the joint solve from the earliest schedule shifted to the due time where possible.
    start = lower + max(0.0, min(prm.due - lower[-1], upper[-1] - lower[-1]) * 0.5)
    A_box = np.vstack([A, np.eye(A.shape[1]), -np.eye(A.shape[1])])
    b_box = np.r_[b, upper, -lower]
    joint = joint_optimum(spec, A_box, b_box, start, np.r_[model.x0[:-1], start[0] - prm.stations[0].transfer])
    if not joint.success:
        raise RuntimeError(f"machine {name!r}: free-optimum solve failed ({joint.status})")
    # The joint solve meets the rows to solver accuracy; push onto the set exactly (the rows are chains of
    # shortest durations and transfers, so raising each later time to its lower limit in turn suffices).
    p_free = np.clip(joint.x[spec.x.numel():], lower, upper)
    for j, st in enumerate(prm.stations):
        if j > 0:
            p_free[2 * j] = max(p_free[2 * j], p_free[2 * j - 1] + st.transfer)
        p_free[2 * j + 1] = max(p_free[2 * j + 1], p_free[2 * j] + st.duration)
    params = []
    for s_ in prm.stations:
        params += [SlotParam(f"{s_.resource}.enter", s_.resource, "enter"),
                   SlotParam(f"{s_.resource}.leave", s_.resource, "leave")]
    return AgentModel(
        name=name, problem=spec.to_problem(solver_options), params=tuple(params),
        reachable=ReachableSet(lower, upper, A, b), free_optimum=p_free, weight=weight,
        trajectory=model.trajectory, model="machine",
    )
