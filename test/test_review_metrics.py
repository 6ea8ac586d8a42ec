"""Review arithmetic against references outside the code: footprint clearance and contact time
against brute-force sampling, the chi-square quantile against scipy and tables, Mahalanobis
distances against a hand-inverted covariance."""

import numpy as np
import pytest
from builtin_interfaces.msg import Time
from scipy import stats
from std_msgs.msg import Header

from riskbound.logs.bag_io import TYPESTORE
from riskbound.logs.review import cdr
from riskbound.clearance import disc_box_clearance
from riskbound.logs.review.footprint import time_to_contact
from riskbound.logs.review.forecast_check import chi_square_2dof_quantile, gaussian_check
from riskbound.logs.review.synthetic import forecast_cloud_cdr
from riskbound.motion.forecast import ObstacleForecast
from riskbound.ros.forecast_codec import cloud_to_forecast, forecast_to_cloud


def brute_force_distance(point, centre, heading, half_extents, samples=4001):
    """Distance from a point to a box: the nearest of many points on its boundary, or minus the
    depth to the nearest face when inside (common practice, no source)."""
    hl, hw = half_extents
    s = np.linspace(-1.0, 1.0, samples)
    local = np.concatenate([np.stack([hl * s, np.full_like(s, hw)], 1), np.stack([hl * s, np.full_like(s, -hw)], 1),
                            np.stack([np.full_like(s, hl), hw * s], 1), np.stack([np.full_like(s, -hl), hw * s], 1)])
    c, sn = np.cos(heading), np.sin(heading)
    world = centre + local @ np.array([[c, sn], [-sn, c]])
    offset = point - centre
    px, py = c * offset[0] + sn * offset[1], -sn * offset[0] + c * offset[1]
    inside = abs(px) <= hl and abs(py) <= hw
    distance = np.min(np.linalg.norm(world - point, axis=1))
    return -distance if inside else distance


def test_disc_box_clearance_matches_brute_force_sampling():
    rng = np.random.default_rng(3)
    points = rng.uniform(-2.0, 2.0, (200, 2))
    centres = rng.uniform(-0.5, 0.5, (200, 2))
    headings = rng.uniform(-np.pi, np.pi, 200)
    extents = rng.uniform(0.1, 0.6, (200, 2))
    radius = 0.3
    got = disc_box_clearance(points, radius, centres, headings, extents)
    expected = [brute_force_distance(p, c, h, e) - radius for p, c, h, e in zip(points, centres, headings, extents)]
    # Boundary sampling step ≤ 1.2 m / 4000: the sampled distance is within ~2e-4 m of the true one.
    np.testing.assert_allclose(got, expected, atol=5e-4)


def test_clearance_closed_form_cases():
    # Box 0.25 × 0.2 heading along +y, disc r = 0.3 (common practice, no source):
    # beside a face: distance to the face minus r; at a corner: Euclidean to the corner; inside: depth.
    box, heading, extents = np.zeros(2), np.pi / 2, np.array([0.25, 0.2])
    assert disc_box_clearance(np.array([1.0, 0.0]), 0.3, box, heading, extents) == pytest.approx(1.0 - 0.2 - 0.3)
    assert disc_box_clearance(np.array([0.0, 1.0]), 0.3, box, heading, extents) == pytest.approx(1.0 - 0.25 - 0.3)
    assert disc_box_clearance(np.array([1.2, 1.25]), 0.3, box, heading, extents) == pytest.approx(np.sqrt(2.0) - 0.3)
    assert disc_box_clearance(np.zeros(2), 0.3, box, heading, extents) == pytest.approx(-0.2 - 0.3)


def brute_force_contact_time(robot, v_robot, radius, box, v_box, heading, extents, horizon=8.0, dt=2e-4):
    t = np.arange(0.0, horizon, dt)
    c = disc_box_clearance(robot + t[:, None] * v_robot, radius, box + t[:, None] * v_box, heading, extents)
    hits = np.nonzero(c <= 0.0)[0]
    return t[hits[0]] if len(hits) else np.inf


def test_time_to_contact_matches_brute_force_search():
    rng = np.random.default_rng(11)
    contacts = 0
    for _ in range(40):
        robot = rng.uniform(-4.0, 4.0, 2)
        box = rng.uniform(-1.0, 1.0, 2)
        v_robot = rng.uniform(-1.5, 1.5, 2)
        v_box = rng.uniform(-1.5, 1.5, 2)
        heading = rng.uniform(-np.pi, np.pi)
        extents = rng.uniform(0.1, 0.5, 2)
        got = time_to_contact(robot, v_robot, 0.3, box, v_box, heading, extents)
        expected = brute_force_contact_time(robot, v_robot, 0.3, box, v_box, heading, extents)
        if np.isinf(expected):
            assert got > 7.999
        else:
            contacts += 1
            assert got == pytest.approx(expected, abs=3e-4)
    assert 5 <= contacts <= 35  # both kinds of case were exercised


