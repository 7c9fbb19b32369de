"""Placement planner (vidodo/planner.py, plan_picture.py, verb ``plan``)."""

from __future__ import annotations

import json
import math
from dataclasses import replace

import cv2
import numpy as np
import pytest

from vidodo.planner import (
    CameraView,
    PlanSettings,
    ProposedCamera,
    camera_pose,
    plan_map,
    predict_at,
    suggest,
)
from vidodo.profiles import FieldProfile, Marker

FIELD = FieldProfile(6, 6, 0.6096)
MARKER = Marker(id=7, family="DICT_4X4_50", size_m=0.2, z_m=0.26)


def _corners_only(sigma_px):
    """Settings with the corner-noise term alone (no common shift, no pixel locking,
    readout known)."""
    return PlanSettings(sigma_corner_px=sigma_px, corner_bias_px=0.0, readout_sigma_s=0.0,
                        refine=None)


def _down(height_m, f_px=1000.0):
    """A camera looking straight down at the floor's (1, 1) from ``height_m``."""
    R = np.diag([1.0, -1.0, -1.0])  # camera x = floor x, camera y = -floor y, z down
    c = np.array([1.0, 1.0, height_m])
    return CameraView(np.array([[f_px, 0, 999.5], [0, f_px, 999.5], [0, 0, 1]]), np.zeros(5),
                      cv2.Rodrigues(R)[0].ravel(), -R @ c, 2000, 2000)


def test_straight_down_closed_form():
    """Pinhole camera looking straight down (common practice): the marker at depth D
    spans f * s / D px, so a cell is f * s / D / 6 for a 4x4 marker (4 bits + border);
    the centre of four corners each with noise sigma per axis has sigma / 2 per axis in
    px, i.e. sigma * D / (2 f) on the floor (mean of four independent values)."""
    view = _down(2.26)
    sigma, cell, in_view = predict_at(np.array([[1.0, 1.0]]), MARKER, view, _corners_only(0.4))
    D = 2.26 - 0.26
    assert in_view[0]
    assert cell[0] == pytest.approx(1000 * 0.2 / D / 6, rel=1e-6)
    assert sigma[0] == pytest.approx(0.4 * D / (2 * 1000), rel=1e-4)


def test_error_matches_monte_carlo_with_opencv_back_projection():
    """Independent check of the propagation: noisy corners (Gaussian, sigma px per axis)
    are back-projected onto the marker plane with OpenCV's undistortPoints and the
    centre taken as the mean of the four corners (the least-squares position of a rigid
    square); the spread over 4000 draws must match the prediction within 5 %."""
    cam = ProposedCamera(1.83, -1.8, 2.4, 1.83, 1.5, 1280, 720, 68.0,
                         dist=(0.05, -0.11, 0.0, 0.0, 0.03))
    rvec, tvec = camera_pose(cam)
    R, _ = cv2.Rodrigues(rvec)
    centre = -R.T @ tvec
    rng = np.random.default_rng(1)
    for xy in ([1.0, 0.8], [2.9, 3.2]):
        sigma, _, _ = predict_at(np.array([xy]), MARKER, cam, _corners_only(0.3))
        s = MARKER.size_m / 2
        corners = np.array([[-s, s], [s, s], [s, -s], [-s, -s]]) + xy
        obj = np.column_stack([corners, np.full(4, MARKER.z_m)])
        img, _ = cv2.projectPoints(obj, rvec, tvec, cam.matrix, np.asarray(cam.dist))
        noisy = img.reshape(1, 4, 2) + rng.normal(0, 0.3, (4000, 4, 2))
        norm = cv2.undistortPoints(noisy.reshape(-1, 1, 2), cam.matrix,
                                   np.asarray(cam.dist)).reshape(-1, 2)
        rays = np.column_stack([norm, np.ones(len(norm))]) @ R  # floor-frame directions
        lam = (MARKER.z_m - centre[2]) / rays[:, 2]
        floor = (centre[:2] + lam[:, None] * rays[:, :2]).reshape(4000, 4, 2).mean(axis=1)
        spread = math.sqrt(np.mean(np.var(floor, axis=0)))
        assert sigma[0] == pytest.approx(spread, rel=0.05), xy


def test_out_of_view_and_behind():
    cam = ProposedCamera(1.83, -1.8, 1.0, 1.83, 0.5, 1280, 720, 40.0)
    _, cell, in_view = predict_at(np.array([[1.83, 0.5], [1.83, -3.0], [5.0, 3.6]]), MARKER,
                                  cam, _corners_only(0.3))
    assert in_view.tolist() == [True, False, False]
    assert np.isnan(cell[1:]).all()


