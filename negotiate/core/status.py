"""Solve statuses: one small enum for every outcome, and one table mapping the solver's raw words to it.

A numerical failure is a status in a result, never an exception. The raw status string of the solver is
always kept beside the mapped status (``LocalResult.message``) so nothing is lost in translation.
"""

from __future__ import annotations

from enum import StrEnum

__all__ = ["IPOPT_STATUS", "SOLUTION_PRESENT", "CoordinationStatus", "Status", "from_ipopt"]


class Status(StrEnum):
    """Outcome of one agent solve."""

    CONVERGED = "converged"
    """The solver met its tolerance and our own KKT re-check passed."""
    INACCURATE = "inaccurate"
    """A point was found but it is not certified optimal (acceptable level, or our re-check failed)."""
    INFEASIBLE = "infeasible"
    """The solver found the constraints locally infeasible."""
    ITERATION_LIMIT = "iteration-limit"
    TIME_LIMIT = "time-limit"
    UNBOUNDED = "unbounded"
    """The iterates diverged (the cost is probably unbounded below)."""
    FAILED = "failed"
    """Anything else: restoration failure, invalid numbers, evaluation errors, ..."""

    def __str__(self) -> str:
        return self.value


class CoordinationStatus(StrEnum):
    """Why a coordination stopped; :attr:`usable` says whether its schedule may be used (it is written either
    way). ``negotiate run`` exits 0 for ``converged`` and 3 otherwise; ``run.json`` holds the value."""

    CONVERGED = "converged"
    """The method's stopping test was met: the schedule is its answer."""
    MAX_ROUNDS = "max-rounds"
    """The round limit came first: the best schedule found, every agent converged there, not certified."""
    STALLED = "stalled"
    """The method could go no further before its stopping test was met (e.g. its line search shortened the step
    to nothing): the best schedule found, every agent converged there, not certified."""
    FAILED = "failed"
    """No point where every agent converged (or the method produced none): no usable schedule."""
    UNREACHABLE = "unreachable"
    """Every agent converged, but an elastic agent misses the times it was given (its slack is not zero): the
    schedule asks for something it cannot do, so it is not usable. With fixed orders this usually means the
    orders admit no schedule."""
    ERROR = "error"
    """The method raised an exception (``negotiate compare`` reports it and goes on with the others)."""

    def __str__(self) -> str:
        return self.value

    @property
    def usable(self) -> bool:
        """Whether the schedule is one where every agent's solve converged."""
        return self in (CoordinationStatus.CONVERGED, CoordinationStatus.MAX_ROUNDS, CoordinationStatus.STALLED)


SOLUTION_PRESENT = frozenset({Status.CONVERGED})
"""Statuses whose point may be used: a value gradient is only ever reported for these."""

# IPOPT's return_status strings (as CasADi reports them in solver.stats()) -> our status.
IPOPT_STATUS: dict[str, Status] = {
    "Solve_Succeeded": Status.CONVERGED,
    "Solved_To_Acceptable_Level": Status.INACCURATE,  # tolerance met only at the looser "acceptable" level
    "Feasible_Point_Found": Status.INACCURATE,  # square problem mode: feasible, not optimal
    "Infeasible_Problem_Detected": Status.INFEASIBLE,
    "Maximum_Iterations_Exceeded": Status.ITERATION_LIMIT,
    "Maximum_CpuTime_Exceeded": Status.TIME_LIMIT,
    "Maximum_WallTime_Exceeded": Status.TIME_LIMIT,
    "Diverging_Iterates": Status.UNBOUNDED,
    "Search_Direction_Becomes_Too_Small": Status.FAILED,
    "Restoration_Failed": Status.FAILED,
    "Error_In_Step_Computation": Status.FAILED,
    "User_Requested_Stop": Status.FAILED,
    "Not_Enough_Degrees_Of_Freedom": Status.FAILED,
    "Invalid_Problem_Definition": Status.FAILED,
    "Invalid_Option": Status.FAILED,
    "Invalid_Number_Detected": Status.FAILED,
    "Unrecoverable_Exception": Status.FAILED,
    "NonIpopt_Exception_Thrown": Status.FAILED,
    "Insufficient_Memory": Status.FAILED,
    "Internal_Error": Status.FAILED,
}


def from_ipopt(raw: str) -> Status:
    """Map IPOPT's raw return status to a :class:`Status` (unknown strings map to ``FAILED``)."""
    return IPOPT_STATUS.get(raw, Status.FAILED)
