"""Small hand-made agents and fleets for coordinator tests (invented numbers, closed forms derived by hand)."""

from __future__ import annotations

import casadi as ca
import numpy as np

from negotiate import AgentModel, ParametricNLP, ReachableSet, SlotParam


def quadratic_share_agent(name: str, target: float, curvature: float, upper: float = 10.0) -> AgentModel:
    """An agent drawing x <= share with cost curvature * (x - target)^2: V(share) = curvature * (share - target)^2
    for share < target, 0 above (a C^1 value function)."""
    x, p = ca.SX.sym("x"), ca.SX.sym("p")
    prob = ParametricNLP(
        {"x": x, "p": p, "f": curvature * (x - target) ** 2, "g": x - p}, ubg=0, g_names=["draw <= share"], name=name
    )
    return AgentModel(
        name, prob, (SlotParam("grid.share[0]", "grid", "share", "W", 0),), ReachableSet([0.0], [upper]), [target + 0.5]
    )


def slot_agent(
    name: str, want_enter: float, duration: float, stiffness: float, resources: list[str], earliest: float | None = None
) -> AgentModel:
    """An agent with a slot on each resource in ``resources`` (in that order): it wants to enter the first at
    ``want_enter``, stays ``duration`` s on each and moves on at once; cost stiffness * sum (enter - wanted)^2.

    Decision variables are the entry times it plans (x), tied to the offered slots by equalities, so
    V(p) = stiffness * sum_k (enter_k - want_k)^2 + (dwell terms): smooth, with known gradient. ``earliest``
    (default: 100 s before the wish) is the earliest entry its reachable set allows."""
    k = len(resources)
    x = ca.SX.sym("x", 2 * k)
    p = ca.SX.sym("p", 2 * k)
    f = 0
    g = [x - p]
    for j in range(k):
        want = want_enter + j * duration
        f += stiffness * (x[2 * j] - want) ** 2 + 0.1 * stiffness * (x[2 * j + 1] - x[2 * j] - duration) ** 2
    prob = ParametricNLP({"x": x, "p": p, "f": f, "g": ca.vertcat(*g)}, lbg=0, ubg=0, name=name)
    params = []
    for r in resources:
        params += [SlotParam(f"{r}.enter", r, "enter"), SlotParam(f"{r}.leave", r, "leave")]
    lower = np.full(2 * k, want_enter - 100.0 if earliest is None else earliest)
    upper = np.full(2 * k, want_enter + 200.0)
    rows, b = [], []
    for j in range(k):  # dwell at least the duration; next slot after this one
        r = np.zeros(2 * k)
        r[2 * j], r[2 * j + 1] = 1.0, -1.0
        rows.append(r)
        b.append(-duration)
        if j + 1 < k:
            r = np.zeros(2 * k)
            r[2 * j + 1], r[2 * j + 2] = 1.0, -1.0
            rows.append(r)
            b.append(0.0)
    free = np.ravel([[want_enter + j * duration, want_enter + (j + 1) * duration] for j in range(k)])
    return AgentModel(name, prob, tuple(params), ReachableSet(lower, upper, np.array(rows), np.array(b)), free)


# INVENTED small fleets (every number made up, physically plausible; SI units) that run in a second or two.
TWO_TRUCKS = """
[fleet]
name = "two-trucks"

[resources.bridge]
kind = "exclusive"
gap = 6.0

[defaults.vehicle]
route_length = 1200.0
stages = 12
speed_limit = 13.0
initial_speed = 6.0
latest_arrival = 600.0

[agents.truck-a]
model = "vehicle"
departure = 0.0
desired_arrival = 140.0
[[agents.truck-a.zones]]
resource = "bridge"
entry = 600.0
exit = 660.0
speed_limit = 6.0

[agents.truck-b]
model = "vehicle"
departure = 5.0
desired_arrival = 145.0
[[agents.truck-b.zones]]
resource = "bridge"
entry = 500.0
exit = 560.0
speed_limit = 6.0
"""

ONE_TRACTOR = """
[fleet]
name = "one-tractor"

[resources.grid]
kind = "capacity"
limits = [200e3, 150e3]
block_length = 900.0

[agents.tractor-1]
model = "capacity"
resource = "grid"
tariff = [1.0, 1.4]
battery_capacity = 3.6e8
initial_soc = 0.3
target_soc = 0.6
"""


def buffered_slot_agent(name: str, want_enter: float, duration: float, stiffness: float, resource: str) -> AgentModel:
    """A one-slot agent that also plans a time ``y`` (s) it would like to be ready, pulled towards both its
    wish and the slot's entry but never more than 2 s after the wish; cost (J)

        stiffness * ((enter - want)^2 + 4 (y - enter)^2 + (y - want)^2 + 0.1 (leave - enter - duration)^2),

    ``want - 50 <= y <= want + 2``. With ``enter = p_0`` and ``leave = p_1`` (equalities), ``y = (4 enter + want) / 5``
    while that is at most ``want + 2``, i.e. ``enter <= want + 2.5``, and ``y = want + 2`` beyond: V is
    piecewise quadratic, C^1 (the bound's multiplier is zero where it starts to bind) and smooth on either
    side, with d2V/d enter2 = 2 stiffness (1 + 4/5) before and 2 stiffness (1 + 4) after. A delay past 2.5 s
    changes the agent's strictly active set without any kink at the points it is solved at."""
    x = ca.SX.sym("x", 3)  # enter, leave, y
    p = ca.SX.sym("p", 2)
    f = stiffness * (
        (x[0] - want_enter) ** 2 + 4 * (x[2] - x[0]) ** 2 + (x[2] - want_enter) ** 2
        + 0.1 * (x[1] - x[0] - duration) ** 2
    )  # fmt: skip
    prob = ParametricNLP(
        {"x": x, "p": p, "f": f, "g": x[:2] - p}, lbg=0, ubg=0,
        lbx=[-ca.inf, -ca.inf, want_enter - 50.0], ubx=[ca.inf, ca.inf, want_enter + 2.0], name=name,
    )  # fmt: skip
    params = (SlotParam(f"{resource}.enter", resource, "enter"), SlotParam(f"{resource}.leave", resource, "leave"))
    reach = ReachableSet(
        np.full(2, want_enter - 100.0), np.full(2, want_enter + 200.0), np.array([[1.0, -1.0]]), np.array([-duration])
    )
    return AgentModel(name, prob, params, reach, [want_enter, want_enter + duration])
