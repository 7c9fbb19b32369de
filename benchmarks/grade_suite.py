"""Grading accuracy over a suite of rendered runs (issue 6 acceptance figures).

Runs: configurations x seeds. Each configuration is a built-in scenario, sometimes with
a fault added or the camera mount changed, so that tank and mecanum drives, tripod and
hand-held cameras, impacts, shoves, pod lifts and IMU heading jumps are all covered.
Each seed moves every fault by 50 ms steps and changes all the noise.

For every run the benchmark grades the footage and compares with the renderer's truth
(which only this script and the tests read):

* clock offset error: our video time of the log's median sample minus the renderer's;
* events: a detection matches an injected fault of a compatible kind when their time
  spans overlap (with 0.2 s slack); an injected impact is expected both as ``impact``
  and as ``wheel_slip`` (the body stalls while the drive wheels turn on). Precision and
  recall per kind, and onset error (detected start minus injected start);
* anchored drift: each source's final anchored error against the renderer's own: its
  ideal odometry put on the video clock with the true clock, anchored on the exact
  truth pose at the same instant, compared with the exact truth.

Usage::

    .venv/bin/python benchmarks/grade_suite.py                 # tracker on the footage
    .venv/bin/python benchmarks/grade_suite.py --truth standin # no video: exact truth
                                                               # plus noise (grading only)
    .venv/bin/python benchmarks/grade_suite.py --seeds 2 --configs tank-tripod,mecanum-handheld

``--truth standin`` replaces the tracker by the renderer's truth plus Gaussian noise
(1.5 mm, 0.3 deg); it measures the grading stages alone, not the tracker.
"""

from __future__ import annotations

import argparse
import copy
import json
import math
import os
import shutil
import sys
import time
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from vidodo.errors import VidodoError  # noqa: E402
from vidodo.logs import read_log  # noqa: E402
from vidodo.metrics import anchor_poses  # noqa: E402
from vidodo.outputs import column_prefix  # noqa: E402
from vidodo.pipeline import grade_run  # noqa: E402
from vidodo.profiles import dump_toml, load_robot  # noqa: E402
from vidodo.synth.scenario import scenario_from_dict  # noqa: E402
from vidodo.synth.simulate import run_cache_key, simulate_run  # noqa: E402

CACHE = Path(os.environ.get("VIDODO_RUN_CACHE", ROOT / ".cache" / "runs")) / "grade_suite"
EXPECTED = {"impact": ("impact", "wheel_slip"), "shove": ("shove",),
            "pod_lift": ("pod_lift",), "heading_jump": ("heading_jump",)}
KINDS = ("wheel_slip", "shove", "pod_lift", "impact", "heading_jump")

_MECANUM_IMPACT = {"kind": "impact", "segment": 5, "at_s": 1.9, "duration_s": 0.3}
CONFIGS = {
    # name: (built-in scenario, overrides, extra faults)
    "tank-tripod-all": ("default", {}, []),
    "tank-handheld-all": ("default", {"camera.mount": "handheld"}, []),
    "mecanum-handheld-all": ("mecanum-handheld", {}, [_MECANUM_IMPACT]),
    "mecanum-tripod-all": ("mecanum-handheld", {"camera.mount": "tripod"}, [_MECANUM_IMPACT]),
    "tank-tripod": ("tank-tripod", {}, []),
}


def _scenario_data(config, seed, small):
    base, overrides, extra = CONFIGS[config]
    path = ROOT / "vidodo" / "synth" / "scenarios" / f"{base}.toml"
    data = tomllib.loads(path.read_text())
    for k, v in overrides.items():
        table, key = k.split(".")
        data.setdefault(table, {})[key] = v
    data["fault"] = copy.deepcopy(data.get("fault", [])) + copy.deepcopy(extra)
    shift = 0.05 * (seed % 5 - 2)
    for f in data["fault"]:
        if "at_s" in f:
            f["at_s"] = max(0.05, float(f["at_s"]) + shift)
    if small:
        data["video"]["width_px"], data["video"]["height_px"] = small
    data["name"] = f"{config}"
    return data


def render(config, seed, *, video, small):
    """Render (or reuse) one run folder; returns its path."""
    data = _scenario_data(config, seed, small)
    sc = scenario_from_dict(data, f"{config} (benchmark)")
    key = run_cache_key(sc, seed, video=video)
    folder = CACHE / key
    if (folder / ".complete").exists():
        return folder
    if folder.exists():
        shutil.rmtree(folder)
    tmp = folder.with_name(folder.name + ".tmp")
    if tmp.exists():
        shutil.rmtree(tmp)
    simulate_run(sc, seed, tmp, video=video)
    (tmp / "scenario.benchmark.toml").write_text(dump_toml(data))
    (tmp / ".complete").write_text(key)
    tmp.rename(folder)
    return folder


