"""Registration accuracy and cost on rendered runs (tripod and hand-held).

For every frame of a rendered run, the floor is registered from the video alone (no
markers, no clicks unless the scenario has floor markers; no truth files read by the
registrar). The score uses the renderer's true camera pose of that frame: every tile
corner of the field is projected to its true pixel, mapped back to the floor with the
frame's registration, and compared with its true floor position. With a rolling shutter the
true pixel is found at the pose of the row it is read in (the renderer's model).

Printed per run: floor error at tile corners (RMS over the field, per frame: median and
worst frame), frames flagged, the methods used, and milliseconds per frame for
registration next to plain decoding of the same frames (side by side, same process).
Also printed: a "first frame only" baseline (keep the first frame's registration for
the whole run), which is what a tracker without re-registration would get.

Run: ``.venv/bin/python benchmarks/registration_accuracy.py [--seconds 4] [--runs NAME ...]
[--seeds 0,1,2,3] [--no-lens-free]``; with several seeds the worst frame over all of
them is printed last for each run.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import cv2
import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _runs import rendered  # noqa: E402

from vidodo.profiles import load_camera, load_field  # noqa: E402
from vidodo.registration.registrar import FloorRegistrar, summarise  # noqa: E402
from vidodo.video import VideoReader  # noqa: E402


def true_poses(run: Path):
    """Per-frame true camera pose (benchmark scoring only)."""
    p = run / "truth" / "camera_poses.csv"
    if p.exists():
        df = pd.read_csv(p)
        return (df["t_s"].to_numpy(),
                df[["rvec_0", "rvec_1", "rvec_2"]].to_numpy(),
                df[["tvec_0_m", "tvec_1_m", "tvec_2_m"]].to_numpy())
    import json

    cam = json.loads((run / "truth" / "meta.json").read_text())["camera"]
    return np.array([0.0]), np.array([cam["rvec"]]), np.array([cam["tvec"]])


def true_corner_pixels(field, cam_true, t_s, poses):
    """Where each tile corner really is in the frame at ``t_s``: rolling shutter included
    (row v is read at t_s + v/H * readout; poses interpolated between frames)."""
    t_true, rv_true, tv_true = poses
    corners = field.tile_corners_m()
    obj = np.column_stack([corners, np.zeros(len(corners))])

    def pose(t):
        return (np.array([np.interp(t, t_true, rv_true[:, j]) for j in range(3)]),
                np.array([np.interp(t, t_true, tv_true[:, j]) for j in range(3)]))

    px = cv2.projectPoints(obj, *pose(t_s), cam_true.matrix,
                           cam_true.dist_coeffs)[0].reshape(-1, 2)
    if cam_true.readout_s > 0 and len(t_true) > 1:
        for _ in range(3):
            t_row = t_s + np.clip(px[:, 1] / cam_true.height_px, 0, 1) * cam_true.readout_s
            px = np.vstack([cv2.projectPoints(obj[i:i + 1], *pose(t), cam_true.matrix,
                                              cam_true.dist_coeffs)[0].reshape(1, 2)
                            for i, t in enumerate(t_row)])
    return corners, px


def corner_rms_mm(reg, field, cam_true, t_s, poses):
    corners, px = true_corner_pixels(field, cam_true, t_s, poses)
    est = reg.image_to_floor(px)
    return float(np.sqrt(np.nanmean(np.sum((est - corners) ** 2, axis=1)))) * 1e3


def bench(run: Path, *, use_camera: bool, max_frames=None):
    field = load_field(run / "field.toml")
    cam_true = load_camera(run / "camera.toml")
    poses = true_poses(run)
    registrar = FloorRegistrar(field, cam_true if use_camera else None)
    errs, first_errs, regs, cost = [], [], [], []
    decode = []
    first = None
    with VideoReader(run / "video.mp4", threaded=False) as reader:
        t0 = time.perf_counter()
        for i, t_s, frame in reader:
            t1 = time.perf_counter()
            decode.append(t1 - t0)
            reg = registrar.register(frame, t_s)
            t0 = time.perf_counter()
            cost.append(t0 - t1)
            regs.append(reg)
            if reg.ok:
                errs.append(corner_rms_mm(reg, field, cam_true, t_s, poses))
                if first is None:
                    first = reg
            else:
                errs.append(np.nan)
            if first is not None:
                first_errs.append(corner_rms_mm(first, field, cam_true, t_s, poses))
            if max_frames and i + 1 >= max_frames:
                break
    q = summarise(regs)
    errs = np.array(errs)
    return dict(
        frames=len(regs), ok=q.n_ok, methods=q.methods,
        median_mm=float(np.nanmedian(errs)), worst_mm=float(np.nanmax(errs)),
        first_frame_ms=1e3 * cost[0], ms_per_frame=1e3 * float(np.median(cost[1:])),
        ms_per_frame_mean=1e3 * float(np.mean(cost[1:])),
        decode_ms=1e3 * float(np.median(decode[1:])),
        first_only_worst_mm=float(np.nanmax(first_errs)) if first_errs else float("nan"),
        focal_px=float(regs[0].camera_matrix[0, 0]) if regs[0].ok else float("nan"),
        true_focal_px=cam_true.fx_px, reference=regs[0].method,
        warnings=list(regs[0].warnings), failed=q.failed[:3])


def _seeds(text):
    try:
        return [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"--seeds {text!r}: give integers separated by "
                                         "commas, e.g. 0,1,2,3") from None


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=4.0, help="run length to render [s]")
    ap.add_argument("--frames", type=int, default=None, help="stop after this many frames")
    ap.add_argument("--runs", nargs="*", default=["default", "mecanum-handheld"],
                    help="built-in scenarios to render and measure")
    ap.add_argument("--seeds", type=_seeds, default=[0],
                    help="render seeds, comma separated (e.g. 0,1,2,3); each run is "
                         "rendered and measured once per seed")
    ap.add_argument("--no-lens-free", action="store_true",
                    help="measure with the camera profile only (skip the estimated lens)")
    args = ap.parse_args(argv)
    lenses = (True,) if args.no_lens_free else (True, False)
    for name in args.runs:
        overall = {lens: [] for lens in lenses}
        for seed in args.seeds:
            label = f"{name} seed {seed}"
            run = rendered(name, seed, **{"video.max_duration_s": args.seconds})
            for use_camera in lenses:
                r = bench(run, use_camera=use_camera, max_frames=args.frames)
                overall[use_camera].append((seed, r))
                _print_run(label, use_camera, r)
        if len(args.seeds) > 1:
            for use_camera in lenses:
                rs = overall[use_camera]
                seed, worst = max(rs, key=lambda sr: sr[1]["worst_mm"])
                lens = "camera profile" if use_camera else "no camera profile"
                print(f"\n{name}, {lens}, seeds {','.join(str(s) for s, _ in rs)}: worst "
                      f"frame {worst['worst_mm']:.2f} mm (seed {seed}); median per seed "
                      + ", ".join(f"{r['median_mm']:.2f}" for _, r in rs) + " mm; cost "
                      + ", ".join(f"{r['ms_per_frame']:.1f}" for _, r in rs) + " ms/frame")


def _print_run(label, use_camera, r):
    lens = "camera profile" if use_camera else "no camera profile"
    print(f"\n{label}, {lens}: {r['frames']} frames, {r['ok']} registered, "
          f"reference by {r['reference']}")
    print(f"  floor error at tile corners, RMS per frame: median {r['median_mm']:.2f} "
          f"mm, worst frame {r['worst_mm']:.2f} mm")
    print(f"  keeping the first frame's registration instead: worst frame "
          f"{r['first_only_worst_mm']:.2f} mm")
    print(f"  focal length {r['focal_px']:.1f} px (true {r['true_focal_px']:.1f})")
    print(f"  cost: reference frame {r['first_frame_ms']:.0f} ms; later frames "
          f"median {r['ms_per_frame']:.1f} ms (mean {r['ms_per_frame_mean']:.1f}) "
          f"vs decoding {r['decode_ms']:.1f} ms/frame "
          f"(ratio {r['ms_per_frame'] / max(r['decode_ms'], 1e-9):.2f})")
    print(f"  methods: {r['methods']}")
    for w in r["warnings"]:
        print(f"  warning: {w}")
    for t, why in r["failed"]:
        print(f"  flagged t={t:.2f}s: {why}")


if __name__ == "__main__":
    main()
