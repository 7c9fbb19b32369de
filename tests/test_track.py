"""Tests of vidodo.tracking: detection, floor pose, time, gaps, uncertainty, bad input.

Frames are synthesised here with OpenCV alone (independent of vidodo's renderer): a
marker image from ``cv2.aruco.generateImageMarker`` is warped onto a grey floor through
the exact homography of a known pinhole camera (``K [r1 r2 t + h r3]``, Zhang 2000;
Hartley & Zisserman, *Multiple View Geometry*, 2nd ed., eq. 8.1), with 4x supersampling
for anti-aliased edges. A stand-in registration intersects camera rays with the plane at
the marker height, using ``cv2.undistortPoints`` and ``cv2.projectPoints``.
"""

from __future__ import annotations

import math
import shutil
import subprocess
from types import SimpleNamespace

import cv2
import numpy as np
import pandas as pd
import pytest

from vidodo.errors import TrackingError
from vidodo.profiles import FieldProfile, Marker, RobotProfile
from vidodo.synth.motion import look_at_pose
from vidodo.tracking.detector import Detection, MarkerDetector
from vidodo.tracking.finish import finish_track
from vidodo.tracking.frame_loop import track_frames
from vidodo.tracking.noise import estimate_corner_noise
from vidodo.tracking.pose_fit import fit_pose
from vidodo.tracking.result import TRACK_COLUMNS, load_track_csv, save_track_csv
from vidodo.tracking.settings import TrackSettings
from vidodo.tracking.shared_error import SHARED_COLUMNS
from vidodo.tracking.tracker import track_video
from vidodo.video import VideoTruncatedError

W, H = 640, 480
K = np.array([[700.0, 0, 319.5], [0, 700.0, 239.5], [0, 0, 1]])
FIELD = FieldProfile(tiles_x=3, tiles_y=3, tile_size_m=0.6)


CAM_C = np.array([0.9, -1.1, 1.9])
CAM_R, CAM_T = look_at_pose(CAM_C, [0.9, 0.9, 0.0])  # rows: camera axes in floor frame
CAM_RVEC = cv2.Rodrigues(CAM_R)[0].ravel()


class StandInRegistration:
    """Known-camera registration: rays from the camera meet the plane z = height."""

    ok = True
    rms_px = 0.1
    rms_floor_m = 0.0003
    camera_matrix = K
    dist_coeffs = np.zeros(5)
    rvec = CAM_RVEC
    tvec = CAM_T

    def image_to_floor(self, points_px, height_m=0.0):
        pts = np.asarray(points_px, float).reshape(-1, 1, 2)
        n = cv2.undistortPoints(pts, K, self.dist_coeffs).reshape(-1, 2)
        d = np.column_stack([n, np.ones(len(n))]) @ CAM_R  # R^T applied to rows
        s = (height_m - CAM_C[2]) / d[:, 2]
        return (CAM_C + s[:, None] * d)[:, :2]

    def floor_to_image(self, points_m):
        p = np.column_stack([np.asarray(points_m, float), np.zeros(len(points_m))])
        return cv2.projectPoints(p, CAM_RVEC, CAM_T, K, self.dist_coeffs)[0].reshape(-1, 2)


class StandInRegistrar:
    def __init__(self):
        self.calls = 0

    def register(self, frame, t_s, mask=None):
        self.calls += 1
        return StandInRegistration()


def _project(points3):
    return cv2.projectPoints(np.asarray(points3, float), CAM_RVEC, CAM_T, K, None)[0].reshape(
        -1, 2)


def _marker_world(marker, pose):
    """Floor corners (OpenCV order) of a marker on a robot at pose (x, y, heading)."""
    s = marker.size_m / 2
    loc = np.array([[-s, s], [s, s], [s, -s], [-s, -s]])
    cy, sy = math.cos(marker.yaw_rad), math.sin(marker.yaw_rad)
    body = loc @ np.array([[cy, sy], [-sy, cy]]) + (marker.x_m, marker.y_m)
    x, y, th = pose
    c, s_ = math.cos(th), math.sin(th)
    floor = body @ np.array([[c, s_], [-s_, c]]) + (x, y)
    return np.column_stack([floor, np.full(4, marker.z_m)])


_TEXTURES = {}


def _texture(marker, bits_px=24):
    key = (marker.family, marker.id)
    if key not in _TEXTURES:
        d = cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, marker.family))
        cells = d.markerSize + 2
        img = cv2.aruco.generateImageMarker(d, marker.id, cells * bits_px, borderBits=1)
        pad = 2 * bits_px
        _TEXTURES[key] = (cv2.copyMakeBorder(img, pad, pad, pad, pad, cv2.BORDER_CONSTANT,
                                             value=255), pad, cells * bits_px)
    return _TEXTURES[key]