def test_plan_map_flags_small_cells():
    cam = ProposedCamera(1.83, -1.8, 2.4, 1.83, 1.5, 1280, 720, 68.0)
    # readout known (no timing term): the corner noise alone, through the geometry
    m = plan_map(FIELD, MARKER, cam, PlanSettings(min_cell_px=4.0, readout_sigma_s=0.0))
    assert m.in_view.any() and not m.all_detectable
    small = m.in_view & ~m.detectable
    assert np.all(m.cell_px[small] < 4.0) and np.all(m.cell_px[m.detectable] >= 4.0)
    # further from the camera (larger y) the cells shrink and the error grows
    col = m.x_m.size // 2
    assert m.cell_px[0, col] > m.cell_px[-1, col]
    assert m.sigma_xy_m[0, col] < m.sigma_xy_m[-1, col]


def test_suggested_marker_is_the_smallest_that_works():
    cam = ProposedCamera(1.83, -1.8, 2.4, 1.83, 1.5, 1280, 720, 68.0)
    settings = PlanSettings(margin_m=0.2)
    sug = suggest(FIELD, MARKER, cam, settings)
    assert sug.smallest_marker_m is not None
    coarse = replace(settings, grid_m=0.1)
    ok = plan_map(FIELD, replace(MARKER, size_m=sug.smallest_marker_m), cam, coarse)
    assert ok.detectable[ok.in_view].all()
    less = plan_map(FIELD, replace(MARKER, size_m=sug.smallest_marker_m - 0.002), cam, coarse)
    assert not less.detectable[less.in_view].all()


def test_plan_verb(tmp_path, capsys):
    from vidodo.cli_main import main

    field = tmp_path / "field.toml"
    field.write_text("[floor]\ntiles_x = 6\ntiles_y = 6\ntile_size_m = 0.6096\n")
    out = tmp_path / "plan"
    assert main(["plan", "--field", str(field), "--marker-mm", "200", "--marker-height-mm",
                 "260", "--camera-at", "1.83,-1.8,2.4", "--aim", "1.83,1.5", "--size",
                 "1920x1080", "--out", str(out)]) == 0
    assert (out / "plan.png").read_bytes().startswith(b"\x89PNG\r\n\x1a\n")
    assert cv2.imread(str(out / "plan.png")) is not None
    summary = json.loads((out / "plan.json").read_text())
    assert 0 < summary["detectable_share"] <= 1
    assert "expected 1-sigma per axis" in capsys.readouterr().out
    assert main(["plan", "--field", str(field), "--marker-mm", "200", "--camera-at", "1,2",
                 "--aim", "1,1", "--out", str(tmp_path / "bad")]) == 2
    assert "--camera-at '1,2': give 3 numbers" in capsys.readouterr().err
    assert not (tmp_path / "bad").exists()


def test_timing_term_straight_down():
    """The track's timing term (DEVELOPERS.md "How the 1-sigma is built"): a detection
    read a fraction ``v / height`` of the readout after the frame time (rolling shutter,
    common practice), with the readout off by sigma_t, is off by speed * frac * sigma_t
    along the motion, i.e. / sqrt(2) per axis for a random direction; the marker's row
    from OpenCV's projectPoints, not the planner's projection."""
    view = _down(2.26)
    xy = np.array([[1.0, 1.3]])
    still, _, _ = predict_at(xy, MARKER, view, _corners_only(0.4))
    moving, _, _ = predict_at(xy, MARKER, view, replace(_corners_only(0.4), readout_sigma_s=0.01),
                              speed_mps=0.8)
    img, _ = cv2.projectPoints(np.array([[1.0, 1.3, MARKER.z_m]]), view.rvec, view.tvec,
                               view.camera_matrix, view.dist_coeffs)
    frac = img.reshape(2)[1] / view.height_px
    assert 0.0 < frac < 0.5  # +y is up the image for this camera
    extra = 0.8 * frac * 0.01 / math.sqrt(2)
    assert moving[0] == pytest.approx(math.hypot(still[0], extra), rel=1e-3)
    known, _, _ = predict_at(xy, MARKER, view, _corners_only(0.4), speed_mps=0.8)
    assert known[0] == pytest.approx(still[0], rel=1e-12)


def test_corner_bias_term_straight_down():
    """A shift common to all four corners of b px moves the marker's image by b px, so
    its position by b * D / f on the floor (pinhole looking down, common practice); the
    map adds it in quadrature, as the track does with its ``corner_bias_px``."""
    view = _down(2.26)
    D = 2.26 - 0.26
    base = plan_map(FIELD, MARKER, view, PlanSettings(readout_sigma_s=0.0, grid_m=0.5,
                                                      corner_bias_px=0.0))
    biased = plan_map(FIELD, MARKER, view, PlanSettings(readout_sigma_s=0.0, grid_m=0.5,
                                                        corner_bias_px=0.2))
    j, i = np.argmin(np.abs(base.y_m - 1.0)), np.argmin(np.abs(base.x_m - 1.0))
    assert biased.sigma_xy_m[j, i] == pytest.approx(
        math.hypot(base.sigma_xy_m[j, i], 0.2 * D / 1000), rel=1e-4)


