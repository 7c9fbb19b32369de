"""``vidodo register``: check one video's floor registration and write a preview."""

from __future__ import annotations

import csv
import math
import sys
from pathlib import Path

import cv2
import numpy as np

from ..errors import InputError, RegistrationRefused
from ..lens import IMAGE_SUFFIXES, read_image
from ..outputs import check_target, staged_dir
from ..profiles import load_camera, load_field
from ..registration import grid
from ..registration.registrar import METHODS, FloorRegistrar, RegistrarSettings, summarise
from ..registration.selfcheck import CheckLimits
from . import registration_options
from ._options import add_profile

NAME = "register"
HELP = "check the floor registration of a video; write a grid preview and per-frame errors"
DESCRIPTION = (
    "Register the floor of every frame of VIDEO (or one still image) to the field profile "
    "(floor markers, a points CSV, or the automatic tile grid), print the quality report, "
    "and write OUT/preview.png (the fitted grid drawn over the reference frame) and "
    "OUT/registration.csv (per frame: error in pixels and floor millimetres, method, "
    "reason when a frame could not be registered). Exit 2 for unreadable input or a bad "
    "points file, 3 when the reference frame cannot be registered."
)

CSV_COLUMNS = ("t_s", "ok", "method", "rms_px", "rms_floor_mm", "n_points", "focal_px",
               "camera_x_m", "camera_y_m", "camera_z_m", "reason")


def add_arguments(parser):
    parser.add_argument("video", type=Path, help="the video (or one still image) to check")
    add_profile(parser, "field")
    add_profile(parser, "camera", "camera profile from 'vidodo lens' (default: estimate)")
    parser.add_argument("--method", choices=METHODS, default="auto",
                        help="reference registration: floor markers, points CSV or the "
                             "automatic tile grid (auto: markers if seen, else grid)")
    parser.add_argument("--points", type=Path, default=None,
                        help="CSV u_px,v_px,x_m,y_m of the first frame (implies --method "
                             "points)")
    parser.add_argument("--max-frames", type=int, default=0,
                        help="register at most this many frames (0: all)")
    parser.add_argument("--camera-height-m", type=float, metavar="M",
                        help="the camera's approximate height above the floor [m]; a "
                        "registration more than 25%% off is refused")
    parser.add_argument("--max-rms-px", type=float, default=3.0,
                        help="refuse a fit whose residual is above this [px]")
    parser.add_argument("-o", "--out", type=Path, default=None,
                        help="output folder (default: <video name>-register beside it)")


def _frames(path: Path, max_frames: int):
    if path.suffix.lower() in IMAGE_SUFFIXES:
        yield 0.0, read_image(path)
        return
    from ..video import VideoReader

    with VideoReader(path, threaded=True) as reader:
        for i, t_s, frame in reader:
            yield t_s, frame
            if max_frames and i + 1 >= max_frames:
                return


