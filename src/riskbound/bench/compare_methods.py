"""The methods of `riskbound bench compare`: which run in which suite, their labels in tables and
figures, how each planner is built, and the percentile every per-method figure uses.

Methods (same robot model, cost, forecasts, pruning and per-constraint risk where they have one):
``ours`` the chance-constrained MPC (ellipse per obstacle and step, IPOPT);
``mixed_integer`` the disjunctive formulation (one binary per face and step, bonmin), exact for the box;
``linearised`` half-planes about the previous plan (one QP per cycle; up to `--passes` in suite a);
``robust_inflation`` ellipses grown by a fixed `--sigma-multiple` standard deviations, no allocation.
"""

import numpy as np

from riskbound.planning.baselines.linearised import LinearisedPlanner
from riskbound.planning.baselines.mixed_integer import MixedIntegerPlanner
from riskbound.planning.baselines.robust_inflation import RobustInflationPlanner
from riskbound.planning.mpc import ChanceConstrainedMPC

METHODS = ("ours", "mixed_integer", "linearised", "robust_inflation")
CROWD_METHODS = ("ours", "linearised", "robust_inflation")
LABELS = {"ours": "ours (ellipse MPC)", "mixed_integer": "mixed-integer", "linearised": "linearised",
          "robust_inflation": "robust inflation"}


def make_planner(method, settings, sigma_multiple, passes=1, time_limit_s=120.0):
    if method == "ours":
        return ChanceConstrainedMPC(settings)
    if method == "mixed_integer":
        return MixedIntegerPlanner(settings, time_limit_s=time_limit_s)
    if method == "linearised":
        return LinearisedPlanner(settings, passes=passes)
    if method == "robust_inflation":
        return RobustInflationPlanner(settings, sigma_multiple=sigma_multiple)
    raise ValueError(f"method={method!r} is not one of {METHODS}")



def finite_percentile(values, q):
    """The q-th percentile of the finite `values`; NaN when none is finite."""
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    return float(np.percentile(values, q)) if len(values) else float("nan")
