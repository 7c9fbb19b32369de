"""How well the profile fit recovers known geometry errors, and how fast.

Part 1 (constructed runs, seconds): truth from a known twist, exact counts through the
wheel model, truth noise, tick quantisation, clock rate and gyro bias; many seeds. It
prints the spread of each fitted value next to the mean standard error the fit
reports (a calibrated fit has a ratio near 1) and the time per fit.

Part 2 (rendered runs, minutes): the renderer's default scenario without faults (a
drive with turns), the same with its faults left in (fit excludes event windows), and a
straight-only drive. Each is graded with a deliberately wrong profile (2 % radius on a
drive wheel and a tracking wheel, 5 mm on three tracking-wheel offsets, 1 % IMU
scale, one inverted encoder); the fit is compared with the exact profile the renderer
wrote, and anchored drift is measured before and after the correction.

    .venv/bin/python benchmarks/fit_recovery.py            # both parts
    .venv/bin/python benchmarks/fit_recovery.py --part 1   # constructed only
"""

from __future__ import annotations

import argparse
import functools
import sys
import time
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd

print = functools.partial(print, flush=True)  # noqa: A001

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from vidodo.profile_fit import fit_profile, with_clock  # noqa: E402
from vidodo.tuning import (  # noqa: E402
    anchored_drift,
    drift_comparison,
    fit_profile_with_events,
)


# ----------------------------------------------------------------------- part 1
def part_constructed(n_seeds: int) -> None:
    from test_profile_fit import _wrong_pods, constructed_run, pod_robot

    true = pod_robot()
    wrong = _wrong_pods(true)
    truth_vals = {"wheel left radius_m": 0.024, "wheel right radius_m": 0.024,
                  "wheel back radius_m": 0.024, "wheel left y_m": 0.16,
                  "wheel right y_m": -0.15, "wheel back x_m": -0.12, "imu scale": 1.0}
    for label, noise in (("truth noise 0.5 mm / 0.11 deg", (0.0005, 0.002)),
                         ("truth noise 1.0 mm / 0.17 deg", (0.001, 0.003))):
        est, se, times, flagged = [], [], [], 0
        for seed in range(n_seeds):
            run = constructed_run(true, profile=wrong, seed=seed, noise_xy_m=noise[0],
                                  noise_heading_rad=noise[1], quantize=True, rate=1e-4,
                                  imu_bias_radps=0.002)
            t0 = time.perf_counter()
            fit = fit_profile([run], wrong)
            times.append(time.perf_counter() - t0)
            tab = fit.table.set_index("parameter")
            est.append(tab["estimate"])
            se.append(tab["std_error"])
            flagged += fit.inverted == ("right",)
        e, s = pd.DataFrame(est), pd.DataFrame(se)
        print(f"\nconstructed runs, {label}, {n_seeds} seeds (19 s drive, 2 % / 5 mm / 1 % "
              f"errors, inverted encoder flagged in {flagged}/{n_seeds}):")
        print(f"  {'value':24s} {'true':>10s} {'mean err':>10s} {'max |err|':>10s} "
              f"{'sd':>9s} {'mean se':>9s} {'sd/se':>6s}")
        for k, v in truth_vals.items():
            err = e[k] - v
            rel = k.endswith("radius_m") or k == "imu scale"
            f = (100.0 / v, "%") if rel else (1e3, "mm")
            print(f"  {k:24s} {v:10.4f} {err.mean() * f[0]:+9.3f}{f[1]:>1s} "
                  f"{err.abs().max() * f[0]:9.3f}{f[1]:>1s} {e[k].std() * f[0]:8.3f}"
                  f"{f[1]:>1s} {s[k].mean() * f[0]:8.3f}{f[1]:>1s} "
                  f"{e[k].std() / s[k].mean():6.2f}")
        print(f"  fit time per run: median {np.median(times) * 1e3:.0f} ms")


