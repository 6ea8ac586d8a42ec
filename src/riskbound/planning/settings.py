"""Planner settings: one table of every parameter (type, default, range, meaning) validated in one place.

The planner node turns this table into ROS parameter descriptors; the core validates with it too,
so a value rejected on the robot is rejected for the same reason in a script.

`rebuild` marks structural settings: changing them rebuilds the optimisation problem (off the
control path). All other settings enter the problem as numbers at the next solve.
"""

from dataclasses import dataclass, replace

from riskbound.motion.robot_models import ROBOT_MODELS
from riskbound.planning.convex_subproblem import QP_SOLVERS
from riskbound.risk.allocation import ALLOCATION_MODES
from riskbound.settings_table import SettingSpec, validate_fields

# What the planner does when no plan meets every obstacle constraint (see riskbound.planning.mpc).
INFEASIBLE_RESPONSES = ("stop", "least_violation")
PLANNER_SOLVERS = ("sequential_qp", "ipopt")


PLANNER_SPECS = (
    SettingSpec("risk_level", 0.05, "total collision probability bound α (see risk_allocation)",
                0.0, 0.5, low_open=True, high_open=True),
    SettingSpec("risk_allocation", "joint",
                "joint: α over horizon × reachable obstacles by Boole's inequality, risk moved to the "
                "pairs that bind (iterative allocation); joint_uniform: the same bound, uniform split; "
                "per_constraint: α for each obstacle and step", choices=ALLOCATION_MODES),
    SettingSpec("horizon_steps", 20, "number of MPC steps", 5, 60, rebuild=True),
    SettingSpec("step_s", 0.1, "duration of one MPC step [s]", 0.02, 1.0, rebuild=True),
    SettingSpec("control_rate_hz", 10.0, "planning cycles per second", 1.0, 100.0, rebuild=True),
    SettingSpec("robot_model", "double_integrator", "robot motion model", choices=ROBOT_MODELS,
                rebuild=True),
    SettingSpec("robot_radius_m", 0.3, "radius of the disc enclosing the robot [m]", 0.0, 5.0),
    SettingSpec("max_speed_mps", 1.2, "speed limit [m/s]", 0.0, 20.0, low_open=True),
    SettingSpec("min_speed_mps", 0.0, "unicycle only: lowest forward speed, negative allows reversing [m/s]",
                -5.0, 0.0),
    SettingSpec("max_accel_mps2", 1.5, "acceleration limit [m/s²]", 0.0, 20.0, low_open=True),
    SettingSpec("max_turn_rate_radps", 1.5, "unicycle only: turn-rate limit [rad/s]", 0.0, 10.0,
                low_open=True),
    SettingSpec("weight_goal", 1.0, "stage cost on squared distance to the goal [1/m²]", 0.0, 1e4),
    SettingSpec("weight_terminal", 10.0, "terminal cost on squared distance to the goal [1/m²]", 0.0, 1e4),
    SettingSpec("weight_speed", 0.1, "stage cost on squared speed [s²/m²]", 0.0, 1e4),
    SettingSpec("weight_accel", 0.1, "stage cost on squared acceleration [s⁴/m²]", 0.0, 1e4),
    SettingSpec("weight_turn", 0.1, "unicycle only: stage cost on squared turn rate [s²/rad²]", 0.0, 1e4),
    SettingSpec("goal_reach_m", 0.0,
                "goal reference is clipped to this distance from the robot (0: speed limit × horizon) [m]",
                0.0, 1e3),
    SettingSpec("max_obstacles", 8, "obstacles constrained per cycle after pruning (nearest first)", 1, 64,
                rebuild=True),
    SettingSpec("robot_accel_noise", 0.2, "robot process noise: std of acceleration [m/s²]", 0.0, 10.0),
    SettingSpec("robot_turn_noise", 0.1, "unicycle robot process noise: std of turn rate [rad/s]", 0.0, 10.0),
    SettingSpec("solver", "sequential_qp",
                "sequential_qp: convex QPs about the previous iterate, every iterate meets the obstacle "
                "constraints, bounded iterations (default); ipopt: the interior-point reference on the full NLP",
                choices=PLANNER_SOLVERS, rebuild=True),
    SettingSpec("qp_solver", "daqp", "QP solver of the sequential_qp path (dense, condensed problem)",
                choices=QP_SOLVERS, rebuild=True),
    SettingSpec("qp_iterations", 6, "sequential_qp: convex subproblems per start at most (two starts per cycle)",
                1, 50),
    SettingSpec("allocation_passes", 3,
                "joint: iterative risk allocation steps per cycle (each after the plan converged); "
                "the split is carried to the next cycle", 1, 10),
    SettingSpec("static_planes", 4, "static half-planes (walls, pillars) per step", 0, 16, rebuild=True),
    SettingSpec("solver_max_iter", 100, "IPOPT iteration cap", 3, 3000, rebuild=True),
    SettingSpec("solver_time_fraction", 0.8, "solver wall-time cap as a fraction of the control period",
                0.05, 1.0, rebuild=True),
    SettingSpec("solver_tolerance", 1e-4, "IPOPT convergence tolerance", 1e-10, 1e-1, rebuild=True),
    SettingSpec("infeasible_response", "stop",
                "when no plan meets every obstacle constraint — stop: send no command (the watchdog stops "
                "the robot); least_violation: command the plan that violates the constraints least "
                "(status least_violation, level WARN; the risk bound does not hold for it)",
                choices=INFEASIBLE_RESPONSES, rebuild=True),
)

SPECS_BY_NAME = {spec.name: spec for spec in PLANNER_SPECS}


@dataclass(frozen=True)
class PlannerSettings:
    """Validated planner settings (SI units; names carry units where a reader could guess wrong)."""

    risk_level: float = 0.05
    risk_allocation: str = "joint"
    horizon_steps: int = 20
    step_s: float = 0.1
    control_rate_hz: float = 10.0
    robot_model: str = "double_integrator"
    robot_radius_m: float = 0.3
    max_speed_mps: float = 1.2
    min_speed_mps: float = 0.0
    max_accel_mps2: float = 1.5
    max_turn_rate_radps: float = 1.5
    weight_goal: float = 1.0
    weight_terminal: float = 10.0
    weight_speed: float = 0.1
    weight_accel: float = 0.1
    weight_turn: float = 0.1
    goal_reach_m: float = 0.0
    max_obstacles: int = 8
    robot_accel_noise: float = 0.2
    robot_turn_noise: float = 0.1
    solver: str = "sequential_qp"
    qp_solver: str = "daqp"
    qp_iterations: int = 6
    allocation_passes: int = 3
    static_planes: int = 4
    solver_max_iter: int = 100
    solver_time_fraction: float = 0.8
    solver_tolerance: float = 1e-4
    infeasible_response: str = "stop"

    def __post_init__(self):
        validate_fields(self, SPECS_BY_NAME)

    def with_changes(self, **changes):
        """Return a copy with `changes` applied; ValueError names the first invalid one."""
        for name in changes:
            if name not in SPECS_BY_NAME:
                raise ValueError(f"{name!r} is not a planner setting")
        return replace(self, **changes)

    def needs_rebuild(self, other):
        """True when going from self to `other` changes a structural setting."""
        return any(getattr(self, s.name) != getattr(other, s.name) for s in PLANNER_SPECS if s.rebuild)

    @property
    def deadline_s(self):
        """Wall time the solver may use per cycle."""
        return self.solver_time_fraction / self.control_rate_hz