def test_registration_term_matches_monte_carlo_with_opencv():
    """The registration's parameter covariance through the pose fit (the track's term,
    ``registration_error.registration_pose_covs``; linear propagation, JCGM 100:2008
    section 5.1.2) against drawing the camera pose from that covariance: the marker's
    corner pixels (OpenCV projectPoints with the true pose) back-projected with each
    drawn pose onto the marker plane (OpenCV undistortPoints, ray and plane), the centre
    the mean of the four corners; the spread over 4000 draws within 5 %."""
    from vidodo.planner import error_parts, view_of
    from vidodo.registration.frame import FrameRegistration

    cam = ProposedCamera(1.83, -1.8, 2.4, 1.83, 1.5, 1280, 720, 68.0,
                         dist=(0.05, -0.11, 0.0, 0.0, 0.03))
    view = view_of(cam)
    cov = np.diag([2e-3, 1e-3, 1e-3, 4e-3, 3e-3, 5e-3]) ** 2
    given = FrameRegistration(0.0, True, view.camera_matrix, view.dist_coeffs, view.rvec,
                              view.tvec, 0.0, float("nan"), 100, "points", param_cov=cov,
                              param_names=("rvec", "tvec"))
    settings = replace(_corners_only(0.3), registration=given)
    rng = np.random.default_rng(2)
    for xy in ([1.0, 0.8], [2.9, 3.2]):
        parts = error_parts(np.array([xy]), MARKER, cam, settings)
        s = MARKER.size_m / 2
        obj = np.column_stack([np.array([[-s, s], [s, s], [s, -s], [-s, -s]]) + xy,
                               np.full(4, MARKER.z_m)])
        img, _ = cv2.projectPoints(obj, view.rvec, view.tvec, cam.matrix, np.asarray(cam.dist))
        norm = cv2.undistortPoints(img, cam.matrix, np.asarray(cam.dist)).reshape(-1, 2)
        centres = []
        for d in rng.multivariate_normal(np.zeros(6), cov, 4000):
            R, _ = cv2.Rodrigues(view.rvec + d[:3])
            c = -R.T @ (view.tvec + d[3:])
            rays = np.column_stack([norm, np.ones(4)]) @ R
            lam = (MARKER.z_m - c[2]) / rays[:, 2]
            centres.append((c[:2] + lam[:, None] * rays[:, :2]).mean(axis=0))
        spread = math.sqrt(np.mean(np.var(np.array(centres), axis=0)))
        assert parts.registration_m[0] == pytest.approx(spread, rel=0.05), xy
        assert parts.bias_m[0] == 0.0 and parts.timing_m[0] == 0.0


def test_registration_fallback_is_the_tracks():
    """Without a covariance the planner takes the track's fallback term: the mean
    prediction error rms * sqrt(p / n) of a least-squares fit (trace of the hat matrix,
    Draper & Smith, Applied Regression Analysis, 3rd ed., sec. 8.1; p = 8) through
    D / f metres per px looking straight down (pinhole, common practice), radial, so
    / sqrt(2) per axis."""
    from vidodo.planner import error_parts

    view = _down(2.26)
    D = 2.26 - 0.26
    settings = replace(_corners_only(0.4), registration_px=0.5, registration_points=200)
    parts = error_parts(np.array([[1.0, 1.0]]), MARKER, view, settings)
    assert parts.registration_m[0] == pytest.approx(
        0.5 * math.sqrt(8 / 200) * D / 1000 / math.sqrt(2), rel=1e-4)
    none = error_parts(np.array([[1.0, 1.0]]), MARKER, view, _corners_only(0.4))
    assert none.registration_m[0] == 0.0


def test_pixel_lock_term_straight_down():
    """Looking straight down, a marker square to the pixel grid keeps its edges' whole
    pixel locking (``PIXEL_LOCK_PX``, measured in tests/test_corner_bias.py) on both image
    axes: per floor axis ``lock * D / f`` at rest (closed form of the nadir scale
    ``D / f`` m per px). Turned by 30 deg its edges cross many pixel phases and the term
    all but vanishes (``lock_attenuation``). Moving fast along an unknown direction the
    planner keeps the locking of one image axis whole (the cautious side): per floor
    axis ``lock * D / f / sqrt(2)``."""
    from vidodo.planner import error_parts
    from vidodo.tracking.detector import PIXEL_LOCK_PX

    view, D = _down(2.26), 2.26 - 0.26
    settings = replace(_corners_only(0.0), refine="apriltag")
    lock = PIXEL_LOCK_PX["apriltag"] * D / 1000.0
    xy = np.array([[1.0, 1.0]])
    rest = error_parts(xy, MARKER, view, settings, speed_mps=0.0)
    assert rest.lock_m[0] == pytest.approx(lock, rel=1e-3)
    assert rest.sigma_xy_m[0] == pytest.approx(lock, rel=1e-3)
    turned = error_parts(xy, MARKER, view, settings, speed_mps=0.0,
                         heading_rad=math.radians(30))
    assert turned.lock_m[0] < 0.05 * lock
    fast = error_parts(xy, MARKER, view, settings, speed_mps=3.0)
    assert fast.lock_m[0] == pytest.approx(lock / math.sqrt(2), rel=0.01)
    assert error_parts(xy, MARKER, view, replace(settings, refine=None)).lock_m[0] == 0.0
