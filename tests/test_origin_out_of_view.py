"""End to end: the field's origin corner out of view, the robot's start tile given.

A run is rendered with the camera 1.6 m high and 0.4 m outside the near edge, the near
edge of the field below the bottom of the image (so the origin corner is out of view).
Tile corners in view are "clicked" at their true pixels (the renderer's camera, the
oracle) and typed with floor positions counted from a visible corner, as a user of the
picker or of ``--points`` may do. ``vidodo grade`` is run as a user would; its truth track
is compared with the renderer's true floor positions, and without a start tile the
summary must say what the positions are relative to.
"""

from __future__ import annotations

import json
import math

import cv2
import numpy as np
import pandas as pd
import pytest

from vidodo.cli_main import main
from vidodo.outputs import MANIFEST
from vidodo.profiles import load_camera, load_field

pytestmark = pytest.mark.slow

PLACEMENT = {"video__max_duration_s": 4.0, "camera__y_m": -0.4, "camera__z_m": 1.6,
             "camera__look_at_y_m": 1.5, "video__width_px": 1280, "video__height_px": 720}
START_TILE = (1, 1)  # the default scenario's robot starts at (0.9144, 0.9144) m


@pytest.fixture(scope="module")
def run(rendered_run):
    return rendered_run("default", 0, **PLACEMENT)


def _true_pixels(run, points_m):
    """The true pixels of floor points in the first frame (tripod: one pose)."""
    cam = load_camera(run / "camera.toml")
    meta = json.loads((run / "truth" / "meta.json").read_text())["camera"]
    obj = np.column_stack([points_m, np.zeros(len(points_m))])
    px = cv2.projectPoints(obj, np.array(meta["rvec"], float), np.array(meta["tvec"], float),
                           cam.matrix, cam.dist_coeffs)[0].reshape(-1, 2)
    return px, cam


def _clicked(run, tmp_path, offset_m):
    """12 tile corners in view, floor positions counted from the corner at ``offset_m``."""
    field = load_field(run / "field.toml")
    corners = field.tile_corners_m()
    px, cam = _true_pixels(run, corners)
    inside = ((px[:, 0] > 10) & (px[:, 0] < cam.width_px - 10) & (px[:, 1] > 10)
              & (px[:, 1] < cam.height_px - 10))
    # The placement the test is about: the origin corner and the whole near edge
    # (y = 0) lie below the bottom of the image.
    near = np.isclose(corners[:, 1], 0.0)
    assert np.all(px[near, 1] > cam.height_px) and not inside[near].any()
    assert inside.sum() >= 20
    rng = np.random.default_rng(5)
    pick = rng.choice(np.flatnonzero(inside), 12, replace=False)
    clicks = px[pick] + rng.normal(0.0, 0.3, (12, 2))  # careful clicks (invented noise)
    floor = corners[pick] - np.asarray(offset_m)
    path = tmp_path / "points.csv"
    pd.DataFrame({"u_px": clicks[:, 0], "v_px": clicks[:, 1], "x_m": floor[:, 0],
                  "y_m": floor[:, 1]}).to_csv(path, index=False)
    return path


def _grade(run, out, *extra, field=None):
    code = main(["grade", str(run / "video.mp4"), str(run / "log.csv"), "--robot",
                 str(run / "robot.toml"), "--field", str(field or run / "field.toml"),
                 "--out", str(out), "--no-report", "--quiet", *extra])
    return code


def _errors_m(run, out):
    """Track minus true floor position per frame [m] (rows with a position)."""
    track = pd.read_csv(out / "track.csv")
    truth = pd.read_csv(run / "truth" / "truth.csv")
    assert len(track) == len(truth)
    d = np.column_stack([track.x_m - truth.x_m, track.y_m - truth.y_m])
    return d[np.all(np.isfinite(d), axis=1)]


def test_start_tile_places_points_counted_from_a_visible_corner(run, tmp_path):
    """Points counted from the visible corner at (2, 2) tiles, the start tile on the
    command line: positions match the true floor positions within a few millimetres
    (with the lens profile; the benchmark measures 0.6 mm at 1280 x 720, 1.7 mm without)."""
    s = load_field(run / "field.toml").tile_size_m
    points = _clicked(run, tmp_path, (2 * s, 2 * s))
    out = tmp_path / "graded"
    assert _grade(run, out, "--points", str(points), "--camera", str(run / "camera.toml"),
                  "--start-tile", f"{START_TILE[0]},{START_TILE[1]}") == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["truth"]["positions_relative_to"] == (
        "the field origin (placed by the start tile 1, 1)")
    d = _errors_m(run, out)
    rms_mm = 1e3 * math.sqrt(np.mean(np.sum(d ** 2, axis=1)))
    assert len(d) > 60 and rms_mm < 2.0


def test_start_tile_from_the_field_profile_without_a_lens_profile(run, tmp_path):
    """The same with ``start_tile`` in field.toml and no lens profile (focal length and
    distortion estimated): still within 4 mm RMS of the truth."""
    s = load_field(run / "field.toml").tile_size_m
    points = _clicked(run, tmp_path, (3 * s, s))
    field = tmp_path / "field.toml"
    text = (run / "field.toml").read_text().replace(
        "[floor]\n", f"[floor]\nstart_tile = [{START_TILE[0]}, {START_TILE[1]}]\n", 1)
    field.write_text(text)
    out = tmp_path / "graded"
    assert _grade(run, out, "--points", str(points), field=field) == 0
    d = _errors_m(run, out)
    assert 1e3 * math.sqrt(np.mean(np.sum(d ** 2, axis=1))) < 4.0


def test_without_a_start_tile_the_summary_names_the_corner(run, tmp_path):
    """No start tile: drift is graded, and the summary says which visible corner the
    positions are relative to and the floor position taken for it; the positions are the
    true ones moved by exactly the whole tiles the clicks were counted from."""
    s = load_field(run / "field.toml").tile_size_m
    points = _clicked(run, tmp_path, (2 * s, s))
    out = tmp_path / "graded"
    assert _grade(run, out, "--points", str(points),
                  "--camera", str(run / "camera.toml")) == 0
    summary = json.loads((out / "summary.json").read_text())
    said = summary["truth"]["positions_relative_to"]
    assert said.startswith("the tile corner at pixel (") and "field origin" not in said
    assert any("no start tile was given" in w for w in summary["warnings"])
    d = _errors_m(run, out)
    np.testing.assert_allclose(np.median(d, axis=0), [-2 * s, -s], atol=0.003)
    # The named corner: its pixel is where the true corner with those coordinates
    # (moved back by the whole tiles) really is.
    u, v = (float(c) for c in said.split("pixel (")[1].split(")")[0].split(","))
    x = float(said.split("taken as x ")[1].split(" m")[0])
    y = float(said.split("y ")[-1].split(" m")[0])
    px, _ = _true_pixels(run, np.array([[x + 2 * s, y + s]]))
    assert np.hypot(px[0, 0] - u, px[0, 1] - v) < 1.5


def test_automatic_registration_is_right_or_refused(run, tmp_path):
    """The automatic tile grid on this view, start tile given: either exit 3 with only the
    preview written, or positions that match the truth. Never a wrong track."""
    out = tmp_path / "graded"
    code = _grade(run, out, "--start-tile", f"{START_TILE[0]},{START_TILE[1]}")
    if code == 3:
        assert sorted(p.name for p in out.iterdir() if p.name != MANIFEST) == ["preview.png"]
        return
    assert code == 0
    d = _errors_m(run, out)
    assert 1e3 * math.sqrt(np.mean(np.sum(d ** 2, axis=1))) < 10.0