def render(markers, pose, *, noise=2.0, rng=None, hidden=(), ss=4, corners=None):
    """A grey frame with the robot's markers at ``pose``; returns (frame, true corners).

    ``corners`` optionally gives each marker's image corners directly (e.g. sheared by
    a rolling shutter); the texture is then mapped by the homography through them.
    """
    big = np.full((H * ss, W * ss), 110, np.uint8)
    A = np.array([[ss, 0, (ss - 1) / 2], [0, ss, (ss - 1) / 2], [0, 0, 1.0]])
    truth = []
    for k, m in enumerate(markers):
        world = _marker_world(m, pose)
        img_corners = _project(world) if corners is None else corners[k]
        truth.append(img_corners)
        if m.id in hidden:
            continue
        tex, pad, side = _texture(m)
        src = np.array([[pad - 0.5, pad - 0.5], [pad + side - 0.5, pad - 0.5],
                        [pad + side - 0.5, pad + side - 0.5], [pad - 0.5, pad + side - 0.5]],
                       np.float32)
        Hm = cv2.getPerspectiveTransform(src, img_corners.astype(np.float32))
        Hb = A @ Hm
        warped = cv2.warpPerspective(tex, Hb, (W * ss, H * ss), flags=cv2.INTER_LINEAR,
                                     borderValue=0)
        mask = cv2.warpPerspective(np.full(tex.shape, 255, np.uint8), Hb, (W * ss, H * ss),
                                   flags=cv2.INTER_NEAREST, borderValue=0)
        big[mask > 0] = warped[mask > 0]
    small = cv2.resize(big, (W, H), interpolation=cv2.INTER_AREA).astype(float)
    if rng is not None and noise > 0:
        small += rng.normal(0, noise, small.shape)
    frame = cv2.cvtColor(np.clip(small, 0, 255).astype(np.uint8), cv2.COLOR_GRAY2BGR)
    return frame, truth


def _robot(markers):
    return RobotProfile(name="test", length_m=0.4, width_m=0.4, height_m=0.3,
                        markers=tuple(markers), wheels=(), time_column="t")


TAG = Marker(id=3, family="DICT_APRILTAG_36h11", size_m=0.12, x_m=0.05, y_m=-0.02,
             z_m=0.25, yaw_rad=0.3)


def _path(t):
    """A smooth test path (made up): an ellipse with heading along the motion."""
    x = 0.9 + 0.5 * np.cos(0.8 * t)
    y = 0.9 + 0.35 * np.sin(0.8 * t)
    th = np.arctan2(0.35 * 0.8 * np.cos(0.8 * t), -0.5 * 0.8 * np.sin(0.8 * t))
    return x, y, np.unwrap(th)


# ----------------------------------------------------------------- pose fitting
def test_fit_pose_exact_with_height_correction():
    """Exact projected corners give back the pose; mapping at the floor would not.

    Reference: cv2.projectPoints (OpenCV) projects the true 3-D corners.
    """
    pose = (1.1, 0.7, 2.0)
    corners = _project(_marker_world(TAG, pose))
    fix = fit_pose([Detection(0, corners)], (TAG,), StandInRegistration())
    assert fix.x_m == pytest.approx(pose[0], abs=1e-9)
    assert fix.y_m == pytest.approx(pose[1], abs=1e-9)
    assert fix.heading_rad == pytest.approx(pose[2], abs=1e-9)
    assert fix.scale == pytest.approx(1.0, abs=1e-9)
    assert fix.chi2_unit == pytest.approx(0.0, abs=1e-12)
    flat = Marker(**{**TAG.__dict__, "z_m": 0.0})
    wrong = fit_pose([Detection(0, corners)], (flat,), StandInRegistration())
    # Parallax of a raised marker, error = d h / (C_z - h) (similar triangles): centimetres.
    assert math.hypot(wrong.x_m - pose[0], wrong.y_m - pose[1]) > 0.1


def test_fit_pose_covariance_matches_monte_carlo():
    """The linearised covariance agrees with Monte-Carlo corner noise (sigma 1 px)."""
    rng = np.random.default_rng(11)  # seed fixed: the statistics depend on it
    pose = (0.6, 1.2, -0.4)
    corners = _project(_marker_world(TAG, pose))
    reg = StandInRegistration()
    fix0 = fit_pose([Detection(0, corners)], (TAG,), reg)
    samples = np.array([
        [(f := fit_pose([Detection(0, corners + rng.normal(0, 1, (4, 2)))], (TAG,), reg)).x_m,
         f.y_m, f.heading_rad]
        for _ in range(800)
    ])
    emp = np.cov(samples.T)
    assert np.sqrt(np.diag(emp)) == pytest.approx(np.sqrt(np.diag(fix0.cov_unit)), rel=0.12)
    # chi^2 / dof of the fits estimates the corner variance (1 px^2).
    chi = [fit_pose([Detection(0, corners + rng.normal(0, 1, (4, 2)))], (TAG,), reg)
           for _ in range(300)]
    assert np.mean([c.chi2_unit for c in chi]) / chi[0].dof == pytest.approx(1.0, rel=0.15)


