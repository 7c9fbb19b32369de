"""2-sigma coverage of the drift figures' 1-sigma over rendered runs.

Each run is graded as a user would (video tracked, clock found from the motion); the
same run is then graded again from the renderer's true track (its sigma set to zero)
with the true clock offset and rate. The second grade's figures are the "true" ones.
Printed: per figure (final, max, ATE, RPE over distance and time, final heading error)
and for the clock offset the share of (run, source) pairs whose graded figure lies
within 2 of its reported 1-sigma of the true one (target 90-98 %), its exact binomial
95 % interval over runs (the sources of one run share the truth's error, so they are
not independent samples), and the median ratio |error| / sigma (0.67 for an honest
normal 1-sigma; well below 0.5 means the sigma is over-stated).

Only this script reads the truth files; the grader never does. Tracks are pickled
beside the cached render (keyed by the tracking and registration sources), so a second
run only grades.

Measured (tank-tripod, 2 sources per run; before -> after issue 15's drift-sigma
changes: the start heading from travel counts the truth's place-bound error, a
standing robot's track error held over the stop). "fixed": seeds 0-19, the scenario's
camera; "moved": ``--vary-camera``, seeds 0-28 (seed 29's view was refused: the
field's place in the tile pattern could not be told):

=================  ===============================  ===============================
figure             fixed camera, 20 runs            moved camera, 29 runs
                   2-sigma share [95 %]; median     2-sigma share [95 %]; median
=================  ===============================  ===============================
final heading      35 -> 80 % [56, 94]; 2.37->1.67  72 -> 76 % [56, 90]; 0.79->0.73
final position     83 -> 100 % [83, 100]; 0.62->0.18 97 -> 100 % [88, 100]; 0.51->0.38
ATE                100 -> 100 %; 0.32 -> 0.26       100 -> 100 %; 0.25 -> 0.20
largest error      100 -> 100 %; 0.02 -> 0.03       100 -> 100 %; 0.02 -> 0.04
RPE 0.5 m          100 -> 100 %; 0.11 -> 0.10       100 -> 100 %; 0.07 -> 0.07
RPE 1 s            100 -> 100 %; 0.17 -> 0.13       100 -> 100 %; 0.08 -> 0.08
all drift figures  86 -> 97 %                       95 -> 96 %
clock offset       100 % [83, 100]; 0.89            100 % [88, 100]; 0.78
=================  ===============================  ===============================

Clock: errors +0.17..+0.33 ms (fixed camera, all positive: one scene's timing bias) and
-0.15..+0.66 ms (moved camera) against claimed 1-sigma 0.21-0.39 and 0.12-0.72 ms.

Then on main after merging the smoother's break kinds (the multi-step restarts with
26-48 mm sigma are gone) and the track's corner-shift and registration terms, the same
seeds re-tracked (same day): share within 2 sigma; median |error| / sigma:

=================  ==========================  ==========================
figure             fixed camera, 20 runs       moved camera, 29 runs
=================  ==========================  ==========================
final heading      90.0 % [68, 99]; 1.52       75.9 % [56, 90]; 0.70
final position     100 % [83, 100]; 0.19       100 % [88, 100]; 0.38
ATE                100 % [83, 100]; 0.83       98.3 % [82, 100]; 0.71
largest error      100 % [83, 100]; 0.18       98.3 % [82, 100]; 0.35
RPE 0.5 m / 1 s    100 %; 0.44 / 0.49          100 %; 0.27 / 0.32
all drift figures  98.3 %                      95.4 %
clock offset       100 %; 0.95                 100 %; 0.51
=================  ==========================  ==========================

Then with the heading's persistent part carried 1.5 times larger (the refined outline
turns more than the fit's residuals show, ``detector.ROTATION_EXCESS``) and the anchor's
and clock's draws stratified (``drift_sigma._stratified_normals``; with plain draws
every run of 318 frames had the same 40 anchor-heading normals, sample sigma 1.19), the
same seeds re-tracked (before -> after; share within 2 sigma; median |error| / sigma):

=================  ===============================  ===============================
figure             fixed camera, 20 runs            moved camera, 29 runs
=================  ===============================  ===============================
final heading      90 -> 100 %; 1.53 -> 1.02       76 -> 100 %; 0.70 -> 0.48
final position     100 -> 100 %; 0.19 -> 0.18      100 -> 100 %; 0.38 -> 0.36
ATE                100 -> 100 %; 0.84 -> 0.93      98.3 -> 98.3 %; 0.71 -> 0.78
largest error      100 -> 100 %; 0.19 -> 0.18      98.3 -> 100 %; 0.35 -> 0.36
RPE 0.5 m / 1 s    100 %; 0.43 / 0.44 -> 0.41/0.52  100 %; 0.27 / 0.32 -> 0.27/0.35
all drift figures  98.3 -> 100 %; 0.41 -> 0.45     95.4 -> 99.7 %; 0.42 after
=================  ===============================  ===============================

(the heading factor alone, moved camera: final heading 93.1 %, median 0.54.) Still
over-stated: the final position, the largest error and RPE. The truth's position sigma
treats its persistent corner error as independent per corner; on tags drawn by exact
area coverage (3-8 px per cell, as in the rotation test) the outline's centre moves
0.038 px RMS about its common shift where the residuals imply 0.06 px (ratio 0.64), and
errors shared by anchor and later samples (the common corner shift, the registration's
smooth error) cancel in every drift figure, which are differences from the anchor; the
first travel's heading sigma, which sets most of the anchor heading's, was 2-4 times
the travel's error (median 0.24 moved, 0.47 fixed).

Then with the track's shared error (``vidodo.tracking.shared_error``: the common corner
shift and a still camera's registration error as modes drawn once per run, at the
anchor too, so differences from the anchor cancel them; the anchor heading's travel
part counting only the error not shared plus each mode's turn), the same tracks graded
side by side with and without the modes (``--without-shared``: every error drawn per
sample, as before; same seeds, same day; share within 2 sigma; median |error| / sigma):

=================  ===============================  ===============================
figure             fixed camera, 20 runs            moved camera, 29 runs
                   without -> with shared modes     without -> with shared modes
=================  ===============================  ===============================
final heading      100 -> 100 %; 1.03 -> 0.99       100 -> 100 %; 0.48 -> 0.45
final position     100 -> 100 %; 0.20 -> 0.22       100 -> 100 %; 0.34 -> 0.36
ATE                97.5 -> 100 %; 0.88 -> 0.85      98.3 -> 98.3 %; 0.74 -> 0.68
largest error      100 -> 100 %; 0.19 -> 0.17       100 -> 96.6 %; 0.37 -> 0.43
RPE 0.5 m / 1 s    100 %; 0.42 / 0.53 -> 0.39/0.39  100 %; 0.27 / 0.35 -> 0.31/0.32
all drift figures  99.6 -> 100 %; 0.44 -> 0.42     99.7 -> 99.1 %; 0.42 -> 0.41
=================  ===============================  ===============================

Per (run, source), the sigma with the modes over the one without (median): final
position 0.84 / 0.76 (fixed / moved), largest error 0.85 / 0.81, final heading 0.97 /
1.00, ATE 1.12 / 1.11 and RPE 1.06-1.27 / 1.03-1.15: a shared error does not average
over the samples of an RMS as independent per-sample draws did, so ATE and RPE grow;
part of every change is the draws' own sampling error, common to all runs of one length
(the generator's seed is fixed and the modes add columns to the stratified draws).
The shared part is 0.4-0.8 mm of a 0.5-1.8 mm sigma on these runs, so cancelling it
moves the figures by 15-25 % at most; what keeps final position, largest error and RPE
over-stated is elsewhere: (1) the track's actual error while moving varies slowly
(seeds 0 and 1, fixed camera: its change over 0.1 / 0.5 / 1 s is 0.29-0.32 / 0.36-0.43 /
0.43-0.61 mm RMS, where the per-sample part the draws decorrelate over 0.3 s alone
predicts 0.89 mm), so either that part is over-stated while moving or it decorrelates
more slowly than ``drift_sigma.CORRELATION_S``; (2) the final position's and the largest
error's sigma are 90 % the anchor heading's; its travel part is honest on the fixed
scene (error / sigma 0.73-1.0, seeds 0-3) but about 3 times the error on moved cameras
(median of seeds 0-9), and on the fixed scene the truth's start heading error and the
travel's have opposite signs in every seed, so the combined anchor is better than its
sigma there.

What was left before that merge, and why (both are the truth track's sigma, not this
propagation; the second is since mostly fixed, see the table above):

* Final heading: the graded error follows the truth's heading error where the robot
  ends standing (0.2-0.6 deg in the misses) while the track claims 0.06-0.3 deg there
  (last 0.3 s: fixed camera median error 0.28 deg against 0.10 deg, 30 % within 2
  sigma; moved camera 75 %). A marker's rotation bias at a place is common to all its
  corners, so the rigid fit's residuals that set the track's sigma cannot show it.
  The anchor heading, combined with the first travel's, was within 0.12 deg.
* ATE, RPE and the largest error are over-stated: at the impact the smoother's break
  steps give 5 samples a 1-sigma of 26-48 mm (the same to 0.1 mm in every seed: the
  released priors, not the data) where the track is 0.6-2.7 mm off; the draws there
  dominate these figures. With those samples' sigma held to 3 times the local median
  (a diagnostic only) the medians become ATE 1.11, RPE 0.50 / 0.66, largest error 0.18
  (fixed camera). The final position's and the largest error's sigma are mostly the
  anchor heading's (0.1 deg over 2-3 m); in the fixed scene the truth's start heading
  error and the travel's have opposite signs in every seed, so the combined anchor is
  better than its sigma there.

Usage (niced; renders and tracks cached under ``.cache/bench``):
``nice -n 10 .venv/bin/python benchmarks/drift_coverage.py [--seeds 0-39]
[--scenario tank-tripod] [--vary-camera] [--without-shared] [--csv rows.csv]
[--from-csv rows.csv]``
"""

