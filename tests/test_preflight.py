"""Pre-flight check (vidodo/preflight*.py) on rendered runs with injected profile mistakes.

Each mistake is one a team makes (a wheel's sign backwards, two columns swapped, the
wrong counter width, the wrong time unit, milliseconds read as seconds, the wrong marker
id); the check must name it and say the right fix, and a correct run must pass.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from vidodo.preflight import check_counter, check_log_time, preflight

BIG = dict(video__width_px=1920, video__height_px=1080, **{"video.max_duration_s": 8.0})


def _copy(run, tmp_path):
    for name in ("robot.toml", "field.toml", "log.csv"):
        shutil.copy(run / name, tmp_path / name)
    return tmp_path


def _edit_wheel(path, wheel, key, value):
    """Set ``key = value`` in the [[wheel]] table named ``wheel``."""
    text = path.read_text()
    blocks = text.split("[[wheel]]")
    for i, b in enumerate(blocks):
        if f'name = "{wheel}"' in b:
            blocks[i] = re.sub(rf"(?m)^{key} = .*$", f"{key} = {value}", b)
    path.write_text("[[wheel]]".join(blocks))


def _failed(result):
    return {c.name: c for c in result.checks if c.status == "fail"}


@pytest.fixture(scope="module")
def small(rendered_run):
    return rendered_run("default", 0, video=False)


# ------------------------------------------------------------------ log only
def test_correct_log_passes(small, tmp_path):
    d = _copy(small, tmp_path)
    res = preflight(d / "robot.toml", d / "field.toml", d / "log.csv")
    assert res.status == "pass", [(c.name, c.detail) for c in res.checks]


@pytest.mark.parametrize(("edits", "check", "todo"), [
    ([("right", "sign", "1")], "encoder directions",
     "sign of wheel 'right' is backwards: set sign = -1"),
    ([("pod_left", "column", '"pod_right_ticks"'), ("pod_right", "column", '"pod_left_ticks"')],
     "encoder directions", "columns of wheels 'pod_left' and 'pod_right' are swapped"),
    ([("pod_left", "counter_bits", "16")], "counter width", "counter_bits = 32 for 'pod_left'"),
], ids=["wheel sign backwards", "columns swapped", "counter declared too narrow"])
def test_profile_fault_is_named(small, tmp_path, edits, check, todo):
    """A robot profile that disagrees with its log in one way fails exactly one check,
    whose advice names the wheel and the fix."""
    d = _copy(small, tmp_path)
    for wheel, key, value in edits:
        _edit_wheel(d / "robot.toml", wheel, key, value)
    fails = _failed(preflight(d / "robot.toml", d / "field.toml", d / "log.csv"))
    assert list(fails) == [check]
    assert todo in fails[check].todo


def test_counter_wrapping_narrower_than_declared_is_named(small, tmp_path):
    """The log's counter wraps at 16 bits (two's complement, as a 16-bit register does:
    common practice) while the profile says 32."""
    from vidodo.synth.sensors import wrap_counter

    d = _copy(small, tmp_path)
    log = pd.read_csv(d / "log.csv")
    log["pod_right_ticks"] = wrap_counter(log["pod_right_ticks"].to_numpy(np.int64), 16)
    log.to_csv(d / "log.csv", index=False)
    fails = _failed(preflight(d / "robot.toml", d / "field.toml", d / "log.csv"))
    assert list(fails) == ["counter width"]
    assert "counter_bits = 16 for 'pod_right'" in fails["counter width"].todo


@pytest.mark.parametrize("declared", ["us", "s"])
def test_wrong_time_unit_is_named(small, tmp_path, declared):
    """The log is in milliseconds; the profile says microseconds, or seconds (ms vs s)."""
    d = _copy(small, tmp_path)
    text = (d / "robot.toml").read_text()
    (d / "robot.toml").write_text(text.replace('time_unit = "ms"',
                                               f'time_unit = "{declared}"'))
    fails = _failed(preflight(d / "robot.toml", d / "field.toml", d / "log.csv"))
    assert "time unit" in fails
    assert fails["time unit"].todo == "set time_unit = 'ms' in the profile's [log] table"
    # the encoder check still runs, on the repaired unit, and finds nothing else
    assert set(fails) == {"time unit"}


def test_missing_column_names_a_near_match(small, tmp_path):
    d = _copy(small, tmp_path)
    _edit_wheel(d / "robot.toml", "left", "column", '"left_tick"')
    fails = _failed(preflight(d / "robot.toml", d / "field.toml", d / "log.csv"))
    assert "did you mean 'left_ticks'?" in fails["log columns"].detail


def test_unknown_profile_key_or_bad_toml_fails_the_profile(small, tmp_path):
    d = _copy(small, tmp_path)
    (d / "robot.toml").write_text("[robot\n")
    res = preflight(d / "robot.toml", d / "field.toml", d / "log.csv")
    assert res.named("robot profile").status == "fail"
    assert "not valid TOML" in res.named("robot profile").detail


# ------------------------------------------------------------------ pure functions
def test_time_unit_from_step():
    """A 100 Hz log (10 ms steps) in ms fits; declared as s it does not (10 s steps)."""
    t = np.arange(0, 20000, 10.0)
    assert check_log_time(t, "ms")[0].status == "pass"
    check, unit = check_log_time(t, "s")
    assert check.status == "fail" and unit == "ms"


def test_counter_width_checks():
    """16-bit two's complement wraps at +-32768 (common practice)."""
    counts = np.arange(0, 200000, 300)
    wrapped = ((counts + 32768) % 65536) - 32768
    assert check_counter(wrapped, 32)[:2] == ("fail", 16)
    assert check_counter(counts, 16)[:2] == ("fail", 32)
    assert check_counter(counts, 32)[0] == "pass"
    assert check_counter(wrapped, 16)[0] == "pass"