def run(args) -> int:
    field = load_field(args.field)
    camera = load_camera(args.camera) if args.camera else None
    method = "points" if args.points is not None else args.method
    if args.camera_height_m is not None and not args.camera_height_m > 0:
        raise InputError("--camera-height-m must be positive")
    limits = CheckLimits(camera_height_m=args.camera_height_m)
    registrar = FloorRegistrar(field, camera, method=method, points_csv=args.points,
                               settings=RegistrarSettings(max_rms_px=args.max_rms_px,
                                                          limits=limits))
    out = args.out or args.video.with_name(args.video.stem + "-register")
    if not args.video.exists():
        raise InputError(f"{args.video}: not found; check the path")
    inputs = (args.video, args.field, args.camera, args.points)
    check_target(out, inputs=inputs)  # before the frames are read
    regs = []
    ref_frame = None
    progress = None
    if not args.quiet:
        from tqdm import tqdm
        progress = tqdm(unit="frame", file=sys.stderr, leave=False, desc="register")
    try:
        for t_s, frame in _frames(args.video, args.max_frames):
            if ref_frame is None:
                # The reference: refuse clearly (CalibrationError, exit 3) if it fails,
                # with only the preview written when its self-check fails.
                try:
                    reg = registrar.register_reference(frame, t_s)
                except RegistrationRefused as exc:
                    with staged_dir(out, inputs=inputs, command="vidodo register") as stage:
                        registration_options.write_preview(exc, stage / "preview.png")
                    raise
                ref_frame = frame
            else:
                reg = registrar.register(frame, t_s)
            regs.append(reg)
            if progress is not None:
                progress.update(1)
    finally:
        if progress is not None:
            progress.close()
    if not regs:
        raise InputError(f"{args.video}: no frame could be read")
    ref = regs[0]
    seams = None
    try:
        seams = grid.seam_samples(cv2.cvtColor(ref_frame, cv2.COLOR_BGR2GRAY)
                                  if ref_frame.ndim == 3 else ref_frame, field, ref,
                                  search=grid.SeamSearch(half_width_px=4.0))[0]
    except (ValueError, cv2.error):
        seams = None
    preview = grid.draw_registration(ref_frame, ref, field, seams=seams)
    quality = summarise(regs)
    with staged_dir(out, inputs=inputs, command="vidodo register") as stage:
        if not cv2.imwrite(str(stage / "preview.png"), preview):
            raise InputError(f"{out}: cannot write preview.png there")
        with open(stage / "registration.csv", "w", newline="") as fh:
            w = csv.DictWriter(fh, fieldnames=CSV_COLUMNS)
            w.writeheader()
            for r in regs:
                row = r.summary()
                w.writerow({k: _fmt(row[k]) for k in CSV_COLUMNS})
    for line in report_lines(ref, quality, camera):
        print(line)
    if registrar.check_report is not None:
        print(check_line(registrar.check_report.figures))
    print(f"wrote {out / 'preview.png'} and {out / 'registration.csv'}")
    return 0


def _fmt(v):
    if isinstance(v, float):
        return "" if not math.isfinite(v) else f"{v:.6g}"
    if isinstance(v, bool | np.bool_):
        return "true" if v else "false"
    return v


def check_line(figures: dict) -> str:
    """The self-check's figures as one printed line."""
    parts = []
    if "supported" in figures:
        parts.append(f"seams on {figures['supported']:.0%} of the {figures['edges']} tile "
                     f"edges in view, {figures['offset_supported']:.0%} half a tile off")
    if math.isfinite(figures.get("subset_disagreement_m", math.nan)):
        parts.append(f"image halves agree within {1000 * figures['subset_disagreement_m']:.1f}"
                     " mm")
    if "holdout_rms_px" in figures:
        parts.append(f"points held out one at a time: {figures['holdout_rms_px']:.2f} px RMS")
    if "field_position" in figures:
        parts.append(figures["field_position"])
    return "self-check passed: " + ("; ".join(parts) if parts else "camera pose plausible")


def report_lines(ref, quality, camera) -> list[str]:
    """The quality report as printed lines."""
    k = ref.camera_matrix
    c = ref.camera_centre_m
    d = ref.dist_coeffs
    lines = [
        f"reference frame (t = {ref.t_s:.3f} s): registered by {ref.method}, "
        f"{ref.n_points} observations",
        f"  residual per observation {ref.rms_px:.3f} px RMS, {ref.rms_floor_m * 1e3:.2f} mm "
        "RMS on the floor",
        f"  camera at x {c[0]:.3f} m, y {c[1]:.3f} m, height {c[2]:.3f} m",
        f"  focal length {k[0, 0]:.1f} px ({'camera profile' if camera else 'estimated'}),"
        f" distortion k1 {d[0]:.4f}, k2 {d[1]:.4f}"
        + ("" if camera or abs(d[0]) > 0 else " (none modelled)"),
        f"frames: {quality.n_ok} of {quality.n_frames} registered; methods "
        + ", ".join(f"{m} {n}" for m, n in sorted(quality.methods.items())),
    ]
    if quality.n_ok:
        lines.append(f"  per-frame residual: median {quality.rms_px_median:.3f} px, worst "
                     f"{quality.rms_px_max:.3f} px; median {quality.rms_floor_mm_median:.2f} "
                     f"mm, worst {quality.rms_floor_mm_max:.2f} mm on the floor")
    for t_s, why in quality.failed[:10]:
        lines.append(f"  not registered at t = {t_s:.3f} s: {why}")
    if len(quality.failed) > 10:
        lines.append(f"  ... and {len(quality.failed) - 10} more frames not registered")
    lines += [f"warning: {w}" for w in ref.warnings]
    return lines
