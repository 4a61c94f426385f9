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
for constant acceleration. Speeds stay within ``[min_speed, speed_limit]`` with ``min_speed > 0``, so every
stage time is finite (the vehicle never stands still on the route). The cost, in J, is

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

Reachable set. For each zone the builder solves auxiliary problems ``min d . (t(entry), t(exit))`` over
directions ``d`` around the circle (without any coupling, with the arrival deadline): their solutions are
points on the boundary of the set of reachable (enter, leave) pairs (earliest entry, latest entry, shortest
and longest dwell, ...). The convex hull of those points, shrunk by a small margin towards the vehicle's own
preferred times, gives rows ``A p <= b``; for several zones, rows ``enter_{k+1} - leave_k`` within its
smallest and largest value follow from two more auxiliary solves. Every vertex of the resulting polytope is
then solved; if one fails, the polytope is shrunk further towards the preferred times. The set is an inner
approximation in the sense that all its vertices are verified (and the reachable pairs are nearly convex).

Free optimum. The vehicle alone (no coupling rows) chooses its trajectory; its times at the zone nodes are
the free optimum. At that ``p`` the coupling equalities have zero multipliers and the NLP's solution is the
same, so the certificate there is that of the unconstrained problem (strict second-order sufficiency from the
convex comfort and arrival terms). If those times fell outside the verified polytope, the free optimum is the
minimiser of the value over it, found by one joint solve over trajectory and parameters. That happens when
the preferred times lie on the boundary of the reachable pairs, e.g. when a zone speed limit binds all
through the zone so that the dwell is as short as it can be: there LICQ fails (every speed in the zone is at
its bound and the dwell is fixed), and the minimiser over the shrunk polytope keeps the margin from that
boundary, where the certificate is strict again.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import casadi as ca
import numpy as np

from agents._common import (
    NLPSpec,
    chebyshev_center,
    hull_rows,
    joint_optimum,
    polytope_vertices,
    shrink_rows,
    smooth_pos,
    solve_aux,
)
from agents.params import STANDARD_GRAVITY, VehicleParams
from negotiate.core.agent import AgentModel, ReachableSet, SlotParam

__all__ = ["VehicleModel", "build_vehicle", "vehicle_grid"]

