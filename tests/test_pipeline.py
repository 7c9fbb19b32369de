"""Grading rendered runs end to end, the written outputs, the verb, and bad input.

Most tests use a *stand-in truth track*: the renderer's exact truth (truth/truth.csv)
plus Gaussian noise of a typical marker track (1.5 mm, 0.3 deg), so the grading can be
checked apart from the tracker. Only tests read truth/; the pipeline never does.
"""

import json
import math

import numpy as np
import pandas as pd
import pytest
from standin_track import noisy_track

from vidodo.cli_main import main
from vidodo.errors import EXIT_MEASURE, EXIT_OK, EXIT_TOLERANCE, SyncError
from vidodo.logs import read_log
from vidodo.metrics import anchor_poses
from vidodo.outputs import column_prefix
from vidodo.pipeline import GradeSettings, Tolerances, grade_run, read_track_csv
from vidodo.profiles import load_robot
from vidodo.report.grade_files import write_outputs
from vidodo.timings import STAGES

SIGMA_M = 0.0015
SIGMA_RAD = math.radians(0.3)
KIND_OF_FAULT = {"impact": {"impact", "wheel_slip"}, "shove": {"shove"},
                 "pod_lift": {"pod_lift"}, "heading_jump": {"heading_jump"}}


def standin_truth(run, seed=0, sigma_m=SIGMA_M, sigma_rad=SIGMA_RAD):
    """Truth track columns from the renderer's exact truth plus noise (tests and
    benchmarks only; never the pipeline)."""
    tr = pd.read_csv(run / "truth" / "truth.csv")
    vis = tr["marker_visible"].astype(str).str.lower().eq("true").to_numpy()
    out = noisy_track(tr["t_s"], tr["x_m"], tr["y_m"], tr["heading_rad"], sigma_m, sigma_rad,
                      np.random.default_rng(seed), detected=vis)
    out.loc[~vis, ["x_m", "y_m", "heading_rad"]] = np.nan
    return out


def true_video_time(run, t_log_s):
    """Video time of a log time from the renderer's clock (truth/meta.json)."""
    lc = json.loads((run / "truth" / "meta.json").read_text())["log_clock"]
    return np.asarray(t_log_s) / (1 + lc["rate_error"]) + lc["offset_s"]


def renderer_anchored_final_error(run, result, name):
    """The renderer's own drift of one source at the end of the log.

    Its ideal odometry (truth/odometry_ideal.csv), put on the video clock with the
    renderer's clock, anchored on the exact truth pose at the grade's anchor instant,
    compared with the exact truth at the last truth sample the source covers.
    """
    ideal = pd.read_csv(run / "truth" / "odometry_ideal.csv")
    truth = pd.read_csv(run / "truth" / "truth.csv")
    pre = column_prefix(name)
    tv = true_video_time(run, ideal["t_log_s"].to_numpy())
    h = np.unwrap(truth["heading_rad"].to_numpy())

    def at(tq, t, cols):
        return np.array([np.interp(tq, t, c) for c in cols])

    tq = np.array(result.truth["t_s"])
    a = result.anchored[name]
    ok = np.isfinite(a["x_m"].to_numpy())
    t_end = float(tq[ok][-1])
    ta = max(result.anchor["t_s"], float(tv[0]))
    src = [ideal[f"{pre}_x_m"], ideal[f"{pre}_y_m"], np.unwrap(ideal[f"{pre}_heading_rad"])]
    q_cols = [truth["x_m"], truth["y_m"], h]
    p = anchor_poses(at(np.array([t_end]), tv, src).T, at(ta, tv, src),
                     at(ta, truth["t_s"], q_cols))[0]
    q = at(t_end, truth["t_s"], q_cols)
    return math.hypot(p[0] - q[0], p[1] - q[1])


@pytest.fixture(scope="module")
def graded(rendered_run):
    """Every built-in scenario with faults, graded from a stand-in truth (no video)."""
    out = {}
    for name in ("default", "tank-tripod", "mecanum-handheld"):
        run = rendered_run(name, 0, video=False)
        res = grade_run(None, run / "log.csv", run / "robot.toml", run / "field.toml",
                        track=standin_truth(run))
        out[name] = (run, res)
    return out


@pytest.mark.parametrize("name", ["default", "tank-tripod", "mecanum-handheld"])
def test_clock_offset_recovered(graded, name):
    """Offset error below 5 ms (our target: median <= 5 ms, max <= 1 frame)."""
    run, res = graded[name]
    robot = load_robot(run / "robot.toml")
    t_mid_s = float(np.median(read_log(run / "log.csv", robot).frame["t_s"]))
    err = float(res.clock.to_video(t_mid_s) - true_video_time(run, t_mid_s))
    assert abs(err) < 0.005
    assert res.clock.sigma_s is not None and res.clock.sigma_s < 0.005


