"""Robust inflation: every obstacle grown by a fixed number of standard deviations, no risk allocation.

Each face of the grown obstacle box moves out by κ·√(nᵀ Σ n) for a fixed multiple κ (say 2 or 3
"sigma"), whatever the horizon length and the number of obstacles, and the box is then enclosed by
the same minimum-volume ellipse as in the MPC. Nothing ties κ to a collision bound over the
horizon: with many constraints the joint risk grows, with few the clearance is wasted.

That is exactly the MPC with the per-constraint risk fixed at a = 1 − Φ(κ) (so that
Φ⁻¹(1 − a) = κ) and no split over steps and obstacles (`risk_allocation = "per_constraint"`), so
this baseline runs the MPC itself with those settings: same problem, solver, warm start and
pruning; only the inflation differs.
"""

from scipy.special import ndtr

from riskbound.planning.mpc import ChanceConstrainedMPC

# κ range: below 0.5 σ the "robust" margin is negligible; above 8 σ, 1 − Φ(κ) underflows the
# settings' accuracy and the method is pointless anyway.
SIGMA_MULTIPLE_RANGE = (0.5, 8.0)


def risk_for_sigma_multiple(sigma_multiple):
    """Per-constraint risk a = 1 − Φ(κ) = Φ(−κ) whose Gaussian back-off is κ standard deviations."""
    low, high = SIGMA_MULTIPLE_RANGE
    if not low <= sigma_multiple <= high:
        raise ValueError(f"sigma_multiple={sigma_multiple!r} is out of range: must be in [{low}, {high}]")
    return float(ndtr(-sigma_multiple))


class RobustInflationPlanner:
    """The MPC with obstacles grown by `sigma_multiple` standard deviations each (no allocation)."""

    solver_name = "ipopt"

    def __init__(self, settings, sigma_multiple=3.0):
        self.sigma_multiple = float(sigma_multiple)
        self.settings = settings.with_changes(risk_allocation="per_constraint",
                                              risk_level=risk_for_sigma_multiple(self.sigma_multiple))
        self._mpc = ChanceConstrainedMPC(self.settings)
        self.model = self._mpc.model

    def solve(self, x0, P0, goal, forecast, elapsed_s=None):
        """Same contract as `ChanceConstrainedMPC.solve`."""
        return self._mpc.solve(x0, P0, goal, forecast, elapsed_s)

    def reset(self):
        self._mpc.reset()