# ------------------------------------------------------------------ with the video
@pytest.mark.slow
def test_correct_run_passes_with_video(rendered_run, tmp_path):
    run = rendered_run("default", 0, **BIG)
    res = preflight(run / "robot.toml", run / "field.toml", run / "log.csv",
                    run / "video.mp4")
    assert res.status == "pass", [(c.name, c.status, c.detail) for c in res.checks]


@pytest.mark.slow
def test_wrong_marker_id_is_named(rendered_run, tmp_path):
    run = rendered_run("default", 0, **BIG)
    d = _copy(run, tmp_path)
    text = (d / "robot.toml").read_text()
    (d / "robot.toml").write_text(text.replace("id = 7", "id = 3"))
    fails = _failed(preflight(d / "robot.toml", d / "field.toml", d / "log.csv",
                              run / "video.mp4"))
    assert list(fails) == ["marker"]
    assert fails["marker"].todo.startswith("set id = 7")


@pytest.mark.slow
def test_preflight_verb(rendered_run, tmp_path, capsys):
    from vidodo.cli_main import main

    run = rendered_run("default", 0, **BIG)
    d = _copy(run, tmp_path)
    args = ["preflight", str(d / "log.csv"), "--robot", str(d / "robot.toml"), "--field",
            str(d / "field.toml"), "--video", str(run / "video.mp4"), "--first-s", "2"]
    assert main(args) == 0
    out = capsys.readouterr().out
    assert "[PASS] marker" in out and out.rstrip().endswith("pre-flight: pass")
    _edit_wheel(d / "robot.toml", "left", "sign", "-1")
    assert main(args) == 2
    out = capsys.readouterr().out
    assert "[FAIL] encoder directions" in out
    assert "sign of wheel 'left' is backwards: set sign = 1" in out


def test_refused_registration_is_a_failed_check(monkeypatch):
    """The registrar's self-check refusal (errors.RegistrationRefused) becomes a failed
    checklist line with what to do, never a crash."""
    from vidodo import preflight_video
    from vidodo.errors import RegistrationRefused
    from vidodo.profiles import FieldProfile, load_robot
    from vidodo.registration import registrar

    def refuse(self, frame, t_s, mask=None):
        raise RegistrationRefused("the floor could not be registered reliably: test", None)

    monkeypatch.setattr(registrar.FloorRegistrar, "register", refuse)
    frames = [(0.0, np.zeros((360, 640, 3), np.uint8))]
    robot = load_robot(Path(__file__).resolve().parents[1] / "fixtures" / "robot_tank.toml")
    checks = {c.name: c for c in preflight_video.video_checks(
        frames, robot, FieldProfile(6, 6, 0.6096), None, None, None)}
    check = checks["floor registration"]
    assert check.status == "fail" and "measurable" not in checks
    assert "registered reliably" in check.detail and check.todo
