"""Capacity user: a battery vehicle charging from a shared grid connection over K time blocks.

Time is split into ``K`` blocks of length ``h`` (s) from ``start``. In block ``k`` the vehicle draws the
constant grid power ``P_k`` (W), ``0 <= P_k <= share_k``, where ``share_k`` is its capacity share of the
connection in that block (the shared parameter, W). The stored energy follows

    E_{k+1} = E_k + efficiency * P_k * h,      E_0 = initial_soc * battery_capacity,

and the state of charge is ``soc_k = E_k / battery_capacity``; ``soc_k <= 1`` in every block. The target
``target_soc`` is wanted at the end of the last block (the deadline), softly: a shortfall variable ``u >= 0``
(J) with ``E_K + u >= target_soc * battery_capacity`` is penalised quadratically, so the problem is feasible
for any shares ``>= 0`` (with no share at all the vehicle simply misses its target). The cost, in
J-equivalent, is

    sum_k tariff_k P_k h              energy bought, at the block's price multiplier
  + sum_k wear_coeff P_k^2 h          battery wear, quadratic in power
  + shortfall_weight * u^2            missed energy at the deadline.

Internally the powers are scaled by ``charger_power`` and the shortfall by ``battery_capacity`` (the
decision variables are dimensionless fractions), which keeps IPOPT's problem well scaled; the parameters
are shares in W.

Reachable set: ``0 <= share_k <= charger_power`` (no linear rows). The NLP is feasible for every
non-negative share, so the box is reachable outright. At a share of exactly 0 the bound ``P_k >= 0`` and
the row ``P_k <= share_k`` coincide (LICQ fails there); the solve still converges, and its certificate
says so.

Free optimum: shares above the charger limit would not help, and above the vehicle's own unconstrained
draw ``P*`` (the solve with every share at ``charger_power``) they change nothing: the value is flat there.
The reported free optimum is ``min(P* + margin * charger_power, charger_power)`` with a margin of 5 %: a
minimiser of the value over the reachable set at which no share row is weakly active (at ``P*`` itself
every row would be touched with a zero multiplier, a kink of the value).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import casadi as ca
import numpy as np

from agents._common import NLPSpec
from agents.params import CapacityParams
from negotiate.core.agent import AgentModel, ReachableSet, SlotParam

__all__ = ["CapacityModel", "build_capacity"]

_MARGIN = 0.05  # free-optimum share above the unconstrained draw, as a fraction of the charger power


class CapacityModel:
    """The charging problem: expressions, bounds and state-of-charge series.

    Parameters
    ----------
    prm : CapacityParams
        Battery, charger, tariff and cost weights (SI units, see :mod:`agents.params`).
    """

    def __init__(self, prm: CapacityParams) -> None:
        self.prm = prm
        K = prm.blocks
        self.K = K
        y = ca.SX.sym("y", K)  # P_k / charger_power
        z = ca.SX.sym("z")  # u / battery_capacity
        self.x = ca.vertcat(y, z)
        share = ca.SX.sym("share", K)
        self.p = share
        Pmax, Ecap, h = prm.charger_power, prm.battery_capacity, prm.block_length
        P = Pmax * y
        soc = [ca.SX(prm.initial_soc)]
        for k in range(K):
            soc.append(soc[-1] + prm.efficiency * P[k] * h / Ecap)
        self.soc_expr = ca.vertcat(*soc)
        self.soc = ca.Function("soc", [self.x], [self.soc_expr])
        tariff = np.asarray(prm.tariff)
        energy = ca.dot(ca.DM(tariff), P) * h
        wear = prm.wear_coeff * ca.sumsqr(P) * h
        shortfall = prm.shortfall_weight * (Ecap * z) ** 2
        self.cost = energy + wear + shortfall
        self.cost_terms = ca.Function("cost_terms", [self.x], [energy, wear, shortfall])

        g = [share[k] / Pmax - y[k] for k in range(K)]  # share_k - P_k >= 0, in units of charger power
        g += [soc[k + 1] for k in range(K)]  # soc <= 1
        g += [soc[K] + z]  # soc_K + u / E_cap >= target
        self.g = ca.vertcat(*g)
        self.lbg = np.r_[np.zeros(K), np.full(K, -np.inf), prm.target_soc]
        self.ubg = np.r_[np.full(K, np.inf), np.ones(K), np.inf]
        self.g_names = ([f"{prm.resource}.share[{k}]" for k in range(K)] + [f"soc_max[{k + 1}]" for k in range(K)]
                        + ["soc_target"])
        self.lbx = np.zeros(K + 1)
        self.ubx = np.full(K + 1, np.inf)
        self.x0 = np.r_[np.full(K, 0.5), 0.0]
        self.x_names = [f"power_fraction[{k}]" for k in range(K)] + ["shortfall_fraction"]
        self.p_names = [f"{prm.resource}.share[{k}]" for k in range(K)]

    def spec(self) -> NLPSpec:
        """The agent's parametric NLP (parameters: shares in W)."""
        return NLPSpec(
            x=self.x, p=self.p, f=self.cost, g=self.g, lbx=self.lbx, ubx=self.ubx, lbg=self.lbg,
            ubg=self.ubg, x0=self.x0, x_names=list(self.x_names), g_names=list(self.g_names),
            p_names=list(self.p_names),
        )

    def power(self, x: np.ndarray) -> np.ndarray:
        """Grid power per block in W from a decision vector."""
        return self.prm.charger_power * np.asarray(x, dtype=float).ravel()[: self.K]

    def draw(self, result: Any) -> np.ndarray:
        """Planned grid power per block in W at a solve (one entry per share parameter, ``<= share_k``)."""
        return self.power(np.asarray(result.x, dtype=float))

    def trajectory(self, result: Any) -> Mapping[str, np.ndarray]:
        """Block-boundary series: time, grid power (zero-order hold), state of charge, stored energy."""
        prm = self.prm
        x = np.asarray(result.x, dtype=float).ravel()
        P = self.power(x)
        soc = np.asarray(self.soc(x)).ravel()
        return {
            "time_s": prm.start + prm.block_length * np.arange(self.K + 1),
            "power_W": np.r_[P, P[-1]],
            "soc": soc,
            "energy_J": soc * prm.battery_capacity,
        }