# -------------------------------------------------------------------- detection
@pytest.mark.parametrize("refine", ["apriltag", "hybrid"])
def test_corners_agree_with_apriltag3(refine):
    """cv2.aruco corners (vidodo's refinements) agree with AprilTag 3.

    The independent detector is the AprilTag 3 C library through pupil_apriltags, run
    crash-isolated by ``tests/apriltag3.py``. AprilTag puts pixel centres at (0.5, 0.5),
    OpenCV at (0, 0) (AprilRobotics/apriltag issue 121), so 0.5 px is subtracted from
    AprilTag's corners before comparing. SUBPIX and CONTOUR are compared in
    benchmarks/track_accuracy.py: with cells of about 4 px, as here, they are several
    times less accurate.
    """
    from apriltag3 import apriltag3_corners

    det = MarkerDetector((TAG,), refine=refine)
    rng = np.random.default_rng(5)
    diffs, truth_err = [], []
    for pose in [(0.5, 0.6, 0.2), (1.3, 1.4, 2.5), (0.9, 0.3, -1.2), (1.5, 0.8, 4.0)]:
        frame, truth = render((TAG,), pose, rng=rng)
        ours = det.detect(frame)
        theirs = apriltag3_corners(frame, "tag36h11")
        assert len(ours) == 1 and TAG.id in theirs
        c_at = theirs[TAG.id] - 0.5
        c_cv = ours[0].corners_px
        # Match corners by proximity (the two libraries list them in different orders).
        d = np.linalg.norm(c_cv[:, None] - c_at[None], axis=2)
        diffs.extend(d.min(axis=1))
        truth_err.extend(np.linalg.norm(c_cv - truth[0], axis=1))
    assert np.mean(diffs) < 0.5
    assert np.mean(truth_err) < 0.5


def test_upscaled_window_keeps_pixel_convention():
    """Corners found in a 2x enlarged window map back onto the true corners.

    Pixel centres at integers at both scales (OpenCV convention): x = (x2 + 0.5)/2 - 0.5.
    """
    det = MarkerDetector((TAG,), refine="apriltag")
    frame, truth = render((TAG,), (0.9, 0.8, 0.7), rng=np.random.default_rng(9))
    c = truth[0]
    roi = (int(c[:, 0].min()) - 20, int(c[:, 1].min()) - 20,
           int(c[:, 0].max()) + 20, int(c[:, 1].max()) + 20)
    big = det.detect(frame, roi, upscale=2)
    assert len(big) == 1
    assert np.mean(np.linalg.norm(big[0].corners_px - c, axis=1)) < 0.3


def test_smallest_outline_bound_keeps_corners():
    """Skipping outlines shorter than half the marker's side changes nothing found;
    a bound above the marker's size finds nothing (the bound is really applied)."""
    det = MarkerDetector((TAG,))
    frame, truth = render((TAG,), (0.9, 0.8, 0.7), rng=np.random.default_rng(9))
    c = truth[0]
    roi = (int(c[:, 0].min()) - 30, int(c[:, 1].min()) - 30,
           int(c[:, 0].max()) + 30, int(c[:, 1].max()) + 30)
    a, b = c[2] - c[0], c[3] - c[1]
    side = np.sqrt(0.5 * abs(a[0] * b[1] - a[1] * b[0]))  # quadrilateral area from diagonals
    plain = det.detect(frame, roi)
    bound = det.detect(frame, roi, min_side_px=0.5 * side)
    assert len(plain) == len(bound) == 1
    np.testing.assert_allclose(bound[0].corners_px, plain[0].corners_px, atol=1e-9)
    assert det.detect(frame, roi, min_side_px=3.0 * side) == []


def test_prefetched_subpix_pass_changes_nothing():
    """The SUBPIX pass started ahead (prefetch) gives the corners of a plain call; one
    started for another frame is not used."""
    det = MarkerDetector((TAG,))
    frame, truth = render((TAG,), (0.9, 0.8, 0.7), rng=np.random.default_rng(9))
    other, _ = render((TAG,), (1.0, 0.8, 0.7), rng=np.random.default_rng(10))
    c = truth[0]
    roi = (int(c[:, 0].min()) - 10, int(c[:, 1].min()) - 10,
           int(c[:, 0].max()) + 10, int(c[:, 1].max()) + 10)
    wide = (roi[0] - 15, roi[1] - 15, roi[2] + 15, roi[3] + 15)
    plain = det.detect(frame, roi, context_roi=wide)
    det.prefetch(frame, wide)
    ahead = det.detect(frame, roi, context_roi=wide)
    det.prefetch(other, wide)
    stale = det.detect(frame, roi, context_roi=wide)
    assert len(plain) == len(ahead) == len(stale) == 1
    np.testing.assert_array_equal(ahead[0].corners_px, plain[0].corners_px)
    np.testing.assert_array_equal(stale[0].corners_px, plain[0].corners_px)


def test_wrong_ids_ignored_and_listed():
    """Only the robot's (family, id) counts; a missing marker error lists seen IDs."""
    other = Marker(id=7, family="DICT_APRILTAG_36h11", size_m=0.12, z_m=0.25)
    frames = [(i, i / 30, render((other,), (0.9, 0.9, 0.1 * i))[0]) for i in range(3)]
    acc = track_frames(frames, _robot([TAG]), FIELD, StandInRegistrar())
    assert all(f is None for f in acc.fix)
    with pytest.raises(TrackingError, match=r"DICT_APRILTAG_36h11:7"):
        finish_track(acc, _robot([TAG]), FIELD, TrackSettings(readout_s=0.0),
                     readout_source="none")


