"""Issue 16: the replay and the report drawn with the registration the track was made with.

A hand-held rendered run is graded through every path (automatic registration,
``grade --points``, ``track --points`` then ``grade --track``). In sampled frames of each
replay, the truth ring's centre must sit within 1 px of the true marker centre projected
by OpenCV (``cv2.projectPoints``) with the renderer's true camera at the time the rows
showing the marker were read (truth/camera_poses.csv, rolling shutter as DEVELOPERS.md
describes it: row ``v`` is read ``v / height * readout_s`` after the frame time).
The report's registration section is opened in headless Chromium and photographed: the
picture decodes and pixels on the seams (true projection) carry the grid colour while
tile centres do not.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
import pandas as pd
import pytest
from test_replay import ring_centre_near, sampled_frame_pairs  # sibling test module
from test_report_page import _open, browser  # noqa: F401  (sibling test module; fixture)

from vidodo.cli_main import main
from vidodo.grid_overlay import GRID_BGR
from vidodo.profiles import load_camera, load_field, load_robot

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def handheld(rendered_run):
    return rendered_run("mecanum-handheld", 0, video__width_px=1280, video__height_px=720,
                        **{"video.max_duration_s": 4.0})


def _pose_at(df, t, cols):
    return np.array([np.interp(t, df["t_s"], df[c]) for c in cols])


def _true_camera(run, t):
    cp = pd.read_csv(run / "truth" / "camera_poses.csv")
    return (_pose_at(cp, t, [f"rvec_{k}" for k in range(3)]),
            _pose_at(cp, t, [f"tvec_{k}_m" for k in range(3)]))


def _true_marker_px(run, t_frame):
    """The marker centre where the rolling-shutter camera saw it (iterated on the row)."""
    cam = load_camera(run / "camera.toml")
    m = load_robot(run / "robot.toml").markers[0]
    truth = pd.read_csv(run / "truth" / "truth.csv")
    truth["h"] = np.unwrap(truth["heading_rad"])
    dt = 0.0
    for _ in range(3):
        x, y, h = _pose_at(truth, t_frame + dt, ["x_m", "y_m", "h"])
        p = np.array([[x + math.cos(h) * m.x_m - math.sin(h) * m.y_m,
                       y + math.sin(h) * m.x_m + math.cos(h) * m.y_m, m.z_m]])
        rvec, tvec = _true_camera(run, t_frame + dt)
        px = cv2.projectPoints(p, rvec, tvec, cam.matrix, cam.dist_coeffs)[0].ravel()
        dt = px[1] / cam.height_px * cam.readout_s
    return px


def _points_csv(run, path):
    """Nine tile corners of the first frame where the true camera saw them."""
    cam = load_camera(run / "camera.toml")
    s = load_field(run / "field.toml").tile_size_m
    rows = []
    for i in (1, 3, 5):
        for j in (1, 3, 5):
            dt = 0.0
            for _ in range(3):
                rvec, tvec = _true_camera(run, dt)
                px = cv2.projectPoints(np.array([[i * s, j * s, 0.0]]), rvec, tvec,
                                       cam.matrix, cam.dist_coeffs)[0].ravel()
                dt = px[1] / cam.height_px * cam.readout_s
            rows.append((px[0], px[1], i * s, j * s))
    pd.DataFrame(rows, columns=["u_px", "v_px", "x_m", "y_m"]).to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def graded(handheld, tmp_path_factory):
    """The run graded three ways: {path name: grade folder}."""
    root = tmp_path_factory.mktemp("paths")
    run = handheld
    common = [str(run / "video.mp4"), str(run / "log.csv"), "--robot", str(run / "robot.toml"),
              "--field", str(run / "field.toml"), "--camera", str(run / "camera.toml"),
              "--replay-scale", "1", "--quiet"]  # full size: rings compared with the footage
    points = _points_csv(run, root / "points.csv")
    out = {}
    for name, extra in (("automatic", []), ("points", ["--points", str(points)])):
        code = main(["grade", *common, "--out", str(root / name), *extra])
        assert code in (0, 4), name
        out[name] = root / name
    track = root / "tracked" / "track.csv"
    track.parent.mkdir()
    assert main(["track", str(run / "video.mp4"), "--robot", str(run / "robot.toml"),
                 "--field", str(run / "field.toml"), "--camera", str(run / "camera.toml"),
                 "--points", str(points), "--out", str(track), "--quiet"]) == 0
    assert (root / "tracked" / "track.floor.csv").is_file()
    assert main(["grade", *common, "--track", str(track), "--out", str(root / "track")]) in (0, 4)
    out["track"] = root / "track"
    return out


@pytest.mark.parametrize("path", ["automatic", "points", "track"])
def test_replay_ring_on_true_marker(graded, handheld, path):
    run = handheld
    truth = pd.read_csv(run / "truth" / "truth.csv")
    errs = []
    for i, orig, img in sampled_frame_pairs(run / "video.mp4", graded[path] / "replay.mp4"):
        if bool(truth["marker_visible"].iloc[i]):
            exp = _true_marker_px(run, float(truth["t_s"].iloc[i]))
            centre = ring_centre_near(img, orig, exp)
            assert centre is not None, f"{path}: no truth ring near the marker in frame {i}"
            errs.append(math.hypot(*(centre - exp)))
    assert len(errs) >= 8
    # 1 px in every sampled frame (issue 16). The ring is placed within 0.15 px of the
    # true marker; what moved the measured centre up to 1 px was the video's colour: the
    # anti-aliased ring's edges over the black-and-white marker, through the
    # half-resolution colour planes of the encoding, pulled the green pixels sideways. The
    # ring has a dark halo since (replay._ring).
    assert float(np.median(errs)) <= 0.6, (path, np.round(errs, 2))
    assert max(errs) <= 1.0, (path, np.round(errs, 2))


def test_report_registration_section_shows_the_grid(browser, graded, handheld):  # noqa: F811
    run = handheld
    page = graded["automatic"] / "report.html"
    browser.set_window_size(1280, 1000)
    console, _ = _open(browser, page)
    assert [e for e in console if e["level"] in ("SEVERE", "ERROR")] == []
    roles = browser.execute_script(
        "return [...document.querySelectorAll('#registration figure')]"
        ".map(f => f.dataset.role);")
    assert roles[:3] == ["start", "middle", "end"] and "worst" in roles
    method = browser.find_element("css selector", '[data-key="registration/method"]').text
    assert "fiducials" in method or "grid" in method
    fig = browser.find_element("css selector", '#registration figure[data-role="middle"]')
    t_s, scale = (float(fig.get_attribute(a)) for a in ("data-t-s", "data-scale"))
    img_el = fig.find_element("tag name", "img")
    browser.execute_script("arguments[0].scrollIntoView();", img_el)
    shot = cv2.imdecode(np.frombuffer(img_el.screenshot_as_png, np.uint8), cv2.IMREAD_COLOR)
    assert shot is not None and shot.shape[0] > 100  # the picture decodes
    # the element's screenshot holds its border too: frame pixels -> screenshot pixels
    natural_w, inner_w, border_x, border_y = browser.execute_script(
        "const i = arguments[0]; return [i.naturalWidth, i.clientWidth, i.clientLeft, "
        "i.clientTop];", img_el)
    k = scale * inner_w / natural_w
    field = load_field(run / "field.toml")
    cam = load_camera(run / "camera.toml")
    rvec, tvec = _true_camera(run, t_s)
    s = field.tile_size_m

    def colour_near(floor_xy):
        px = cv2.projectPoints(np.column_stack([floor_xy, np.zeros(len(floor_xy))]), rvec,
                               tvec, cam.matrix, cam.dist_coeffs)[0].reshape(-1, 2)
        px = (px + 0.5) * k - 0.5 + np.array([border_x, border_y])
        hits = []
        for u, v in px:
            ui, vi = int(round(u)), int(round(v))
            if not (2 <= ui < shot.shape[1] - 2 and 2 <= vi < shot.shape[0] - 2):
                continue
            # the grid colour (magenta): blue and red far above green, within 2 px
            patch = shot[vi - 2:vi + 3, ui - 2:ui + 3].reshape(-1, 3).astype(int)
            hits.append(bool(np.any(np.minimum(patch[:, 0], patch[:, 2]) - patch[:, 1] > 100)))
        return np.array(hits)

    assert min(GRID_BGR[0], GRID_BGR[2]) - GRID_BGR[1] > 200  # magenta, as sampled below
    seams = [((i + 0.5) * s, j * s) for i in range(field.tiles_x)
             for j in range(1, field.tiles_y)]
    centres = [((i + 0.5) * s, (j + 0.5) * s) for i in range(field.tiles_x)
               for j in range(field.tiles_y)]
    on = colour_near(np.array(seams))
    off = colour_near(np.array(centres))
    assert on.size >= 15 and off.size >= 15
    assert on.mean() >= 0.9, on
    assert off.mean() <= 0.1, off