def build_capacity(name: str, prm: CapacityParams | None = None, weight: float = 1.0,
                   solver_options: dict[str, Any] | None = None) -> AgentModel:
    """Build a capacity-user (charging) agent.

    Parameters
    ----------
    name : str
        Agent name, unique in the fleet.
    prm : CapacityParams, optional
        Battery, charger and tariff data (SI units); the invented demo defaults when omitted.
    weight : float
        Weight of the agent's cost in the fleet total (dimensionless, > 0).
    solver_options : dict, optional
        Passed to :class:`~negotiate.core.nlp.ParametricNLP`.

    Returns
    -------
    negotiate.core.agent.AgentModel
        Parameters ``<resource>.share[k]`` in W, reachable box ``[0, charger_power]``, the free optimum of
        the module docstring and ``draw`` (the planned power ``P_k`` per block, W).
    """
    prm = CapacityParams() if prm is None else prm
    model = CapacityModel(prm)
    spec = model.spec()
    ample = np.full(model.K, prm.charger_power)
    free = spec.solve_plain(ample)
    if not free.success:
        raise RuntimeError(f"capacity user {name!r}: the solve with ample shares failed ({free.status})")
    p_free = np.minimum(model.power(free.x) + _MARGIN * prm.charger_power, prm.charger_power)
    params = tuple(SlotParam(f"{prm.resource}.share[{k}]", prm.resource, "share", unit="W", block=k)
                   for k in range(model.K))
    return AgentModel(
        name=name, problem=spec.to_problem(solver_options), params=params,
        reachable=ReachableSet(np.zeros(model.K), ample), free_optimum=p_free, weight=weight,
        trajectory=model.trajectory, model="capacity", draw=model.draw,
    )