def standin_truth(run, seed):
    """The renderer's truth plus Gaussian noise (1.5 mm, 0.3 deg), as a truth track."""
    from test_pipeline import standin_truth as noisy_truth

    return noisy_truth(run, 1000 + seed, sigma_m=0.0015, sigma_rad=math.radians(0.3))


def _tracked(run, camera, reuse):
    """The tracker's truth track of a run, kept beside it for re-analysis."""
    from vidodo.pipeline import read_track_csv
    from vidodo.profiles import load_camera, load_field
    from vidodo.tracking.tracker import track_video

    path = run / ("track_camera.csv" if camera else "track.csv")
    if reuse and path.is_file():
        return read_track_csv(path)
    robot = load_robot(run / "robot.toml")
    res = track_video(run / "video.mp4", robot, load_field(run / "field.toml"),
                      load_camera(run / "camera.toml") if camera else None)
    res.track.to_csv(path, index=False, float_format="%.9g")
    return res.track


def _true_video(meta, t_log):
    lc = meta["log_clock"]
    return np.asarray(t_log, dtype=float) / (1 + lc["rate_error"]) + lc["offset_s"]


def renderer_drift(run, meta, res):
    """Per source: (ours, renderer's) final anchored error [m]."""
    ideal = pd.read_csv(run / "truth" / "odometry_ideal.csv")
    truth = pd.read_csv(run / "truth" / "truth.csv")
    tv = _true_video(meta, ideal["t_log_s"])
    ht = np.unwrap(truth["heading_rad"].to_numpy())
    out = {}
    for name, m in res.metrics.items():
        pre = column_prefix(name)
        if f"{pre}_x_m" not in ideal.columns or m.final_err_m is None:
            continue
        a = res.anchored[name]
        ok = np.isfinite(a["x_m"].to_numpy())
        t_end = float(res.truth["t_s"].to_numpy()[ok][-1])
        ta = max(res.anchor["t_s"], float(tv[0]))
        if name in res.anchored and any("anchored at" in w and name in w
                                        for w in res.warnings):
            ta = float(res.truth["t_s"].to_numpy()[ok][0])
        src = [ideal[f"{pre}_x_m"], ideal[f"{pre}_y_m"],
               np.unwrap(ideal[f"{pre}_heading_rad"])]
        qc = [truth["x_m"], truth["y_m"], ht]

        def at(tq, t, cols):
            return np.array([np.interp(tq, t, c) for c in cols])

        p = anchor_poses(at(np.array([t_end]), tv, src).T, at(ta, tv, src),
                         at(ta, truth["t_s"], qc))[0]
        q = at(t_end, truth["t_s"], qc)
        out[name] = (m.final_err_m, math.hypot(p[0] - q[0], p[1] - q[1]))
    return out


