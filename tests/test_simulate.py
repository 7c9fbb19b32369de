"""Run folders: layout, determinism, profiles, truth, events, clock, and the video."""

import json
import math
import subprocess

import cv2
import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from vidodo.cli_main import main
from vidodo.profiles import load_camera, load_field, load_robot, marker_corners_local
from vidodo.synth.scenario import load_scenario
from vidodo.synth.simulate import frame_times, simulate_run

FILES = ["log.csv", "robot.toml", "field.toml", "camera.toml", "scenario.toml",
         "truth/truth.csv", "truth/events.csv", "truth/odometry_ideal.csv", "truth/meta.json",
         "truth/camera_poses.csv"]


@pytest.fixture(scope="module")
def run_default(tmp_path_factory):
    out = tmp_path_factory.mktemp("run") / "default"
    return simulate_run("default", 0, out, video=False)


def test_run_folder_layout_and_profiles(run_default):
    for f in FILES:
        assert (run_default / f).is_file(), f
    sc = load_scenario("default")
    assert load_robot(run_default / "robot.toml") == sc.robot
    assert load_field(run_default / "field.toml") == sc.field
    assert load_camera(run_default / "camera.toml") == sc.camera_profile()
    again = load_scenario(run_default / "scenario.toml")
    assert again.data == sc.data
    truth = pd.read_csv(run_default / "truth/truth.csv")
    assert list(truth.columns) == ["t_s", "x_m", "y_m", "heading_rad", "vx_mps", "vy_mps",
                                   "omega_radps", "marker_visible"]
    assert truth["marker_visible"].dtype == bool
    ev = pd.read_csv(run_default / "truth/events.csv")
    assert list(ev.columns) == ["kind", "t_start_s", "t_end_s", "x_m", "y_m", "magnitude",
                                "sources"]
    assert set(ev["kind"]) == {"impact", "shove", "pod_lift", "heading_jump"}


def test_same_seed_same_bytes(tmp_path, run_default):
    again = simulate_run("default", 0, tmp_path / "again", video=False)
    for f in FILES:
        assert (again / f).read_bytes() == (run_default / f).read_bytes(), f
    other = simulate_run("default", 1, tmp_path / "other", video=False)
    assert (other / "log.csv").read_bytes() != (run_default / "log.csv").read_bytes()


def test_events_at_the_scenario_times(run_default):
    meta = json.loads((run_default / "truth/meta.json").read_text())
    starts = meta["robot"]["segment_start_s"]
    sc = load_scenario("default")
    ev = pd.read_csv(run_default / "truth/events.csv").set_index("kind")
    want = {"pod_lift": sc.faults[0], "impact": sc.faults[1], "shove": sc.faults[2],
            "heading_jump": sc.faults[3]}
    for kind, f in want.items():
        assert ev.loc[kind, "t_start_s"] == pytest.approx(starts[f.segment] + f.at_s, abs=1e-6)
    assert ev.loc["shove", "t_end_s"] - ev.loc["shove", "t_start_s"] == pytest.approx(0.4)
    assert ev.loc["heading_jump", "magnitude"] == pytest.approx(math.radians(5.0), abs=1e-6)
    assert ev.loc["pod_lift", "sources"] == "tracking;tracking+imu;logged"
    truth = pd.read_csv(run_default / "truth/truth.csv")
    t0, t1 = ev.loc["impact", ["t_start_s", "t_end_s"]]
    stalled = truth[(truth.t_s > t0 + 0.1) & (truth.t_s < t0 + 0.5)]
    assert len(stalled) >= 10 and stalled.vx_mps.abs().max() < 1e-6


def test_clock_offset_from_meta_lines_log_up_with_truth(run_default):
    """Map log times to video times with the meta's offset and rate; the tracking
    odometry (rotated onto the start pose) then follows the truth up to the pod lift."""
    meta = json.loads((run_default / "truth/meta.json").read_text())
    clk = meta["log_clock"]
    odo = pd.read_csv(run_default / "truth/odometry_ideal.csv")
    t_video = odo.t_log_s / (1 + clk["rate_error"]) + clk["offset_s"]
    truth = pd.read_csv(run_default / "truth/truth.csv")
    ev = pd.read_csv(run_default / "truth/events.csv").set_index("kind")
    sel = (t_video >= truth.t_s.iloc[0]) & (t_video < ev.loc["pod_lift", "t_start_s"])
    x0, y0, h0 = meta["robot"]["start_pose"]
    c, s = math.cos(h0), math.sin(h0)
    ox, oy = odo.tracking_x_m[sel], odo.tracking_y_m[sel]
    est_x, est_y = x0 + c * ox - s * oy, y0 + s * ox + c * oy
    tx = np.interp(t_video[sel], truth.t_s, truth.x_m)
    ty = np.interp(t_video[sel], truth.t_s, truth.y_m)
    # linear interpolation of 30 fps truth at 0.9 m/s is exact on straight lines
    assert np.hypot(est_x - tx, est_y - ty).max() < 1e-3
    # and a wrong offset by one frame would not fit
    t_bad = t_video[sel] + 1 / 30
    tx_bad = np.interp(t_bad, truth.t_s, truth.x_m)
    assert np.abs(est_x - tx_bad).max() > 0.01


