"""Property tests of the profile loader and the log reader against hostile input
(issue 14): whatever the keys, values or cells, the result is a clean profile or log,
or an :class:`~vidodo.errors.InputError` naming the file; never another exception,
never a value outside its plausible range, never a numeric library warning."""

from __future__ import annotations

import io
import json
import math
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from vidodo.errors import InputError
from vidodo.logs import read_log
from vidodo.plausible import RANGES
from vidodo.profiles import load_robot

FIX = Path(__file__).resolve().parents[1] / "fixtures"
ROBOT_TEXT = (FIX / "robot_pods.toml").read_text()
ROBOT_DATA = tomllib.loads(ROBOT_TEXT)

pytestmark = pytest.mark.filterwarnings("error")

TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cc", "Cs")), max_size=6)
KEYS = st.text(alphabet="abcdefghijklmnopqrstuvwxyz_", min_size=1, max_size=14)


def _tables():
    """(header as written, table dict) of every table in the fixture profile."""
    out = []
    for k, v in ROBOT_DATA.items():
        if isinstance(v, dict):
            out.append((f"[{k}]", v))
        elif isinstance(v, list):
            out += [(f"[[{k}]]", item) for item in v[:1]]
    return out


TABLES = _tables()


def _toml_literal(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, int):
        return str(value)
    return json.dumps(value, ensure_ascii=False)


def _load(tmp_path_factory, text):
    p = tmp_path_factory.mktemp("prof") / "robot.toml"
    p.write_text(text)
    return load_robot(p), p


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(key=KEYS, which=st.integers(0, len(TABLES) - 1),
       value=st.one_of(st.integers(-5, 5), st.floats(0.01, 1.0), TEXT))
def test_unknown_key_in_any_table_is_refused(tmp_path_factory, key, which, value):
    header, table = TABLES[which]
    assume(key not in table and key not in ROBOT_DATA)
    text = ROBOT_TEXT.replace(header, f"{header}\n{key} = {_toml_literal(value)}", 1)
    known = {"gear_ratio", "roller_deg", "direction_deg", "raw_a_column", "raw_b_column",
             "raw_threshold", "powered", "sign", "counter_bits", "wrapped", "scale", "unit",
             "length_unit", "angle_unit", "family", "x_m", "y_m", "z_m", "yaw_deg", "name",
             "length_m", "width_m", "height_m", "no_sideways", "heading", "column"}
    assume(key not in known)
    with pytest.raises(InputError) as err:
        _load(tmp_path_factory, text)
    msg = str(err.value)
    assert "robot.toml" in msg and f"unknown key '{key}'" in msg


NUMERIC = [("[[wheel]]", "radius_m", "wheel.radius_m"),
           ("[[wheel]]", "ticks_per_rev", "wheel.ticks_per_rev"),
           ("[[wheel]]", "gear_ratio", "wheel.gear_ratio"),
           ("[[wheel]]", "x_m", "wheel.x_m"),
           ("[imu]", "scale", "imu.scale"),
           ("[robot]", "length_m", "robot.length_m")]


@settings(max_examples=120, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(which=st.integers(0, len(NUMERIC) - 1),
       value=st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(),
                       st.booleans(), TEXT))
def test_any_value_loads_in_range_or_is_refused(tmp_path_factory, which, value):
    header, key, rng = NUMERIC[which]
    assume(not (isinstance(value, int) and abs(value) > 2**63 - 1))
    table = header.strip("[]")
    start = ROBOT_TEXT.index(header)
    end = ROBOT_TEXT.find("\n[", start + 1)
    end = len(ROBOT_TEXT) if end < 0 else end
    line = f"{key} = {_toml_literal(value)}"
    at = ROBOT_TEXT.find(f"\n{key} = ", start, end)
    if at >= 0:  # replace the key's line
        text = ROBOT_TEXT[:at + 1] + line + ROBOT_TEXT[ROBOT_TEXT.index("\n", at + 1):]
    else:  # add it under the table header
        text = ROBOT_TEXT.replace(header, f"{header}\n{line}", 1)
    try:
        robot, _ = _load(tmp_path_factory, text)
    except InputError as exc:
        assert "robot.toml" in str(exc) and "\n" not in str(exc)
        return
    got = getattr(robot.imu if table == "imu" else (robot.wheels[0] if table == "wheel"
                                                      else robot), key)
    lo, hi, _ = RANGES[rng]
    assert math.isfinite(got) and lo <= got <= hi


TANK = load_robot(FIX / "robot_tank.toml")
TANK_LOG = pd.read_csv(FIX / "log_tank.csv", dtype=str, keep_default_na=False)
CELLS = st.one_of(
    st.sampled_from(["inf", "-inf", "nan", "", " ", "1e400", "-1e400", "abc", "0x10", "1,5",
                     "-", "NaN", "1e-400", "null", "+", "=1+1", "1e308", "-0"]),
    st.integers(-(2**40), 2**40).map(str),
    st.floats(allow_nan=False, allow_infinity=False, width=32).map(repr),
    st.text(max_size=4))


@settings(max_examples=150, deadline=None)
@given(cells=st.lists(st.tuples(st.integers(0, len(TANK_LOG) - 1), st.integers(0, 3), CELLS),
                      min_size=1, max_size=4))
def test_log_with_random_cells_is_read_clean_or_refused_with_a_line(cells):
    df = TANK_LOG.copy()
    for row, col, text in cells:
        df.iloc[row, col] = text.replace("\n", " ").replace("\r", " ").replace('"', "")
    buf = io.StringIO(df.to_csv(index=False))
    buf.name = "log_tank.csv"
    try:
        log = read_log(buf, TANK)
    except InputError as exc:
        msg = str(exc)
        assert msg.startswith("log_tank.csv: ") and "\n" not in msg
        return
    f = log.frame
    t = f["t_s"].to_numpy(float)
    assert np.isfinite(t).all() and np.all(np.diff(t) > 0)
    for c in ("ticks_left", "ticks_right"):
        assert f[c].dtype.kind == "i"
    assert np.isfinite(f["imu_heading_rad"].to_numpy(float)).all()


@settings(max_examples=100, deadline=None)
@given(steps=st.lists(st.integers(-3000, 3000), min_size=30, max_size=200),
       start=st.one_of(st.integers(-(2**31), -(2**25)), st.integers(2**25, 2**31 - 1)))
def test_counter_width_slip_only_where_a_narrower_counter_wrapped(steps, start):
    """Counts logged at their own width, with readings outside every narrower register,
    are never taken for a narrower counter; the same counts folded into a signed 16-bit
    counter are, wherever they cross its range. (Readings that would fit a narrower
    register, such as 29 still samples and one step of 240 from zero, are genuinely
    ambiguous and are not part of the property.)"""
    from vidodo.logs import counter_width_slip, unwrap_counter

    true = start + np.cumsum(np.r_[0, steps]).astype(np.int64)
    logged32 = (true + 2**31) % 2**32 - 2**31
    assert counter_width_slip(logged32, 32) is None
    folded = (true + 2**15) % 2**16 - 2**15
    slip = counter_width_slip(folded, 32)
    crossings = np.flatnonzero(np.abs(np.diff(folded)) > 2**15)
    if crossings.size and crossings.size <= 0.05 * len(steps):
        assert slip is not None and slip[0] == 16 and slip[1] == crossings[0] + 1
        assert np.array_equal(unwrap_counter(folded, 16) - folded[0], true - true[0])
    elif slip is not None:
        assert slip[0] in (8, 16)