# ---------------------------------------------------------------- whole tracking
def _sequence(markers, n=45, fps=30.0, hidden=None, seed=1):
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fps
    x, y, th = _path(t)
    frames = []
    for i in range(n):
        hid = hidden(i) if hidden else ()
        frames.append((i, float(t[i]), render(markers, (x[i], y[i], th[i]), rng=rng,
                                              hidden=hid)[0]))
    return t, np.column_stack([x, y, th]), frames


def _track(markers, frames, **kw):
    robot = _robot(markers)
    settings = TrackSettings(readout_s=0.0, **kw)
    acc = track_frames(iter(frames), robot, FIELD, StandInRegistrar(), settings)
    return finish_track(acc, robot, FIELD, settings, readout_source="given")


@pytest.fixture(scope="module")
def single_tag_run():
    t, truth, frames = _sequence((TAG,), hidden=lambda i: (3,) if 20 <= i < 23 else ())
    return truth, _track((TAG,), frames)


def test_track_accuracy_and_short_gap(single_tag_run):
    """Position within a few mm of the synthetic truth; 3 hidden frames bridged."""
    truth, res = single_tag_run
    tr = res.track
    assert list(tr.columns) == TRACK_COLUMNS + SHARED_COLUMNS
    # the shared part never exceeds the whole 1-sigma
    shared = np.sum(tr[SHARED_COLUMNS].to_numpy() ** 2, axis=1)
    assert np.all(shared <= tr.sigma_xy_m.to_numpy() ** 2 * (1 + 1e-9))
    err = np.hypot(tr.x_m - truth[:, 0], tr.y_m - truth[:, 1])
    assert np.sqrt(np.mean(err**2)) < 0.002
    assert np.degrees(np.sqrt(np.mean((tr.heading_rad - truth[:, 2]) ** 2))) < 0.5
    assert tr.detected.sum() == 42 and tr.interpolated[20:23].all()
    assert not tr.interpolated[tr.detected].any()
    # Velocity against the analytic derivative of the path (interior samples).
    tt = tr.t_s.to_numpy()
    vx_true = -0.5 * 0.8 * np.sin(0.8 * tt)
    assert np.sqrt(np.mean((tr.vx_mps[5:-5] - vx_true[5:-5]) ** 2)) < 0.03
    q = res.quality
    assert q["detected_frames"] == 42 and q["long_gaps"] == []
    assert 2 < q["marker_cell_px_min"] <= q["marker_cell_px_median"] < 6
    assert 0.02 < q["corner_sigma_px"] < 1.0


def test_sigma_is_a_plausible_error_bound(single_tag_run):
    """Most samples lie within 2 sigma (radial RMS sigma; Gaussian: about 95-98%)."""
    truth, res = single_tag_run
    tr = res.track
    err = np.hypot(tr.x_m - truth[:, 0], tr.y_m - truth[:, 1])
    assert np.mean(err <= 2 * tr.sigma_xy_m) > 0.8
    assert np.all(tr.sigma_xy_m < 0.01)


def test_long_gap_left_empty_and_reported():
    """A 0.4 s occlusion (> max_gap_s) is NaN, not invented, and reported."""
    t, truth, frames = _sequence((TAG,), n=40, hidden=lambda i: (3,) if 10 <= i < 22 else ())
    res = _track((TAG,), frames)
    tr = res.track
    assert tr.x_m[10:22].isna().all() and not tr.interpolated[10:22].any()
    assert tr.x_m[:10].notna().all() and tr.x_m[22:].notna().all()
    assert res.quality["long_gaps"][0]["first_frame"] == 10
    assert any("untracked gaps" in w for w in res.warnings)


def test_rigid_marker_set_survives_occlusion():
    """Two markers with known offsets: one hidden, the pose continues without a jump."""
    a = Marker(id=1, family="DICT_4X4_50", size_m=0.09, x_m=0.1, y_m=0.0, z_m=0.2)
    b = Marker(id=2, family="DICT_4X4_50", size_m=0.09, x_m=-0.1, y_m=0.0, z_m=0.2,
               yaw_rad=math.pi / 2)
    t, truth, frames = _sequence((a, b), n=30, hidden=lambda i: (2,) if i >= 15 else ())
    res = _track((a, b), frames)
    tr = res.track
    err = np.hypot(tr.x_m - truth[:, 0], tr.y_m - truth[:, 1])
    assert tr.detected.all()
    assert err.max() < 0.004
    assert np.degrees(np.abs(tr.heading_rad - truth[:, 2]).max()) < 1.0


