"""Annotated replay: rings drawn where the registration projects the marker.

The expected pixel of the marker is always computed here with ``cv2.projectPoints``
(OpenCV's pinhole + Brown-Conrady distortion model) from the camera's intrinsics and
pose; the replay code itself only uses the frame registration.
"""

from __future__ import annotations

import json
import math

import cv2
import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from vidodo.profiles import Marker
from vidodo.registration.frame import FrameRegistration
from vidodo.report.replay import (
    TRUTH_BGR,
    ReplaySetup,
    ReplayStyle,
    ReplayTracks,
    annotate_frame,
    frame_overlay,
    marker_points_m,
    write_replay,
)

# A camera 2.2 m up behind the field edge looking down at it, mild barrel distortion
# (values of the kind a phone main camera has: from memory).
K = np.array([[700.0, 0, 320.0], [0, 700.0, 240.0], [0, 0, 1]])
DIST = np.array([0.05, -0.11, 0.0004, -0.0003, 0.03])
MARKER = Marker(id=7, family="DICT_4X4_50", size_m=0.2, x_m=0.05, y_m=-0.02, z_m=0.26)


def _camera_pose():
    """rvec, tvec (floor -> camera) of a camera at (1.8, -0.9, 2.2) looking at (1.8, 1.8, 0)."""
    c = np.array([1.8, -0.9, 2.2])
    fwd = np.array([1.8, 1.8, 0.0]) - c
    fwd /= np.linalg.norm(fwd)
    right = np.cross(fwd, [0, 0, 1.0])
    right /= np.linalg.norm(right)
    down = np.cross(fwd, right)
    r = np.vstack([right, down, fwd])  # rows: camera x, y, z in floor coordinates
    rvec = cv2.Rodrigues(r)[0].ravel()
    return rvec, -r @ c


def _registration(t_s=0.0):
    rvec, tvec = _camera_pose()
    return FrameRegistration(t_s=t_s, ok=True, camera_matrix=K, dist_coeffs=DIST, rvec=rvec,
                             tvec=tvec, rms_px=0.3, rms_floor_m=0.001, n_points=40,
                             method="points")


def _truth_ring_centre(img, orig):
    """Centroid of the pixels painted exactly in the truth colour (ring + crosshair)."""
    painted = np.all(img == np.array(TRUTH_BGR, np.uint8), axis=2) & np.any(img != orig, axis=2)
    v, u = np.nonzero(painted)
    assert u.size > 20
    return np.array([u.mean(), v.mean()])


def _expected_px(pose):
    """The marker centre projected by OpenCV (independent of the replay code)."""
    x, y, h = pose
    mx = x + math.cos(h) * MARKER.x_m - math.sin(h) * MARKER.y_m
    my = y + math.sin(h) * MARKER.x_m + math.cos(h) * MARKER.y_m
    rvec, tvec = _camera_pose()
    px, _ = cv2.projectPoints(np.array([[mx, my, MARKER.z_m]]), rvec, tvec, K, DIST)
    return px.reshape(2)


def test_marker_points_compose_pose_and_offset():
    """Body offset rotated by the heading (planar rigid motion, common practice)."""
    pts = marker_points_m([[1.0, 2.0, math.pi / 2]], MARKER)
    assert_allclose(pts, [[1.0 + 0.02, 2.0 + 0.05, 0.26]], atol=1e-12)
    assert_allclose(marker_points_m([[1.0, 2.0, np.nan]]), [[1.0, 2.0, 0.0]])


def _tracks(poses, t):
    drift = pd.DataFrame({"t_s": t, "truth_x_m": poses[:, 0], "truth_y_m": poses[:, 1],
                          "truth_heading_rad": poses[:, 2],
                          "drive_x_m": poses[:, 0] + 0.1, "drive_y_m": poses[:, 1],
                          "drive_heading_rad": poses[:, 2], "drive_err_m": np.full(len(t), 0.1)})
    return drift


@pytest.mark.parametrize("pose", [(1.2, 1.0, 0.3), (2.4, 2.6, -2.0), (0.7, 3.0, 1.4)])
def test_drawn_truth_ring_centre_on_projected_marker(pose):
    """In memory (no encoding): the ring's centroid is within 0.5 px of projectPoints."""
    poses = np.array([pose, pose])
    tracks = ReplayTracks.from_tables(_tracks(poses, np.array([0.0, 0.1])))
    frame = np.full((480, 640, 3), 90, np.uint8)
    ov = frame_overlay(tracks, 1, _registration(), marker=MARKER)
    img = annotate_frame(frame, ov, lines=[("t = 0.10 s", (255, 255, 255))])
    exp = _expected_px(pose)
    assert_allclose(ov["truth_px"], exp, atol=1e-6)
    assert np.linalg.norm(_truth_ring_centre(img, frame) - exp) < 0.5