def test_time_to_contact_head_on_closed_form():
    # Robot 2 m from a box face approaching at 1 m/s, r = 0.3: contact after 2 − 0.25 − 0.3 = 1.45 s.
    assert time_to_contact([-2.0, 0.0], [1.0, 0.0], 0.3, [0.0, 0.0], [0.0, 0.0], 0.0, [0.25, 0.2]) == \
        pytest.approx(1.45)
    assert time_to_contact([-2.0, 0.0], [-1.0, 0.0], 0.3, [0.0, 0.0], [0.0, 0.0], 0.0, [0.25, 0.2]) == np.inf
    assert time_to_contact([0.1, 0.0], [1.0, 0.0], 0.3, [0.0, 0.0], [0.0, 0.0], 0.0, [0.25, 0.2]) == 0.0


def test_chi_square_two_dof_quantile():
    # Reference: scipy.stats.chi2.ppf; table value χ²₂(0.95) = 5.991 (standard chi-square tables,
    # value from memory) and the closed form −2 ln α for 2 dof.
    for alpha in (0.5, 0.1, 0.05, 0.01, 1e-4):
        assert chi_square_2dof_quantile(1.0 - alpha) == pytest.approx(stats.chi2.ppf(1.0 - alpha, 2), rel=1e-9)
    assert chi_square_2dof_quantile(0.95) == pytest.approx(5.991, abs=5e-4)


def test_mahalanobis_against_hand_inverted_covariance():
    # Σ = [[4, 1], [1, 2]], det Σ = 7, Σ⁻¹ = (1/7)[[2, −1], [−1, 4]] (inverted by hand).
    # e = a − μ = (1, 2): eᵀ Σ⁻¹ e = (2·1 − 2·1·2 + 4·2·2)/7 = 14/7 = 2, so d = √2; ‖e‖ = √5.
    mean, actual = np.array([3.0, -1.0]), np.array([4.0, 1.0])
    sigma = np.array([[4.0, 1.0], [1.0, 2.0]])
    result = gaussian_check(actual, mean, sigma, risk_level=0.05)
    assert result["mahalanobis"] == pytest.approx(np.sqrt(2.0), rel=1e-12)
    assert result["position_error_m"] == pytest.approx(np.sqrt(5.0), rel=1e-12)
    assert result["inside_risk_ellipse"]          # 2 ≤ 5.991
    # α = 0.5: the 50 % ellipse is d² ≤ −2 ln 0.5 = 1.386, and 2 lies outside it.
    outside = gaussian_check(actual, mean, sigma, risk_level=0.5)
    assert outside["chi2_bound"] == pytest.approx(2.0 * np.log(2.0))
    assert not outside["inside_risk_ellipse"]


def _cdr_pairs():
    T = TYPESTORE.types
    header = T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](sec=12, nanosec=500_000_000),
                                      frame_id="odom_frame")

    def pose(x, y, yaw):
        return T["geometry_msgs/msg/Pose"](position=T["geometry_msgs/msg/Point"](x=x, y=y, z=0.5),
                                           orientation=T["geometry_msgs/msg/Quaternion"](
                                               x=0.0, y=0.0, z=np.sin(yaw / 2), w=np.cos(yaw / 2)))
    rng = np.random.default_rng(2)
    poses = [pose(*rng.normal(size=3)) for _ in range(5)]
    status = T["diagnostic_msgs/msg/DiagnosticStatus"](level=2, name="riskbound planner", message="infeasible",
                                                       hardware_id="/p", values=[
                                                           T["diagnostic_msgs/msg/KeyValue"](key=k, value=v)
                                                           for k, v in (("solve_ms", "12.5"), ("status", "infeasible"),
                                                                        ("reason", "ünïcode ok"))])
    return T, header, poses, status


