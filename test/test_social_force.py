"""Social force model: reference checks against closed forms of the model's own equations
(Phys. Rev. E 51, 4282 (1995)) and geometric facts of walking people."""

import numpy as np
import pytest

from riskbound.crowd.scenario import load_scenario
from riskbound.crowd.simulate import simulate
from riskbound.crowd.social_force import (
    Geometry,
    SocialForceParameters,
    boundary_clearance,
    pedestrian_forces,
    step,
)

PARAMS = SocialForceParameters()
OPEN_FIELD = Geometry.build()
V0 = 1.34   # m/s, mean desired speed, Phys. Rev. E 51, 4282 (1995) (value from memory)
TAU = 0.5   # s, relaxation time, same paper (value from memory)


def test_published_parameter_values():
    # Checks that the defaults are consistent with the values cited for Phys. Rev. E 51, 4282
    # (1995) (value from memory, the same memory the defaults were written from, so this guards
    # against an edited default, not against a misremembered number):
    # τ = 0.5 s, V⁰ = 2.1 m²/s², σ = 0.3 m, Δt = 2 s, U⁰ = 10 m²/s², R = 0.2 m, 2φ = 200°, c = 0.5,
    # v_max = 1.3 v⁰.
    assert (PARAMS.relaxation_time_s, PARAMS.pedestrian_strength_m2_s2, PARAMS.pedestrian_range_m) == (0.5, 2.1, 0.3)
    assert (PARAMS.step_horizon_s, PARAMS.wall_strength_m2_s2, PARAMS.wall_range_m) == (2.0, 10.0, 0.2)
    assert (2 * PARAMS.view_half_angle_deg, PARAMS.behind_weight, PARAMS.max_speed_factor) == (200.0, 0.5, 1.3)


@pytest.mark.parametrize("dt_s", [0.05, 0.1])
def test_lone_walker_follows_the_analytic_exponential(dt_s):
    # A walker starting at rest with nothing around obeys dv/dt = (v⁰ − v)/τ (the driving term of
    # Phys. Rev. E 51, 4282 (1995)), whose solution is v(t) = v⁰ (1 − e^(−t/τ)) and
    # x(t) = v⁰ (t − τ (1 − e^(−t/τ))). Required: within 2 % of v⁰ (speed) and of x(t) (distance).
    positions, velocities = np.zeros((1, 2)), np.zeros((1, 2))
    target = np.array([[1000.0, 0.0]])
    for k in range(1, int(round(4.0 / dt_s)) + 1):
        positions, velocities, contacts = step(positions, velocities, target, np.array([V0]), np.array([0.25]),
                                               OPEN_FIELD, PARAMS, dt_s)
        t = k * dt_s
        v_ref = V0 * (1.0 - np.exp(-t / TAU))
        x_ref = V0 * (t - TAU * (1.0 - np.exp(-t / TAU)))
        assert abs(velocities[0, 0] - v_ref) <= 0.02 * V0, t
        assert abs(positions[0, 0] - x_ref) <= 0.02 * x_ref, t
        assert abs(velocities[0, 1]) < 1e-12 and contacts == 0
    assert velocities[0, 0] == pytest.approx(V0, rel=0.02)


def test_speed_never_exceeds_the_published_limit():
    # v_max = 1.3 v⁰, Phys. Rev. E 51, 4282 (1995) (value from memory): a walker shoved hard from
    # behind by a crowd of pushers still does not exceed it.
    positions = np.array([[0.0, 0.0]])
    velocities = np.array([[5.0, 0.0]])
    push = np.array([[50.0, 0.0]])
    for _ in range(20):
        positions, velocities, _ = step(positions, velocities, np.array([[100.0, 0.0]]), np.array([V0]),
                                        np.array([0.25]), OPEN_FIELD, PARAMS, 0.05, extra_forces=push)
        assert np.linalg.norm(velocities[0]) <= 1.3 * V0 + 1e-12


def _potential(r, v_beta, params):
    """V⁰ exp(−b/σ) with 2b = sqrt((|r| + |r − s e_β|)² − s²), written out from Phys. Rev. E 51,
    4282 (1995), independently of the code under test."""
    speed = np.linalg.norm(v_beta)
    step_vec = v_beta * params.step_horizon_s
    s = speed * params.step_horizon_s
    b = 0.5 * np.sqrt((np.linalg.norm(r) + np.linalg.norm(r - step_vec)) ** 2 - s ** 2)
    return params.pedestrian_strength_m2_s2 * np.exp(-b / params.pedestrian_range_m)


