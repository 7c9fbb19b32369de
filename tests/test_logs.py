"""Robot log reader: units, wrap-around, sign, ordering, holes, and bad input."""

import io
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from vidodo.errors import InputError
from vidodo.logs import read_log, unwrap_counter
from vidodo.odometry import rim_travel
from vidodo.profiles import Imu, PoseColumns, RobotProfile, Wheel, load_robot

FIX = Path(__file__).resolve().parents[1] / "fixtures"


def robot(*, bits=32, time_unit="s", imu=None, pose=None, wheels=None):
    ws = wheels or (
        Wheel("left", "el", x_m=0.0, y_m=0.15, direction_rad=0.0, radius_m=0.05,
              ticks_per_rev=360, counter_bits=bits),
        Wheel("right", "er", x_m=0.0, y_m=-0.15, direction_rad=0.0, radius_m=0.05,
              ticks_per_rev=360, counter_bits=bits, sign=-1),
    )
    return RobotProfile("r", 0.4, 0.4, 0.3, (), tuple(ws), "t", time_unit, imu, pose)


def csv(text):
    return io.StringIO(text.strip() + "\n")


def test_fixture_log_is_cleaned_as_documented():
    """The hand-made fixture: a 16-bit counter wrapping (65534 -> 2), a right encoder
    going negative, a blank line, rows out of order, an empty cell, an IMU in wrapped
    degrees crossing +-180, and an extra text column that is not used."""
    r = load_robot(FIX / "robot_tank.toml")
    log = read_log(FIX / "log_tank.csv", r)
    f = log.frame
    assert_allclose(f["t_s"], np.arange(8) * 0.01)
    assert_array_equal(f["ticks_left"], 65530 + 4 * np.arange(8))  # line 9 interpolated
    assert_array_equal(f["ticks_right"], 10 - 4 * np.arange(8))
    assert_allclose(np.degrees(f["imu_heading_rad"]), 179.0 + 0.5 * np.arange(8))
    assert_array_equal(f["line"], [2, 3, 4, 6, 5, 8, 9, 10])  # header is line 1
    text = " | ".join(log.warnings)
    assert "blank row(s) at line(s) 7" in text
    assert "out of time order" in text and "line(s) 6" in text
    assert "interpolation" in text and "line(s) 9" in text
    assert f["ticks_left"].dtype == np.int64


