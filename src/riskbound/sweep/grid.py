"""The sweep's grid: every combination of the chosen values is one cell, one closed loop.

A cell is identified by a key: the SHA-256 of its parameters together with the contents of its
parameter file and scenario file, so a rerun of the same command finds the cells already done, and
an edited file gives new cells instead of silently mixing old results with new ones.
"""

import hashlib
import itertools
import json
from dataclasses import asdict, dataclass
from pathlib import Path

from riskbound.motion.robot_models import ROBOT_MODELS
from riskbound.risk.allocation import ALLOCATION_MODES

# robot_model value meaning "the model the parameter file sets".
FROM_FILE = "from_file"


@dataclass(frozen=True)
class Cell:
    """One closed loop of a sweep (the arguments of riskbound.bench.crowd_loop.run_cell)."""

    risk_level: float
    risk_allocation: str
    scenario: str                 # scenario file path as given
    seed: int                     # crowd seed (as `riskbound crowd --seed`)
    params_file: str              # ROS parameter file path as given
    robot_model: str              # a planner robot model, or FROM_FILE
    reaction_strength_m2_s2: float  # how strongly walkers react to the robot; 0 = they do not
    start_s: float                # robot leaves this long into the recording [s]
    duration_s: float             # crowd recording length [s]
    max_cycles: int               # cap on planning cycles per crossing; 0 = none
    overrides: str                # further planner settings, JSON object with sorted keys
    inputs_sha256: str            # SHA-256 of the parameter file's and scenario file's bytes

    @property
    def key(self):
        text = json.dumps(asdict(self), sort_keys=True)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()[:32]

    def planner_overrides(self):
        overrides = dict(json.loads(self.overrides), risk_level=self.risk_level,
                         risk_allocation=self.risk_allocation)
        if self.robot_model != FROM_FILE:
            overrides["robot_model"] = self.robot_model
        return overrides


def _file_bytes(path, what):
    try:
        return Path(path).read_bytes()
    except OSError as error:
        raise ValueError(f"{what} {path}: cannot read: {error.strerror or error}") from None


def build_grid(risk_levels, allocations, scenarios, seeds, params_files, robot_models, reaction_strengths,
               start_s, duration_s, max_cycles=0, overrides=None):
    """All cells of the grid, in a fixed order. Raises ValueError naming the first bad value."""
    for value in risk_levels:
        if not 0.0 < value < 0.5:
            raise ValueError(f"risk level {value!r}: must be in (0, 0.5)")
    for value in allocations:
        if value not in ALLOCATION_MODES:
            raise ValueError(f"allocation {value!r}: must be one of {', '.join(ALLOCATION_MODES)}")
    for value in robot_models:
        if value not in ROBOT_MODELS + (FROM_FILE,):
            raise ValueError(f"robot model {value!r}: must be one of {', '.join(ROBOT_MODELS + (FROM_FILE,))}")
    for value in reaction_strengths:
        if not (value >= 0.0 and value != float("inf")):
            raise ValueError(f"reaction strength {value!r}: must be a finite number >= 0 [m²/s²]")
    for value in seeds:
        if value < 0:
            raise ValueError(f"seed {value!r}: must be >= 0")
    if not start_s >= 1.0:
        raise ValueError(f"start_s {start_s!r}: must be >= 1 s (one second of tracking comes first)")
    if not start_s < duration_s:
        raise ValueError(f"duration_s {duration_s!r}: must be > start_s = {start_s}")
    if max_cycles < 0:
        raise ValueError(f"max_cycles {max_cycles!r}: must be >= 0 (0: no cap)")
    for name, values in (("risk levels", risk_levels), ("allocations", allocations), ("scenarios", scenarios),
                         ("seeds", seeds), ("parameter files", params_files), ("robot models", robot_models),
                         ("reaction strengths", reaction_strengths)):
        if not values:
            raise ValueError(f"{name}: at least one value is needed")
    overrides_text = json.dumps(dict(overrides or {}), sort_keys=True)
    digests = {}
    for params_file, scenario in itertools.product(params_files, scenarios):
        digest = hashlib.sha256(_file_bytes(params_file, "parameter file"))
        digest.update(_file_bytes(scenario, "scenario"))
        digests[params_file, scenario] = digest.hexdigest()
    cells = {}  # key → cell: a value given twice makes no second cell
    for params_file, robot_model, scenario, allocation, risk_level, reaction, seed in itertools.product(
            params_files, robot_models, scenarios, allocations, risk_levels, reaction_strengths, seeds):
        cell = Cell(float(risk_level), allocation, str(scenario), int(seed), str(params_file), robot_model,
                    float(reaction), float(start_s), float(duration_s), int(max_cycles), overrides_text,
                    digests[params_file, scenario])
        cells.setdefault(cell.key, cell)
    return list(cells.values())