def test_unregistered_frame_draws_no_ring():
    poses = np.array([(1.0, 1.0, 0.0)])
    tracks = ReplayTracks.from_tables(_tracks(poses, np.array([0.0])))
    bad = FrameRegistration(t_s=0.0, ok=False, camera_matrix=K, dist_coeffs=DIST,
                            rvec=np.full(3, np.nan), tvec=np.full(3, np.nan), rms_px=math.nan,
                            rms_floor_m=math.nan, n_points=0, method="", reason="no floor")
    ov = frame_overlay(tracks, 0, bad, marker=MARKER)
    assert ov["truth_px"] is None
    frame = np.zeros((480, 640, 3), np.uint8)
    assert not np.any(np.all(annotate_frame(frame, ov) == TRUTH_BGR, axis=2))


def test_row_at_nearest_within_gap():
    t = np.array([0.0, 0.033, 0.067, 0.1])
    tracks = ReplayTracks.from_tables(_tracks(np.zeros((4, 3)), t))
    assert tracks.row_at(0.06) == 2
    assert tracks.row_at(0.5, max_gap_s=0.05) is None


@pytest.mark.parametrize("scale", [1.0, 0.5])
def test_written_replay_keeps_times_and_lands_on_marker(tmp_path, scale):
    """Encode, decode: frame times kept; the ring stays within 3 px after H.264, at full
    size and at half size (a pixel centre u maps to (u + 0.5) s - 0.5 when an image is
    resized by s: pixel centres at integers, common practice)."""
    pytest.importorskip("vidodo.encode")
    from vidodo.encode import write_video

    rng = np.random.default_rng(4)
    t = np.cumsum(rng.uniform(0.028, 0.04, 24))
    t -= t[0]
    n = t.size
    base = np.full((480, 640, 3), 100, np.uint8)
    write_video(tmp_path / "in.mp4", (base for _ in range(n)), t, codec="h264")
    poses = np.column_stack([1.0 + 0.5 * t, 1.5 + 0.2 * t, 0.4 + 0.3 * t])
    drift = _tracks(poses, t)
    events = pd.DataFrame([{"kind": "impact", "t_start_s": t[10], "t_end_s": t[12],
                            "x_m": 1.5, "y_m": 2.0}])
    out = write_replay(tmp_path / "in.mp4", drift, events, tmp_path / "replay.mp4",
                       ReplaySetup(registration=_registration(), marker=MARKER),
                       ReplayStyle(scale=scale))
    cap = cv2.VideoCapture(str(out))
    got_t, errs = [], []
    i = 0
    while True:
        ok, img = cap.read()
        if not ok:
            break
        got_t.append(cap.get(cv2.CAP_PROP_POS_MSEC) / 1000)
        assert img.shape[:2] == (round(480 * scale), round(640 * scale))
        if i % 6 == 0:
            near = np.all(np.abs(img.astype(int) - TRUTH_BGR) < 60, axis=2)
            exp = (np.asarray(_expected_px(poses[i])) + 0.5) * scale - 0.5
            # only the ring's neighbourhood: the readout panel (its text has a smallest
            # size) holds a line in the truth colour
            v, u = np.mgrid[:near.shape[0], :near.shape[1]]
            near &= np.hypot(u - exp[0], v - exp[1]) < 30 * scale
            v, u = np.nonzero(near)
            errs.append(np.hypot(u.mean() - exp[0], v.mean() - exp[1]))
        i += 1
    cap.release()
    assert i == n
    assert_allclose(got_t, t, atol=2e-3)
    assert max(errs) < 3.0, errs


@pytest.mark.slow
def test_replay_on_rendered_run(request, tmp_path):
    """On a rendered run, the drawn truth ring is within 3 px of the
    marker's true position projected with the run's camera (truth/meta.json) in sampled
    frames. The replay itself registers the floor with FloorRegistrar on the tracker's
    schedule (no truth read); full size, so the 3 px are footage pixels.
    """
    try:
        rendered_run = request.getfixturevalue("rendered_run")
    except pytest.FixtureLookupError:
        pytest.skip("rendered_run fixture not available yet (tests/conftest.py)")
    from vidodo.profiles import load_camera, load_field, load_robot

    # 1280x720: the automatic tile grid needs the seams resolved (at 640x360 it can lock
    # on a grid shifted by a tile, which is the registration's business, not the replay's)
    run = rendered_run("default", 3, video__width_px=1280, video__height_px=720,
                       **{"video.max_duration_s": 4.0})
    robot = load_robot(run / "robot.toml")
    field = load_field(run / "field.toml")
    camera = load_camera(run / "camera.toml")
    truth = pd.read_csv(run / "truth" / "truth.csv")
    meta = json.loads((run / "truth" / "meta.json").read_text())
    # the drift table's truth here is the oracle itself, so the check isolates the
    # replay's drawing and the registration's inverse mapping
    drift = _tracks(truth[["x_m", "y_m", "heading_rad"]].to_numpy(), truth["t_s"].to_numpy())
    out = write_replay(run / "video.mp4", drift, None, tmp_path / "replay.mp4",
                       ReplaySetup(robot=robot, field=field, camera=camera),
                       ReplayStyle(scale=1.0))
    cam_pose = _meta_camera_pose(meta)
    marker = robot.markers[0]
    errs = []
    for i, orig, img in sampled_frame_pairs(run / "video.mp4", out):
        if bool(truth["marker_visible"].iloc[i]):
            x, y, h = truth[["x_m", "y_m", "heading_rad"]].iloc[i]
            p = np.array([[x + math.cos(h) * marker.x_m - math.sin(h) * marker.y_m,
                           y + math.sin(h) * marker.x_m + math.cos(h) * marker.y_m,
                           marker.z_m]])
            rvec, tvec = cam_pose(truth["t_s"].iloc[i])
            exp = cv2.projectPoints(p, rvec, tvec, camera.matrix, camera.dist_coeffs)[0]
            centre = ring_centre_near(img, orig, exp.ravel())
            assert centre is not None, f"no truth ring near the marker in frame {i}"
            errs.append(np.hypot(*(centre - exp.ravel())))
    assert len(errs) >= 5
    assert max(errs) < 3.0, errs


