"""Round trips that must hold for any input (property-based, with hypothesis).

References: the SE(2) exponential and logarithm are inverses on |dtheta| < pi (Lynch &
Park, *Modern Robotics*, 2017, sec. 3.3 and 13.4); Umeyama's closed form recovers an
exact rigid motion from noise-free correspondences (Umeyama, IEEE TPAMI 13(4):376,
1991); encoder counts and rim travel are inverse linear maps; a profile written with
``dump_toml`` reads back unchanged (TOML 1.0 round trip, Python's ``tomllib``).
"""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from vidodo.metrics import umeyama
from vidodo.profiles import Imu, Marker, RobotProfile, Wheel, dump_toml, load_robot, robot_to_dict
from vidodo.se2 import exp_increment, log_increment, relative_pose, wrap_angle
from vidodo.wheels import rim_to_ticks, solve_twist, ticks_to_rim, twist_to_rim

finite = st.floats(-5.0, 5.0, allow_nan=False)
angle = st.floats(-3.1, 3.1, allow_nan=False)


@settings(max_examples=200, deadline=None)
@given(finite, finite, angle)
def test_se2_log_undoes_exp(ux, uy, dtheta):
    """log(exp(u)) = u for every twist whose rotation is below half a turn."""
    dx, dy = exp_increment(ux, uy, dtheta)
    back = log_increment(dx, dy, dtheta)[0]
    np.testing.assert_allclose(back, [ux, uy, dtheta], atol=1e-9 * (1 + abs(ux) + abs(uy)))


@settings(max_examples=200, deadline=None)
@given(finite, finite, angle, finite, finite, angle)
def test_se2_exp_undoes_log_of_a_relative_pose(xa, ya, ha, xb, yb, hb):
    """exp(log(a^-1 b)) = a^-1 b for any two poses."""
    rel = relative_pose([xa, ya, ha], [xb, yb, hb])[0]
    u = log_increment(*rel)[0]
    dx, dy = exp_increment(u[0], u[1], u[2])
    np.testing.assert_allclose([float(dx), float(dy)], rel[:2], atol=1e-9)
    assert abs(wrap_angle(u[2] - rel[2])) < 1e-12


@settings(max_examples=100, deadline=None)
@given(angle, finite, finite, st.integers(0, 2**32 - 1))
def test_umeyama_recovers_an_exact_rigid_motion(theta, tx, ty, seed):
    """Noise-free points moved by any rotation and translation: the fit gives them back."""
    rng = np.random.default_rng(seed)
    src = rng.uniform(-2.0, 2.0, (6, 2))
    src[1] = src[0] + [0.5, 0.0]  # never all on one point
    c, s = math.cos(theta), math.sin(theta)
    dst = src @ np.array([[c, -s], [s, c]]).T + [tx, ty]
    a = umeyama(src, dst)
    assert abs(wrap_angle(a.angle_rad - theta)) < 1e-9
    np.testing.assert_allclose(a.translation, [tx, ty], atol=1e-9)
    np.testing.assert_allclose(a.apply(src), dst, atol=1e-9)


wheel = st.builds(
    lambda r, tpr, gear, sign, d, x, y: Wheel("w", "w", x, y, d, r, tpr, gear_ratio=gear,
                                             sign=sign),
    st.floats(0.01, 0.2), st.sampled_from([8192.0, 2000.0, 537.7, 28.0]),
    st.floats(0.2, 20.0), st.sampled_from([1, -1]), angle, st.floats(-0.3, 0.3),
    st.floats(-0.3, 0.3))


@settings(max_examples=200, deadline=None)
@given(wheel, finite, finite, angle)
def test_wheel_twist_to_ticks_and_back(w, vx, vy, omega):
    """Twist -> rim travel -> counts -> rim travel: the rim travel comes back."""
    rim = twist_to_rim([w], [vx, vy, omega])
    ticks = rim_to_ticks(w, rim)
    np.testing.assert_allclose(ticks_to_rim(w, ticks), rim, rtol=1e-12, atol=1e-15)


@settings(max_examples=100, deadline=None)
@given(finite, finite, angle, st.floats(0.1, 0.4), st.floats(0.02, 0.1))
def test_three_omni_wheels_give_the_twist_back(vx, vy, omega, radius_m, r_wheel_m):
    """Three omni wheels 120 degrees apart observe any twist; solving their rim travel
    gives it back (Lynch & Park 2017, eq. 13.6 with zero roller angle)."""
    wheels = [Wheel(f"w{k}", f"w{k}", radius_m * math.cos(a), radius_m * math.sin(a),
                    a + math.pi / 2, r_wheel_m, 2000.0)
              for k, a in enumerate((0.0, 2 * math.pi / 3, 4 * math.pi / 3))]
    rim = twist_to_rim(wheels, [vx, vy, omega])
    np.testing.assert_allclose(solve_twist(wheels, rim)[0], [vx, vy, omega], atol=1e-9)


name = st.text("abcdefghijklmnopqrstuvwxyz_", min_size=1, max_size=8)
robot = st.builds(
    lambda n, dims, wheels, imu: RobotProfile(
        name=n, length_m=dims[0], width_m=dims[1], height_m=dims[2],
        markers=(Marker(3, "DICT_APRILTAG_36h11", 0.08, 0.01, -0.02, dims[2], 0.5),),
        wheels=tuple(Wheel(f"{n}{k}", f"enc_{k}", *w) for k, w in enumerate(wheels)),
        time_column="t", time_unit="ms", imu=Imu("heading", scale=imu) if imu else None),
    name, st.tuples(st.floats(0.1, 0.6), st.floats(0.1, 0.6), st.floats(0.05, 0.5)),
    st.lists(st.tuples(st.floats(-0.3, 0.3), st.floats(-0.3, 0.3), angle, st.floats(0.01, 0.1),
                       st.floats(100.0, 9000.0)), min_size=1, max_size=4),
    st.one_of(st.none(), st.floats(0.9, 1.1)))


@settings(max_examples=60, deadline=None)
@given(robot)
def test_robot_profile_dump_then_load(tmp_path_factory, r):
    """A robot profile written as TOML reads back equal (angles to 1e-12 rad after the
    round trip through degrees)."""
    path = tmp_path_factory.mktemp("profile") / "robot.toml"
    path.write_text(dump_toml(robot_to_dict(r)), encoding="utf-8")
    back = load_robot(path)
    assert (back.name, back.time_column, back.time_unit, back.imu) == \
        (r.name, r.time_column, r.time_unit, r.imu)
    for a, b in zip(back.wheels, r.wheels, strict=True):
        assert a.name == b.name and a.column == b.column
        np.testing.assert_allclose(
            [a.x_m, a.y_m, a.radius_m, a.ticks_per_rev, math.cos(a.direction_rad),
             math.sin(a.direction_rad)],
            [b.x_m, b.y_m, b.radius_m, b.ticks_per_rev, math.cos(b.direction_rad),
             math.sin(b.direction_rad)], rtol=0, atol=1e-12)
    np.testing.assert_allclose(
        [back.length_m, back.width_m, back.height_m, back.markers[0].yaw_rad],
        [r.length_m, r.width_m, r.height_m, r.markers[0].yaw_rad], atol=1e-12)