_DIRECTIONS = 12  # support directions per zone for the reachable set
_MARGIN = 0.03  # relative shrink of the reachable polytope towards the preferred times


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
        self.x = ca.vertcat(e, a)
        e0 = 0.5 * prm.initial_speed**2
        E = [ca.SX(e0)] + [e[i] for i in range(N)]
        v = [ca.sqrt(2 * Ei) for Ei in E]
        dyn = [E[i + 1] - E[i] - ds[i] * (a[i] - self.roll - self.aero * 0.5 * (E[i] + E[i + 1]))
               for i in range(N)]
        dt = [2 * ds[i] / (v[i] + v[i + 1]) for i in range(N)]
        t = [ca.SX(prm.departure)]
        for i in range(N):
            t.append(t[-1] + dt[i])
        self.t_nodes = ca.vertcat(*t)
        self.arrival = t[-1]

        energy = sum(m * ds[i] * smooth_pos(a[i], prm.traction_smoothing) for i in range(N)) / prm.efficiency
        comfort = prm.comfort_weight * sum(((E[i + 1] - E[i]) / ds[i]) ** 2 * dt[i] for i in range(N))
        lateness = prm.arrival_weight * (self.arrival - prm.desired_arrival) ** 2
        self.cost = energy + comfort + lateness
        self.cost_terms = ca.Function("cost_terms", [self.x], [energy, comfort, lateness])
        self.times = ca.Function("times", [self.x], [self.t_nodes])

        # Base constraints: dynamics (== 0) and the arrival deadline.
        self.g_base = ca.vertcat(*dyn, self.arrival)
        self.lbg_base = np.r_[np.zeros(N), -np.inf]
        self.ubg_base = np.r_[np.zeros(N), prm.latest_arrival]
        self.g_base_names = [f"dynamics[{i}]" for i in range(N)] + ["arrival"]

        # Bounds: speed band per node (zone limits on nodes the vehicle occupies the zone), force limits.
        vmax = np.full(N + 1, prm.speed_limit)
        for z in prm.zones:
            if z.speed_limit is not None:
                on = (s >= z.entry - 1e-9) & (s <= z.exit + prm.length + 1e-9)
                vmax[on] = np.minimum(vmax[on], z.speed_limit)
        self.v_max = vmax
        self.lbx = np.r_[np.full(N, 0.5 * prm.min_speed**2), np.full(N, -prm.max_brake)]
        self.ubx = np.r_[0.5 * vmax[1:] ** 2, np.full(N, prm.max_accel)]
        span = max(prm.desired_arrival - prm.departure, prm.route_length / prm.speed_limit)
        v_guess = float(np.clip(prm.route_length / span, prm.min_speed, vmax.min()))
        e_guess = 0.5 * v_guess**2
        self.x0 = np.r_[np.full(N, e_guess), np.full(N, self.roll + self.aero * e_guess)]
        self.x_names = [f"e[{i + 1}]" for i in range(N)] + [f"a[{i}]" for i in range(N)]

        # Zone times as functions of x.
        zone_t = []
        for i_en, i_ex in self.zone_nodes:
            zone_t += [self.t_nodes[i_en], self.t_nodes[i_ex]]
        self.zone_times_expr = ca.vertcat(*zone_t)
        self.zone_times = ca.Function("zone_times", [self.x], [self.zone_times_expr])
        self.p_names = []
        for z in prm.zones:
            self.p_names += [f"{z.resource}.enter", f"{z.resource}.leave"]
        self._cache: dict[str, Any] = {}

    # ----------------------------------------------------------------------------------------------------
    def spec(self) -> NLPSpec:
        """The agent's parametric NLP: base constraints plus the coupling equalities (zone times == p)."""
        n_p = len(self.p_names)
        p = ca.SX.sym("p", n_p)
        g = ca.vertcat(self.g_base, self.zone_times_expr - p)
        return NLPSpec(
            x=self.x, p=p, f=self.cost, g=g, lbx=self.lbx, ubx=self.ubx,
            lbg=np.r_[self.lbg_base, np.zeros(n_p)], ubg=np.r_[self.ubg_base, np.zeros(n_p)],
            x0=self.x0, x_names=list(self.x_names), g_names=self.g_base_names + list(self.p_names),
            p_names=list(self.p_names),
        )

    def solve_free(self) -> Any:
        """The vehicle alone: minimise the cost with no coupling rows (plain IPOPT)."""
        return solve_aux("free", self._cache, self.x, self.cost, self.g_base, self.lbx, self.ubx,
                         self.lbg_base, self.ubg_base, self.x0)

    def solve_linear(self, weights: np.ndarray) -> Any:
        """Minimise ``weights . (zone times)`` (s) under the vehicle's constraints, without coupling.

        One solver serves every direction (the weights are its parameter); a small regulariser on the force
        makes the solution unique.
        """
        if "linear" not in self._cache:
            d = ca.SX.sym("d", self.zone_times_expr.numel())
            obj = ca.dot(d, self.zone_times_expr) + 1e-4 * ca.sumsqr(self.x[self.n_stages:])
            self._cache["linear"] = (d, obj)
        d, obj = self._cache["linear"]
        return solve_aux("linear_solver", self._cache, self.x, obj, self.g_base, self.lbx, self.ubx,
                         self.lbg_base, self.ubg_base, self.x0, p=d, p_val=np.asarray(weights, dtype=float))

    def fastest_arrival(self) -> float:
        """Earliest possible arrival time at the route end, in s (auxiliary solve)."""
        obj = self.arrival + 1e-4 * ca.sumsqr(self.x[self.n_stages:])
        res = solve_aux("fastest", self._cache, self.x, obj, self.g_base, self.lbx, self.ubx, self.lbg_base,
                        self.ubg_base, self.x0)
        if not res.success:
            raise RuntimeError(f"vehicle: fastest-traversal solve failed ({res.status})")
        return float(self.times(res.x)[-1])

    # ----------------------------------------------------------------------------------------------------
    def reachable(self, center: np.ndarray, spec: NLPSpec,
                  x_start: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Rows ``A p <= b`` of a verified inner approximation of the reachable zone times (see module doc).

        ``center`` are the preferred zone times (s), ``x_start`` an initial guess for the vertex solves.
        """
        Z = len(self.zone_nodes)
        n_p = 2 * Z
        rows: list[np.ndarray] = []
        rhs: list[float] = []
        angles = 2 * np.pi * (np.arange(_DIRECTIONS) + 0.5) / _DIRECTIONS
        for k in range(Z):
            pts = []
            for th in angles:
                d = np.zeros(n_p)
                d[2 * k: 2 * k + 2] = np.cos(th), np.sin(th)
                res = self.solve_linear(d)
                if res.success:
                    zt = np.asarray(self.zone_times(res.x)).ravel()
                    pts.append(zt[2 * k: 2 * k + 2])
            if len(pts) < 3:
                raise RuntimeError(f"vehicle: support solves for zone {self.p_names[2 * k]!r} failed")
            A2, b2 = hull_rows(np.array(pts))
            for row, bi in zip(A2, b2, strict=True):
                full = np.zeros(n_p)
                full[2 * k: 2 * k + 2] = row
                rows.append(full)
                rhs.append(bi)
        for k in range(Z - 1):
            full = np.zeros(n_p)
            full[2 * k + 2], full[2 * k + 1] = 1.0, -1.0  # gap enter_{k+1} - leave_k
            for sign in (1.0, -1.0):
                res = self.solve_linear(sign * full)
                if not res.success:
                    raise RuntimeError(f"vehicle: gap solve between zones {k} and {k + 1} failed")
                zt = np.asarray(self.zone_times(res.x)).ravel()
                value = zt[2 * k + 2] - zt[2 * k + 1]
                # value is the extreme of gap; row  -sign*gap <= -sign*value
                rows.append(-sign * full)
                rhs.append(-sign * value)
        A = np.array(rows)
        b = np.array(rhs)
        # Shrink towards the preferred times when they lie inside the hull (then they stay inside), else
        # towards the hull's Chebyshev centre.
        anchor = center if bool(np.all(A @ center < b)) else chebyshev_center(A, b)[0]
        factor = 1.0 - _MARGIN
        for _ in range(6):
            bs = shrink_rows(A, b, anchor, factor)
            verts = polytope_vertices(A, bs, chebyshev_center(A, bs)[0])
            if all(spec.solve_plain(v, x_start).success for v in verts):
                return A, bs
            factor *= 0.7
        raise RuntimeError("vehicle: could not verify a reachable polytope for the zone times")

    def trajectory(self, result: Any) -> Mapping[str, np.ndarray]:
        """Node time series of a solve: time, position, speed, force (zero-order hold per stage), energy."""
        x = np.asarray(result.x, dtype=float).ravel()
        N = self.n_stages
        e = np.r_[0.5 * self.prm.initial_speed**2, x[:N]]
        a = x[N:]
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
        Parameters ``(<zone>.enter, <zone>.leave)`` per zone in s, the verified reachable polytope and the
        free optimum described in the module docstring.
    """
    prm = VehicleParams() if prm is None else prm
    model = VehicleModel(prm)
    spec = model.spec()
    free = model.solve_free()
    if not free.success:
        raise RuntimeError(f"vehicle {name!r}: the unconstrained trip does not solve ({free.status})")
    center = np.asarray(model.zone_times(free.x)).ravel()
    A, b = model.reachable(center, spec)
    verts = polytope_vertices(A, b, chebyshev_center(A, b)[0])
    lower, upper = verts.min(axis=0), verts.max(axis=0)
    if np.all(A @ center <= b):
        p_free = center
    else:
        joint = joint_optimum(spec, A, b, center, free.x)
        if not joint.success:
            raise RuntimeError(f"vehicle {name!r}: free-optimum solve over the reachable set failed "
                               f"({joint.status})")
        # The joint solve meets the rows to solver accuracy; step a hair towards the centre so that the
        # free optimum lies in the reported set exactly.
        mid = chebyshev_center(A, b)[0]
        p_free = np.clip(mid + (1 - 1e-7) * (joint.x[spec.x.numel():] - mid), lower, upper)
    params = []
    for z in prm.zones:
        params += [SlotParam(f"{z.resource}.enter", z.resource, "enter"),
                   SlotParam(f"{z.resource}.leave", z.resource, "leave")]
    return AgentModel(
        name=name, problem=spec.to_problem(solver_options), params=tuple(params),
        reachable=ReachableSet(lower, upper, A, b), free_optimum=p_free, weight=weight,
        trajectory=model.trajectory, model="vehicle",
    )

