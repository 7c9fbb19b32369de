"""Coverage of the truth track's 2-sigma band, per case: tripod and hand-held, with and
without a lens profile, automatic registration and clicked points.

For every case the run is tracked as a user would (``track_video`` with a
``FloorRegistrar``), and the track's position error against the renderer's truth is
compared with its reported 1-sigma (``sigma_xy_m``, the radial RMS the track claims).
Printed per case: position error RMS and 95th percentile [mm], median sigma [mm], the
share of samples with error <= 2 sigma, and the same for heading. Target 90-98 %.

Clicked points are made from the renderer's true camera at the reference (first) frame:
``--clicks`` tile corners in view (spread over the view, farthest-point order), each at its
true pixel plus Gaussian click noise of ``--click-px`` per axis (0.5 px by default, an
invented figure for careful clicks in a zoomed view); the "picker" path then snaps each
click to the nearest tile-corner candidate within 3 px, as the picker page does. Only
this script reads the truth files; the tracker never does.

Measured (seed 0, 8 s runs, 240 samples each; position within 2 sigma, before -> after
issue 12's readout term; clicks 12 spread corners, 0.5 px noise):

==========================  =====  ==========  ===========  =============
case                        error  auto         points       picker
==========================  =====  ==========  ===========  =============
tripod, lens profile        1.1 mm 70 -> 70 %   100 -> 100 %  100 %
tripod, no lens profile     5.3 mm 40 -> 98 %   83 -> 100 %   100 %
hand-held, lens profile     2.0 mm 49 -> 49 %   100 -> 100 %  100 %
hand-held, no lens profile  7.7 mm 19 -> 81 %   80 -> 100 %   100 %
==========================  =====  ==========  ===========  =============

Without a lens profile the renders also lack the readout time (camera profile); the
error then is mostly the rolling-shutter lag of a moving robot, now in the sigma. Still
short: the tile grid with a lens profile (tripod: about 1 mm across-track error at
0.6 m/s and more; hand-held: about 2 mm per-frame registration error, standing still
too) and the hand-held run without one. Clicked points over-cover: the held-out click
error holds the click noise, which the seam-sharpened fit does not carry.

Run (niced; renders are cached under ``.cache/bench``):
``nice -n 10 .venv/bin/python benchmarks/sigma_coverage.py [--runs default,mecanum-handheld]
[--seeds 0] [--seconds 8] [--paths auto,points] [--lens both|yes|no]``
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _runs import rendered  # noqa: E402
from registration_accuracy import true_corner_pixels, true_poses  # noqa: E402

from vidodo.corner_candidates import corner_candidates  # noqa: E402
from vidodo.errors import VidodoError  # noqa: E402
from vidodo.profiles import load_camera, load_field, load_robot  # noqa: E402
from vidodo.registration.registrar import FloorRegistrar  # noqa: E402
from vidodo.tracking.tracker import track_video  # noqa: E402
from vidodo.video import VideoReader  # noqa: E402


def spread_order(px: np.ndarray) -> np.ndarray:
    """Indices of ``px`` in farthest-point order, starting nearest the centroid."""
    left = list(range(len(px)))
    first = int(np.argmin(np.linalg.norm(px - px.mean(axis=0), axis=1)))
    order = [first]
    left.remove(first)
    d = np.linalg.norm(px - px[first], axis=1)
    while left:
        k = max(left, key=lambda i: d[i])
        order.append(k)
        left.remove(k)
        d = np.minimum(d, np.linalg.norm(px - px[k], axis=1))
    return np.array(order)


def clicked_points(run: Path, n_clicks: int, click_px: float, seed: int, *,
                   relative_to=None, margin_px: float = 12.0, snap_px=None) -> pd.DataFrame:
    """Tile corners in view of the first frame as a user would click them.

    ``relative_to``: a floor corner (x, y) [m] subtracted from every floor position
    (points typed relative to a visible corner, as the picker lets one do).
    ``snap_px``: move each click to the nearest tile-corner candidate of the frame within
    this distance, as the picker page does (:func:`vidodo.corner_candidates`).
    """
    field = load_field(run / "field.toml")
    cam = load_camera(run / "camera.toml")
    t0 = float(pd.read_csv(run / "truth" / "truth.csv")["t_s"].iloc[0])
    corners, px = true_corner_pixels(field, cam, t0, true_poses(run))
    inside = ((px[:, 0] > margin_px) & (px[:, 0] < cam.width_px - margin_px)
              & (px[:, 1] > margin_px) & (px[:, 1] < cam.height_px - margin_px))
    corners, px = corners[inside], px[inside]
    pick = spread_order(px)[:n_clicks]
    rng = np.random.default_rng(1000 + seed)
    clicked = px[pick] + rng.normal(0.0, click_px, size=(len(pick), 2))
    if snap_px:
        clicked = snapped(run, clicked, snap_px)
    floor = corners[pick] - (np.zeros(2) if relative_to is None else np.asarray(relative_to))
    return pd.DataFrame({"u_px": clicked[:, 0], "v_px": clicked[:, 1],
                         "x_m": floor[:, 0], "y_m": floor[:, 1]})


def snapped(run: Path, clicks: np.ndarray, snap_px: float) -> np.ndarray:
    """Each click moved to the nearest corner candidate within ``snap_px`` [px]."""
    with VideoReader(run / "video.mp4", threaded=False) as reader:
        frame = next(iter(reader))[2]
    cand = corner_candidates(frame)
    out = clicks.copy()
    for k, c in enumerate(clicks):
        d = np.hypot(*(cand - c).T) if len(cand) else np.array([np.inf])
        if d.min() <= snap_px:
            out[k] = cand[int(np.argmin(d))]
    return out


def coverage(run: Path, *, lens: bool, points_csv=None):
    """Track ``run`` and compare the track with the truth (benchmark scoring only)."""
    robot = load_robot(run / "robot.toml")
    field = load_field(run / "field.toml")
    camera = load_camera(run / "camera.toml") if lens else None
    registrar = FloorRegistrar(field, camera, points_csv=points_csv)
    t0 = time.perf_counter()
    res = track_video(run / "video.mp4", robot, field, camera, registrar=registrar)
    wall = time.perf_counter() - t0
    truth = pd.read_csv(run / "truth" / "truth.csv")
    tr = res.track
    e = np.hypot(tr.x_m - truth.x_m, tr.y_m - truth.y_m).to_numpy()
    dh = (tr.heading_rad - truth.heading_rad).to_numpy()
    dh = (dh + np.pi) % (2 * np.pi) - np.pi
    ok = np.isfinite(e)
    sig = tr.sigma_xy_m.to_numpy()[ok]
    return {
        "samples": int(ok.sum()),
        "rms_mm": 1e3 * float(np.sqrt(np.mean(e[ok] ** 2))),
        "p95_mm": 1e3 * float(np.percentile(e[ok], 95)),
        "sigma_mm": 1e3 * float(np.median(sig)),
        "cover_xy": float(np.mean(e[ok] <= 2 * sig)),
        "cover_heading": float(np.mean(np.abs(dh[ok])
                                       <= 2 * tr.sigma_heading_rad.to_numpy()[ok])),
        "method": registrar.reference.method if registrar.reference is not None else "-",
        "wall_s": wall,
    }


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", default="default,mecanum-handheld")
    ap.add_argument("--seeds", default="0")
    ap.add_argument("--seconds", type=float, default=8.0, help="run length to render [s]")
    ap.add_argument("--paths", default="auto,points,picker",
                    help="registration paths to measure: auto (tile grid), points (clicks "
                         "as clicked), picker (clicks snapped to corner candidates)")
    ap.add_argument("--lens", choices=("both", "yes", "no"), default="both")
    ap.add_argument("--clicks", type=int, default=12, help="tile corners clicked")
    ap.add_argument("--click-px", type=float, default=0.5,
                    help="click noise per axis [px] (invented)")
    args = ap.parse_args(argv)
    lenses = {"both": (True, False), "yes": (True,), "no": (False,)}[args.lens]
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.runs.split(","):
            for seed in (int(v) for v in args.seeds.split(",")):
                run = rendered(name, seed, **{"video.max_duration_s": args.seconds})
                for path in args.paths.split(","):
                    csv = None
                    if path in ("points", "picker"):
                        csv = Path(tmp) / f"{name}-{seed}-{path}.csv"
                        clicked_points(run, args.clicks, args.click_px, seed,
                                       snap_px=3.0 if path == "picker" else None).to_csv(
                            csv, index=False)
                    for lens in lenses:
                        label = (f"{name} seed {seed}, {path}, "
                                 f"{'lens profile' if lens else 'no lens profile'}")
                        try:
                            r = coverage(run, lens=lens, points_csv=csv)
                        except VidodoError as exc:
                            print(f"{label}: refused/failed: {exc}", flush=True)
                            continue
                        r["case"] = (f"{name}, {path}, "
                                     f"{'lens profile' if lens else 'no lens profile'}")
                        rows.append(r)
                        print(f"{label} ({r['method']}, {r['samples']} samples, "
                              f"{r['wall_s']:.0f} s): error RMS {r['rms_mm']:.2f} mm, p95 "
                              f"{r['p95_mm']:.2f} mm, median sigma {r['sigma_mm']:.2f} mm; "
                              f"within 2 sigma: position {100 * r['cover_xy']:.1f} %, "
                              f"heading {100 * r['cover_heading']:.1f} % (target 90-98 %)",
                              flush=True)
    if rows:
        print_summary(rows)


def print_summary(rows):
    """Per case over the seeds: coverage mean, spread (SD) and range; median sigma; RMS."""
    print("\nper case over seeds: within 2 sigma, mean +- SD (min-max) [%]; median sigma, "
          "error RMS [mm]")
    df = pd.DataFrame(rows)
    for case, g in df.groupby("case", sort=False):
        pos, head = 100 * g["cover_xy"], 100 * g["cover_heading"]
        print(f"{case} ({len(g)} seeds): position {pos.mean():.0f} +- {pos.std(ddof=0):.0f} "
              f"({pos.min():.0f}-{pos.max():.0f}), heading {head.mean():.0f} +- "
              f"{head.std(ddof=0):.0f} ({head.min():.0f}-{head.max():.0f}); sigma "
              f"{g['sigma_mm'].median():.2f}, error RMS {g['rms_mm'].median():.2f}")
    print(f"position coverage over {len(rows)} runs: {100 * df['cover_xy'].min():.1f}-"
          f"{100 * df['cover_xy'].max():.1f} %")


if __name__ == "__main__":
    main()