from __future__ import annotations

import argparse
import hashlib
import json
import pickle
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _runs import rendered  # noqa: E402

from vidodo.drift_sigma import FIGURES  # noqa: E402
from vidodo.errors import VidodoError  # noqa: E402
from vidodo.logs import read_log  # noqa: E402
from vidodo.pipeline import GradeSettings, grade_tracks  # noqa: E402
from vidodo.profiles import load_camera, load_robot  # noqa: E402
from vidodo.tracking.result import shared_column_names  # noqa: E402


def _tracked(run):
    """The tracker's result for ``run``, pickled beside the render and reused while
    the tracking and registration code is unchanged (the grading is what this
    benchmark studies; tracking a clip takes minutes)."""
    pkg = Path(__file__).resolve().parents[1] / "vidodo"
    src = sorted([*pkg.glob("tracking/*.py"), *pkg.glob("registration/**/*.py"),
                  pkg / "video.py", pkg / "lens.py"])
    key = hashlib.sha256(b"".join(f.read_bytes() for f in src)).hexdigest()[:12]
    hit = run / f"track-{key}.pkl"
    if hit.exists():
        with hit.open("rb") as fh:
            return pickle.load(fh)
    from vidodo.pipeline import _track_recorded
    from vidodo.profiles import load_field

    tres, _ = _track_recorded(run / "video.mp4", load_robot(run / "robot.toml"),
                              load_field(run / "field.toml"),
                              load_camera(run / "camera.toml"), None, None)
    for old in run.glob("track-*.pkl"):
        old.unlink()
    with hit.open("wb") as fh:
        pickle.dump(tres, fh)
    return tres