def match_events(truth_ev, found, slack_s=0.2):
    """Match detections to injected faults; returns per-kind counts and onset errors."""
    tp = {k: 0 for k in KINDS}
    fn = {k: 0 for k in KINDS}
    onset = {k: [] for k in KINDS}
    used = set()
    for _, row in truth_ev.iterrows():
        for kind in EXPECTED.get(row["kind"], ()):
            best = None
            for i, e in enumerate(found):
                if i in used or e.kind != kind:
                    continue
                if e.t_start_s <= row["t_end_s"] + slack_s and \
                        e.t_end_s >= row["t_start_s"] - slack_s:
                    d = e.t_start_s - row["t_start_s"]
                    if best is None or abs(d) < abs(best[1]):
                        best = (i, d)
            if best is None:
                fn[kind] += 1
            else:
                used.add(best[0])
                tp[kind] += 1
                onset[kind].append(best[1])
    fp = {k: sum(1 for i, e in enumerate(found) if e.kind == k and i not in used)
          for k in KINDS}
    false = [(e.kind, round(e.t_start_s, 2)) for i, e in enumerate(found) if i not in used]
    return tp, fp, fn, onset, false


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--truth", choices=["tracker", "standin"], default="tracker")
    ap.add_argument("--seeds", type=int, default=5, help="seeds per configuration")
    ap.add_argument("--configs", default=",".join(CONFIGS),
                    help=f"comma-separated subset of {list(CONFIGS)}")
    ap.add_argument("--size", default="1280x720", help="video size WxH (tracker mode)")
    ap.add_argument("--camera", action="store_true",
                    help="give the run's camera profile (true lens) to the tracker")
    ap.add_argument("--reuse-track", action="store_true",
                    help="reuse a truth track saved beside the run by an earlier call")
    args = ap.parse_args(argv)
    configs = [c for c in args.configs.split(",") if c]
    small = tuple(int(v) for v in args.size.lower().split("x"))
    video = args.truth == "tracker"
    rows, counts = [], {k: [0, 0, 0] for k in KINDS}
    onsets = {k: [] for k in KINDS}
    drift_rows = []
    t_all = time.perf_counter()
    for config in configs:
        for seed in range(args.seeds):
            t0 = time.perf_counter()
            run = render(config, seed, video=video, small=small)
            t_render = time.perf_counter() - t0
            meta = json.loads((run / "truth" / "meta.json").read_text())
            t1 = time.perf_counter()
            try:
                if video:
                    track = _tracked(run, args.camera, args.reuse_track)
                    res = grade_run(run / "video.mp4", run / "log.csv", run / "robot.toml",
                                    run / "field.toml",
                                    run / "camera.toml" if args.camera else None,
                                    track=track)
                else:
                    res = grade_run(None, run / "log.csv", run / "robot.toml",
                                    run / "field.toml", track=standin_truth(run, seed))
            except VidodoError as exc:
                print(f"{config} seed {seed}: FAILED {type(exc).__name__}: {exc}")
                rows.append({"run": f"{config}/{seed}", "failed": str(exc)})
                continue
            t_grade = time.perf_counter() - t1
            robot = load_robot(run / "robot.toml")
            t_mid = float(np.median(read_log(run / "log.csv", robot).frame["t_s"]))
            clock_err = float(res.clock.to_video(t_mid) - _true_video(meta, t_mid))
            frame = 1.0 / float(meta["video"]["fps_nominal"])
            tev = pd.read_csv(run / "truth" / "events.csv")
            tp, fp, fn, onset, false = match_events(tev, res.event_list)
            for k in KINDS:
                counts[k][0] += tp[k]
                counts[k][1] += fp[k]
                counts[k][2] += fn[k]
                onsets[k] += onset[k]
            dr = renderer_drift(run, meta, res)
            for name, (ours, ref) in dr.items():
                drift_rows.append({"run": f"{config}/{seed}", "source": name,
                                   "ours_mm": 1000 * ours, "renderer_mm": 1000 * ref,
                                   "diff_mm": 1000 * (ours - ref)})
            missed = [k for k in KINDS if fn[k]]
            rows.append({"run": f"{config}/{seed}", "clock_err_ms": 1000 * clock_err,
                         "clock_sigma_ms": None if res.clock.sigma_s is None
                         else 1000 * res.clock.sigma_s, "frame_ms": 1000 * frame,
                         "events": len(res.event_list), "false": false, "missed": missed,
                         "render_s": t_render, "grade_s": t_grade})
            print(f"{config} seed {seed}: clock {1000 * clock_err:+.2f} ms, "
                  f"{len(res.event_list)} events, false {false}, missed {missed}, "
                  f"drift diff max "
                  f"{max((abs(o - r) for o, r in dr.values()), default=float('nan')) * 1000:.1f}"
                  f" mm, grade {t_grade:.1f} s", flush=True)
    ok = [r for r in rows if "clock_err_ms" in r]
    print()
    print(f"truth: {args.truth}; runs graded: {len(ok)} of {len(rows)}; "
          f"total time {time.perf_counter() - t_all:.0f} s")
    if not ok:
        return 1
    ce = np.abs([r["clock_err_ms"] for r in ok])
    worst_frames = max(abs(r["clock_err_ms"]) / r["frame_ms"] for r in ok)
    print(f"clock offset error: median {np.median(ce):.2f} ms, max {ce.max():.2f} ms "
          f"({worst_frames:.2f} frame) [target: median <= 5 ms, max <= 1 frame]")
    print("events [target: precision and recall >= 0.95, onset error <= 100 ms]:")
    for k in KINDS:
        tp, fp, fn = counts[k]
        prec = tp / (tp + fp) if tp + fp else float("nan")
        rec = tp / (tp + fn) if tp + fn else float("nan")
        on = np.abs(onsets[k]) * 1000
        within = np.mean(on <= 100) if on.size else float("nan")
        print(f"  {k:<13} injected {tp + fn:3d}  found {tp + fp:3d}  precision {prec:.2f}  "
              f"recall {rec:.2f}  onset |err| median "
              f"{np.median(on) if on.size else float('nan'):.0f} ms, max "
              f"{on.max() if on.size else float('nan'):.0f} ms, within 100 ms {within:.2f}")
    if drift_rows:
        d = pd.DataFrame(drift_rows)
        diff = d["diff_mm"].abs()
        print(f"anchored final drift vs renderer: |diff| median {diff.median():.2f} mm, "
              f"max {diff.max():.2f} mm over {len(d)} source-runs; within 5 mm: "
              f"{(diff <= 5).mean():.2f} [target: within 5 mm]")
        worst = d.loc[diff.idxmax()]
        print(f"  worst: {worst['run']} {worst['source']}: ours {worst['ours_mm']:.1f} mm, "
              f"renderer {worst['renderer_mm']:.1f} mm")
    print(f"grade time per run: median {np.median([r['grade_s'] for r in ok]):.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