def test_window_search_equals_full_search():
    """Searching a predicted window finds the marker as well as the whole frame does.

    The AprilTag quad search thresholds the image in tiles counted from the window's
    corner, so a window moves corners by a few hundredths of a pixel; the poses agree
    within 1 mm and are as close to the truth."""
    t, truth, frames = _sequence((TAG,), n=12)
    win = _track((TAG,), frames, window=True)
    full = _track((TAG,), frames, window=False)
    assert win.quality["window_searches"] >= 10
    np.testing.assert_allclose(win.track.x_m, full.track.x_m, atol=1e-3)
    np.testing.assert_allclose(win.track.y_m, full.track.y_m, atol=1e-3)
    err_win = np.hypot(win.track.x_m - truth[:, 0], win.track.y_m - truth[:, 1])
    err_full = np.hypot(full.track.x_m - truth[:, 0], full.track.y_m - truth[:, 1])
    assert np.sqrt(np.mean(err_win**2)) < np.sqrt(np.mean(err_full**2)) + 5e-4


def test_rolling_shutter_correction():
    """A marker in row v is seen at t + (v/H) readout; correcting removes the lag.

    Model: Ringaby & Forssen, IJCV 96:335, 2012 (row-wise readout).
    """
    readout = 0.03
    n = 36
    rng = np.random.default_rng(2)
    t = np.arange(n) / 30.0
    frames, truth_frame = [], []
    for i in range(n):
        te = t[i]
        for _ in range(3):  # fixed point: the row depends on the pose at the read time
            x, y, th = (v[0] for v in _path(np.array([te])))
            v_row = np.mean(_project(_marker_world(TAG, (x, y, th)))[:, 1])
            te = t[i] + v_row / H * readout
        frames.append((i, float(t[i]), render((TAG,), (x, y, th), rng=rng)[0]))
        truth_frame.append([v[0] for v in _path(np.array([t[i]]))])
    truth_frame = np.array(truth_frame)
    robot = _robot([TAG])
    results = {}
    for ro in (0.0, readout):
        acc = track_frames(iter(frames), robot, FIELD, StandInRegistrar())
        results[ro] = finish_track(acc, robot, FIELD, TrackSettings(readout_s=ro),
                                   readout_source="given")
    e = {ro: np.hypot(r.track.x_m - truth_frame[:, 0], r.track.y_m - truth_frame[:, 1])[3:-3]
         for ro, r in results.items()}
    assert np.sqrt(np.mean(e[readout] ** 2)) < 0.5 * np.sqrt(np.mean(e[0.0] ** 2))
    assert np.sqrt(np.mean(e[readout] ** 2)) < 0.002
    # Readout unknown (no camera profile): the lag stays, and the 1-sigma carries it
    # (speed x row fraction x the readout's uncertainty): the samples lie within 2 sigma
    # (2-D Gaussian with sigma the radial RMS: about 98 %, common practice). Assuming
    # the readout right instead, the same lag lies outside.
    acc = track_frames(iter(frames), robot, FIELD, StandInRegistrar())
    unknown = finish_track(acc, robot, FIELD, TrackSettings(readout_s=0.0),
                           readout_source="none").track
    err = np.hypot(unknown.x_m - truth_frame[:, 0], unknown.y_m - truth_frame[:, 1])[3:-3]
    assert np.mean(err <= 2 * unknown.sigma_xy_m.to_numpy()[3:-3]) >= 0.9
    assert np.mean(e[0.0] <= 2 * results[0.0].track.sigma_xy_m.to_numpy()[3:-3]) < 0.5


def test_csv_round_trip(tmp_path, single_tag_run):
    _truth, res = single_tag_run
    path = tmp_path / "track.csv"
    save_track_csv(res, path)
    back = load_track_csv(path)
    assert list(back.columns) == TRACK_COLUMNS + SHARED_COLUMNS
    # a track written before the shared modes existed still reads
    res.track[TRACK_COLUMNS].to_csv(tmp_path / "old.csv", index=False)
    assert list(load_track_csv(tmp_path / "old.csv").columns) == TRACK_COLUMNS
    pd.testing.assert_series_equal(back.detected, res.track.detected)
    np.testing.assert_allclose(back.x_m, res.track.x_m, rtol=1e-8)


def test_small_marker_warning():
    """Cells under 3 px give a warning naming a marker size that would fix it."""
    tiny = Marker(id=3, family="DICT_APRILTAG_36h11", size_m=0.045, z_m=0.25)
    t, truth, frames = _sequence((tiny,), n=6)
    res = _track((tiny,), frames)
    assert res.quality["marker_cell_px_field_min"] < 3
    assert any("use a marker of at least" in w for w in res.warnings)


# ------------------------------------------------------------ through a video file
def _encode(frames, path, fps=30, codec=("-c:v", "libx264", "-crf", "12")):
    proc = subprocess.Popen(
        ["ffmpeg", "-loglevel", "error", "-y", "-f", "rawvideo", "-pix_fmt", "bgr24",
         "-s", f"{W}x{H}", "-r", str(fps), "-i", "-", *codec,
         "-pix_fmt", "yuv420p", "-movflags", "+faststart", str(path)],
        stdin=subprocess.PIPE,
    )
    for _i, _t, f in frames:
        proc.stdin.write(f.tobytes())
    proc.stdin.close()
    assert proc.wait() == 0