def test_marker_visibility_agrees_with_projection(run_default):
    """Visible rows: every marker corner projects inside the image (cv2.projectPoints)."""
    meta = json.loads((run_default / "truth/meta.json").read_text())
    truth = pd.read_csv(run_default / "truth/truth.csv")
    robot = load_robot(run_default / "robot.toml")
    cam = load_camera(run_default / "camera.toml")
    rvec, tvec = np.array(meta["camera"]["rvec"]), np.array(meta["camera"]["tvec"])
    mk = robot.markers[0]
    loc = marker_corners_local(mk.size_m)
    for row in truth.iloc[::25].itertuples():
        c, s = math.cos(row.heading_rad), math.sin(row.heading_rad)
        cy, sy = math.cos(mk.yaw_rad), math.sin(mk.yaw_rad)
        bx = mk.x_m + cy * loc[:, 0] - sy * loc[:, 1]
        by = mk.y_m + sy * loc[:, 0] + cy * loc[:, 1]
        pts = np.column_stack([row.x_m + c * bx - s * by, row.y_m + s * bx + c * by,
                               np.full(4, mk.z_m)])
        uv, _ = cv2.projectPoints(pts, rvec, tvec, cam.matrix, cam.dist_coeffs)
        uv = uv.reshape(-1, 2)
        inside = bool(np.all((uv >= 0) & (uv <= [cam.width_px - 1, cam.height_px - 1])))
        assert inside == row.marker_visible
    # pushing the camera's view off the field hides the robot
    off = simulate_run(load_scenario("default", **{"camera.look_at_x_m": -6.0}), 0,
                       run_default.parent / "off", video=False)
    assert not pd.read_csv(off / "truth/truth.csv").marker_visible.any()


def test_failure_leaves_nothing_behind(tmp_path, monkeypatch):
    import vidodo.synth.simulate as sim

    def boom(*a, **k):
        raise RuntimeError("renderer failed")

    monkeypatch.setattr(sim, "_write_video", boom)
    target = tmp_path / "run"
    with pytest.raises(RuntimeError):
        simulate_run("default", 0, target)
    assert not target.exists()
    assert list(tmp_path.iterdir()) == []


def test_variable_frame_timing():
    sc = load_scenario("vfr-phone")
    t = frame_times(sc, 10.0, seed=0)
    dt = np.diff(t)
    assert np.all(dt > 0) and t[0] == 0
    assert dt.max() > 1.5 / sc.video.fps  # dropped slots leave gaps
    assert np.std(dt) > 1e-3
    assert_allclose(t * 90000, np.round(t * 90000), atol=1e-6)  # on the 90 kHz clock
    const = frame_times(load_scenario("default"), 10.0)
    assert_allclose(np.diff(const), 1 / 30, atol=1 / 90000)


def test_render_command_without_video(tmp_path, capsys):
    out = tmp_path / "cli"
    code = main(["render", "mecanum-handheld", "--seed", "3", "--out", str(out), "--no-video",
                 "--width", "640", "--fps", "60", "--set", "log.rate_hz=50", "--quiet"])
    assert code == 0
    cam = load_camera(out / "camera.toml")
    assert (cam.width_px, cam.height_px) == (640, 360)
    sc = load_scenario(out / "scenario.toml")
    assert sc.video.fps == 60 and sc.log.rate_hz == 50
    assert main(["render", "nope", "--out", str(tmp_path / "x")]) == 2
    assert "built-ins are" in capsys.readouterr().err


def _ffprobe_pts(path):
    out = subprocess.run(
        ["ffprobe", "-v", "error", "-select_streams", "v:0", "-show_entries",
         "frame=pts_time", "-of", "csv=p=0", str(path)],
        check=True, capture_output=True, text=True).stdout
    return np.array([float(v.strip(",")) for v in out.split() if v.strip(",")])


