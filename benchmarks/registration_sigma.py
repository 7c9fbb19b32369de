"""The floor registration's own 1-sigma against its actual error, per camera placement.

For each placement of ``planner_accuracy.py`` and each seed (a new setup: own floor
texture, camera moved by up to 5 cm, every other seed turned over) the first frame is
rendered (0.2 s clips) and registered as a user would when the automatic registration is
refused (the picker's clicks at the tile corners, refined on the seams:
``planner_accuracy._registration_error``). A marker at the centre of each of the
placement's two stop tiles, at its height, is projected with the renderer's true camera
and mapped back through the registration: that is the registration's actual error. Its
predicted 1-sigma per floor axis is the registration's parameter covariance carried to
that pixel (``registration.uncertainty.floor_point_covariance``). Printed per placement:
the RMS over seeds, tiles and axes of the actual error and of the predicted 1-sigma,
their ratio, the RMS of error / sigma, and the seeds' correlation of the error (the
share that repeats from setup to setup; ``planner_accuracy.seed_correlation``'s rule).

Measured 2026-12 (seeds 0-15 placement 0, 0-9 placements 1-4, 0-6 placement 5; the
same renders): predicted / actual per placement, before -> after the covariance's
M-estimator weights, one observation per seam sample and the CR2 correction
(``registration.uncertainty.cluster_covariance``):

=========  ===========  ===========  =========================
placement  before       after        seeds' correlation of the
                                     actual error
=========  ===========  ===========  =========================
0          1.13         1.52         0.18
1          0.61         0.91         0.09
2          1.04         1.43         0.18
3          0.90         1.19         -0.01
4          0.87         1.18         -0.10
5          1.15         1.52         0.38
=========  ===========  ===========  =========================

Usage: ``nice -n 10 .venv/bin/python benchmarks/registration_sigma.py [--placements
0,1,2,3,4,5] [--seeds 0,...,9]``
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import planner_accuracy as pa  # noqa: E402
from _runs import rendered  # noqa: E402

from vidodo.errors import VidodoError  # noqa: E402
from vidodo.profiles import load_camera, load_field, load_robot  # noqa: E402
from vidodo.registration.uncertainty import floor_point_covariance  # noqa: E402


def one(i, seed):
    """Actual error and predicted 1-sigma per stop tile and floor axis [m], (2, 2) each."""
    run = rendered("default", seed, **dict(pa._overrides(i, seed),
                                            **{"video.max_duration_s": 0.2}))
    robot, fld, cam = (load_robot(run / "robot.toml"), load_field(run / "field.toml"),
                       load_camera(run / "camera.toml"))
    view = pa._view(run, cam)
    xy = np.array([(np.array(t) + 0.5) * fld.tile_size_m for t in pa.STOP_TILES[i]])
    z = robot.markers[0].z_m
    err, reg = pa._registration_error(run, seed, fld, cam, view, xy, z)
    px = reg.floor_to_image(np.column_stack([xy, np.full(len(xy), z)]))
    cov, _ = floor_point_covariance(reg, px, z)
    return err, np.sqrt(np.diagonal(cov, axis1=1, axis2=2))


def correlation(err):
    """Correlation between seeds of errors (S, ...) taken about zero, clipped to [-1, 1]."""
    m = err.reshape(len(err), -1)
    cross = float((m.sum(axis=0) ** 2 - (m ** 2).sum(axis=0)).sum())
    square = float((len(m) - 1) * (m ** 2).sum())
    return float(np.clip(cross / square, -1.0, 1.0)) if square > 0 else float("nan")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--placements", default=",".join(str(i) for i in range(len(pa.PLACEMENTS))))
    ap.add_argument("--seeds", default=",".join(str(v) for v in range(10)))
    args = ap.parse_args(argv)
    print("placement  seeds  actual mm  predicted mm  pred/actual  RMS err/sigma  seeds' "
          "correlation")
    for i in (int(v) for v in args.placements.split(",")):
        errs, sigs = [], []
        for seed in (int(v) for v in args.seeds.split(",")):
            try:
                e, s = one(i, seed)
            except VidodoError as exc:
                print(f"    placement {i} seed {seed}: not registered ({exc})")
                continue
            errs.append(e)
            sigs.append(s)
        if not errs:
            continue
        e, s = np.array(errs), np.array(sigs)
        act, pred = np.sqrt(np.mean(e ** 2)), np.sqrt(np.mean(s ** 2))
        print(f"    {i}      {len(e):3d}    {act * 1000:6.3f}     {pred * 1000:6.3f}       "
              f"{pred / act:5.2f}        {np.sqrt(np.mean((e / s) ** 2)):5.2f}         "
              f"{correlation(e):5.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
