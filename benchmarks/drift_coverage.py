"""2-sigma coverage of the drift figures' 1-sigma over rendered runs.

Each run is graded as a user would (video tracked, clock found from the motion); the
same run is then graded again from the renderer's true track (its sigma set to zero)
with the true clock offset and rate. The second grade's figures are the "true" ones.
Printed: per figure (final, max, ATE, RPE over distance and time, final heading error)
the share of (run, source) pairs whose graded figure lies within 2 of its reported
1-sigma of the true one (target 90-98 %), and the median ratio |error| / sigma.

Only this script reads the truth files; the grader never does.

Usage: ``.venv/bin/python benchmarks/drift_coverage.py [--seeds 0-19] [--scenario
tank-tripod]``
"""

from __future__ import annotations

import argparse
import json
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _runs import rendered  # noqa: E402

from vidodo.drift_sigma import FIGURES  # noqa: E402
from vidodo.logs import read_log  # noqa: E402
from vidodo.pipeline import GradeSettings, grade_run, grade_tracks  # noqa: E402
from vidodo.profiles import load_robot  # noqa: E402


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


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", default="0-19")
    ap.add_argument("--scenario", default="tank-tripod")
    args = ap.parse_args(argv)
    lo, _, hi = args.seeds.partition("-")
    seeds = range(int(lo), int(hi or lo) + 1)
    rows, clocks = [], []
    for seed in seeds:
        run = rendered(args.scenario, seed)
        g = grade_run(run / "video.mp4", run / "log.csv", run / "robot.toml",
                      run / "field.toml", run / "camera.toml")
        t = _true_grade(run, g)
        clk = json.loads((run / "truth" / "meta.json").read_text())["log_clock"]
        tl = float(np.median(g.odometry[next(iter(g.odometry))]["t_s"]))  # video times
        tl_log = g.clock.to_log(tl) if hasattr(g.clock, "to_log") else tl - g.clock.offset_s
        true_v = tl_log / (1.0 + float(clk.get("rate_error", 0.0))) + float(clk["offset_s"])
        clocks.append((float(g.clock.to_video(np.array([tl_log]))[0]) - true_v,
                       g.clock.sigma_s))
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
        print(f"seed {seed}: {len(g.metrics)} sources graded", flush=True)
    df = pd.DataFrame(rows, columns=["seed", "source", "figure", "err", "sigma"])
    df["ratio"] = np.abs(df.err) / df.sigma
    print(f"\n== {len(set(df.seed))} runs, {len(df)} figures: share within 2 sigma "
          "(target 90-98 %), median |error| / sigma")
    for f, d in df.groupby("figure"):
        print(f"  {f:24s} {100 * np.mean(d.ratio <= 2):5.1f} %  median {d.ratio.median():.2f}"
              f"  (n = {len(d)})")
    print(f"  {'all figures':24s} {100 * np.mean(df.ratio <= 2):5.1f} %")
    ck = [(e, s) for e, s in clocks if s]
    if ck:
        r = np.array([abs(e) / s for e, s in ck])
        print(f"  {'clock offset':24s} {100 * np.mean(r <= 2):5.1f} %  median {np.median(r):.2f}"
              f"  (n = {len(r)}; errors {', '.join(f'{1e3 * e:+.2f}' for e, _ in ck)} ms, "
              f"sigmas {', '.join(f'{1e3 * s:.2f}' for _, s in ck)} ms)")


if __name__ == "__main__":
    main()
