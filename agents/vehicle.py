"""Vehicle on a path: longitudinal dynamics along a fixed route with exclusive zones on it.

The route ``[0, L]`` (m) is discretised in distance, not in time: nodes ``s_0 = 0 < s_1 < ... < s_N = L``,
with a node exactly at every zone entry and at every zone exit plus the vehicle length (the zone is held
until the rear has left it). The state at node ``i`` is the kinetic energy per mass ``e_i = v_i^2 / 2``
(J/kg); the control on stage ``i`` (from ``s_i`` to ``s_{i+1}``) is the force per total mass ``a_i`` (m/s^2)
applied by the drivetrain (``a_i > 0``) or the brakes (``a_i < 0``). With ``e`` as state the longitudinal
dynamics ``m v dv/ds = F - C_rr m g - rho C_dA v^2 / 2`` become linear,

    de/ds = a - C_rr g - (rho C_dA / m) e,

discretised by the trapezoidal rule on each stage (``ds_i = s_{i+1} - s_i``)::

    e_{i+1} - e_i = ds_i (a_i - C_rr g - (rho C_dA / m) (e_i + e_{i+1}) / 2).

Time follows from the average speed of a stage, ``t_{i+1} - t_i = 2 ds_i / (v_i + v_{i+1})``, which is exact
for constant acceleration; the node times ``t_1 .. t_N`` are variables tied by these rows (a sparse clock:
written as running sums instead, every time would depend on every speed before it and building the
derivatives would grow with the square of the stages). Speeds stay within ``[min_speed, speed_limit]``
with ``min_speed > 0``, so every stage time is finite (the vehicle never stands still on the route). The cost, in J, is

    sum_i m ds_i pos(a_i) / efficiency                              traction energy
  + comfort_weight * sum_i ((e_{i+1} - e_i) / ds_i)^2 dt_i          time integral of (dv/dt)^2
  + arrival_weight * (t_N - desired_arrival)^2                      lateness or earliness

where ``pos`` is the smooth positive part of :func:`agents._common.smooth_pos` (width
``traction_smoothing``; braking energy is lost, not recovered). ``t_N <= latest_arrival`` is a hard
constraint.

Coupling. The shared parameters are the entry and exit time of each zone, ``p = (enter_1, leave_1, enter_2,
...)`` in s, and they are imposed as equalities: ``t(entry_k) = enter_k`` and ``t(exit_k + length) =
leave_k``. Inequalities (``t(entry) >= enter``, ``t(exit) <= leave``) would say the same thing (the vehicle
stays inside its slot) but at the vehicle's own preferred times both would be touched with zero multipliers,
i.e. weakly active: the value function would have a kink exactly at the point every coordination starts
from. Equalities have no weak activity, so the value function is smooth wherever the NLP is regular, and
nothing is lost at the fleet level: the coordinator chooses the slots anyway, and a vehicle that would use
only part of a slot is represented by the smaller slot it actually occupies.

Elastic slots. The coupling equalities are elastic: ``t(entry_k) = enter_k + late - early`` with ``late, early
>= 0`` priced at ``slot_penalty`` (J/s) each in the cost, an exact L1 penalty (Nocedal & Wright, *Numerical
Optimization*, 2nd ed., sec. 17.2, nonsmooth penalty functions; cited from memory). Where the vehicle can meet
the proposed times and the multiplier of their row is below the penalty, the slacks are zero at the solution
(both bounds strictly active), so value, gradient and certificate are exactly those of the plain equalities;
where it cannot, the solve still converges, the value grows by the penalty times the miss and the gradient is
the penalty itself, a large exact price that drives the coordinator back. :meth:`VehicleModel.slack` reads the
miss from a solve (``late - early`` per parameter, s); the coordinator reports a schedule whose slacks are not
zero as unreachable. The penalty is ``10 x`` the largest of three marginal costs of the vehicle (traction
power at the speed limit, the arrival term's slope over the whole window, the comfort term at full
acceleration), so that every multiplier of a reachable slot the coordination is likely to meet stays below it.

Kinematic window. The coordinator proposes slot times from a box and a few rows that contain every
reachable time: with the drag neglected in the drive direction and taken at its largest in the braking
direction, the trapezoidal dynamics bound the kinetic energy at each node from above (forward pass from the
initial speed at full drive force, backward pass at full braking, the speed limits) and from below (full
braking, ``min_speed``); the stage times ``2 ds / (v_i + v_{i+1})`` at those speeds bound the earliest and
latest time at every node, the deadline bounds the latest time by ``latest_arrival`` minus the quickest rest
of the route, and consecutive marks along the route (zone entries and exits, in route order) get rows
``t_b - t_a`` within the quickest and the slowest time between them. This costs no solve; it is an outer
bound (every reachable time lies inside, some times inside are not reachable), which the elastic slots make
harmless: a proposal the vehicle cannot meet is priced, not failed.

Free optimum. The vehicle alone (no coupling rows) chooses its trajectory; its times at the zone nodes are
the free optimum and the global minimiser of the value (the slacks are zero there and the coupling
multipliers vanish). Building a vehicle costs this one solve.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import casadi as ca
import numpy as np

from agents._common import NLPSpec, hull_rows, joint_optimum, smooth_pos, solve_aux
from agents.params import STANDARD_GRAVITY, VehicleParams
from negotiate.core.agent import AgentModel, ReachableSet, SlotParam

__all__ = ["VehicleModel", "build_vehicle", "vehicle_grid"]

_PENALTY_FACTOR = 10.0  # slot penalty / the vehicle's largest marginal cost (see the module docstring)
_SPEED_LEVELS = 12  # intervals of the speed at a mark for the hull of two consecutive durations
_MARGIN = 1e-3  # relative margin of the window's shortest times between marks (see the module docstring)


def vehicle_grid(prm: VehicleParams) -> tuple[np.ndarray, list[tuple[int, int]]]:
    """Node positions ``s`` (m) and, per zone, the node indices of its entry and its exit plus length.

    Between consecutive marks (route ends, zone entries, zone exits plus vehicle length) nodes are spaced
    evenly, the number of stages per piece proportional to its length (at least one).
    """
    L = prm.route_length
    marks = {0.0, L}
    for z in prm.zones:
        marks.add(float(z.entry))
        marks.add(float(z.exit + prm.length))
    ordered = sorted(marks)
    nodes = [0.0]
    for lo, hi in zip(ordered[:-1], ordered[1:], strict=True):
        n = max(1, int(round(prm.stages * (hi - lo) / L)))
        nodes.extend(np.linspace(lo, hi, n + 1)[1:].tolist())
    s = np.array(nodes)
    index = [(int(np.argmin(np.abs(s - z.entry))), int(np.argmin(np.abs(s - (z.exit + prm.length)))))
             for z in prm.zones]
    return s, index


class VehicleModel:
    """The vehicle's discretised problem: expressions, bounds and the auxiliary solves on them.

    Parameters
    ----------
    prm : VehicleParams
        Physical data, route, zones and cost weights (SI units, see :mod:`agents.params`).
    """

    def __init__(self, prm: VehicleParams) -> None:
        self.prm = prm
        self.s, self.zone_nodes = vehicle_grid(prm)
        s = self.s
        N = s.size - 1
        self.n_stages = N
        ds = np.diff(s)
        self.ds = ds
        m = prm.total_mass
        self.roll = prm.rolling_coeff * STANDARD_GRAVITY  # rolling resistance force per mass, m/s^2
        self.aero = prm.air_density * prm.drag_area / m  # aerodynamic force per mass and per e, 1/m

        e = ca.SX.sym("e", N)
        a = ca.SX.sym("a", N)
        tt = ca.SX.sym("t", N)
        self.x = ca.vertcat(e, a, tt)
        e0 = 0.5 * prm.initial_speed**2
        E = [ca.SX(e0)] + [e[i] for i in range(N)]
        v = [ca.sqrt(2 * Ei) for Ei in E]
        dyn = [E[i + 1] - E[i] - ds[i] * (a[i] - self.roll - self.aero * 0.5 * (E[i] + E[i + 1]))
               for i in range(N)]
        dt = [2 * ds[i] / (v[i] + v[i + 1]) for i in range(N)]
        # The clock is a state with one row per stage (sparse), not a running sum of every stage time: the
        # derivatives of a running sum are dense in the stages, which made building long routes quadratic.
        t = [ca.SX(prm.departure)] + [tt[i] for i in range(N)]
        clock = [t[i + 1] - t[i] - dt[i] for i in range(N)]
        self.t_nodes = ca.vertcat(*t)
        self.arrival = t[-1]

        energy = sum(m * ds[i] * smooth_pos(a[i], prm.traction_smoothing) for i in range(N)) / prm.efficiency
        comfort = prm.comfort_weight * sum(((E[i + 1] - E[i]) / ds[i]) ** 2 * dt[i] for i in range(N))
        lateness = prm.arrival_weight * (self.arrival - prm.desired_arrival) ** 2
        self.cost = energy + comfort + lateness
        self.cost_terms = ca.Function("cost_terms", [self.x], [energy, comfort, lateness])
        self.times = ca.Function("times", [self.x], [self.t_nodes])

        # Base constraints: dynamics (== 0) and the arrival deadline.
        self.g_base = ca.vertcat(*dyn, *clock, self.arrival)
        self.lbg_base = np.r_[np.zeros(2 * N), -np.inf]
        self.ubg_base = np.r_[np.zeros(2 * N), prm.latest_arrival]
        self.g_base_names = [f"dynamics[{i}]" for i in range(N)] + [f"clock[{i}]" for i in range(N)] + ["arrival"]

        # Bounds: speed band per node (zone limits on nodes the vehicle occupies the zone), force limits.
        vmax = np.full(N + 1, prm.speed_limit)
        for z in prm.zones:
            if z.speed_limit is not None:
                on = (s >= z.entry - 1e-9) & (s <= z.exit + prm.length + 1e-9)
                vmax[on] = np.minimum(vmax[on], z.speed_limit)
        self.v_max = vmax
        self.lbx = np.r_[np.full(N, 0.5 * prm.min_speed**2), np.full(N, -prm.max_brake), np.full(N, -np.inf)]
        self.ubx = np.r_[0.5 * vmax[1:] ** 2, np.full(N, prm.max_accel), np.full(N, np.inf)]
        span = max(prm.desired_arrival - prm.departure, prm.route_length / prm.speed_limit)
        v_guess = float(np.clip(prm.route_length / span, prm.min_speed, vmax.min()))
        e_guess = 0.5 * v_guess**2
        v0 = np.r_[prm.initial_speed, np.full(N, v_guess)]
        self.x0 = np.r_[np.full(N, e_guess), np.full(N, self.roll + self.aero * e_guess),
                        prm.departure + np.cumsum(2 * ds / (v0[:-1] + v0[1:]))]  # the clock of that guess
        self.x_names = ([f"e[{i + 1}]" for i in range(N)] + [f"a[{i}]" for i in range(N)]
                        + [f"t[{i + 1}]" for i in range(N)])

        # Zone times as functions of x.
        zone_t = []
        for i_en, i_ex in self.zone_nodes:
            zone_t += [self.t_nodes[i_en], self.t_nodes[i_ex]]
        self.zone_times_expr = ca.vertcat(*zone_t)
        self.zone_times = ca.Function("zone_times", [self.x], [self.zone_times_expr])
        self.p_names = []
        for z in prm.zones:
            self.p_names += [f"{z.resource}.enter", f"{z.resource}.leave"]
        # Largest marginal costs, J/s: traction power at the speed limit, the arrival term's slope across the
        # whole window, the comfort term at full acceleration.
        power = m * prm.max_accel * prm.speed_limit / prm.efficiency
        arrival = 2 * prm.arrival_weight * (prm.latest_arrival - prm.departure)
        comfort = prm.comfort_weight * max(prm.max_accel, prm.max_brake) ** 2
        self.slot_penalty = _PENALTY_FACTOR * max(power, arrival, comfort)
        self._cache: dict[str, Any] = {}

    # ----------------------------------------------------------------------------------------------------
    def spec(self) -> NLPSpec:
        """The agent's parametric NLP: base constraints plus the elastic coupling rows (zone times == p).

        The variables are ``x`` followed by the slacks ``late`` and ``early`` (s, one of each per parameter);
        the rows ``zone times - p - late + early == 0`` follow the base rows.
        """
        n_p = len(self.p_names)
        p = ca.SX.sym("p", n_p)
        late = ca.SX.sym("late", n_p)
        early = ca.SX.sym("early", n_p)
        g = ca.vertcat(self.g_base, self.zone_times_expr - p - late + early)
        f = self.cost + self.slot_penalty * (ca.sum1(late) + ca.sum1(early))
        return NLPSpec(
            x=ca.vertcat(self.x, late, early), p=p, f=f, g=g,
            lbx=np.r_[self.lbx, np.zeros(2 * n_p)], ubx=np.r_[self.ubx, np.full(2 * n_p, np.inf)],
            lbg=np.r_[self.lbg_base, np.zeros(n_p)], ubg=np.r_[self.ubg_base, np.zeros(n_p)],
            x0=np.r_[self.x0, np.zeros(2 * n_p)],
            x_names=list(self.x_names) + [f"late[{q}]" for q in self.p_names] + [f"early[{q}]" for q in self.p_names],
            g_names=self.g_base_names + list(self.p_names), p_names=list(self.p_names),
        )

    def slack(self, result: Any) -> np.ndarray:
        """By how much a solve's own zone times miss its parameters, ``late - early`` per parameter (s)."""
        x = np.asarray(result.x, dtype=float).ravel()
        n_p, n = len(self.p_names), self.x.numel()
        return x[n: n + n_p] - x[n + n_p: n + 2 * n_p]

    def solve_free(self) -> Any:
        """The vehicle alone: minimise the cost with no coupling rows (plain IPOPT)."""
        return solve_aux("free", self._cache, self.x, self.cost, self.g_base, self.lbx, self.ubx,
                         self.lbg_base, self.ubg_base, self.x0)

    def fastest_arrival(self) -> float:
        """Earliest possible arrival time at the route end, in s (auxiliary solve)."""
        obj = self.arrival + 1e-4 * ca.sumsqr(self.x[self.n_stages: 2 * self.n_stages])
        res = solve_aux("fastest", self._cache, self.x, obj, self.g_base, self.lbx, self.ubx, self.lbg_base,
                        self.ubg_base, self.x0)
        if not res.success:
            raise RuntimeError(f"vehicle: fastest-traversal solve failed ({res.status})")
        return float(self.times(res.x)[-1])

    # ----------------------------------------------------------------------------------------------------
    def energy_bounds(self, pin: tuple[int, float, float] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Bounds ``lo <= e <= hi`` on the kinetic energy per mass at every node over every feasible trajectory
        (J/kg); with ``pin = (node, e_low, e_high)`` over those whose energy at ``node`` lies in that interval.

        ``hi`` by a forward pass at full drive force without drag and a backward pass at full braking with the
        largest drag, both under the speed limits; ``lo`` by a forward pass at full braking and a backward pass
        at full drive force, both above ``min_speed``. The trapezoidal dynamics change ``e`` over a stage by at
        most these amounts, so every feasible ``e`` lies between the two, node by node (two passes suffice:
        the backward pass cannot break what the forward pass established). Where ``lo > hi`` somewhere, no
        trajectory exists (with that pin).
        """
        prm, ds = self.prm, self.ds
        N = self.n_stages
        e0 = 0.5 * prm.initial_speed**2
        hi = np.r_[e0, 0.5 * self.v_max[1:] ** 2]
        lo = np.r_[e0, np.full(N, 0.5 * prm.min_speed**2)]
        drive = max(prm.max_accel - self.roll, 0.0)  # largest gain of e per metre, m/s^2
        brake = prm.max_brake + self.roll + self.aero * float(hi.max())  # largest loss of e per metre
        if pin is not None:
            node, e_low, e_high = pin
            hi[node], lo[node] = min(hi[node], e_high), max(lo[node], e_low)
        for i in range(1, N + 1):
            hi[i] = min(hi[i], hi[i - 1] + drive * ds[i - 1])
            lo[i] = max(lo[i], lo[i - 1] - brake * ds[i - 1])
        for i in range(N - 1, -1, -1):
            hi[i] = min(hi[i], hi[i + 1] + brake * ds[i])
            lo[i] = max(lo[i], lo[i + 1] - drive * ds[i])
        return lo, hi

    def stage_times(self, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Shortest and longest time of each stage (s) for node energies within ``[lo, hi]``: the stage time
        ``2 ds / (v_i + v_{i+1})`` at the highest and at the lowest speeds."""
        v_hi, v_lo = np.sqrt(2 * hi), np.sqrt(2 * np.minimum(lo, hi))
        return 2 * self.ds / (v_hi[:-1] + v_hi[1:]), 2 * self.ds / (v_lo[:-1] + v_lo[1:])

    def window(self, margin: float = _MARGIN) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Box ``lower <= p <= upper`` and rows ``A p <= b`` containing every reachable zone time (s).

        From :meth:`energy_bounds` and :meth:`stage_times`: the earliest and latest time at each zone node
        (the latest also leaves the quickest rest of the route before ``latest_arrival``); for consecutive
        marks along the route (entries and exits in route order) the quickest and slowest time between them,
        the quickest raised by the relative ``margin``; and for two consecutive such durations the convex
        hull of the pairs they can take together. That hull is the union over the speed at the mark between
        them: for each of ``_SPEED_LEVELS`` intervals of that speed, the energy bounds pinned to the interval
        give a rectangle of the two durations, and the hull of all rectangles holds every reachable pair. It
        keeps what a box of durations loses: over a few metres the speed hardly changes, so a vehicle that is
        slow through one zone is slow through the next. At the quickest time between two marks every speed
        between them can be at its limit, where the coupling rows and the speed bounds are linearly dependent
        (LICQ fails, the value has a kink); the margin keeps proposals off that edge. With ``margin = 0`` the
        set is a true outer bound.
        """
        prm = self.prm
        lo, hi = self.energy_bounds()
        quick, slow = self.stage_times(lo, hi)
        t_early = prm.departure + np.r_[0.0, np.cumsum(quick)]
        t_late = np.minimum(prm.departure + np.r_[0.0, np.cumsum(slow)],
                            prm.latest_arrival - np.r_[np.cumsum(quick[::-1])[::-1], 0.0])
        nodes = np.array([i for pair in self.zone_nodes for i in pair])
        lower, upper = t_early[nodes], t_late[nodes]
        order = np.argsort(nodes, kind="stable")
        rows: list[np.ndarray] = []
        rhs: list[float] = []

        def duration_row(a: int, b: int) -> np.ndarray:  # t_b - t_a as a row on p
            row = np.zeros(nodes.size)
            row[b], row[a] = 1.0, -1.0
            return row

        for a, b in zip(order[:-1], order[1:], strict=True):
            row = duration_row(a, b)
            rows += [-row, row]
            rhs += [-(1 + margin) * float(quick[nodes[a]: nodes[b]].sum()), float(slow[nodes[a]: nodes[b]].sum())]
        for a, b, c in zip(order[:-2], order[1:-1], order[2:], strict=True):
            first, second = slice(nodes[a], nodes[b]), slice(nodes[b], nodes[c])
            levels = np.linspace(lo[nodes[b]], hi[nodes[b]], _SPEED_LEVELS + 1)
            pts = []
            for e_low, e_high in zip(levels[:-1], levels[1:], strict=True):
                lo_k, hi_k = self.energy_bounds((int(nodes[b]), float(e_low), float(e_high)))
                if np.any(lo_k > hi_k * (1 + 1e-12)):
                    continue  # no trajectory has its speed at the middle mark in this interval
                q, s = self.stage_times(lo_k, hi_k)
                for d1 in (q[first].sum(), s[first].sum()):
                    for d2 in (q[second].sum(), s[second].sum()):
                        pts.append((d1, d2))
            if len(pts) < 3 or np.ptp(np.array(pts), axis=0).min() <= 0:
                continue  # a degenerate pair (a duration of zero length): the duration rows above suffice
            A2, b2 = hull_rows(np.array(pts))
            for (w1, w2), bi in zip(A2, b2, strict=True):
                rows.append(w1 * duration_row(a, b) + w2 * duration_row(b, c))
                rhs.append(float(bi))
        A = np.array(rows).reshape(len(rows), nodes.size)
        return lower, upper, A, np.array(rhs)

    def trajectory(self, result: Any) -> Mapping[str, np.ndarray]:
        """Node time series of a solve: time, position, speed, force (zero-order hold per stage), energy."""
        N = self.n_stages
        x = np.asarray(result.x, dtype=float).ravel()[: 3 * N]  # without the slot slacks
        e = np.r_[0.5 * self.prm.initial_speed**2, x[:N]]
        a = x[N: 2 * N]
        force = self.prm.total_mass * np.r_[a, a[-1]]
        return {
            "time_s": np.asarray(self.times(x)).ravel(),
            "position_m": self.s.copy(),
            "speed_m_per_s": np.sqrt(2 * e),
            "force_N": force,
        }


def build_vehicle(name: str, prm: VehicleParams | None = None, weight: float = 1.0,
                  solver_options: dict[str, Any] | None = None) -> AgentModel:
    """Build a vehicle agent.

    Parameters
    ----------
    name : str
        Agent name, unique in the fleet.
    prm : VehicleParams, optional
        Vehicle, route and zone data (SI units); the invented demo defaults when omitted.
    weight : float
        Weight of the agent's cost in the fleet total (dimensionless, > 0).
    solver_options : dict, optional
        Passed to :class:`~negotiate.core.nlp.ParametricNLP`.

    Returns
    -------
    negotiate.core.agent.AgentModel
        Parameters ``(<zone>.enter, <zone>.leave)`` per zone in s, elastic slots, the kinematic window as
        its reachable set and the free optimum described in the module docstring.
    """
    prm = VehicleParams() if prm is None else prm
    model = VehicleModel(prm)
    free = model.solve_free()
    if not free.success:
        raise RuntimeError(f"vehicle {name!r}: the unconstrained trip does not solve ({free.status})")
    p_free = np.asarray(model.zone_times(free.x)).ravel()
    lower, upper, A, b = model.window()
    spec = model.spec()
    if np.any(A @ p_free > b):
        # The vehicle alone crosses a zone as fast as it may (its speed limit binds all through it): the free
        # optimum is the minimiser of the value over the window, one joint solve over trajectory and times.
        joint = joint_optimum(spec, A, b, p_free, np.r_[free.x, np.zeros(2 * p_free.size)])
        if not joint.success:
            raise RuntimeError(f"vehicle {name!r}: free-optimum solve over the window failed ({joint.status})")
        p_free = joint.x[spec.x.numel():]
    # the joint solve meets the rows to solver accuracy (~1e-9 s): the window takes that rounding in
    lower, upper, b = np.minimum(lower, p_free), np.maximum(upper, p_free), np.maximum(b, A @ p_free)
    params = []
    for z in prm.zones:
        params += [SlotParam(f"{z.resource}.enter", z.resource, "enter"),
                   SlotParam(f"{z.resource}.leave", z.resource, "leave")]
    return AgentModel(
        name=name, problem=spec.to_problem(solver_options), params=tuple(params),
        reachable=ReachableSet(lower, upper, A, b), free_optimum=p_free, weight=weight,
        trajectory=model.trajectory, model="vehicle", slack=model.slack,
    )
