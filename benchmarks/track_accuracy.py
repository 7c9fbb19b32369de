"""Truth-track accuracy on rendered runs, measured against the renderer's truth.

Prints, per run: position error RMS / 95th percentile [mm], heading RMS [deg], share of
frames with the marker visible where it was found, share of samples within 2 sigma
(position and heading), and the largest difference between track times and the true
presentation times [ms]. Then the OpenCV corner refinements (and vidodo's 'hybrid') on
the default run.

Only this script reads the truth files; the tracker never does.

Each scenario is rendered with several seeds (``--seeds``); the share of samples within
2 sigma is printed per run and pooled over all runs (the same errors, counted together).

Usage: ``.venv/bin/python benchmarks/track_accuracy.py [--runs default,...] [--seeds 0,1,2]
[--methods]``
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _runs import rendered  # noqa: E402

from vidodo.profiles import load_camera, load_field, load_robot  # noqa: E402
from vidodo.registration.registrar import FloorRegistrar  # noqa: E402
from vidodo.tracking.settings import TrackSettings  # noqa: E402
from vidodo.tracking.tracker import track_video  # noqa: E402

TARGETS = {"default": (2.0, 4.0, 0.3), "mecanum-handheld": (4.0, None, None)}


def evaluate(run: Path, **options):
    robot = load_robot(run / "robot.toml")
    field = load_field(run / "field.toml")
    camera = load_camera(run / "camera.toml")
    t0 = time.perf_counter()
    res = track_video(run / "video.mp4", robot, field, camera,
                      TrackSettings(**options), registrar=FloorRegistrar(field, camera))
    wall = time.perf_counter() - t0
    truth = pd.read_csv(run / "truth" / "truth.csv")
    tr = res.track
    if len(tr) != len(truth):
        raise SystemExit(f"{run}: {len(tr)} track rows but {len(truth)} truth rows")
    e = np.hypot(tr.x_m - truth.x_m, tr.y_m - truth.y_m).to_numpy()
    dh = (tr.heading_rad - truth.heading_rad).to_numpy()
    dh = (dh + np.pi) % (2 * np.pi) - np.pi
    ok = np.isfinite(e)
    vis = truth.marker_visible.astype(str).str.lower().isin(("true", "1")).to_numpy()
    return {
        "frames": len(tr),
        "rms_mm": 1000 * np.sqrt(np.mean(e[ok] ** 2)),
        "p95_mm": 1000 * np.percentile(e[ok], 95),
        "max_mm": 1000 * np.max(e[ok]),
        "heading_rms_deg": np.degrees(np.sqrt(np.mean(dh[ok] ** 2))),
        "detected_of_visible": float(np.mean(tr.detected.to_numpy()[vis])),
        "within_2sigma_xy": float(np.mean(e[ok] <= 2 * tr.sigma_xy_m.to_numpy()[ok])),
        "within_2sigma_heading": float(np.mean(np.abs(dh[ok])
                                               <= 2 * tr.sigma_heading_rad.to_numpy()[ok])),
        "samples": int(ok.sum()),
        "median_sigma_mm": 1000 * float(np.nanmedian(tr.sigma_xy_m)),
        "time_err_max_ms": 1000 * float(np.max(np.abs(tr.t_s - truth.t_s))),
        "wall_s": wall,
        "warnings": res.warnings,
        "registration_rms_px": res.quality["registration"]["rms_px_median"],
        "readout_est_ms": 1000 * res.quality["readout_estimate_s"],
        "readout_sigma_ms": 1000 * res.quality["readout_estimate_sigma_s"],
        "readout_true_ms": 1000 * camera.readout_s,
        "corner_noise": {k: res.quality[k] for k in (
            "corner_sigma_px", "corner_fresh_px", "corner_persistent_px", "corner_lag1_corr")},
        "r_scales": [(s["r_x"], s["r_y"], s["r_heading"]) for s in res.quality["smoother"]],
    }


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", default="default,mecanum-handheld,vfr-phone,fullhd60")
    ap.add_argument("--seeds", default="0,1,2", help="render seeds of every scenario")
    ap.add_argument("--methods", action="store_true",
                    help="also compare the corner refinements on the default run")
    args = ap.parse_args(argv)
    pooled = []
    for name in args.runs.split(","):
        for seed in (int(v) for v in args.seeds.split(",")):
            r = evaluate(rendered(name, seed))
            pooled.append(r)
            report(f"{name} seed {seed}", r, TARGETS.get(name))
    n = sum(r["samples"] for r in pooled)
    xy = sum(r["within_2sigma_xy"] * r["samples"] for r in pooled) / n
    hd = sum(r["within_2sigma_heading"] * r["samples"] for r in pooled) / n
    print(f"\n== pooled over {len(pooled)} runs ({n} samples): within 2 sigma position "
          f"{100 * xy:.1f}%, heading {100 * hd:.1f}% (target 90-98%); per run position "
          f"{100 * min(r['within_2sigma_xy'] for r in pooled):.1f}-"
          f"{100 * max(r['within_2sigma_xy'] for r in pooled):.1f}%, heading "
          f"{100 * min(r['within_2sigma_heading'] for r in pooled):.1f}-"
          f"{100 * max(r['within_2sigma_heading'] for r in pooled):.1f}%")
    if args.methods:
        compare_methods()


def report(label, r, target):
    print(f"\n== {label} ({r['frames']} frames, tracked in {r['wall_s']:.1f} s)")
    print(f"  position error RMS {r['rms_mm']:.2f} mm, p95 {r['p95_mm']:.2f} mm, "
          f"max {r['max_mm']:.2f} mm; heading RMS {r['heading_rms_deg']:.3f} deg")
    if target:
        print(f"  targets: RMS <= {target[0]} mm"
              + (f", p95 <= {target[1]} mm" if target[1] else "")
              + (f", heading <= {target[2]} deg" if target[2] else ""))
    print(f"  marker found in {100 * r['detected_of_visible']:.2f}% of frames where "
          "visible (target >= 99%)")
    print(f"  within 2 sigma: position {100 * r['within_2sigma_xy']:.1f}%, heading "
          f"{100 * r['within_2sigma_heading']:.1f}% (target 90-98%); median sigma "
          f"{r['median_sigma_mm']:.2f} mm; registration residual "
          f"{r['registration_rms_px']:.2f} px")
    print(f"  track times vs true presentation times: max {r['time_err_max_ms']:.4f} ms "
          "(target < 1 ms)")
    print(f"  readout estimated from marker shear: {r['readout_est_ms']:.1f} +- "
          f"{r['readout_sigma_ms']:.1f} ms (camera profile: {r['readout_true_ms']:.1f} ms)")
    c = r["corner_noise"]
    print(f"  corner noise from the fit residuals: {c['corner_sigma_px']:.3f} px (fresh "
          f"{c['corner_fresh_px']:.3f}, persistent {c['corner_persistent_px']:.3f}, lag-1 "
          f"correlation {c['corner_lag1_corr']:.2f}); smoother variance factors x, y, "
          "heading: " + "; ".join(", ".join(f"{v:.2f}" for v in f) for f in r["r_scales"]))
    for w in r["warnings"]:
        print(f"  warning: {w}")


def compare_methods():
    run = rendered("default")
    print("\n== corner refinement on the default run")
    for method in ("none", "subpix", "contour", "apriltag", "hybrid"):
        r = evaluate(run, refine=method)
        print(f"  {method:9s} RMS {r['rms_mm']:.2f} mm, p95 {r['p95_mm']:.2f} mm, heading "
              f"{r['heading_rms_deg']:.3f} deg, found {100 * r['detected_of_visible']:.1f}%,"
              f" whole tracking {r['wall_s']:.1f} s")


if __name__ == "__main__":
    main()
