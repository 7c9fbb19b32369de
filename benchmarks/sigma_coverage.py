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
before -> after the pixel-locking term (``vidodo.tracking.pixel_lock``) and the F test
on the clicks' held-out excess (``registration.uncertainty.held_out_excess_px``); the median
sigma after, the error RMS (unchanged to the digit: only the sigma changed) and the
RMS of error / sigma after (1 for a sigma that is right on average). Hand-held with the
tile grid and a lens profile: seeds 1 and 2 are refused by the self-check (halves
disagree), so seeds 0 and 4. "Before" is main's figure on the same renders.

==============================  =============  ==============  ===========  ======  =========
case                            before         after           sigma after  error   err/sigma
==============================  =============  ==============  ===========  ======  =========
tripod, lens, auto              78 (60-95) %   100 (99-100) %  1.21 mm      0.95    0.74-0.87
tripod, lens, points            93 (79-100) %  100 (99-100) %  1.21 mm      0.96    0.74-0.88
tripod, no lens, auto           85 %           99 (99-100) %   1.62 mm      2.35    0.86-1.24
tripod, no lens, points         91 %           99 (99-100) %   1.62 mm      2.37    0.86-1.22
hand-held, lens, auto (0, 4)    94, 68 %       97, 74 %        1.68, 1.47   1.75,   0.94, 1.63
                                                                            2.76
hand-held, lens, points         100 %          97 (95-100) %   1.64 mm      1.89    0.85-1.11
hand-held, no lens, auto        99 %           100 %           5.44 mm      8.03    1.01-1.13
hand-held, no lens, points      100 %          100 %           5.45 mm      8.07    1.01-1.12
==============================  =============  ==============  ===========  ======  =========

Tripod, lens, tile grid on six more seeds (3-8): 98.3-100 %, error / sigma 0.67-0.88.

The registration covariance's CR2 form (2026-12, ``registration.uncertainty.
cluster_covariance``), seed 0, before -> after, tile grid and clicked points alike:
median sigma tripod lens 1.25 -> 1.27 mm, no lens 1.36 -> 1.37 mm, hand-held 1.68 and
5.45 mm unchanged; error / sigma 0.87 -> 0.85 (tripod), 0.94 and 1.01 (hand-held auto),
1.02 and 1.00 (points); coverage unchanged: tripod 100 %, hand-held lens 97 % (auto) and
95 % (points), hand-held no lens 100 %. The registration's own term is a small part of
these runs' sigma; its over-coverage comes from elsewhere (error / sigma 0.85 with
errors lighter-tailed than a normal's).
Heading within 2 sigma: not changed by these terms (the locking shifts the whole marker;
the heading figures moved with main's rotation excess, e.g. tripod seed 0 95 -> 98 %).

The term added: a marker whose image edges run along the pixel rows or columns (the
default scenarios' robot stands axis-aligned to a camera at the field edge) is found
shifted as a whole by an amount set by where its edges fall within a pixel (pixel
locking of the quad fit: 0.19 px RMS per axis for OpenCV's AprilTag refinement on
exact-coverage tags, ``tests/test_corner_bias.py``). That is the common corner shift of
0.1-0.35 px at rest seen on the renders: the same shift comes out on the render, on an
exact-coverage drawing of the same pose, at 8 or 64 samples per pixel, with or without
H.264; it is the detector's, not the renderer's. It is kept while the marker holds its
sub-pixel place along that axis (standing, or driving along the other image axis),
averaged by the smoother when it moves across pixels. On tripod seed 0 at rest the
error beyond the registration's was 1.6 mm against a 0.56 mm sigma before, 1.32 mm
after.

What is still off, and why:

* over the top of the band (99-100 %): with the locking carried, error / sigma is
  0.67-0.88 (tripod, tile grid, nine seeds): the sigma is right to within the spread
  of the few independent locking draws a run has (one per standing or straight stretch);
  an error of about 1 sigma that stays for seconds keeps all its samples inside 2 sigma;
* clicked points: the registration term was the larger of the covariance and the
  clicks' held-out error less their noise; with 12 clicks that difference is noisier
  than the error it measures (lens: 0.27-0.35 px claimed where the true mapping error is
  about 0.1 px; no lens: click-noise estimate 1.05-1.93 px^2 for a true 0.5), so the
  larger-of rule inflated the sigma (error / sigma 0.37-0.58 with the locking term
  alone). Now taken only where the lack-of-fit F test shows it at 95 %: error / sigma
  as with the tile grid, hand-held with a lens profile inside the band;
* hand-held without a lens profile: error / sigma 1.01-1.13, yet 100 %: the error is
  the unknown readout's own timing error (speed x row fraction x 30 ms), the same in
  every sample in proportion to the sigma, so no honest sigma puts it into the band;
  only a usable readout estimate would (retiming the track). The marker-shear estimate
  is biased high on the hand-held runs with and without a lens profile (seed 0: 41.4
  and 47.1 ms for 30, jackknife 3.2-3.4 ms; with the view's own motion subtracted from
  the marker's velocity 36.9 and 41.0 ms): unexplained. On the tripod it is not a
  lens effect: seed 1 gives 25.3 ms with and 25.2 ms without (18 ms true; jackknife
  6.2-6.6 ms, so within its sigma);
* hand-held with a lens profile, seed 4: the registration drifts 3-4 mm for the last
  3 s with no term seeing it (error / sigma 1.63), as before.

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