def test_unwrap_counter_signed_and_unsigned_16_and_32_bit():
    """Differences modulo 2^n (domain notes sec. 4), both printing conventions."""
    true = np.array([0, 30000, 60000, 90000, 60000, 35000, 5000, -20000, -50000])  # steps < 2^15
    for bits in (16, 32):
        m = 2**bits
        unsigned = np.mod(true, m)
        signed = (unsigned + m // 2) % m - m // 2
        for logged in (unsigned, signed):
            got = unwrap_counter(logged, bits)
            assert_array_equal(got - got[0], true - true[0])
    assert_array_equal(unwrap_counter(true, 0), true)


def test_missing_column_lists_columns_present():
    with pytest.raises(InputError, match=r"\['er'\].*columns present: \['t', 'el', 'x'\]"):
        read_log(csv("t,el,x\n0,1,2\n1,2,3"), robot())


def test_non_numeric_cell_names_its_line():
    text = "t,el,er\n0,1,2\n0.01,2,3\n\n0.02,3,oops\n0.03,4,5"
    with pytest.raises(InputError, match=r"line 5, column 'er': 'oops'"):
        read_log(csv(text), robot())


@pytest.mark.parametrize(("unit", "scale", "expect"), [
    ("ms", 1e9 / 100, "'ns'"),   # ms declared, data in ns: span 1e9 ms, step 1e7 ms
    ("s", 10000, "'us'"),        # s declared, median step 10000: 100 Hz in us
    ("ms", 0.01, "'s'"),         # ms declared, data in seconds at 100 Hz
])
def test_implausible_time_unit_suggests_one(unit, scale, expect):
    t = np.arange(101) * scale
    text = "t,el,er\n" + "\n".join(f"{float(v)!r},{i},{-i}" for i, v in enumerate(t))
    with pytest.raises(InputError, match=f"time_unit = {expect}"):
        read_log(csv(text), robot(time_unit=unit))


def test_time_units_convert():
    for unit, f in (("s", 1.0), ("ms", 1e-3), ("us", 1e-6), ("ns", 1e-9)):
        t = np.arange(5) * (0.005 / f)
        text = "t,el,er\n" + "\n".join(f"{int(round(v)) if f < 1 else v},{i},{i}"
                                       for i, v in enumerate(t))
        log = read_log(csv(text), robot(time_unit=unit))
        assert_allclose(log.frame["t_s"], np.arange(5) * 0.005, rtol=1e-12)


def test_semicolon_separated_with_byte_order_mark():
    log = read_log(io.StringIO("\ufefft;el;er\n0;1;2\n0.01;2;3\n"), robot())
    assert log.frame["ticks_left"].tolist() == [1, 2]


def test_ragged_row_names_its_line():
    with pytest.raises(InputError, match="line 3"):
        read_log(csv("t,el,er\n0,1,2\n0.01,2,3,4,5\n0.02,3,4"), robot())


def test_identical_times_with_different_values_are_ambiguous():
    text = "t,el,er\n0,1,1\n0.01,2,2\n0.01,3,3\n0.02,4,4"
    with pytest.raises(InputError, match=r"lines 3 and 4 have the same time"):
        read_log(csv(text), robot())


def test_exact_duplicates_are_dropped_with_a_warning():
    text = "t,el,er\n0,1,1\n0.01,2,2\n0.01,2,2\n0.02,4,4"
    log = read_log(csv(text), robot())
    assert len(log.frame) == 3
    assert any("duplicate" in w and "line(s) 4" in w for w in log.warnings)


def test_counter_value_outside_declared_width_is_an_error():
    text = "t,el,er\n0,1,1\n0.01,70000,2\n0.02,70004,4"
    with pytest.raises(InputError, match="16-bit counter.*counter_bits"):
        read_log(csv(text), robot(bits=16))


def test_blank_rows_and_edge_holes():
    text = "t,el,er\n0,,1\n0.01,2,2\n,,\n0.02,3,3\n0.03,4,\n"
    log = read_log(csv(text), robot())
    assert_allclose(log.frame["t_s"], [0.01, 0.02])
    w = " | ".join(log.warnings)
    assert "1 blank row(s) at line(s) 4" in w
    assert "2 incomplete row(s) at the start or end (line(s) 2, 6)" in w


def test_imu_units_wrapping_scale_and_sign():
    """Wrapped degrees unwrap; scale multiplies the heading change; sign flips it."""
    h_true = np.linspace(0.0, 4 * math.pi, 200)  # two full turns counter-clockwise
    wrapped_deg = np.degrees((h_true + math.pi) % (2 * math.pi) - math.pi)
    t = np.arange(200) * 0.01
    df = pd.DataFrame({"t": t, "el": 0, "er": 0, "yaw": -wrapped_deg})
    r = robot(imu=Imu("yaw", unit="deg", wrapped=True, scale=1.01, sign=-1))
    f = read_log(io.StringIO(df.to_csv(index=False)), r).frame
    assert_allclose(f["imu_heading_rad"] - f["imu_heading_rad"][0], 1.01 * h_true, atol=1e-9)
    # continuous radians, not declared wrapped
    df["yaw"] = h_true
    r = robot(imu=Imu("yaw", unit="rad", wrapped=False))
    f = read_log(io.StringIO(df.to_csv(index=False)), r).frame
    assert_allclose(f["imu_heading_rad"], h_true, atol=1e-12)


def test_imu_bias_is_subtracted():
    """heading = sign * (h0 + scale (h - h0)) - bias (t - t0) (robot profile [imu]
    bias_radps, hand computed): a still robot whose gyro drifts 0.01 rad/s reads still."""
    t = np.arange(100) * 0.02 + 5.0
    df = pd.DataFrame({"t": t, "el": 0, "er": 0, "yaw": 0.3 + 0.01 * (t - t[0])})
    r = robot(imu=Imu("yaw", unit="rad", wrapped=False, bias_radps=0.01))
    f = read_log(io.StringIO(df.to_csv(index=False)), r).frame
    assert_allclose(f["imu_heading_rad"], 0.3, atol=1e-12)


def test_gaps_and_unexpected_heading_wraps_are_reported():
    t = np.r_[np.arange(10) * 0.01, 1.0 + np.arange(10) * 0.01]
    yaw = np.r_[np.linspace(170, 179, 10), np.linspace(-179, -170, 10)]
    df = pd.DataFrame({"t": t, "el": 0, "er": 0, "yaw": yaw})
    r = robot(imu=Imu("yaw", unit="deg", wrapped=False))
    w = " | ".join(read_log(io.StringIO(df.to_csv(index=False)), r).warnings)
    assert "1 gap(s) longer than 10 median steps" in w and "after line(s) 11" in w
    assert "set wrapped = true" in w


def test_logged_pose_units():
    r = robot(pose=PoseColumns("px", "py", "ph", length_unit="mm", angle_unit="deg"))
    text = "t,el,er,px,py,ph\n0,0,0,0,0,170\n0.1,1,1,100,50,-175\n0.2,2,2,200,100,-165"
    f = read_log(csv(text), r).frame
    assert_allclose(f["pose_x_m"], [0.0, 0.1, 0.2])
    assert_allclose(f["pose_y_m"], [0.0, 0.05, 0.1])
    assert_allclose(np.degrees(f["pose_heading_rad"]), [170, 185, 195])


def test_raw_channel_wheels_get_ticks_from_the_decoder():
    r = load_robot(FIX / "robot_raw.toml")
    pos = np.r_[0:40, 40:20:-1]  # states: 40 up, then 19 down
    seq = np.array([(0, 0), (0, 1), (1, 1), (1, 0)])[pos % 4]
    levels = np.where(seq == 1, 800, 150)  # raw reflectance counts of a light sensor
    df = pd.DataFrame({"t_us": np.arange(pos.size) * 1000, "la": levels[:, 0],
                       "lb": levels[:, 1], "ra": levels[:, 1], "rb": levels[:, 0]})
    log = read_log(io.StringIO(df.to_csv(index=False)), r)
    assert_array_equal(log.frame["ticks_left"], pos)
    assert_array_equal(log.frame["ticks_right"], -pos)  # channels swapped: reversed
    assert set(log.quadrature) == {"left", "right"}


@settings(max_examples=50, deadline=None)
@given(
    steps=st.lists(st.integers(-3000, 3000), min_size=2, max_size=60),
    start=st.integers(-(2**40), 2**40),
    bits=st.sampled_from([16, 32]),
    signed=st.booleans(),
    dts=st.lists(st.floats(1e-4, 0.45), min_size=60, max_size=60),
    shuffle_seed=st.integers(0, 2**31 - 1),
    unit=st.sampled_from(["s", "ms", "us", "ns"]),
)
def test_property_counts_conserved(steps, start, bits, signed, dts, shuffle_seed, unit):
    """Any counter width, signed or unsigned printing, any sample times and unit, rows
    shuffled: the reader returns the true count changes, in time order."""
    true = start + np.concatenate([[0], np.cumsum(steps)])
    m = 2**bits

    def counter(v):  # what a wrapping counter prints
        u = np.mod(v, m)
        return (u + m // 2) % m - m // 2 if signed else u

    f = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9}[unit]
    t_s = np.cumsum(np.r_[0.0, dts[: true.size - 1]])
    t_raw = np.round(t_s / f) if f < 1 else t_s
    if np.any(np.diff(t_raw) <= 0):
        return
    step = np.median(np.diff(t_raw)) * f
    order = np.random.default_rng(shuffle_seed).permutation(true.size)
    df = pd.DataFrame({"t": t_raw, "el": counter(true), "er": counter(-true)}).iloc[order]
    if unit != "s":
        df["t"] = df["t"].astype(np.int64)
    r = robot(bits=bits, time_unit=unit)
    if not (2e-5 <= step <= 60 and (t_raw[-1] - t_raw[0]) * f <= 2 * 86400):
        with pytest.raises(InputError, match="time_unit"):
            read_log(io.StringIO(df.to_csv(index=False)), r)
        return
    log = read_log(io.StringIO(df.to_csv(index=False)), r)
    assert_array_equal(np.diff(log.frame["ticks_left"]), np.diff(true))
    assert_array_equal(np.diff(log.frame["ticks_right"]), -np.diff(true))
    assert np.all(np.diff(log.frame["t_s"]) > 0)
    # the wheel sign is applied downstream: both wheels roll forward by the same travel
    rim = rim_travel(log, r.wheels)
    assert_allclose(rim[:, 0], rim[:, 1], rtol=0, atol=0)
    assert_allclose(rim[:, 0], np.diff(true) * r.wheels[0].metres_per_tick, rtol=1e-12)


@settings(max_examples=40, deadline=None)
@given(
    steps=st.lists(st.integers(-1, 1), min_size=3, max_size=200),
    dt_us=st.integers(20, 200000),
    shuffle_seed=st.integers(0, 2**31 - 1),
    dark=st.integers(0, 400),
    light=st.integers(600, 4095),
)
def test_property_raw_channels_shuffled_rows(steps, dt_us, shuffle_seed, dark, light):
    """Raw optical channels (any two reflectance levels, any sample rate), rows shuffled:
    after sorting, the decoded counts equal the true state changes."""
    r = load_robot(FIX / "robot_raw.toml")
    pos = 1 + np.concatenate([[0], np.cumsum(steps)])
    seq = np.array([(0, 0), (0, 1), (1, 1), (1, 0)])[pos % 4]
    if len(set(seq[:, 0].tolist())) < 2 or len(set(seq[:, 1].tolist())) < 2:
        return  # a channel that never changes carries no count information
    lv = np.where(seq == 1, light, dark)
    df = pd.DataFrame({"t_us": np.arange(pos.size) * dt_us, "la": lv[:, 0], "lb": lv[:, 1],
                       "ra": lv[:, 0], "rb": lv[:, 1]})
    df = df.iloc[np.random.default_rng(shuffle_seed).permutation(len(df))]
    log = read_log(io.StringIO(df.to_csv(index=False)), r)
    assert_array_equal(log.frame["ticks_left"], pos - pos[0])
    assert_array_equal(log.frame["ticks_right"], pos - pos[0])