@pytest.mark.parametrize("r, v_beta", [
    ([1.2, 0.3], [-1.0, 0.2]),
    ([0.8, -0.9], [0.5, 1.1]),
    ([2.0, 0.0], [0.0, 0.0]),
])
def test_pedestrian_force_is_minus_the_gradient_of_the_elliptic_potential(r, v_beta):
    # f_αβ = −∇_r V(b(r)), Phys. Rev. E 51, 4282 (1995); checked by central differences of the
    # potential written out above (point walkers, β in α's view so the weight is 1).
    r, v_beta = np.array(r), np.array(v_beta)
    positions = np.array([r, [0.0, 0.0]])
    velocities = np.array([[0.0, 0.0], v_beta])
    directions = np.array([-r / np.linalg.norm(r), [1.0, 0.0]])  # α looks at β
    force = pedestrian_forces(positions, velocities, directions, np.zeros(2), PARAMS)[0]
    h = 1e-6
    gradient = np.array([(_potential(r + h * e, v_beta, PARAMS) - _potential(r - h * e, v_beta, PARAMS)) / (2 * h)
                         for e in np.eye(2)])
    np.testing.assert_allclose(force, -gradient, rtol=1e-5, atol=1e-9)


def test_repulsion_saturates_at_contact():
    # Two walkers at rest (s = 0, so b = |r|), radii 0.25 m: at contact the gap is zero and the
    # magnitude is V⁰/σ = 2.1 / 0.3 = 7 m/s² (published values, Phys. Rev. E 51, 4282 (1995), value
    # from memory). An overlap keeps that magnitude; a gap of σ divides it by e.
    def magnitude(distance):
        positions = np.array([[distance, 0.0], [0.0, 0.0]])
        directions = np.array([[-1.0, 0.0], [1.0, 0.0]])
        force = pedestrian_forces(positions, np.zeros((2, 2)), directions, np.full(2, 0.25), PARAMS)[0]
        return np.linalg.norm(force)

    assert magnitude(0.5) == pytest.approx(7.0, rel=1e-9)
    assert magnitude(0.3) == pytest.approx(7.0, rel=1e-9)
    assert magnitude(0.8) == pytest.approx(7.0 / np.e, rel=1e-9)


@pytest.mark.parametrize("limit", [5.0, 2.0])
def test_interaction_acceleration_is_bounded_and_the_published_model_is_not(limit):
    # Four walkers at rest, each aiming at the spot where it stands (so the driving term is zero),
    # three of them pressed against the west side of the fourth: over one short step the velocity
    # change is the interaction term alone, τf(1 − e^(−h/τ)).
    positions = np.array([[0.0, 0.0], [-0.5, 0.0], [-0.42, 0.3], [-0.42, -0.3]])
    zeros = np.zeros((4, 2))
    dt = 0.01

    def largest_acceleration(params):
        _, velocities, _ = step(positions, zeros, positions, np.full(4, 1.34), np.full(4, 0.25),
                                OPEN_FIELD, params, dt)
        return np.max(np.linalg.norm(velocities, axis=1)) / dt

    unbounded = largest_acceleration(SocialForceParameters(max_interaction_accel_mps2=float("inf")))
    bounded = largest_acceleration(SocialForceParameters(max_interaction_accel_mps2=limit))
    assert unbounded > 2.0 * limit  # the configuration really pushes harder than the bound
    assert bounded <= limit * (1.0 + 1e-9)
    assert bounded >= 0.98 * limit  # τ(1 − e^(−h/τ))/h = 0.990 for h = 0.01 s, τ = 0.5 s


def test_someone_behind_counts_with_the_published_weight():
    # Outside the 200° field of view the force is multiplied by c = 0.5, Phys. Rev. E 51, 4282 (1995).
    positions = np.array([[0.0, 0.0], [-1.0, 0.0]])
    velocities = np.zeros((2, 2))
    looking_away = pedestrian_forces(positions, velocities, np.array([[1.0, 0.0], [1.0, 0.0]]), np.zeros(2), PARAMS)[0]
    looking_at = pedestrian_forces(positions, velocities, np.array([[-1.0, 0.0], [1.0, 0.0]]), np.zeros(2), PARAMS)[0]
    np.testing.assert_allclose(looking_away, 0.5 * looking_at, rtol=1e-12)


def _walk(positions, velocities, targets, speeds, radius, geometry, seconds, dt_s=0.05):
    radii = np.full(len(positions), radius)
    history, contacts = [positions], 0
    for _ in range(int(round(seconds / dt_s))):
        positions, velocities, found = step(positions, velocities, targets, speeds, radii, geometry, PARAMS, dt_s)
        history.append(positions)
        contacts += found
    return np.array(history), contacts


