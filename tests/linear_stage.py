"""A linear test stage with exact answers, registered as ``linear_test`` for engine tests.

y = x1 + 2 x2 (volts), z = x1 * x2; samples with x1 above ``diverge_above`` report no
convergence, so the engine's handling of failed solves can be checked exactly, and y is
-inf where x1 lies below ``infinite_below`` (a metric out of a model's range, failing).
"""

from __future__ import annotations

import sys

import numpy as np
import cloudpickle

from tolerance.protocol import Criterion, MetricInfo, register_stage

# workers unpickle this module's classes by value: tests/ is not importable there
cloudpickle.register_pickle_by_value(sys.modules[__name__])


class LinearStage:
    name = "linear_test"

    def __init__(self, parameters, criteria, diverge_above, infinite_below=-np.inf):
        self.parameters = parameters
        self.criteria = criteria
        self.diverge_above = diverge_above
        self.infinite_below = infinite_below
        self.metrics = {"y": MetricInfo("V", "x1 + 2 x2"), "z": MetricInfo("1", "x1 x2")}

    def evaluate(self, samples):
        x1, x2 = samples["x1"], samples["x2"]
        converged = ~(x1 > self.diverge_above)
        y = np.where(x1 < self.infinite_below, -np.inf, x1 + 2 * x2)
        return {"y": y, "z": x1 * x2, "converged": converged}


@register_stage("linear_test", description="exact linear test stage")
def configure(reader):
    inputs = reader.table("inputs", required=True)
    params = [inputs.parameter("x1", "V", "x1", "first input"),
              inputs.parameter("x2", "V", "x2", "second input")]
    solver = reader.table("solver")
    diverge = solver.quantity("diverge_above", "V", default=np.inf)
    infinite = solver.quantity("infinite_below", "V", default=-np.inf)
    criteria = [Criterion("y_positive", "y", minimum=0.0, source="stage",
                          description="y stays positive")]
    return LinearStage(params, criteria, diverge, infinite)
