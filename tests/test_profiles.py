"""Profile loading: round trips and one-line errors naming file and key."""

import math

import pytest

from vidodo.errors import InputError
from vidodo.profiles import (
    camera_to_dict,
    dump_toml,
    field_to_dict,
    load_camera,
    load_field,
    load_robot,
    robot_to_dict,
)

ROBOT = """
[robot]
name = "test bot"
length_m = 0.4
width_m = 0.4
height_m = 0.2

[log]
time_column = "t_ms"
time_unit = "ms"

[[marker]]
id = 3
family = "DICT_4X4_50"
size_m = 0.1
z_m = 0.3
yaw_deg = 90

[[wheel]]
name = "left"
column = "enc_l"
x_m = 0.0
y_m = 0.18
radius_m = 0.045
ticks_per_rev = 537.6
counter_bits = 16

[[wheel]]
name = "right"
column = "enc_r"
x_m = 0.0
y_m = -0.18
radius_m = 0.045
ticks_per_rev = 537.6
sign = -1

[imu]
column = "yaw_deg"
"""


def test_robot_round_trip(tmp_path):
    p = tmp_path / "robot.toml"
    p.write_text(ROBOT)
    r = load_robot(p)
    assert r.markers[0].yaw_rad == pytest.approx(math.pi / 2)
    assert r.wheel("right").sign == -1
    assert r.wheel("left").counter_bits == 16
    # two parallel plain drive wheels: the default source forbids sideways motion
    (drive,) = r.resolved_sources()
    assert drive.no_sideways
    q = tmp_path / "again.toml"
    q.write_text(dump_toml(robot_to_dict(r)))
    assert load_robot(q) == r


def test_field_and_camera_round_trip(tmp_path):
    f = tmp_path / "field.toml"
    f.write_text("[floor]\ntiles_x = 6\ntiles_y = 4\ntile_size_m = 0.6096\n")
    fp = load_field(f)
    assert fp.size_m == pytest.approx((3.6576, 2.4384))  # 6 and 4 tiles of 24 in
    assert fp.tile_corners_m().shape == (35, 2)
    f2 = tmp_path / "field2.toml"
    f2.write_text(dump_toml(field_to_dict(fp)))
    assert load_field(f2) == fp
    c = tmp_path / "cam.toml"
    c.write_text("[camera]\nwidth_px = 1280\nheight_px = 720\nfx_px = 1000\nfy_px = 1000\n"
                 "cx_px = 640\ncy_px = 360\ndistortion = [0.1, -0.02, 0, 0, 0]\n")
    cam = load_camera(c)
    c2 = tmp_path / "cam2.toml"
    c2.write_text(dump_toml(camera_to_dict(cam)))
    assert load_camera(c2) == cam


@pytest.mark.parametrize(
    ("patch", "message"),
    [
        (("radius_m = 0.045\nticks", "radius_m = -1\nticks"),
         r"\[\[wheel\]\] #1.*radius_m.*positive"),
        (("sign = -1", "sign = 2"), r"'sign' must be 1 or -1"),
        (('time_column = "t_ms"\n', ""), r"\[log\].*missing key 'time_column'"),
        (('time_unit = "ms"', 'time_unit = "minutes"'), r"time_unit.*use one of"),
        (("[imu]", "[imu"), r"not valid TOML"),
    ],
)
def test_robot_errors_name_file_and_key(tmp_path, patch, message):
    p = tmp_path / "robot.toml"
    p.write_text(ROBOT.replace(*patch, 1))
    with pytest.raises(InputError, match=message) as exc:
        load_robot(p)
    assert str(p) in str(exc.value)
    assert "\n" not in str(exc.value)


def test_missing_file():
    with pytest.raises(InputError, match="file not found"):
        load_field("/nonexistent/field.toml")


def test_imu_bias_in_either_unit(tmp_path):
    """[imu] bias_dps (deg/s) or bias_radps (rad/s), not both; it round-trips."""
    p = tmp_path / "robot.toml"
    p.write_text(ROBOT + "bias_dps = 0.5\n")
    r = load_robot(p)
    assert r.imu.bias_radps == pytest.approx(math.radians(0.5))
    q = tmp_path / "again.toml"
    q.write_text(dump_toml(robot_to_dict(r)))
    assert load_robot(q) == r
    p.write_text(ROBOT + "bias_dps = 0.5\nbias_radps = 0.01\n")
    with pytest.raises(InputError, match="bias"):
        load_robot(p)