@pytest.mark.parametrize("lateral_offset_m", [0.05, 0.3])
def test_head_on_walkers_pass_without_their_discs_overlapping(lateral_offset_m):
    # Two people walking straight at each other sidestep and pass; their bodies (discs of 0.25 m
    # radius, a common shoulder half-width, value from memory) never overlap, and the smooth
    # repulsion alone does it: the contact constraint never acts.
    radius = 0.25
    positions = np.array([[0.0, 0.0], [16.0, lateral_offset_m]])
    velocities = np.array([[V0, 0.0], [-V0, 0.0]])
    targets = np.array([[30.0, 0.0], [-14.0, lateral_offset_m]])
    history, contacts = _walk(positions, velocities, targets, np.array([V0, V0]), radius, OPEN_FIELD, 25.0)
    gap = np.linalg.norm(history[:, 0] - history[:, 1], axis=1)
    assert gap.min() > 2 * radius
    assert contacts == 0
    assert history[-1, 0, 0] > 16.0 and history[-1, 1, 0] < 0.0  # they passed each other
    assert np.abs(history[:, :, 1]).max() < 1.5                    # by a sidestep, not a detour


def test_walker_driven_into_a_wall_stops_where_the_forces_balance():
    # A walker whose target lies behind a wall comes to rest where the wall force equals the
    # driving force: (U⁰/R) e^(−d/R) = v⁰/τ, so the disc keeps d = R ln(U⁰ τ / (R v⁰)) from the
    # wall (stationary point of the model equations of Phys. Rev. E 51, 4282 (1995); closed form
    # derived from them here). With the published values d ≈ 0.585 m.
    wall = Geometry.build(walls=[[[5.0, -10.0], [5.0, 10.0]]])
    radius = 0.25
    history, contacts = _walk(np.array([[0.0, 0.3]]), np.zeros((1, 2)), np.array([[20.0, 0.3]]),
                              np.array([V0]), radius, wall, 20.0)
    gap_expected = PARAMS.wall_range_m * np.log(PARAMS.wall_strength_m2_s2 * TAU / (PARAMS.wall_range_m * V0))
    gap = 5.0 - history[-1, 0, 0] - radius
    assert gap == pytest.approx(gap_expected, abs=0.01)
    assert gap_expected == pytest.approx(0.585, abs=0.001)
    assert contacts == 0


def test_crowd_in_a_corridor_stays_out_of_the_walls():
    # 30 walkers in two opposing streams in a 3 m corridor: every disc stays inside the corridor
    # at every step (a wall is not walked through; geometric fact, no source).
    rng = np.random.default_rng(4)
    half_width = 1.5
    walls = Geometry.build(walls=[[[-5.0, -half_width], [45.0, -half_width]], [[-5.0, half_width], [45.0, half_width]]])
    count = 30
    east = np.arange(count) % 2 == 0
    x = np.where(east, rng.uniform(0.0, 12.0, count), rng.uniform(28.0, 40.0, count))
    positions = np.column_stack([x, rng.uniform(-1.0, 1.0, count)])
    # Spread them so no two start touching.
    positions[:, 0] += np.arange(count) * 0.01
    order = np.argsort(positions[:, 0])
    positions = positions[order]
    east = east[order]
    for i in range(1, count):
        if np.min(np.linalg.norm(positions[:i] - positions[i], axis=1)) < 0.6:
            positions[i, 0] += 0.6
    targets = np.column_stack([np.where(east, 44.0, -4.0), np.zeros(count)])
    speeds = np.clip(rng.normal(V0, 0.26, count), 0.6, 2.0)
    history, _ = _walk(positions, np.zeros((count, 2)), targets, speeds, 0.25, walls, 30.0)
    assert np.abs(history[:, :, 1]).max() <= half_width - 0.25 + 1e-9
    clearance = np.array([boundary_clearance(p, np.full(count, 0.25), walls) for p in history])
    assert clearance.min() >= -1e-9


def test_scenario_crowd_keeps_bodies_apart_and_inside_the_courtyard():
    # A 40-walker run in the walled courtyard: discs do not overlap each other, walls or planters
    # by more than 1 cm (tolerance: common practice, no source) and nobody leaves the courtyard.
    scenario = load_scenario("config/crowd_courtyard_40.yaml")
    run = simulate(scenario, 11, duration_s=10.0)
    assert run.min_gap_m > -0.01
    assert run.min_boundary_gap_m > -0.01
    for frame in run.frames:
        assert len(frame.ids) == 40
        assert np.all((frame.positions > 0.0) & (frame.positions < [24.0, 20.0]))
