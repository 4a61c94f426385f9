"""The nonsmooth guard: when an agent's gradient is not unique, gather its one-sided gradients.

An agent's value gradient ``partial_p L`` is the unique gradient of ``V_i`` only at a regular KKT point
without weakly active constraints. The guard flags an agent when its certificate

* reports weakly active constraints (active with zero multiplier), or
* fails LICQ (the multipliers, hence ``partial_p L``, are not unique), or
* is nonsmooth for another reason (a flat solution set along which dV/dp changes), or
* has a different strictly active set than at the agent's previous solve (a kink may lie in between; where
  the certificate is otherwise smooth, this only flags: no probe at this point can see a kink elsewhere).

For a flagged agent it re-solves at the same parameters with each suspect constraint *held active* (an
equality at its bound) and *released* (that bound removed); each converged re-solve gives a one-sided
gradient ``partial_p L`` of one smooth piece of ``V_i``. Together with the plain gradient they span (an
approximation of) the generalised gradient of ``V_i`` at that point; a bundle method takes each as a cut,
the gradient method takes a subgradient step on the local model they define.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from negotiate.core.kkt import ConstraintRef
from negotiate.core.nlp import LocalResult, ParametricNLP, try_solve

__all__ = ["GuardReport", "guard"]

MAX_PROBED_ROWS = 3
"""At most this many suspect constraints are probed per agent and round (two re-solves each)."""


@dataclass(frozen=True)
class GuardReport:
    """Why an agent was flagged and what the probes gave."""

    reason: str
    probed: tuple[str, ...]
    gradients: tuple[np.ndarray, ...]
    solves: int


def _strict_names(result: LocalResult | None) -> set[str]:
    if result is None or result.certificate is None:
        return set()
    return {str(r) for r in result.certificate.strictly_active}


def flag_reason(result: LocalResult, previous: LocalResult | None) -> tuple[str, list[ConstraintRef]]:
    """Why the gradient of ``result`` may not be unique (empty string if it is) and the rows to probe."""
    cert = result.certificate
    if cert is None:
        return "", []
    rows: list[ConstraintRef] = []
    reasons = []
    if cert.weakly_active:
        reasons.append("weakly active " + ", ".join(str(r) for r in cert.weakly_active))
        rows.extend(cert.weakly_active)
    if not cert.licq:
        reasons.append("LICQ fails on " + ", ".join(str(r) for r in cert.dependent))
        rows.extend(r for r in cert.dependent if r not in rows)
    if cert.verdict == "nonsmooth" and not reasons:
        reasons.append(cert.reason)
    if previous is not None and previous.certificate is not None:
        now, before = _strict_names(result), _strict_names(previous)
        changed = now ^ before
        if changed:
            reasons.append("active set changed (" + ", ".join(sorted(changed)) + ")")
            if cert.verdict != "smooth":
                # At a smooth point a changed row is strictly active with a unique multiplier: holding it
                # returns the same solution and releasing it another one, so no probe can give a second
                # one-sided gradient here (the kink lies between the two points). Flag, but do not probe.
                rows.extend(
                    r for r in cert.strictly_active if str(r) in changed and r not in rows and r.side != "equal"
                )
    return "; ".join(reasons), rows[:MAX_PROBED_ROWS]


def guard(problem: ParametricNLP, result: LocalResult, previous: LocalResult | None) -> GuardReport | None:
    """Probe a flagged agent; ``None`` when its gradient is unique (or the solve did not converge)."""
    if not result.success:
        return None
    reason, rows = flag_reason(result, previous)
    if not reason:
        return None
    grads: list[np.ndarray] = []
    solves = 0
    for ref in rows:
        for kw in ({"hold": [ref]}, {"release": [ref]}):
            r = try_solve(problem, result.p, warm=result, **kw)  # a probe that raises gives no gradient
            solves += 1
            # A piece's gradient only counts if its value matches (the re-solve found the same point).
            if (
                r.success
                and r.gradient is not None
                and abs(r.value - result.value) <= 1e-6 * max(1.0, abs(result.value))
            ):
                grads.append(r.gradient)
    assert result.gradient is not None
    unique: list[np.ndarray] = []
    for g in grads:
        if all(not _same(g, u) for u in [result.gradient, *unique]):
            unique.append(g)
    return GuardReport(reason, tuple(str(r) for r in rows), tuple(unique), solves)


def _same(a: np.ndarray, b: np.ndarray) -> bool:
    return bool(np.max(np.abs(a - b), initial=0.0) <= 1e-9 * max(1.0, float(np.max(np.abs(b), initial=0.0))))