def _true_grade(run, graded):
    robot = load_robot(run / "robot.toml")
    log = read_log(run / "log.csv", robot)
    truth = pd.read_csv(run / "truth" / "truth.csv")
    meta = json.loads((run / "truth" / "meta.json").read_text())
    clk = meta["log_clock"]
    tr = graded.truth.copy()
    for c in ("x_m", "y_m", "heading_rad"):
        tr[c] = truth[c].to_numpy(float)
    tr["sigma_xy_m"] = 1e-6
    tr["sigma_heading_rad"] = 1e-6
    # t_video = t_log / (1 + rate_error) + offset (the scenario's formula)
    off, rate = float(clk["offset_s"]), float(clk.get("rate_error", 0.0))
    shifted = log.frame.copy()
    shifted["t_s"] = shifted["t_s"] / (1.0 + rate)
    return grade_tracks(tr, replace(log, frame=shifted), robot,
                        GradeSettings(clock_offset_s=off))


def camera_overrides(scenario, seed):
    """Overrides moving the camera by a seed's draw: x, y, height and the point looked
    at each up to +-0.3 m (uniform) from the scenario's own. Runs of one scenario share
    its camera and path, so the truth's errors tied to the place in the image repeat
    from seed to seed; a coverage over such runs counts one error many times."""
    from vidodo.synth.scenario import load_scenario

    cam = load_scenario(scenario).data["camera"]
    rng = np.random.default_rng([seed, 15])
    keys = ("x_m", "y_m", "z_m", "look_at_x_m", "look_at_y_m")
    return {f"camera.{k}": round(float(cam[k]) + float(rng.uniform(-0.3, 0.3)), 4)
            for k in keys}


def _clock_row(g, run):
    """The clock's error at the log's median time against the scenario's [s], and its
    claimed 1-sigma."""
    clk = json.loads((run / "truth" / "meta.json").read_text())["log_clock"]
    tl = float(np.median(g.odometry[next(iter(g.odometry))]["t_s"]))  # video times
    tl_log = g.clock.to_log(tl) if hasattr(g.clock, "to_log") else tl - g.clock.offset_s
    true_v = tl_log / (1.0 + float(clk.get("rate_error", 0.0))) + float(clk["offset_s"])
    return float(g.clock.to_video(np.array([tl_log]))[0]) - true_v, g.clock.sigma_s


