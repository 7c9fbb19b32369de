"""Truth motion: speed profiles, integration, faults and the camera pose."""

import math

import cv2
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import cumulative_simpson
from scipy.linalg import expm

from vidodo.errors import InputError
from vidodo.synth.motion import GRID_DT_S, camera_pose_fn, simulate_motion, trapezoid
from vidodo.synth.scenario import load_scenario


@pytest.fixture(scope="module")
def default_motion():
    sc = load_scenario("default")
    return sc, simulate_motion(sc, 0)


def _expm_se2(ux, uy, th):
    """Group exponential of the se(2) matrix, by scipy.linalg.expm (independent of vidodo)."""
    return expm(np.array([[0.0, -th, ux], [th, 0.0, uy], [0.0, 0.0, 0.0]]))


@pytest.mark.parametrize("length, v, a", [(2.0, 0.8, 1.5), (0.2, 0.8, 1.5), (math.pi, 3.0, 9.0)])
def test_trapezoid_closed_form(length, v, a):
    """Trapezoidal profile (common practice): T = L/v + v/a when L >= v^2/a, else 2 sqrt(L/a)."""
    tau = np.linspace(0, 10, 200001)
    s, dur = trapezoid(tau, length, v, a)
    expected = length / v + v / a if length >= v * v / a else 2 * math.sqrt(length / a)
    assert dur == pytest.approx(expected, rel=1e-12)
    assert s[-1] == pytest.approx(length, abs=1e-12)
    vel = np.gradient(s, tau)
    acc = np.diff(s, 2) / (tau[1] - tau[0]) ** 2
    assert vel.max() <= v * (1 + 1e-6)
    assert np.abs(acc).max() <= a * (1 + 1e-3)
    assert np.all(np.diff(s) >= -1e-15)


def test_integrated_truth_velocity_reproduces_truth_path(default_motion):
    """Floor-frame velocity integrated with Simpson's rule (scipy) gives pose_at (< 0.1 mm)."""
    _, m = default_motion
    t = np.arange(0.0, m.duration_s, GRID_DT_S / 4)
    vel = m.floor_velocity_at(t)
    pose = m.pose_at(t)
    x = pose[0, 0] + cumulative_simpson(vel[:, 0], x=t, initial=0.0)
    y = pose[0, 1] + cumulative_simpson(vel[:, 1], x=t, initial=0.0)
    h = pose[0, 2] + cumulative_simpson(vel[:, 2], x=t, initial=0.0)
    assert np.hypot(x - pose[:, 0], y - pose[:, 1]).max() < 1e-4
    assert np.abs(h - pose[:, 2]).max() < 1e-5


def test_fault_free_path_reaches_the_planned_points():
    """Drive/turn/arc end points by construction (closed forms: straight line, circle)."""
    sc = load_scenario("default", fault=[])
    m = simulate_motion(sc)
    starts = m.segment_start_s
    # segment 1 (turn to 90 deg) starts where segment 0 (drive to (2.7432, 0.9144)) ends
    assert_allclose(m.pose_at([starts[1]])[0], [2.7432, 0.9144, 0.0], atol=1e-9)
    assert_allclose(m.pose_at([starts[2]])[0], [2.7432, 0.9144, math.pi / 2], atol=1e-9)
    # the arc (segment 3, r = 0.6096 m, +90 deg) stays on its circle about (2.1336, 2.4384)
    t = np.linspace(starts[3], starts[4], 50)
    p = m.pose_at(t)
    assert_allclose(np.hypot(p[:, 0] - 2.1336, p[:, 1] - 2.4384), 0.6096, atol=1e-9)
    assert_allclose(p[-1], [2.1336, 2.4384 + 0.6096, math.pi], atol=1e-9)
    # commanded and true motion agree without faults
    assert_allclose(m.pose, m.cmd_pose, atol=1e-12)


def test_pose_at_is_continuous_and_exact_on_nodes(default_motion):
    _, m = default_motion
    k = np.arange(0, len(m.t_s), 997)
    assert_allclose(m.pose_at(m.t_s[k]), m.pose[k], atol=1e-12)
    t = np.linspace(0, m.duration_s, 100003)
    d = np.diff(m.pose_at(t), axis=0)
    # at most 0.9 m/s and 180 deg/s (the path limits) between close samples
    dt = t[1] - t[0]
    assert np.hypot(d[:, 0], d[:, 1]).max() <= 0.9 * dt * 1.001 + 0.02 * dt
    assert np.abs(d[:, 2]).max() <= math.pi * dt * 1.001 + 0.2 * dt  # + shove rotation


def test_impact_stalls_body_while_wheels_turn(default_motion):
    sc, m = default_motion
    ev = next(e for e in m.faults if e.kind == "impact")
    f = ev.fault
    assert ev.t_start_s == pytest.approx(m.segment_start_s[2] + f.at_s)
    t = np.linspace(ev.t_start_s + 0.1, ev.t_start_s + f.duration_s - 0.01, 20)
    true_speed = np.hypot(*m.twist_at(t)[:, :2].T)
    cmd_speed = np.hypot(*m.twist_at(t, commanded=True)[:, :2].T)
    assert true_speed.max() < 1e-9 and cmd_speed.min() > 0.3
    # the deceleration right after contact is the scenario's decel_mps2 (finite difference)
    t0 = ev.t_start_s
    v = np.hypot(*m.twist_at([t0 + 0.005, t0 + 0.015])[:, :2].T)
    assert (v[0] - v[1]) / 0.01 == pytest.approx(f.decel_mps2, rel=0.05)
    # magnitude: commanded travel minus true travel over the window
    tt = np.array([ev.t_start_s, ev.t_end_s])
    cmd = m.commanded_pose_at(tt)
    tru = m.pose_at(tt)
    lost = np.hypot(*(cmd[1] - cmd[0])[:2]) - np.hypot(*(tru[1] - tru[0])[:2])
    assert ev.magnitude == pytest.approx(lost, abs=1e-6)


