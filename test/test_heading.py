"""Heading ↔ quaternion conversions against transforms3d, the reference library (w-first order)."""

import numpy as np
from transforms3d.euler import euler2quat, quat2euler

from riskbound.motion.heading import quaternion_xyzw_to_yaw, yaw_to_quaternion_xyzw


def test_yaw_to_quaternion_matches_transforms3d_reordered():
    yaws = np.random.default_rng(0).uniform(-np.pi, np.pi, 200)
    ours = yaw_to_quaternion_xyzw(yaws)
    reference = np.array([euler2quat(0.0, 0.0, yaw, axes="sxyz") for yaw in yaws])  # (w, x, y, z)
    np.testing.assert_allclose(ours, reference[:, [1, 2, 3, 0]], atol=1e-15)


def test_quaternion_to_yaw_matches_transforms3d_for_general_rotations():
    rng = np.random.default_rng(1)
    quaternions = rng.normal(size=(200, 4)) * rng.uniform(0.1, 10.0, (200, 1))  # not normalised
    ours = quaternion_xyzw_to_yaw(quaternions)
    unit = quaternions / np.linalg.norm(quaternions, axis=1, keepdims=True)
    reference = np.array([quat2euler(q[[3, 0, 1, 2]], axes="sxyz")[2] for q in unit])
    np.testing.assert_allclose(ours, reference, atol=1e-12)


def test_invalid_quaternions_give_nan():
    bad = np.array([[0.0, 0.0, 0.0, 0.0], [np.nan, 0.0, 0.0, 1.0], [0.0, np.inf, 0.0, 1.0]])
    assert np.all(np.isnan(quaternion_xyzw_to_yaw(bad)))


def test_round_trip_wraps_to_minus_pi_pi():
    yaws = np.linspace(-3 * np.pi, 3 * np.pi, 37)
    back = quaternion_xyzw_to_yaw(yaw_to_quaternion_xyzw(yaws))
    np.testing.assert_allclose(np.angle(np.exp(1j * (back - yaws))), 0.0, atol=1e-12)