@pytest.mark.slow
def test_rendered_video_frames_and_timestamps(rendered_run):
    """Frame count, size and per-frame presentation times (ffprobe) match truth.csv."""
    run = rendered_run("vfr-phone", 0, **{"video.max_duration_s": 3.0})
    truth = pd.read_csv(run / "truth/truth.csv")
    pts = _ffprobe_pts(run / "video.mp4")
    assert len(pts) == len(truth)
    assert_allclose(pts, truth.t_s, atol=2e-5)
    cap = cv2.VideoCapture(str(run / "video.mp4"))
    ok, frame = cap.read()
    assert ok and frame.shape == (360, 640, 3)


@pytest.mark.slow
def test_rendered_marker_is_found_near_its_projection(rendered_run):
    """cv2.aruco finds the robot's marker where cv2.projectPoints puts it (first, still frame)."""
    run = rendered_run("default", 0, **{"video.max_duration_s": 1.0,
                                        "video.width_px": 1280, "video.height_px": 720})
    cap = cv2.VideoCapture(str(run / "video.mp4"))
    ok, frame = cap.read()
    assert ok
    robot = load_robot(run / "robot.toml")
    cam = load_camera(run / "camera.toml")
    meta = json.loads((run / "truth/meta.json").read_text())
    truth = pd.read_csv(run / "truth/truth.csv")
    mk = robot.markers[0]
    det = cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50))
    corners, ids, _ = det.detectMarkers(cv2.cvtColor(frame, cv2.COLOR_BGR2GRAY))
    assert ids is not None and mk.id in ids.ravel()
    found = corners[list(ids.ravel()).index(mk.id)].reshape(4, 2)
    row = truth.iloc[0]
    c, s = math.cos(row.heading_rad), math.sin(row.heading_rad)
    loc = marker_corners_local(mk.size_m)
    cy, sy = math.cos(mk.yaw_rad), math.sin(mk.yaw_rad)
    bx = mk.x_m + cy * loc[:, 0] - sy * loc[:, 1]
    by = mk.y_m + sy * loc[:, 0] + cy * loc[:, 1]
    pts = np.column_stack([row.x_m + c * bx - s * by, row.y_m + s * bx + c * by,
                           np.full(4, mk.z_m)])
    uv, _ = cv2.projectPoints(pts, np.array(meta["camera"]["rvec"]),
                              np.array(meta["camera"]["tvec"]), cam.matrix, cam.dist_coeffs)
    # default detector settings have no sub-pixel refinement (about 0.7 px RMS corner
    # error on clean markers, measured on OpenCV 5.0), plus H.264 and sensor noise
    assert np.abs(found - uv.reshape(4, 2)).max() < 1.5


def test_profile_errors_change_only_the_written_profile(tmp_path, run_default):
    out = simulate_run("wrong-profile", 0, tmp_path / "wrong", video=False)
    written = load_robot(out / "robot.toml")
    true = load_scenario("default").robot
    assert written.wheel("pod_left").radius_m == 0.02448
    assert true.wheel("pod_left").radius_m == 0.024
    assert written.wheel("right").y_m == -0.21
    meta = json.loads((out / "truth/meta.json").read_text())
    keys = {e["key"]: (e["true"], e["written"]) for e in meta["profile_errors"]}
    assert keys["pod_perpendicular.x_m"] == (-0.12, -0.08)
    # the sensors follow the true robot: same log and ideal odometry as the default run
    for f in ("log.csv", "truth/odometry_ideal.csv", "truth/truth.csv"):
        assert (out / f).read_bytes() == (run_default / f).read_bytes(), f


def test_camera_poses_per_frame(tmp_path, run_default):
    cams = pd.read_csv(run_default / "truth/camera_poses.csv")
    truth = pd.read_csv(run_default / "truth/truth.csv")
    assert_allclose(cams.t_s, truth.t_s)
    meta = json.loads((run_default / "truth/meta.json").read_text())
    assert_allclose(cams[["rvec_0", "rvec_1", "rvec_2"]].to_numpy()
                    - np.array(meta["camera"]["rvec"]), 0, atol=1e-8)  # tripod: fixed
    out = simulate_run("mecanum-handheld", 0, tmp_path / "hh", video=False)
    hh = pd.read_csv(out / "truth/camera_poses.csv")
    # hand-held: the lens centre -R^T t moves by centimetres, not metres
    centres = []
    for row in hh.itertuples():
        rot = cv2.Rodrigues(np.array([row.rvec_0, row.rvec_1, row.rvec_2]))[0]
        centres.append(-rot.T @ np.array([row.tvec_0_m, row.tvec_1_m, row.tvec_2_m]))
    spread = np.ptp(np.array(centres), axis=0)
    assert 0.002 < spread.max() < 0.1