@pytest.mark.slow
@pytest.mark.skipif(shutil.which("ffmpeg") is None, reason="needs ffmpeg")
def test_track_video_and_truncated_file(tmp_path):
    """Whole path through an H.264 file; a truncated copy keeps the track up to the cut."""
    t, truth, frames = _sequence((TAG,), n=60)
    video = tmp_path / "clip.mp4"
    _encode(frames, video)
    robot = _robot([TAG])
    cam = SimpleNamespace(readout_s=0.0, width_px=W, height_px=H)
    res = track_video(video, robot, FIELD, cam, registrar=StandInRegistrar())
    err = np.hypot(res.track.x_m - truth[:, 0], res.track.y_m - truth[:, 1])
    assert len(res.track) == 60 and res.track.detected.all()
    assert np.sqrt(np.mean(err**2)) < 0.003
    np.testing.assert_allclose(res.track.t_s, t, atol=1e-3)
    data = video.read_bytes()
    cut = tmp_path / "cut.mp4"
    cut.write_bytes(data[: int(len(data) * 0.6)])
    with pytest.raises(VideoTruncatedError, match="stopped at frame") as info:
        track_video(cut, robot, FIELD, cam, registrar=StandInRegistrar())
    part = info.value.partial
    assert part is not None and 10 < len(part.track) < 60
    assert part.track.detected.mean() > 0.9


@pytest.mark.skipif(shutil.which("ffmpeg") is None, reason="needs ffmpeg")
def test_still_robot_in_hevc_is_tracked_in_every_frame(tmp_path):
    """A still robot in an HEVC clip decodes to bit-identical frames, each with its own
    timestamp (ffprobe lists 40): every one is a frame of the track, detected, and
    none is reported as a duplicate or left as a gap at the end (issue 15: 35-40
    dropped, the last 5 an untracked gap)."""
    _t, _truth, frames = _sequence((TAG,), n=1)
    still = frames[0][2]
    video = tmp_path / "still.mp4"
    _encode([(i, i / 30, still) for i in range(40)], video,
            codec=("-c:v", "libx265", "-x265-params", "log-level=error", "-crf", "18"))
    robot = _robot([TAG])
    cam = SimpleNamespace(readout_s=0.0, width_px=W, height_px=H)
    res = track_video(video, robot, FIELD, cam, registrar=StandInRegistrar())
    assert len(res.track) == 40 and res.track.detected.all()
    assert res.quality["duplicated_frames"] == []
    assert res.quality["repeated_images_skipped"] == 0
    assert not res.quality["long_gaps"]


# ------------------------------------------------------------- on a rendered run
@pytest.mark.slow
def test_track_command_on_rendered_run(rendered_run, tmp_path):
    """``vidodo track`` on a short rendered clip: CSV per frame, close to the truth.

    The renderer's truth file is read here only to grade the result.
    """
    from vidodo.cli_main import main

    run = rendered_run("default", 0, video__max_duration_s=4.0)
    out = tmp_path / "track.csv"
    code = main(["track", str(run / "video.mp4"), "--robot", str(run / "robot.toml"),
                 "--field", str(run / "field.toml"), "--camera", str(run / "camera.toml"),
                 "--out", str(out), "--quiet"])
    assert code == 0
    tr = load_track_csv(out)
    truth = pd.read_csv(run / "truth" / "truth.csv")
    assert len(tr) == len(truth)
    np.testing.assert_allclose(tr.t_s, truth.t_s, atol=1e-3)
    err = np.hypot(tr.x_m - truth.x_m, tr.y_m - truth.y_m)
    # 640x360 test clip: a coarser image than the benchmark's 1280x720, so a looser bound.
    assert np.sqrt(np.nanmean(err**2)) < 0.01
    assert tr.detected.mean() > 0.95
    assert (tmp_path / "track.quality.json").exists()


def test_readout_estimated_from_marker_shear():
    """Each corner imaged at its own row time (rolling shutter) shears the marker; the
    readout time comes back from that shear when no camera profile gives it.

    Model: Ringaby & Forssen, IJCV 96:335, 2012 (row-wise readout).
    """
    readout = 0.05
    n = 60
    rng = np.random.default_rng(4)  # seed fixed for reproducibility
    t = np.arange(n) / 30.0
    frames = []
    for i in range(n):
        pose0 = [v[0] for v in _path(np.array([3.0 * t[i]]))]  # about 1.2 m/s
        rows = _project(_marker_world(TAG, pose0))[:, 1]
        for _ in range(3):  # fixed point: each corner's row sets its own time
            img = []
            for c in range(4):
                pc = [v[0] for v in _path(np.array([3.0 * (t[i] + rows[c] / H * readout)]))]
                img.append(_project(_marker_world(TAG, pc))[c])
            img = np.array(img)
            rows = img[:, 1]
        frames.append((i, float(t[i]), render((TAG,), pose0, rng=rng, corners=[img])[0]))
    robot = _robot([TAG])
    acc = track_frames(iter(frames), robot, FIELD, StandInRegistrar())
    warnings = []
    res = finish_track(acc, robot, FIELD, TrackSettings(readout_s=0.0),
                       readout_source="none", warnings=warnings)
    q = res.quality
    assert q["readout_source"] == "estimated"
    assert abs(q["readout_estimate_s"] - readout) < max(3 * q["readout_estimate_sigma_s"], 0.01)
    assert any("readout estimated" in w for w in warnings)