@pytest.mark.parametrize("name", ["default", "tank-tripod", "mecanum-handheld"])
def test_anchored_drift_matches_renderer(graded, name):
    """Final anchored error within 5 mm of the renderer's own."""
    run, res = graded[name]
    ideal = pd.read_csv(run / "truth" / "odometry_ideal.csv", nrows=1)
    checked = 0
    for src, m in res.metrics.items():
        if f"{column_prefix(src)}_x_m" not in ideal.columns:
            continue
        ref = renderer_anchored_final_error(run, res, src)
        assert m.final_err_m == pytest.approx(ref, abs=0.005), src
        checked += 1
    assert checked >= 1


@pytest.mark.parametrize("name", ["default", "tank-tripod", "mecanum-handheld"])
def test_injected_faults_found(graded, name):
    """Every injected fault is found within 100 ms of its onset; nothing else is claimed.

    An injected impact (the body stalls while the drive wheels turn on) must show as an
    impact and as a wheel slip.
    """
    run, res = graded[name]
    truth_ev = pd.read_csv(run / "truth" / "events.csv")
    found = list(res.event_list)
    used = set()
    for _, row in truth_ev.iterrows():
        for kind in KIND_OF_FAULT[row["kind"]]:
            match = [i for i, e in enumerate(found) if e.kind == kind
                     and abs(e.t_start_s - row["t_start_s"]) <= 0.1]
            assert match, (row["kind"], kind, row["t_start_s"])
            used.add(match[0])
    extra = [(e.kind, round(e.t_start_s, 2)) for i, e in enumerate(found) if i not in used]
    assert not extra


def test_outputs_written_in_the_documented_format(graded, tmp_path):
    """drift.csv, events.csv and summary.json carry the columns of DEVELOPERS.md."""
    _, res = graded["default"]
    write_outputs(res, tmp_path)
    drift = pd.read_csv(tmp_path / "drift.csv")
    assert list(drift.columns[:7]) == ["t_s", "truth_x_m", "truth_y_m", "truth_heading_rad",
                                       "truth_sigma_xy_m", "truth_sigma_heading_rad",
                                       "path_length_m"]
    for src in res.metrics:
        p = column_prefix(src)
        for c in ("x_m", "y_m", "heading_rad", "err_m", "along_m", "cross_m",
                  "heading_err_rad"):
            assert f"{p}_{c}" in drift.columns
    assert drift.columns[-1] == "events"
    ev = pd.read_csv(tmp_path / "events.csv")
    assert list(ev.columns) == ["kind", "t_start_s", "t_end_s", "x_m", "y_m", "magnitude",
                                "magnitude_unit", "sources", "detail"]
    s = json.loads((tmp_path / "summary.json").read_text())
    for key in ("vidodo_version", "inputs", "settings", "clock", "truth", "sources",
                "events", "tolerances", "verdict", "warnings"):
        assert key in s
    for m in s["sources"].values():
        for key in ("ate_rmse_m", "rpe_0p5m_rmse_m", "rpe_1s_rmse_m", "final_err_m",
                    "final_heading_err_rad", "drift_pct", "heading_drift_deg_per_turn",
                    "max_err_m", "max_err_t_s", "max_err_x_m", "max_err_y_m",
                    "path_length_m", "pass"):
            assert key in m
    # a track written by grade is read back unchanged
    back = read_track_csv(tmp_path / "track.csv")
    assert np.allclose(back["x_m"], res.truth["x_m"], equal_nan=True)


def test_grade_verb_exit_codes(rendered_run, tmp_path, capsys):
    """The verb: exit 0 without tolerances, 4 when a source is outside them."""
    run = rendered_run("tank-tripod", 0, video=False)
    track = tmp_path / "track.csv"
    standin_truth(run).to_csv(track, index=False)
    args = ["grade", str(run / "video.mp4"), str(run / "log.csv"), "--robot",
            str(run / "robot.toml"), "--field", str(run / "field.toml"), "--track",
            str(track), "--out", str(tmp_path / "out"), "--quiet"]
    assert main(args) == EXIT_OK
    assert (tmp_path / "out" / "summary.json").is_file()
    code = main(args[:-1] + ["--tol-pos-m", "0.001"])
    assert code == EXIT_TOLERANCE
    out = capsys.readouterr().out
    assert "FAIL" in out and "verdict: fail" in out
    s = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert s["verdict"] == "fail"
    t = s["timings_s"]  # track given: no decoding; no footage: no replay
    assert t["decode"] is None and t["replay"] is None
    assert t["sync"] > 0 and t["events"] > 0 and t["pictures"] > 0


