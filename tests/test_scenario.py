"""Scenario files: loading, overrides, errors, and the profiles they imply."""

import math

import cv2
import numpy as np
import pytest
from numpy.testing import assert_allclose

from vidodo.errors import InputError
from vidodo.profiles import load_robot
from vidodo.synth.scenario import load_scenario, scenario_names
from vidodo.wheels import check_observable


def test_builtins_load_and_cover_the_variants():
    names = scenario_names()
    assert "default" in names
    kinds = set()
    for name in names:
        sc = load_scenario(name)
        kinds.add((sc.drivetrain.kind, sc.tracking.layout, sc.camera.mount,
                   sc.video.variable_timing))
        # every source a scenario declares must be observable (single wheel model)
        for src in sc.robot.resolved_sources():
            check_observable([sc.robot.wheel(n) for n in src.wheels],
                             omega_known=src.heading == "imu", no_sideways=src.no_sideways)
    assert ("tank", "three", "tripod", False) in kinds
    assert ("mecanum", "two+imu", "handheld", False) in kinds
    assert any(k[3] for k in kinds)


def test_focal_length_from_field_of_view_matches_opencv():
    """fx = (W/2) / tan(hfov/2) (pinhole model); checked with cv2.calibrationMatrixValues."""
    sc = load_scenario("default", **{"camera.hfov_deg": 75.0, "video.width_px": 640,
                                     "video.height_px": 360})
    cam = sc.camera_profile()
    fovx, _fovy, *_ = cv2.calibrationMatrixValues(cam.matrix, (640, 360), 6.4, 3.6)
    # OpenCV measures the angle to the principal point at (W-1)/2 from pixel edges 0 and W
    assert fovx == pytest.approx(75.0, abs=0.1)
    assert cam.cx_px == 319.5 and cam.cy_px == 179.5


def test_overrides_dotted_and_double_underscore():
    a = load_scenario("default", video__width_px=640, **{"video.height_px": 360})
    assert (a.video.width_px, a.video.height_px) == (640, 360)
    b = load_scenario("default", **{"fault": []})
    assert b.faults == ()
    c = load_scenario("default", **{"fault.1.duration_s": 0.9})
    assert c.faults[1].duration_s == 0.9
    d = load_scenario("default", **{"video.codec": "hevc", "log.rate_hz": "50"})
    assert d.video.codec == "hevc" and d.log.rate_hz == 50.0  # string parsed as TOML


@pytest.mark.parametrize("overrides, match", [
    ({"video.codec": "vp9"}, r"\[video\]: key 'codec'"),
    ({"drivetrain.kind": "swerve"}, r"\[drivetrain\]: key 'kind'"),
    ({"segment.0.kind": "strafe"}, "needs a mecanum"),
    ({"fault.0.wheel": "left"}, "not a tracking wheel"),
    ({"camera.hfov_deg": 200.0}, "hfov_deg"),
    ({"tracking.signs": [1, 1]}, "'signs' must be a list of 3"),
    ({"drivetrain.counter_bits": 12}, "counter_bits"),
    ({"bogus": 1}, "unknown key"),
    ({"fault.0.segment": 99}, "'segment' must be"),
    ({"camera.z_m": 0.1}, "below 0.3 m"),
    ({"camera.look_at_z_m": 3.0}, "must be below the camera"),
    ({"log.jitter_s": 0.01}, "below half the sample period"),
])
def test_bad_values_name_the_key(overrides, match):
    with pytest.raises(InputError, match=match):
        load_scenario("default", **overrides)


def test_unknown_name_lists_builtins(tmp_path):
    with pytest.raises(InputError, match="built-ins are"):
        load_scenario("no-such-scenario")
    with pytest.raises(InputError, match="file not found"):
        load_scenario(tmp_path / "missing.toml")


def test_written_scenario_reloads_identically(tmp_path):
    sc = load_scenario("mecanum-handheld", **{"video.fps": 60.0})
    p = tmp_path / "s.toml"
    p.write_text(sc.to_toml())
    again = load_scenario(p)
    assert again.data == sc.data
    assert again.faults == sc.faults and again.segments == sc.segments


def test_robot_profile_round_trips_through_toml(tmp_path):
    from vidodo.profiles import dump_toml, robot_to_dict

    for name in scenario_names():
        robot = load_scenario(name).robot
        p = tmp_path / f"{name}.toml"
        p.write_text(dump_toml(robot_to_dict(robot)))
        assert load_robot(p) == robot


def test_mecanum_layout_is_the_published_x_configuration():
    """Lynch & Park (2017) eq. 13.10: rows [1, -1, -k], [1, 1, k], [1, 1, -k], [1, -1, k]."""
    from vidodo.wheels import wheel_rows

    sc = load_scenario("mecanum-handheld")
    drive = [w for w in sc.robot.wheels if w.powered]
    k = sc.drivetrain.wheelbase_m / 2 + sc.drivetrain.track_m / 2
    expected = np.array([[1, -1, -k], [1, 1, k], [1, 1, -k], [1, -1, k]], float)
    assert_allclose(wheel_rows(drive), expected, atol=1e-12)
    assert [w.name for w in drive] == ["front_left", "front_right", "rear_left", "rear_right"]
    assert math.isclose(drive[0].metres_per_tick,
                        2 * math.pi * 0.048 / (28 * 13.7))


def test_profile_error_entries_are_checked():
    with pytest.raises(InputError, match="part must be 'imu' or a wheel"):
        load_scenario("default", profile_error=[{"part": "nope", "key": "x_m", "value": 1.0}])
    with pytest.raises(InputError, match="must be positive"):
        load_scenario("default",
                      profile_error=[{"part": "left", "key": "radius_m", "value": -1.0}])
    sc = load_scenario("default", profile_error=[{"part": "imu", "key": "scale", "value": 1.02}])
    assert sc.written_robot.imu.scale == 1.02 and sc.robot.imu.scale == 1.0


def test_scenario_text_is_stable():
    from vidodo.synth.scenario import scenario_text

    assert scenario_text(load_scenario("default")) == scenario_text(load_scenario("default"))
    assert scenario_text(load_scenario("default", video__fps=60.0)) != scenario_text(
        load_scenario("default"))
