"""One agent's slot problem, solved and certified: value, value gradient (slot prices) and KKT certificate.

Invented demo (quarry-bridge flavour): a haul truck drives 300 m; its position is sampled every 2 s; it
must be at the bridge entry (100 m) no earlier than the slot's entry time and leave the bridge end (200 m)
no later than the slot's exit time. Its cost is traction effort plus lateness against a wanted arrival.
The shared parameters are p = (enter, leave) in s. Run:  python examples/single_agent.py
"""

from __future__ import annotations

import casadi as ca
import numpy as np

from negotiate import ParametricNLP

STEPS, DT, LENGTH = 30, 2.0, 300.0  # samples, s, m
ENTRY, EXIT = 100.0, 200.0  # bridge entry and exit positions, m
V_MAX, A_MAX, ARRIVE = 12.0, 1.0, 45.0  # m/s, m/s^2, wanted arrival s


def build() -> ParametricNLP:
    """Double-integrator truck with a continuous 'time at position' read-out, in Opti form."""
    opti = ca.Opti()
    s = opti.variable(STEPS + 1)  # position, m
    v = opti.variable(STEPS + 1)  # speed, m/s
    a = opti.variable(STEPS)  # acceleration, m/s^2
    t_in = opti.variable()  # time the truck reaches the bridge entry, s
    t_out = opti.variable()  # time it reaches the bridge exit, s
    t_end = opti.variable()  # arrival time at 300 m, s
    enter, leave = opti.parameter(), opti.parameter()  # the slot, s
    opti.subject_to([s[0] == 0, v[0] == 0])
    for k in range(STEPS):
        opti.subject_to(s[k + 1] == s[k] + DT * v[k] + 0.5 * DT**2 * a[k])
        opti.subject_to(v[k + 1] == v[k] + DT * a[k])
    opti.subject_to(opti.bounded(0, v[1:], V_MAX))  # v[0] is fixed above: bounding it too would break LICQ
    opti.subject_to(opti.bounded(-A_MAX, a, A_MAX))

    # Time at a position by smooth interpolation of the sampled path: sum of sigmoids of (s_k - position).
    def time_at(pos: float) -> ca.MX:
        return DT * ca.sum1(1 / (1 + ca.exp((s - pos) / 2.0)))

    opti.subject_to(t_in == time_at(ENTRY))
    opti.subject_to(t_out == time_at(EXIT))
    opti.subject_to(t_end == time_at(LENGTH - 1.0))
    opti.subject_to(t_in >= enter)
    opti.subject_to(t_out <= leave)
    opti.minimize(ca.sumsqr(a) + 0.05 * (t_end - ARRIVE) ** 2)
    opti.set_initial(s, np.linspace(0, LENGTH, STEPS + 1))
    opti.set_initial(v, LENGTH / (STEPS * DT))
    return ParametricNLP.from_opti(opti, p_names=["bridge.enter", "bridge.leave"], name="truck")


def main() -> None:
    prob = build()
    p = np.array([20.0, 30.0])  # slot: enter no earlier than 20 s, leave no later than 30 s
    res = prob.solve(p)
    print(f"problem: {prob}")
    print(f"status: {res.status} ({res.message}), {res.iterations} iterations, {1e3 * res.solve_time:.1f} ms")
    if not res.success:
        print("no certified solution, so no gradient is reported")
        return
    print(f"V(p) = {res.value:.6f}")
    for name, d in zip(prob.p_names, res.gradient, strict=True):
        print(f"dV/d{name} = {d:+.6f} per s")
    cert = res.certificate
    print(f"certificate: {cert.summary()}")
    # Check the gradient against a central finite difference (h = 1e-3 s), as a user would. The problem is
    # not convex (the time read-out is a sum of sigmoids), so the neighbouring solves are warm-started from
    # this solution to stay on the same local minimum; cold starts may land on another one.
    h = 1e-3
    fd = [(prob.solve(p + h * e, warm=res).value - prob.solve(p - h * e, warm=res).value) / (2 * h) for e in np.eye(2)]
    print(f"central differences: {np.round(fd, 6).tolist()}")
    sens = res.sensitivity()
    if sens.available:
        print(f"value Hessian (per s^2):\n{np.round(sens.value_hessian, 6)}")
    else:
        print(f"sensitivities not available: {sens.reason}")


if __name__ == "__main__":
    main()