@pytest.mark.slow
def test_track_command_keeps_track_of_truncated_video(rendered_run, tmp_path):
    """A cut file: exit code 2 (bad input) naming the frame, and the CSV up to the cut."""
    from vidodo.cli_main import main

    run = rendered_run("default", 0, video__max_duration_s=4.0)
    # Index first (as phones write it), so that a cut file still opens.
    front = tmp_path / "front.mp4"
    subprocess.run(["ffmpeg", "-loglevel", "error", "-y", "-i", str(run / "video.mp4"),
                    "-c", "copy", "-movflags", "+faststart", str(front)], check=True)
    data = front.read_bytes()
    cut = tmp_path / "cut.mp4"
    cut.write_bytes(data[: int(len(data) * 0.6)])
    out = tmp_path / "track.csv"
    code = main(["track", str(cut), "--robot", str(run / "robot.toml"), "--field",
                 str(run / "field.toml"), "--camera", str(run / "camera.toml"),
                 "--out", str(out), "--quiet"])
    assert code == 2
    tr = load_track_csv(out)
    assert 10 < len(tr) < 120


# ------------------------------------------------------------ corner noise per run
def _noisy_fixes(fresh_px, persistent_px, phi, n=800, seed=5):
    """Fits of n consecutive frames of a moving tag with corner noise of two kinds:
    fresh (independent per frame) and persistent (AR(1) with coefficient phi per frame)."""
    rng = np.random.default_rng(seed)  # seed fixed: the statistics depend on it
    reg = StandInRegistration()
    x, y, th = _path(np.arange(n) / 30.0)
    pers = rng.normal(0.0, persistent_px, (4, 2))
    fixes = []
    for k in range(n):
        pers = phi * pers + math.sqrt(1.0 - phi**2) * rng.normal(0.0, persistent_px, (4, 2))
        corners = _project(_marker_world(TAG, (x[k], y[k], th[k])))
        noisy = corners + pers + rng.normal(0.0, fresh_px, (4, 2))
        fixes.append(fit_pose([Detection(0, noisy)], (TAG,), reg))
    return fixes


def test_corner_noise_recovers_known_gaussian_sigma():
    """White Gaussian corner noise of 0.3 px is recovered from the rigid-fit residuals.

    Source: for a least-squares fit of p parameters to n observations with noise s, the
    whitened residual sum of squares is s^2 chi^2(n - p) (Draper & Smith, Applied
    Regression Analysis, 3rd ed., section 2.6), here n - p = 8 - 3 = 5 per frame; over
    4000 degrees of freedom the relative 1-sigma of s is 1 / sqrt(2 x 4000) = 1.1%, so 5%
    is a > 4-sigma tolerance. White noise has no lag-1 correlation (1-sigma of the
    estimate about 1 / sqrt(4000) = 0.016).
    """
    fixes = _noisy_fixes(0.3, 0.0, 0.0)
    noise = estimate_corner_noise(fixes, range(len(fixes)))
    assert noise.dof == 5 * len(fixes)
    assert noise.sigma_px == pytest.approx(0.3, rel=0.05)
    assert noise.lag1_corr < 0.06
    assert noise.fresh_px == pytest.approx(0.3, rel=0.06)


def test_corner_noise_splits_persistent_from_fresh():
    """Noise kept from frame to frame is told apart from fresh noise by its correlation.

    Source: an AR(1) process with coefficient phi has lag-1 autocorrelation phi (Box &
    Jenkins, Time Series Analysis, section 3.2.4), so fresh noise f plus AR(1) noise p
    has lag-1 correlation phi p^2 / (p^2 + f^2): here 0.95 x 0.5 = 0.475. Tolerance
    0.1 (the AR(1) samples are far from independent: about 800 x (1 - phi) / (1 + phi)
    = 20 independent draws of 8 numbers each). Frames not consecutive are not paired.
    """
    fixes = _noisy_fixes(0.2, 0.2, 0.95)
    noise = estimate_corner_noise(fixes, range(len(fixes)))
    assert noise.sigma_px == pytest.approx(math.sqrt(0.08), rel=0.1)
    assert noise.lag1_corr == pytest.approx(0.475, abs=0.1)
    assert noise.persistent_px**2 + noise.fresh_px**2 == pytest.approx(noise.sigma_px**2)
    sparse = estimate_corner_noise(fixes[::2], range(0, len(fixes), 2))
    assert sparse.pairs == 0 and sparse.lag1_corr == 1.0  # cautious: all persistent