def test_no_overlap_is_could_not_measure(rendered_run, tmp_path):
    """A manual offset putting the log outside the video: exit 3, nothing written."""
    run = rendered_run("tank-tripod", 0, video=False)
    track = tmp_path / "track.csv"
    standin_truth(run).to_csv(track, index=False)
    out = tmp_path / "out"
    code = main(["grade", "v.mp4", str(run / "log.csv"), "--robot", str(run / "robot.toml"),
                 "--field", str(run / "field.toml"), "--track", str(track),
                 "--clock-offset-s", "500", "--out", str(out)])
    assert code == EXIT_MEASURE
    assert not out.exists()


def test_short_log_is_graded_on_the_overlap_with_a_warning(rendered_run, tmp_path):
    """A log cut to its first 40 % still syncs; the summary says only the overlap counts."""
    run = rendered_run("default", 0, video=False)
    log = pd.read_csv(run / "log.csv")
    short = tmp_path / "log.csv"
    log.iloc[: int(0.4 * len(log))].to_csv(short, index=False)
    res = grade_run(None, short, run / "robot.toml", run / "field.toml",
                    track=standin_truth(run))
    robot = load_robot(run / "robot.toml")
    t_mid = float(np.median(read_log(short, robot).frame["t_s"]))
    assert abs(float(res.clock.to_video(t_mid) - true_video_time(run, t_mid))) < 0.005
    assert any("only the overlap is graded" in w for w in res.warnings)
    for m in res.metrics.values():
        assert m.coverage_s < 0.6 * float(res.truth["t_s"].iloc[-1])


def test_truth_without_motion(rendered_run):
    """A truth track that never moves: automatic sync refuses; with a manual offset the
    figures that need motion are None and a warning says so (never made up)."""
    run = rendered_run("default", 0, video=False)
    still = standin_truth(run)
    rng = np.random.default_rng(3)
    n = len(still)
    still["x_m"] = 1.0 + rng.normal(0, SIGMA_M, n)
    still["y_m"] = 1.0 + rng.normal(0, SIGMA_M, n)
    still["heading_rad"] = 0.5 + rng.normal(0, SIGMA_RAD, n)
    with pytest.raises(SyncError, match="too little motion"):
        grade_run(None, run / "log.csv", run / "robot.toml", run / "field.toml", track=still)
    res = grade_run(None, run / "log.csv", run / "robot.toml", run / "field.toml",
                    track=still,
                    settings=GradeSettings(clock_offset_s=float(true_video_time(run, 0.0))))
    assert any("no motion" in w for w in res.warnings)
    for m in res.metrics.values():
        assert m.drift_pct is None and m.heading_drift_deg_per_turn is None
        assert m.rpe_path_rmse_m is None


def test_tolerances():
    """Pass/fail compares the final anchored errors (documented choice)."""
    from vidodo.metrics import SourceMetrics

    m = SourceMetrics(0.01, None, None, 0.03, math.radians(-2), 1.0, None, 0.04, 1.0, 0.0,
                      0.0, 3.0, 10.0, 0.0)
    assert Tolerances().check(m) is None
    assert Tolerances(position_m=0.05).check(m) is True
    assert Tolerances(position_m=0.02).check(m) is False
    assert Tolerances(heading_rad=math.radians(1)).check(m) is False
    assert Tolerances(0.05, math.radians(3)).check(m) is True


@pytest.mark.slow
def test_grade_rendered_video_end_to_end(rendered_run, tmp_path):
    """Full path on footage: tracker, sync, drift. Clock within one frame."""
    run = rendered_run("tank-tripod", 0, video__width_px=1280, video__height_px=720)
    res = grade_run(run / "video.mp4", run / "log.csv", run / "robot.toml",
                    run / "field.toml", run / "camera.toml")
    robot = load_robot(run / "robot.toml")
    t_mid = float(np.median(read_log(run / "log.csv", robot).frame["t_s"]))
    assert abs(float(res.clock.to_video(t_mid) - true_video_time(run, t_mid))) < 1 / 30
    write_outputs(res, tmp_path)
    assert (tmp_path / "drift.csv").is_file()
    t = res.summary["timings_s"]
    assert list(t)[:8] == list(STAGES)
    assert all(t[k] > 0 for k in ("decode", "register", "detect", "smooth", "sync", "events"))
    assert t["pictures"] is None and t["replay"] is None