# ----------------------------------------------------------------------- part 2
def part_rendered(seed: int, quick: bool) -> None:
    from conftest import _render
    from test_profile_fit import SPIN, grade_for_fit, recovery_rows, wrong_rendered_profile

    from vidodo.logs import read_log
    from vidodo.profiles import load_robot

    size = {"video__width_px": 1280, "video__height_px": 720}
    cases = [("spin 2 turns each way twice, then a square", dict(fault=None, segment=SPIN,
                                                              **size)),
             ("default drive, no faults", dict(fault=None, **size)),
             ("default drive, faults excluded", dict(**size))]
    if not quick:
        cases.append(("straight only", dict(fault=None, segment=[
            {"kind": "drive", "x_m": 3.2, "y_m": 0.9144}], **size)))
    for label, ov in cases:
        t0 = time.perf_counter()
        folder = Path(_render("default", seed, **ov))
        t_render = time.perf_counter() - t0
        exact = load_robot(folder / "robot.toml")
        wrong = wrong_rendered_profile(exact)
        sc = tomllib.loads((folder / "scenario.toml").read_text())
        scale_error = float(sc.get("imu", {}).get("scale_error", 0.0))
        t0 = time.perf_counter()
        run, log, _res = grade_for_fit(folder, wrong)
        t_grade = time.perf_counter() - t0
        t0 = time.perf_counter()
        fit = fit_profile_with_events(
            [run], wrong, lambda p, f=folder: [read_log(f / "log.csv", p)])
        t_fit = time.perf_counter() - t0
        print(f"\nrendered run: {label} (seed {seed}; render {t_render:.0f} s, grade "
              f"{t_grade:.0f} s, fit {t_fit * 1e3:.0f} ms; {fit.n_windows[run.name]} windows, "
              f"two passes, events left out in the second)")
        for w in fit.warnings:
            if w.startswith("event windows"):
                print(f"  {w}")
        print(f"  {'value':34s} {'true':>10s} {'pinned':>7s} {'error':>12s}  within")
        for name, true, st, err, ok in recovery_rows(fit, exact, wrong, scale_error):
            tv = f"{true:.5f}" if isinstance(true, float) else str(true)
            verdict = "n/a" if ok is None else "yes" if ok else "NO"
            print(f"  {name:34s} {tv:>10s} {st:>7s} {err:>12s}  {verdict}")
        tw = fit.table[fit.table["parameter"].str.contains("track_width")]
        for _, r in tw.iterrows():
            print(f"  {r['parameter']}: {r['identifiable']}, se {r['std_error'] * 1e3:.3f} mm"
                  + (f", suggestion: {r['suggestion']}" if r["suggestion"] else ""))
        run = with_clock(run, fit.clocks.get(run.name))  # same clock before and after
        before = anchored_drift(run, log, wrong)
        fixed = anchored_drift(run, read_log(folder / "log.csv", fit.corrected_robot),
                               fit.corrected_robot)
        best = anchored_drift(run, read_log(folder / "log.csv", exact), exact)
        table = drift_comparison(before, fixed, run.name)
        print("  anchored drift [mm]      wrong profile -> corrected (exact profile), ratio")
        for _, r in table.iterrows():
            ex = best.get(r["source"])
            for key, label in (("final_err", "final"), ("max_err", "max"),
                               ("ate_rmse", "ATE")):
                e = getattr(ex, f"{key}_m") if ex else None
                print(f"    {r['source']:14s} {label:5s} {r[f'{key}_m_before'] * 1e3:9.1f} -> "
                      f"{r[f'{key}_m_after'] * 1e3:7.1f} "
                      f"({e * 1e3 if e is not None else float('nan'):7.1f}), "
                      f"{r[f'{key}_ratio']:6.1f}x")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--part", type=int, choices=(1, 2), help="run only this part")
    ap.add_argument("--seeds", type=int, default=20, help="seeds for part 1")
    ap.add_argument("--seed", type=int, default=0, help="render seed for part 2")
    ap.add_argument("--quick", action="store_true", help="part 2: skip the straight run")
    args = ap.parse_args()
    if args.part in (None, 1):
        part_constructed(args.seeds)
    if args.part in (None, 2):
        part_rendered(args.seed, args.quick)


if __name__ == "__main__":
    main()