def test_fast_decoders_agree_with_the_type_store():
    T, header, poses, status = _cdr_pairs()
    pose_array = T["geometry_msgs/msg/PoseArray"](header=header, poses=poses)
    raw = TYPESTORE.serialize_cdr(pose_array, "geometry_msgs/msg/PoseArray")
    stamp, frame, values = cdr.pose_array(raw)
    assert (stamp, frame) == (12.5, "odom_frame")
    np.testing.assert_array_equal(values[:, 0:3], [[p.position.x, p.position.y, p.position.z] for p in poses])
    np.testing.assert_array_equal(values[:, 5:7], [[p.orientation.z, p.orientation.w] for p in poses])

    path = T["nav_msgs/msg/Path"](header=header, poses=[T["geometry_msgs/msg/PoseStamped"](header=header, pose=p)
                                                        for p in poses])
    _, _, stamps, values = cdr.path(TYPESTORE.serialize_cdr(path, "nav_msgs/msg/Path"))
    np.testing.assert_array_equal(stamps, 12.5)
    np.testing.assert_array_equal(values[:, 0:2], [[p.position.x, p.position.y] for p in poses])

    level, name, message, hardware, kv = cdr.diagnostic_status(
        TYPESTORE.serialize_cdr(status, "diagnostic_msgs/msg/DiagnosticStatus"))
    assert (level, name, message, hardware) == (2, "riskbound planner", "infeasible", "/p")
    assert kv == {"solve_ms": "12.5", "status": "infeasible", "reason": "ünïcode ok"}

    array = T["diagnostic_msgs/msg/DiagnosticArray"](header=header, status=[status, status])
    stamp, statuses = cdr.diagnostic_array(TYPESTORE.serialize_cdr(array, "diagnostic_msgs/msg/DiagnosticArray"))
    assert stamp == 12.5 and len(statuses) == 2 and statuses[1][4]["solve_ms"] == "12.5"

    twist = T["geometry_msgs/msg/TwistStamped"](header=header, twist=T["geometry_msgs/msg/Twist"](
        linear=T["geometry_msgs/msg/Vector3"](x=0.5, y=-0.25, z=0.0),
        angular=T["geometry_msgs/msg/Vector3"](x=0.0, y=0.0, z=0.75)))
    _, _, values = cdr.twist_stamped(TYPESTORE.serialize_cdr(twist, "geometry_msgs/msg/TwistStamped"))
    np.testing.assert_array_equal(values, [0.5, -0.25, 0.0, 0.0, 0.0, 0.75])

    ids = T["std_msgs/msg/UInt32MultiArray"](layout=T["std_msgs/msg/MultiArrayLayout"](dim=[
        T["std_msgs/msg/MultiArrayDimension"](label="walker_id", size=3, stride=3)], data_offset=0),
        data=np.array([7, 4_000_000_000, 0], dtype=np.uint32))
    np.testing.assert_array_equal(cdr.uint32_multi_array(TYPESTORE.serialize_cdr(ids, "std_msgs/msg/UInt32MultiArray")),
                                  [7, 4_000_000_000, 0])

    covariance = np.arange(36, dtype=float)
    odom = T["nav_msgs/msg/Odometry"](header=header, child_frame_id="base", pose=T[
        "geometry_msgs/msg/PoseWithCovariance"](pose=poses[0], covariance=covariance), twist=T[
        "geometry_msgs/msg/TwistWithCovariance"](twist=twist.twist, covariance=-covariance))
    _, frame, child, values = cdr.odometry(TYPESTORE.serialize_cdr(odom, "nav_msgs/msg/Odometry"))
    assert (frame, child) == ("odom_frame", "base")
    np.testing.assert_array_equal(values[7:43], covariance)
    np.testing.assert_array_equal(values[43:49], [0.5, -0.25, 0.0, 0.0, 0.0, 0.75])
    np.testing.assert_array_equal(values[49:85], -covariance)


def test_fast_decoders_refuse_damaged_bytes():
    T, header, poses, status = _cdr_pairs()
    raw = TYPESTORE.serialize_cdr(T["geometry_msgs/msg/PoseArray"](header=header, poses=poses),
                                  "geometry_msgs/msg/PoseArray")
    with pytest.raises(cdr.CdrLayoutError):
        cdr.pose_array(raw[: len(raw) // 2])
    with pytest.raises(cdr.CdrLayoutError):
        cdr.pose_array(b"\x01\x00" + raw[2:])  # big-endian marker: not the layout read here
    raw = TYPESTORE.serialize_cdr(status, "diagnostic_msgs/msg/DiagnosticStatus")
    with pytest.raises(cdr.CdrLayoutError):
        cdr.diagnostic_status(raw[:-3])


def test_forecast_cloud_written_for_bags_matches_the_codec():
    # The synthetic bags' obstacle_forecast is built with the bag type store; the reference is the
    # package's one codec (riskbound.ros.forecast_codec): same fields, same bytes, same decode.
    rng = np.random.default_rng(9)
    J, S = 4, 6
    A = rng.normal(size=(J, S, 2, 2))
    forecast = ObstacleForecast(rng.choice(1000, J, replace=False), 0.1 * np.arange(S), rng.normal(size=(J, S, 2)),
                                rng.uniform(-3, 3, (J, S)), A @ np.swapaxes(A, -1, -2), rng.uniform(0.1, 0.5, (J, 2)))
    raw = forecast_cloud_cdr(7.25, forecast, frame_id="odom")
    from_bag = TYPESTORE.deserialize_cdr(raw, "sensor_msgs/msg/PointCloud2")
    reference = forecast_to_cloud(forecast, Header(stamp=Time(sec=7, nanosec=250_000_000), frame_id="odom"))
    assert bytes(from_bag.data) == bytes(reference.data)
    assert [(f.name, f.offset, f.datatype, f.count) for f in from_bag.fields] == \
        [(f.name, f.offset, f.datatype, f.count) for f in reference.fields]
    assert (from_bag.point_step, from_bag.width, from_bag.height) == (reference.point_step, reference.width, 1)
    decoded, expected = cloud_to_forecast(from_bag), cloud_to_forecast(reference)
    for name in ("track_ids", "times", "positions", "headings", "covariances", "half_extents"):
        np.testing.assert_array_equal(getattr(decoded, name), getattr(expected, name))
