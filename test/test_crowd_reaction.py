"""Walkers who react to the robot (riskbound.crowd.social_force.RobotPresence).

Strength 0 must leave the crowd exactly as it was before the robot existed in the simulation: the
frames are compared bit for bit with digests of the unmodified simulation (test/data/crowd_digests.json,
computed at the commit named there). With strength > 0 a walker heading at a standing robot must
turn aside, which it does not do at strength 0."""

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest

from riskbound.crowd.record import seeded_generators
from riskbound.crowd.scenario import load_scenario
from riskbound.crowd.simulate import CrowdSimulation, simulate
from riskbound.crowd.social_force import Geometry, RobotPresence, SocialForceParameters, step

REPO = Path(__file__).resolve().parents[1]
DIGESTS = json.loads((REPO / "test" / "data" / "crowd_digests.json").read_text())["runs"]
PARAMS = SocialForceParameters()
V0_MPS = 1.34                # mean desired walking speed, Phys. Rev. E 51, 4282 (1995) (value from memory)
PERSON_STRENGTH_M2_S2 = 2.1  # V⁰ of the same paper (value from memory): the robot felt like a person


def _digest(frames):
    digest = hashlib.sha256()
    for frame in frames:
        for array in (np.float64(frame.time_s), frame.ids, frame.positions, frame.headings, frame.velocities):
            digest.update(np.ascontiguousarray(array).tobytes())
    return digest.hexdigest()


@pytest.mark.parametrize("run", DIGESTS, ids=[r["scenario"].split("/")[-1] for r in DIGESTS])
def test_without_reaction_the_crowd_is_bit_identical_to_the_unmodified_simulation(run):
    scenario = load_scenario(REPO / run["scenario"])
    crowd_rng, _ = seeded_generators(run["seed"])
    assert _digest(simulate(scenario, crowd_rng, duration_s=run["duration_s"]).frames) == run["sha256"]
    # Frame by frame with a robot present at strength 0, driving through the middle of the scene.
    crowd_rng, _ = seeded_generators(run["seed"])
    simulation = CrowdSimulation(scenario, crowd_rng, duration_s=run["duration_s"])
    simulation.first_frame()
    x_min, x_max, y_min, y_max = scenario.bounds()
    k = 0
    while not simulation.finished:
        position = np.array([x_min + 0.01 * k * (x_max - x_min), 0.5 * (y_min + y_max)])
        simulation.next_frame(RobotPresence(position, np.array([1.0, 0.0]), 0.3, 0.0))
        k += 1
    assert _digest(simulation.run.frames) == run["sha256"]


def _walk_past_standing_robot(strength_m2_s2, lateral_offset_m=0.1):
    """A lone walker aimed along +x at a robot standing 5 m ahead, its line `lateral_offset_m` off the
    robot's centre (nobody walks exactly at a centre). Returns the walker's track (steps, 2)."""
    robot = RobotPresence(np.array([5.0, 0.0]), np.zeros(2), 0.3, strength_m2_s2)
    position = np.array([[0.0, lateral_offset_m]])
    velocity = np.array([[V0_MPS, 0.0]])
    target = np.array([[10.0, lateral_offset_m]])
    track = [position[0]]
    for _ in range(200):  # 10 s at 0.05 s
        position, velocity, _ = step(position, velocity, target, np.array([V0_MPS]), np.array([0.25]),
                                     Geometry.build(), PARAMS, 0.05, robot=robot)
        track.append(position[0])
    return np.array(track)


def test_a_walker_heading_at_a_standing_robot_turns_aside():
    blind = _walk_past_standing_robot(0.0)
    seeing = _walk_past_standing_robot(PERSON_STRENGTH_M2_S2)
    contact_m = 0.3 + 0.25
    # Blind: it walks straight through the robot's disc.
    assert np.min(np.linalg.norm(blind - [5.0, 0.0], axis=1)) < contact_m
    assert np.max(np.abs(blind[:, 1] - 0.1)) < 1e-9
    # Seeing: it passes on its own side without touching, and still gets where it was going
    # (a person steps aside around a standing obstacle; common practice, no source).
    passing = seeing[np.argmin(np.abs(seeing[:, 0] - 5.0))]
    assert passing[1] > contact_m
    assert np.min(np.linalg.norm(seeing - [5.0, 0.0], axis=1)) > contact_m
    assert seeing[-1, 0] > 9.0


def test_reaction_is_stronger_with_strength():
    weak = _walk_past_standing_robot(0.5)
    strong = _walk_past_standing_robot(4.0)
    gap = [np.min(np.linalg.norm(track - [5.0, 0.0], axis=1)) for track in (weak, strong)]
    assert gap[1] > gap[0]


@pytest.mark.parametrize("field, value", [("strength_m2_s2", -1.0), ("strength_m2_s2", float("nan")),
                                          ("radius_m", -0.1)])
def test_bad_robot_presence_names_the_field(field, value):
    arguments = dict(position=np.zeros(2), velocity=np.zeros(2), radius_m=0.3, strength_m2_s2=1.0)
    arguments[field] = value
    with pytest.raises(ValueError, match=field):
        RobotPresence(**arguments)