def run_rows(run, seed, *, shared=True):
    """``(seed, source, figure, error, sigma)`` rows of one rendered run (the clock's
    as source ``"clock"``, figure ``"clock_offset_s"``); ``shared=False`` grades the
    track without its shared-error modes (every error drawn per sample, as before)."""
    robot = load_robot(run / "robot.toml")
    tres = _tracked(run)
    if not shared:
        tres = replace(tres, track=tres.track.drop(
            columns=shared_column_names(tres.track.columns)))
    g = grade_tracks(tres, read_log(run / "log.csv", robot), robot)
    t = _true_grade(run, g)
    err, sig = _clock_row(g, run)
    rows = [(seed, "clock", "clock_offset_s", err, sig)] if sig else []
    for name, m in g.metrics.items():
        if name not in t.metrics:
            continue
        for f in FIGURES:
            v, s, ref = getattr(m, f), (m.sigma or {}).get(f), getattr(t.metrics[name], f)
            if v is None or s is None or ref is None or not s > 0:
                continue
            err = v - ref
            if f.endswith("_rad"):
                err = (err + np.pi) % (2 * np.pi) - np.pi
            rows.append((seed, name, f, err, s))
    return rows


def clopper_pearson(k, n, level=0.95):
    """Exact binomial interval of a share ``k / n`` (Clopper & Pearson, Biometrika
    26:404, 1934), as (low, high)."""
    a = 1.0 - level
    lo = stats.beta.ppf(a / 2, k, n - k + 1) if k > 0 else 0.0
    hi = stats.beta.ppf(1 - a / 2, k + 1, n - k) if k < n else 1.0
    return float(lo), float(hi)


def summary(df):
    """Lines of the coverage table: per figure the share within 2 sigma, its 95 %
    interval, the median |error| / sigma and the counts."""
    df = df.assign(ratio=np.abs(df.err) / df.sigma)
    runs = df.seed.nunique()
    out = [f"== {runs} runs: share within 2 sigma (target 90-98 %), its 95 % interval "
           "(Clopper-Pearson over runs: the sources of one run share the truth's error), "
           "median |error| / sigma (0.67 for an honest normal sigma)"]
    groups = [*df[df.source != "clock"].groupby("figure"), ("all drift figures",
                                                          df[df.source != "clock"]),
              ("clock offset", df[df.source == "clock"])]
    for f, d in groups:
        if not len(d):
            continue
        share = float(np.mean(d.ratio <= 2))
        n = d.seed.nunique()
        lo, hi = clopper_pearson(round(share * n), n)
        out.append(f"  {f:24s} {100 * share:5.1f} %  [{100 * lo:3.0f}, {100 * hi:3.0f}] %"
                   f"  median {d.ratio.median():.2f}  (n = {len(d)} over {n} runs)")
    ck = df[df.source == "clock"]
    if len(ck):
        out.append("  clock errors [ms]: " + ", ".join(f"{1e3 * e:+.2f}" for e in ck.err)
                   + "; sigmas [ms]: " + ", ".join(f"{1e3 * s:.2f}" for s in ck.sigma))
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", default="0-39")
    ap.add_argument("--scenario", default="tank-tripod")
    ap.add_argument("--vary-camera", action="store_true",
                    help="move the camera by each seed's draw (see camera_overrides)")
    ap.add_argument("--csv", help="also write the rows (seed, source, figure, err, "
                    "sigma) here")
    ap.add_argument("--from-csv", help="summarise rows written by --csv; nothing run")
    ap.add_argument("--without-shared", action="store_true",
                    help="grade the tracks without their shared-error modes (the drift "
                    "sigma as before they existed), for a side-by-side comparison")
    args = ap.parse_args(argv)
    if args.from_csv:
        print("\n".join(summary(pd.read_csv(args.from_csv))))
        return
    lo, _, hi = args.seeds.partition("-")
    rows = []
    for seed in range(int(lo), int(hi or lo) + 1):
        over = camera_overrides(args.scenario, seed) if args.vary_camera else {}
        try:
            new = run_rows(rendered(args.scenario, seed, **over), seed,
                           shared=not args.without_shared)
        except VidodoError as exc:  # e.g. a moved camera that no longer sees the field
            print(f"seed {seed}: not graded ({exc})", flush=True)
            continue
        rows += new
        print(f"seed {seed}: {len({r[1] for r in new}) - 1} sources graded", flush=True)
    df = pd.DataFrame(rows, columns=["seed", "source", "figure", "err", "sigma"])
    if args.csv:
        df.to_csv(args.csv, index=False)
    print("\n" + "\n".join(summary(df)))


if __name__ == "__main__":
    main()