def test_shove_moves_body_by_the_group_exponential(default_motion):
    """Constant-direction twist -> displacement exp(xi) (se(2) matrix exponential, scipy)."""
    _, m = default_motion
    ev = next(e for e in m.faults if e.kind == "shove")
    f = ev.fault
    # a few grid steps either side, where the robot is otherwise still
    p0, p1 = m.pose_at([ev.t_start_s - 0.003, ev.t_end_s + 0.003])
    c, s = math.cos(p0[2]), math.sin(p0[2])
    g0 = np.array([[c, -s, p0[0]], [s, c, p0[1]], [0, 0, 1]])
    g1 = g0 @ _expm_se2(f.dx_m, f.dy_m, f.dheading_rad)
    assert_allclose(p1[:2], g1[:2, 2], atol=1e-9)
    assert p1[2] - p0[2] == pytest.approx(f.dheading_rad, abs=1e-12)
    # the drive wheels are still meanwhile
    assert np.abs(m.twist_at(np.linspace(ev.t_start_s, ev.t_end_s, 9), commanded=True)).max() == 0


def test_faults_in_the_wrong_place_are_refused():
    with pytest.raises(InputError, match="place the shove in a 'wait'"):
        simulate_motion(load_scenario("default", **{"fault.2.segment": 0}))
    with pytest.raises(InputError, match="nearly still"):
        simulate_motion(load_scenario("default", **{"fault.1.segment": 4}))


def test_deterministic_and_cut_short():
    sc = load_scenario("mecanum-handheld")
    a, b = simulate_motion(sc, 3), simulate_motion(sc, 3)
    assert np.array_equal(a.pose, b.pose)
    short = simulate_motion(load_scenario("mecanum-handheld", **{"video.max_duration_s": 4.0}))
    assert short.duration_s == pytest.approx(4.0)
    assert all(e.t_start_s < 4.0 for e in short.faults)
    assert_allclose(short.pose, a.pose[: len(short.pose)], atol=1e-12)


def test_tripod_camera_looks_at_the_look_at_point():
    """The look-at point projects to the principal point (cv2.projectPoints, no distortion)."""
    sc = load_scenario("default", **{"camera.distortion": [0.0] * 5})
    rvec, tvec = camera_pose_fn(sc)(0.0)
    cam = sc.camera_profile()
    uv, _ = cv2.projectPoints(np.array([sc.camera.look_at_m]), rvec, tvec, cam.matrix, None)
    assert_allclose(uv.ravel(), [cam.cx_px, cam.cy_px], atol=1e-9)
    rot = cv2.Rodrigues(rvec)[0]
    assert_allclose(-rot.T @ tvec, sc.camera.position_m, atol=1e-12)
    # image rows run downwards: a point above the look-at point is higher in the image
    up = np.array([sc.camera.look_at_m]) + [0, 0, 0.3]
    uv2, _ = cv2.projectPoints(up, rvec, tvec, cam.matrix, None)
    assert uv2.ravel()[1] < cam.cy_px


@pytest.mark.parametrize("roll_deg", [180.0, 90.0])
def test_rolled_camera_turns_the_image_about_the_principal_point(roll_deg):
    """A camera turned about its optical axis by roll sees every point turned by roll
    about the principal point, same position and aim (pinhole geometry, common
    practice); checked with cv2.projectPoints against the level camera's image."""
    level = load_scenario("default", **{"camera.distortion": [0.0] * 5})
    rolled = load_scenario("default", **{"camera.distortion": [0.0] * 5,
                                         "camera.roll_deg": roll_deg})
    cam = level.camera_profile()
    pts = np.array([[0.5, 0.5, 0.0], [3.0, 1.0, 0.26], [1.8, 3.0, 0.0]])
    uv = [cv2.projectPoints(pts, *camera_pose_fn(sc)(0.0), cam.matrix, None)[0].reshape(-1, 2)
          for sc in (level, rolled)]
    c, s = math.cos(math.radians(roll_deg)), math.sin(math.radians(roll_deg))
    d = uv[0] - [cam.cx_px, cam.cy_px]
    assert_allclose(uv[1], np.column_stack([c * d[:, 0] + s * d[:, 1],
                                            -s * d[:, 0] + c * d[:, 1]])
                    + [cam.cx_px, cam.cy_px], atol=1e-6)
    rot = cv2.Rodrigues(camera_pose_fn(rolled)(0.0)[0])[0]
    assert_allclose(-rot.T @ camera_pose_fn(rolled)(0.0)[1], rolled.camera.position_m,
                    atol=1e-12)


def test_handheld_camera_sways_slowly_and_deterministically():
    sc = load_scenario("mecanum-handheld")
    f, g = camera_pose_fn(sc, 5), camera_pose_fn(sc, 5)
    r0, t0 = f(0.0)
    assert_allclose(g(0.0)[0], r0)
    rots = [cv2.Rodrigues(f(t)[0])[0] for t in np.linspace(0, 10, 101)]
    ang = [np.degrees(np.arccos(np.clip((np.trace(rots[0].T @ r) - 1) / 2, -1, 1)))
           for r in rots]
    assert 0.1 < max(ang) < 3 * math.degrees(sc.camera.sway_rad) * 1.2 + 1e-9
    step = [np.degrees(np.arccos(np.clip((np.trace(a.T @ b) - 1) / 2, -1, 1)))
            for a, b in zip(rots, rots[1:], strict=False)]
    assert max(step) < 0.5  # per 0.1 s: slow sway, no jumps
