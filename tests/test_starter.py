"""Starter robot profile from questions (vidodo/starter.py, verb ``new-robot``)."""

from __future__ import annotations

import io
import itertools

import numpy as np
import pytest

from vidodo.errors import InputError
from vidodo.profiles import load_robot
from vidodo.starter import QUESTIONS, complete_answers, parse_answer, profile_text
from vidodo.wheels import check_observable, wheel_rows


def _write(tmp_path, **given):
    path = tmp_path / "robot.toml"
    path.write_text(profile_text(complete_answers(given)))
    return load_robot(path)


@pytest.mark.parametrize("drivetrain,pods,imu",
                         list(itertools.product(["diff", "skid", "mecanum"], ["0", "2", "3"],
                                                [True, False])))
def test_every_combination_loads_and_every_source_is_observable(tmp_path, drivetrain, pods,
                                                                imu):
    robot = _write(tmp_path, drivetrain=drivetrain, pods=pods, imu=imu)
    n_drive = 2 if drivetrain == "diff" else 4
    assert sum(w.powered for w in robot.wheels) == n_drive
    assert sum(not w.powered for w in robot.wheels) == int(pods)
    assert (robot.imu is not None) == imu
    for s in robot.resolved_sources():
        ws = [robot.wheel(n) for n in s.wheels]
        check_observable(ws, omega_known=s.heading == "imu", no_sideways=s.no_sideways,
                         where=s.name)


def test_mecanum_layout_matches_the_textbook(tmp_path):
    """Lynch & Park, Modern Robotics (2017), eq. 13.10: for the X layout, wheel speeds
    per unit (omega, vx, vy) are FL (-l-w, 1, -1), FR (l+w, 1, 1), RR (l+w, 1, -1),
    RL (-l-w, 1, 1), with l half the wheelbase and w half the track."""
    robot = _write(tmp_path, drivetrain="mecanum", track_mm=400.0, wheelbase_mm=300.0)
    l, w = 0.15, 0.20
    book = {"front_left": (-l - w, 1, -1), "front_right": (l + w, 1, 1),
            "rear_right": (l + w, 1, -1), "rear_left": (-l - w, 1, 1)}
    for wheel in robot.wheels:
        omega, vx, vy = book[wheel.name]
        assert wheel_rows([wheel])[0] == pytest.approx([vx, vy, omega])


def test_differential_track_and_radius(tmp_path):
    """Rim speed of a differential drive's wheels: v -+ omega * track / 2 (common
    practice); radius is half the diameter."""
    robot = _write(tmp_path, drivetrain="diff", track_mm=380.0, drive_diameter_mm=96.0)
    rows = wheel_rows(robot.wheels)
    assert rows[:, 2].tolist() == pytest.approx([-0.19, 0.19])
    assert {w.radius_m for w in robot.wheels} == {0.048}


def test_bad_answers_are_refused():
    q = {q.key: q for q in QUESTIONS}
    with pytest.raises(InputError, match="use one of"):
        parse_answer(q["drivetrain"], "tank")
    with pytest.raises(InputError, match="positive"):
        parse_answer(q["track_mm"], "-3")
    with pytest.raises(InputError, match="yes or no"):
        parse_answer(q["imu"], "maybe")
    assert parse_answer(q["track_mm"], "") == q["track_mm"].default
    with pytest.raises(InputError, match="unknown key"):
        complete_answers({"wheels": 4})


def test_verb_with_answers_file(tmp_path, capsys):
    from vidodo.cli_main import main

    answers = tmp_path / "answers.toml"
    answers.write_text('drivetrain = "skid"\npods = "2"\nimu = true\nmarker_id = 5\n')
    out = tmp_path / "robot.toml"
    assert main(["new-robot", "--answers", str(answers), "--out", str(out)]) == 0
    robot = load_robot(out)
    assert robot.markers[0].id == 5
    assert (tmp_path / "robot.png").read_bytes().startswith(b"\x89PNG")
    assert "# " in out.read_text()  # commented
    answers.write_text('drivetrain = "hover"\n')
    assert main(["new-robot", "--answers", str(answers), "--out",
                 str(tmp_path / "r2.toml")]) == 2
    assert "'drivetrain' = 'hover'" in capsys.readouterr().err
    assert not (tmp_path / "r2.toml").exists()


def test_verb_asks_on_the_terminal(tmp_path, monkeypatch, capsys):
    from vidodo.cli_main import main

    typed = ["bot", "diff", "", "", "", "400", "", "", "", "", "3"] + [""] * 40
    monkeypatch.setattr("sys.stdin", io.StringIO("\n".join(typed) + "\n"))
    out = tmp_path / "robot.toml"
    assert main(["new-robot", "--out", str(out)]) == 0
    robot = load_robot(out)
    assert robot.name == "bot"
    assert [w.y_m for w in robot.wheels if w.powered] == [0.2, -0.2]
    assert sum(not w.powered for w in robot.wheels) == 3
    assert "Robot name [my-robot]:" in capsys.readouterr().out
    monkeypatch.setattr("sys.stdin", io.StringIO("bot\n"))
    assert main(["new-robot", "--out", str(tmp_path / "r3.toml")]) == 2
    assert "input ended" in capsys.readouterr().err
    assert not (tmp_path / "r3.toml").exists()


def test_written_keys_round_trip(tmp_path):
    """Every value written is read back as written (no key silently ignored)."""
    robot = _write(tmp_path, drivetrain="mecanum", pods="3", imu=True, marker_size_mm=120.0,
                   marker_height_mm=250.0, pod_perp_x_mm=-90.0)
    assert robot.markers[0].size_m == 0.12 and robot.markers[0].z_m == 0.25
    perp = robot.wheel("pod_perpendicular")
    assert perp.x_m == -0.09 and np.degrees(perp.direction_rad) == pytest.approx(90.0)
