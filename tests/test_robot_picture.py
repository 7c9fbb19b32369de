"""The robot picture (vidodo/robot_picture.py) and its verb, and its place in the report."""

from __future__ import annotations

import json
import math
from dataclasses import replace
from pathlib import Path

import cv2
import numpy as np
import pytest
from test_report_page import browser  # noqa: F401  (the headless browser fixture)

from vidodo.profiles import Wheel, load_robot
from vidodo.robot_picture import (
    body_to_page,
    robot_figure,
    robot_layout,
    write_robot_picture,
)

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures"


def _wheel_glyph(wheel):
    """The wheel as the picture draws it: the layout of a fixture robot with only it."""
    robot = replace(load_robot(FIXTURES / "robot_tank.toml"), wheels=(wheel,))
    return robot_layout(robot).wheels[0]


def test_page_is_the_body_frame_turned_front_up():
    """Front up, left on the left, and a rotation keeps handedness (det = +1, the
    definition of a proper rotation), so a mirrored robot cannot be drawn."""
    assert body_to_page([1.0, 0.0]).tolist() == [0.0, 1.0]  # forward -> up
    assert body_to_page([0.0, 1.0]).tolist() == [-1.0, 0.0]  # left -> left
    m = np.column_stack([body_to_page([1.0, 0.0]), body_to_page([0.0, 1.0])])
    assert np.linalg.det(m) == pytest.approx(1.0)


def test_count_arrow_follows_sign_and_right_wheel_is_on_the_right():
    robot = load_robot(FIXTURES / "robot_tank.toml")
    glyphs = {g.name: g for g in robot_layout(robot).wheels}
    assert glyphs["left"].centre[0] < 0 < glyphs["right"].centre[0]
    assert glyphs["left"].counts_up == pytest.approx((0.0, 1.0))  # sign +1: up (forward)
    assert glyphs["right"].counts_up == pytest.approx((0.0, -1.0))  # sign -1: backwards


def test_blind_direction_of_omni_and_mecanum_wheels():
    """An omni wheel's rollers let it slide along its axle (common practice); a 45 deg
    mecanum wheel slides freely at 45 deg to its axle (Lynch & Park, Modern Robotics,
    2017, sec. 13.2, fig. 13.5)."""
    omni = Wheel("o", "o", 0.1, 0.1, 0.0, 0.03, 100)
    g = _wheel_glyph(omni)
    assert np.dot(g.blind, g.counts_up) == pytest.approx(0.0, abs=1e-12)
    mec = Wheel("m", "m", 0.1, 0.1, 0.0, 0.03, 100, roller_rad=math.pi / 4)
    g = _wheel_glyph(mec)
    assert abs(np.dot(g.blind, g.counts_up)) == pytest.approx(math.cos(math.pi / 4))


def test_tracking_wheel_lever_arm():
    """A wheel rolling along body x at y = 0.17 m has a 0.17 m lever arm: rim speed
    -0.17 m per radian of counter-clockwise turn (v = omega x r, common practice)."""
    w = Wheel("pod", "p", 0.05, 0.17, 0.0, 0.024, 8192, powered=False)
    g = _wheel_glyph(w)
    assert g.lever_m == pytest.approx(-0.17)
    assert g.lever_foot == pytest.approx(tuple(body_to_page([0.0, 0.17])))


def test_figure_is_to_scale():
    """Equal metres per pixel along both page axes."""
    fig = robot_figure(load_robot(FIXTURES / "robot_pods.toml"))
    fig.canvas.draw()
    ax = fig.axes[0]
    p = ax.transData.transform([[0, 0], [0.1, 0], [0, 0.1]])
    assert np.linalg.norm(p[1] - p[0]) == pytest.approx(np.linalg.norm(p[2] - p[0]), rel=1e-6)


def test_picture_verb(tmp_path, capsys):
    from vidodo.cli_main import main

    out = tmp_path / "robot.png"
    assert main(["picture", str(FIXTURES / "robot_pods.toml"), "--out", str(out)]) == 0
    assert out.read_bytes().startswith(b"\x89PNG\r\n\x1a\n")
    img = cv2.imread(str(out))
    assert img is not None and img.shape[0] > 300 and img.shape[1] > 300
    bad = tmp_path / "bad.toml"
    bad.write_text("[robot]\nname = 'x'\n")
    assert main(["picture", str(bad), "--out", str(tmp_path / "no.png")]) == 2
    assert "bad.toml [log]: missing key 'time_column'" in capsys.readouterr().err
    assert not (tmp_path / "no.png").exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_report_includes_the_robot_picture(tmp_path):
    from test_plots import make_grade_dir

    from vidodo.report.build import write_report

    folder = make_grade_dir(tmp_path / "run")
    summary = json.loads((folder / "summary.json").read_text())
    summary.setdefault("inputs", {})["robot"] = str(FIXTURES / "robot_tank.toml")
    (folder / "summary.json").write_text(json.dumps(summary))
    written = {p.name for p in write_report(folder, folder, replay=False)}
    assert "robot.png" in written
    page = (folder / "report.html").read_text()
    assert page.count("<img") == 4


def test_write_robot_picture_returns_path(tmp_path):
    p = write_robot_picture(load_robot(FIXTURES / "robot_tank.toml"), tmp_path / "r.png")
    assert p.is_file()


def test_report_with_robot_picture_loads_clean_in_a_browser(browser, tmp_path):  # noqa: F811
    """The same checks as the report's own browser test (tests/test_html.py): no console
    errors, no request but the file itself, every image decoded."""
    from test_plots import make_grade_dir
    from test_report_page import _open

    from vidodo.report.build import write_report

    folder = make_grade_dir(tmp_path / "run")
    summary = json.loads((folder / "summary.json").read_text())
    summary.setdefault("inputs", {})["robot"] = str(FIXTURES / "robot_pods.toml")
    (folder / "summary.json").write_text(json.dumps(summary))
    write_report(folder, folder, replay=False)
    console, requests = _open(browser, folder / "report.html")
    assert [e for e in console if e["level"] in ("SEVERE", "ERROR")] == []
    assert [u for u in requests if not u.startswith("data:")] == \
        [(folder / "report.html").resolve().as_uri()]
    widths = browser.execute_script(
        "return [...document.images].map(i => [i.complete, i.naturalWidth, i.alt]);")
    assert len(widths) == 4 and all(c and w > 0 for c, w, _ in widths)


def test_wheel_label_states_the_gear_ratio_direction():
    """The gear ratio is encoder turns per wheel turn (robot profile key gear_ratio);
    the picture says so beside the number."""
    w = Wheel("d", "d", 0.0, 0.15, 0.0, 0.045, 28, gear_ratio=19.2)
    assert "gear 19.2 enc. turns/wheel turn" in _wheel_glyph(w).label
