"""Encoders, IMU and log clock against closed forms and independent implementations."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from vidodo.outputs import column_prefix
from vidodo.se2 import relative_pose
from vidodo.synth.motion import simulate_motion
from vidodo.synth.scenario import load_scenario
from vidodo.synth.sensors import (
    source_increments,
    synthesize_log,
    unwrap_counter,
    wrap_counter,
    wrap_deg,
)
from vidodo.wheels import solve_twist

# Fine encoders for the "< 1 mm" checks: 8192 counts per wheel revolution on the drive
# wheels (a through-bore encoder on the axle, common practice). With the default
# 537.6 counts per revolution one count is 0.56 mm of rim travel and the heading
# quantisation (2 counts / track width ~ 3 mrad) alone moves the path by more than a
# millimetre over a few metres; that is the encoder's honest limit, not a bug.
FINE = {"drivetrain.ticks_per_rev": 8192, "drivetrain.gear_ratio": 1.0,
        "imu.noise_deg": 0.0, "imu.bias_dps": 0.0, "imu.bias_walk_dps_per_sqrt_s": 0.0,
        "imu.scale_error": 0.0}


def _synth(name, seed=0, **ov):
    sc = load_scenario(name, **ov)
    m = simulate_motion(sc, seed)
    return sc, m, synthesize_log(sc, m, seed)


def test_wrap_counter_matches_numpy_fixed_width_integers():
    """Two's-complement wrap: numpy's int16/int32 casts are the reference."""
    v = np.array([0, 1, 32767, 32768, 65535, 65536, -1, -32768, -32769, 10**9, -(10**9)])
    assert_allclose(wrap_counter(v, 16), v.astype(np.int16))
    assert_allclose(wrap_counter(v * 70000, 32), (v * 70000).astype(np.int32))


@settings(max_examples=50, deadline=None)
@given(st.lists(st.integers(-30000, 30000), min_size=1, max_size=60),
       st.integers(-(2**40), 2**40))
def test_unwrap_recovers_cumulative_counts(steps, start):
    """Differences modulo 2**bits recover counts when each step is under half the range."""
    true = start + np.concatenate([[0], np.cumsum(steps)])
    got = unwrap_counter(wrap_counter(true, 16), 16)
    assert_allclose(got - got[0], true - true[0])


def test_wrap_deg_half_open_interval():
    """(-180, 180]: the same angle as np.angle(exp(i x)) gives, which is (-pi, pi]."""
    x = np.concatenate([np.linspace(-1000, 1000, 4001), [180.0, -180.0, 540.0, -540.0]])
    ref = np.degrees(np.angle(np.exp(1j * np.radians(x))))
    w = wrap_deg(x)
    assert np.all((w > -180) & (w <= 180))
    assert_allclose(np.cos(np.radians(w - ref)), 1.0, atol=1e-12)
    assert wrap_deg(-180.0) == 180.0


def test_straight_drive_ticks_are_floor_of_revolutions_times_cpr():
    """Ticks = floor(distance / (2 pi r) * CPR * gear) (wheel circumference, common practice)."""
    sc, m, log = _synth("default", fault=[])
    # last sample of the first straight drive (from x = 0.9144 m along +x)
    i = np.searchsorted(log.t_video_s, m.segment_start_s[1]) - 1
    dist = m.pose_at(log.t_video_s[i:i + 1])[0, 0] - 0.9144
    assert dist > 1.5
    dt = sc.drivetrain
    expected = math.floor(dist / (2 * math.pi * dt.wheel_radius_m) * dt.ticks_per_rev
                          * dt.gear_ratio + 1e-9)
    assert log.log["left_ticks"].iloc[i] == expected
    assert log.log["right_ticks"].iloc[i] == -expected - 1  # sign -1: floor(-x) = -x - 1
    pods = sc.tracking
    pod = math.floor(dist / (2 * math.pi * pods.radius_m) * pods.ticks_per_rev + 1e-9)
    assert log.log["pod_left_ticks"].iloc[i] == pod
    assert log.log["pod_perpendicular_ticks"].iloc[i] == 0


def test_sixteen_bit_counters_wrap_and_unwrap_to_the_continuous_count():
    sc, m, log = _synth("tank-tripod")
    for w in sc.robot.wheels:
        raw = log.log[w.column].to_numpy()
        assert w.counter_bits == 16
        assert raw.min() >= -32768 and raw.max() <= 32767
        cont = np.floor(log.ticks_continuous[w.name] + 1e-9).astype(np.int64)
        un = unwrap_counter(raw, 16)
        assert_allclose(un - un[0], cont - cont[0])
    # the tracking wheels travel far enough to wrap at least once
    assert np.abs(np.diff(log.log["pod_left_ticks"].to_numpy())).max() > 32768


@pytest.mark.parametrize("name", ["default", "mecanum-handheld", "tank-tripod"])
def test_closed_forms_agree_with_the_wheel_least_squares(name):
    """Closed-form drivetrain formulas vs vidodo.wheels.solve_twist on the same ticks.

    Sources: differential drive (Siegwart et al. 2011, sec. 3.2), mecanum inverse of
    Lynch & Park (2017) eq. 13.10, three-wheel formulas from v + w x r.
    """
    sc, m, log = _synth(name)
    incs = source_increments(sc, log.log, log.imu_heading_rad)
    robot = sc.robot
    for src in robot.resolved_sources():
        wheels = [robot.wheel(n) for n in src.wheels]
        rim = np.column_stack([
            w.sign * unwrap_counter(log.log[w.column].to_numpy(), w.counter_bits)
            * w.metres_per_tick for w in wheels])
        d = np.diff(rim, axis=0)
        om = np.diff(log.imu_heading_rad) if src.heading == "imu" else None
        ref = solve_twist(wheels, d, omega=om, no_sideways=src.no_sideways)
        assert_allclose(incs[src.name], ref, atol=1e-12)


@pytest.mark.parametrize("name", ["default", "mecanum-handheld", "tank-tripod", "vfr-phone"])
def test_logged_ticks_reproduce_truth_outside_faults(name):
    """Integrating the logged, quantised ticks with the exact profile reproduces the truth
    path to < 1 mm in every fault-free stretch (anchored at the stretch's start).

    Encoders as in ``FINE`` above; the tracking wheels keep their scenario resolution.
    """
    sc, m, log = _synth(name, **FINE)
    truth = m.pose_at(log.t_video_s)
    bad = np.zeros(len(truth), bool)
    for e in m.faults:
        bad |= (log.t_video_s >= e.t_start_s - 0.02) & (log.t_video_s <= e.t_end_s + 0.02)
    good = np.flatnonzero(~bad)
    stretches = np.split(good, np.flatnonzero(np.diff(good) > 1) + 1)
    assert len(stretches) >= 2 and sum(map(len, stretches)) > 0.8 * len(truth)
    odo = log.odometry_ideal
    for src in sc.robot.resolved_sources():
        p = column_prefix(src.name)
        est = odo[[f"{p}_x_m", f"{p}_y_m", f"{p}_heading_rad"]].to_numpy()
        for r in stretches:
            a = relative_pose(np.repeat(truth[r[:1]], len(r), 0), truth[r])
            b = relative_pose(np.repeat(est[r[:1]], len(r), 0), est[r])
            err = np.hypot(a[:, 0] - b[:, 0], a[:, 1] - b[:, 1]).max()
            assert err < 1e-3, f"{name} {src.name}: {err * 1e3:.3f} mm"


def test_faults_show_in_the_right_sensors():
    sc, m, log = _synth("default", **FINE)
    t = log.t_video_s
    lift = next(e for e in m.faults if e.kind == "pod_lift")
    inside = (t > lift.t_start_s) & (t < lift.t_end_s)
    left = log.log["pod_left_ticks"].to_numpy()[inside]
    right = log.log["pod_right_ticks"].to_numpy()[inside]
    assert np.all(left == left[0]) and np.ptp(right) > 100
    imp = next(e for e in m.faults if e.kind == "impact")
    inside = (t > imp.t_start_s + 0.1) & (t < imp.t_start_s + imp.fault.duration_s)
    assert np.ptp(log.log["left_ticks"].to_numpy()[inside]) > 100  # wheels spin
    assert np.ptp(log.log["pod_left_ticks"].to_numpy()[inside]) == 0  # body stalled
    jump = next(e for e in m.faults if e.kind == "heading_jump")
    i = np.searchsorted(t, jump.t_start_s)
    true_dh = np.degrees(np.diff(m.pose_at(t[i - 1:i + 1])[:, 2]))[0]
    logged_dh = wrap_deg(np.diff(log.log["imu_heading_deg"].to_numpy()[i - 1:i + 1]))[0]
    assert logged_dh - true_dh == pytest.approx(5.0, abs=1e-3)


def test_log_clock_maps_to_video_clock():
    """t_log = (t_video - offset)(1 + e): logged times invert to the sample instants."""
    sc, m, log = _synth("default")
    lg = sc.log
    t_log = log.log["time_ms"].to_numpy() * 1e-3
    assert_allclose(t_log, log.t_log_s, atol=1e-12)
    assert_allclose((log.t_video_s - lg.clock_offset_s) * (1 + lg.clock_rate_error), t_log,
                    atol=1e-12)
    period = np.diff(t_log)
    assert period.mean() == pytest.approx(1 / lg.rate_hz, rel=0.01)
    assert 0 < period.std() < 3 * lg.jitter_s


def test_imu_scale_error_and_wrap():
    """Noise-free IMU with scale error e reads (1 + e) times the true heading change."""
    ov = {"imu.noise_deg": 0.0, "imu.bias_dps": 0.0, "imu.bias_walk_dps_per_sqrt_s": 0.0,
          "imu.scale_error": 0.01}
    sc, m, log = _synth("default", **ov)
    deg = log.log["imu_heading_deg"].to_numpy()
    assert deg.max() <= 180 and deg.min() > -180
    true = m.pose_at(log.t_video_s)[:, 2]
    jump = np.where(log.t_video_s >= next(
        e.t_start_s for e in m.faults if e.kind == "heading_jump"), np.radians(5.0), 0)
    expected = 1.01 * (true - true[0]) + jump
    assert_allclose(log.imu_heading_rad, expected, atol=1e-5)


def test_logged_pose_is_the_robots_estimate_in_its_units():
    sc, m, log = _synth("default")
    odo = log.odometry_ideal
    x_in = log.log["pose_x_in"].to_numpy()
    # the firmware integrates with the mid-step heading; the exponential differs by far
    # less than a millimetre over 10 ms steps (domain check, Lynch & Park 2017 sec. 13.4)
    assert_allclose(x_in * 0.0254, odo["tracking_imu_x_m"], atol=1e-3)
    h = log.log["pose_heading_deg"].to_numpy()
    assert h.max() <= 180 and h.min() > -180


def test_same_seed_same_log_other_seed_other_noise():
    a = _synth("default", seed=1)[2].log
    b = _synth("default", seed=1)[2].log
    c = _synth("default", seed=2)[2].log
    assert a.equals(b)
    assert not a["imu_heading_deg"].equals(c["imu_heading_deg"])