def sampled_frame_pairs(video, replay, every=10, phase=5):
    """``(index, original frame, replay frame)`` for every ``every``-th frame pair."""
    cap_in, cap_out = cv2.VideoCapture(str(video)), cv2.VideoCapture(str(replay))
    i = 0
    try:
        while True:
            ok1, orig = cap_in.read()
            ok2, img = cap_out.read()
            if not (ok1 and ok2):
                return
            if i % every == phase:
                yield i, orig, img
            i += 1
    finally:
        cap_in.release()
        cap_out.release()


def ring_centre_near(img, orig, exp_px, half_px=40):
    """Centroid of the truth-coloured pixels the replay added within ``half_px`` of
    ``exp_px`` (None when fewer than 11), shape (2,) [px]."""
    near = np.all(np.abs(img.astype(int) - TRUTH_BGR) < 60, axis=2) & \
        ~np.all(np.abs(orig.astype(int) - TRUTH_BGR) < 60, axis=2)
    box = np.zeros_like(near)
    u0, v0 = np.round(np.asarray(exp_px, float)).astype(int)
    box[max(v0 - half_px, 0):v0 + half_px, max(u0 - half_px, 0):u0 + half_px] = True
    v, u = np.nonzero(near & box)
    return np.array([u.mean(), v.mean()]) if u.size > 10 else None


def _meta_camera_pose(meta):
    """Camera pose per frame time from truth/meta.json (test only)."""
    cam = meta.get("camera") or {}
    if "rvec" in cam and "tvec" in cam and not cam.get("sway_deg") and not cam.get("sway_m"):
        rvec = np.asarray(cam["rvec"], float)
        tvec = np.asarray(cam["tvec"], float)
        return lambda t: (rvec, tvec)
    pytest.skip("truth/meta.json has no fixed camera pose (a swaying camera)")


def test_missing_footage_still_writes_the_report(tmp_path):
    """write_report: no footage -> the plots and the page are written, then the error."""
    from test_plots import make_grade_dir  # sibling test module

    from vidodo.errors import InputError
    from vidodo.report.build import write_report

    folder = make_grade_dir(tmp_path / "grade")
    with pytest.raises(InputError, match="inputs.video"):
        write_report(folder, folder, replay=True)
    page = (folder / "report.html").read_text()
    assert "replay.mp4 not written" in page
    assert (folder / "field_map.png").is_file()


def test_interrupt_while_plotting_stops_the_replay(tmp_path, monkeypatch):
    """The replay runs on its own thread beside the plots; an interrupt in the plots stops
    it at its next frame and write_report re-raises the interrupt with no thread left."""
    import threading
    import time

    from test_plots import make_grade_dir  # sibling test module

    from vidodo.report import build, replay

    frames_done = []

    def endless_replay(data, path, *, progress=None, **_options):
        for i in range(100000):  # frames until stopped
            time.sleep(0.001)
            progress(i + 1, None)
            frames_done.append(i)
        return path

    def plots_interrupted(*_a, **_k):
        while not frames_done:  # the replay is under way
            time.sleep(0.001)
        raise KeyboardInterrupt

    monkeypatch.setattr(replay, "replay_from_grade", endless_replay)
    monkeypatch.setattr(build, "write_plots", plots_interrupted)
    folder = make_grade_dir(tmp_path / "grade")
    with pytest.raises(KeyboardInterrupt):
        build.write_report(folder, folder, replay=True)
    assert 0 < len(frames_done) < 100000
    assert not any(t.name == "vidodo-replay" for t in threading.enumerate())
