"""A coordination method of your own, run with the same CLI, outputs and verification as the built-ins.

    negotiate run examples/machining_cell.toml --out runs/custom \
        --method examples/custom_method.py:ShrinkingStep --verify

(``--method`` imports and runs this file.) The method below is deliberately plain: projected gradient steps
of a fixed length in scaled units that halves whenever a step does not lower the total. It sees only what
the agents report -- values, value gradients, certificates -- and the feasible set of shared parameters.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from negotiate import Evaluation, Method, Proposal, option, register_method


@dataclass(frozen=True)
class ShrinkingStepOptions:
    """The method's options ([coordinator.options]); an unknown key or a mistyped value is refused."""

    step: float = option(0.05, "length of the first step, in scaled units")


@register_method
class ShrinkingStep(Method):
    name = "shrinking-step"
    Options = ShrinkingStepOptions

    def start(self, first: Evaluation) -> None:
        # `first` is every agent's report at the starting point; keep the best point as the incumbent.
        self.incumbent = first
        self.step = self.options["step"]  # declared above: a float, 0.05 unless the fleet file sets it

    def propose(self, latest: Evaluation) -> Proposal:
        # `latest` is the evaluation of the previous proposal (the start on the first call).
        if latest.ok and latest.total < self.incumbent.total:
            self.incumbent = latest
        elif latest is not self.incumbent:
            self.step *= 0.5  # the step did not help (or an agent failed there): shorten it
        x = self.incumbent
        s = self.feasible.scale  # width of each parameter's window: makes seconds and watts comparable
        g = x.gradient * s  # weighted value gradient in scaled units (only used when every agent converged)
        unit = s * g / max(float(np.max(np.abs(g))), 1e-300)  # a step of one window width at most
        nxt = self.feasible.project(x.P - self.step * unit)
        # stopping measure: first-order decrease promised by a full unit step, relative to the total
        measure = float(x.gradient @ (x.P - self.feasible.project(x.P - unit))) / max(1.0, abs(x.total))
        done = measure <= self.settings.tolerance or self.step < 1e-9
        return Proposal(None if done else nxt, measure, converged=done, note=f"step {self.step:.3g}")
