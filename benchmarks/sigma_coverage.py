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

Measured (seeds 0, 1, 2; 8 s runs, 240 samples each; clicks 12 spread corners, 0.5 px
noise): share of samples with the position within 2 sigma, mean over seeds (min-max),
before -> after issue 12's registration terms; the median sigma after and the error RMS
(unchanged by them, it is only the sigma that changed). Hand-held with the tile grid and
a lens profile: seeds 1, 2 and 3 are refused by the self-check (halves disagree), so
seeds 0 and 4 (4 measured after only). Heading within 2 sigma, every run: 89-99 %
after (83-99 % before).

=============================  ==================  ==============  ===========  ========
case                           before              after           sigma after  error
=============================  ==================  ==============  ===========  ========
tripod, lens, auto             64 (51-72) %        66 (52-74) %    0.61 mm      0.99 mm
tripod, lens, points           100 %               91 (73-100) %   1.38 mm      0.99 mm
tripod, lens, picker           100 %               91 (73-100) %   1.39 mm      0.99 mm
tripod, no lens, auto          60 (51-76) %        85 (80-90) %    1.31 mm      2.37 mm
tripod, no lens, points        100 %               91 (84-100) %   1.48 mm      2.38 mm
hand-held, lens, auto (0, 4)   60 % (seed 0)       94, 68 %        1.51, 1.25   1.75, 2.76
hand-held, lens, points        100 %               100 (99-100) %  2.59 mm      1.89 mm
hand-held, no lens, auto       78 (74-82) %        99 (99-100) %   5.41 mm      8.03 mm
hand-held, no lens, points     100 %               100 (99-100) %  5.41 mm      8.07 mm
=============================  ==================  ==============  ===========  ========

What changed (see DEVELOPERS.md, the truth track's 1-sigma): the registration's own
parameter covariance (seam fits cluster-robust over seam lines) carried through the
pose fit; clicked points' noise taken out of a seam-refined registration's held-out
error; tracked (hand-held) frames' disagreement with the seam fits of recent frames;
the readout estimate's block-jackknife spread; a moving camera's own motion over an
unknown readout. What is still short, and why:

* tripod with a lens profile (and clicked points where the click estimate comes out
  near 0): the marker's four corners are found shifted together by 0.1-0.35 px (on the
  renders mostly up the image; OpenCV's SUBPIX and plain AprilTag refinement shift them
  by as much, differently), about 1 mm on the floor, standing still too. A shift shared
  by all corners of the one marker leaves no residual in the rigid fit and no trace in
  the smoother, so nothing in the footage measures it. Part of it is the AprilTag
  refinement's own shift on sharp edges (up to 0.09 px, ``tests/test_corner_bias.py``),
  now carried by default (``corner_bias_px`` None: 0.052 px 1-sigma): seeds 0-2, tile
  grid 66 (52-74) -> 78 +- 14 (60-95) %, clicked points 91 -> 93 +- 10 (79-100) %;
* without a lens profile the readout estimated from the marker shear comes out 2-9 ms
  high (25-27 ms for 18 ms) on seeds 1 and 2, beyond its jackknife sigma;
* hand-held with a lens profile, seed 4: the registration at the marker is 3-4 mm off
  for the last 3 s while the seam fits of those frames agree with the tracked pose
  within 0.15 px over the corners in view, so the anchor term does not see it;
* clicked points over-cover where 12 clicks leave a noisy estimate of the seam fit's
  error (their mean square less the click noise is itself uncertain by about 0.4 px);
* hand-held without a lens profile over-covers: with no readout known its 1-sigma is the
  unknown readout's (about 31 ms here, the true one is 30 ms), so the band is as wide
  as the whole rolling-shutter offset.

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
        "z_rms": float(np.sqrt(np.mean((e[ok] / sig) ** 2))),
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
                              f"{r['p95_mm']:.2f} mm, median sigma {r['sigma_mm']:.2f} mm, "
                              f"RMS of error / sigma {r['z_rms']:.2f}; "
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
              f"{g['sigma_mm'].median():.2f}, error RMS {g['rms_mm'].median():.2f}, "
              f"RMS of error / sigma {g['z_rms'].min():.2f}-{g['z_rms'].max():.2f}")
    print(f"position coverage over {len(rows)} runs: {100 * df['cover_xy'].min():.1f}-"
          f"{100 * df['cover_xy'].max():.1f} %")


if __name__ == "__main__":
    main()