def test_local_noise_follows_a_change_of_corner_noise():
    """Corner noise that triples half-way through a run, and turns persistent, is seen
    locally.

    Source: the same chi^2 / dof estimator as above (Draper & Smith, 3rd ed., section
    2.6), pooled over 31 fits = 155 degrees of freedom: relative 1-sigma of the variance
    sqrt(2 / 155) = 11%, so a tolerance of 40% on the variance ratio is > 3 sigma.
    Away from the change, the local variance over the run's is 0.1^2 / s^2 and
    0.3^2 / s^2 with s^2 = (0.1^2 + 0.3^2) / 2 the run's (equal halves). The second half
    is AR(1) noise with phi = 0.7, whose lag-1 correlation is 0.7 (Box & Jenkins,
    section 3.2.4); it has about 31 x 0.3 / 1.7 = 5.5 independent draws of 8 numbers a
    window (effective sample size of AR(1), same source), so the variance tolerance
    there is 50% (> 2 sigma) and the correlation is only checked to exceed 0.45. The
    first half is white, where the run's 0.2 is kept as the floor.
    """
    from vidodo.tracking.noise import CornerNoise, local_corner_noise

    fixes = _noisy_fixes(0.1, 0.0, 0.0, n=200, seed=11)[:100]
    fixes += _noisy_fixes(0.0, 0.3, 0.7, n=200, seed=12)[100:]
    s2 = (0.1**2 + 0.3**2) / 2
    run = CornerNoise(math.sqrt(s2), 0.0, 0.0, 0.2, 1000, 199)
    scale, rho = local_corner_noise(fixes, range(200), run)
    assert scale.shape == rho.shape == (200,)
    assert np.median(scale[:80]) == pytest.approx(0.1**2 / s2, rel=0.4)
    assert np.median(scale[120:]) == pytest.approx(0.3**2 / s2, rel=0.5)
    assert np.median(rho[:80]) == 0.2 and rho.min() >= 0.2 and np.median(rho[120:]) > 0.45
    _, sparse_rho = local_corner_noise(fixes[::2], range(0, 200, 2), run)
    assert np.all(sparse_rho == 0.2)  # no consecutive pairs: the run's correlation


class _ShiftedRegistration(StandInRegistration):
    """The stand-in camera with its image moved by ``shift_px`` (a camera that moves)."""

    def __init__(self, shift_px):
        self.shift_px = np.asarray(shift_px, float)

    def floor_to_image(self, points_m):
        return super().floor_to_image(points_m) + self.shift_px


def test_registration_policy_still_moving_and_bumped():
    """A still camera is registered once a second after a quarter second; a swaying one
    every frame; a tripod bumped at 3 s goes back to every frame at its next check.
    The sway (0.3 Hz, 20 px) is a slow hand-held sway (common practice: a phone held
    by hand drifts by pixels per second); the policy never sees the truth, only
    registrations."""
    from vidodo.profiles import FieldProfile
    from vidodo.tracking.registration_policy import RegistrationPolicy

    field = FieldProfile(6, 6, 0.6096)
    fps = 30.0
    t = np.arange(150) / fps

    def run(shift):
        class Registrar:
            calls = []

            def register(self, frame, t_s, mask=None):
                self.calls.append(t_s)
                return _ShiftedRegistration(shift(t_s))

        reg = Registrar()
        policy = RegistrationPolicy(reg, field)
        for i, ts in enumerate(t):
            policy.update(None, i, ts)
        return np.array(reg.calls), policy

    still, p = run(lambda ts: (0.0, 0.0))
    assert p.still and len(still) <= 1 + int(0.25 * fps) + 1 + 5
    assert np.all(np.diff(still[still > 0.5]) >= 1.0 - 1e-9)
    sway, p = run(lambda ts: (20.0 * math.sin(2 * math.pi * 0.3 * ts), 0.0))
    assert not p.still and len(sway) == len(t)
    bumped, p = run(lambda ts: (0.0, 0.0) if ts < 3.0 else (3.0, 0.0))
    assert p.moved_count == 1
    after = bumped[bumped > 3.0]
    assert after[0] < 3.0 + 1.0 + 1e-9 and np.all(np.diff(after[1:3]) < 0.04)


@pytest.mark.slow
def test_moving_camera_without_lens_profile_is_flagged(rendered_run):
    """Hand-held footage tracked without a camera profile carries a warning that the
    floor is good to about a centimetre (what the registration benchmark measures:
    5-10 mm worst frame without a profile, under 4 mm with one); with the profile it
    does not. Rendered at the scenario's own 1280x720: at 640x360 without a lens profile
    the registration self-check finds too few of the far seams and refuses the floor."""
    from vidodo.profiles import load_camera, load_field, load_robot

    run = rendered_run("mecanum-handheld", 0, video__max_duration_s=1.5,
                       video__width_px=1280, video__height_px=720)
    robot, field = load_robot(run / "robot.toml"), load_field(run / "field.toml")
    bare = track_video(run / "video.mp4", robot, field, None)
    assert any("no camera profile" in w for w in bare.warnings)
    lens = track_video(run / "video.mp4", robot, field, load_camera(run / "camera.toml"))
    assert not any("no camera profile" in w for w in lens.warnings)
