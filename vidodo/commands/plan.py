"""``vidodo plan --field F.toml --robot R.toml --camera-at X,Y,Z --aim X,Y --out DIR``."""

from __future__ import annotations

import json
from pathlib import Path

from ._options import add_force, add_profile

NAME = "plan"
HELP = "plan the camera: expected error and marker size over the field for a placement"
DESCRIPTION = (
    "For a proposed camera (position, aim, field of view or a lens profile) and the "
    "robot's marker (size, height), draw a map of the field: expected 1-sigma position "
    "error by the track's own model (corner noise through the pose fit, the "
    "registration's error, the corner refinement's common shift, rolling-shutter "
    "timing), marker cell size in pixels, where the marker is too small to "
    "detect and what is out of view; then suggest the lowest camera height and the "
    "smallest marker that keep every point detectable. Writes plan.png and plan.json. "
    "Exit 2 for bad input."
)


def _numbers(text, n, name):
    from ..errors import InputError

    try:
        vals = [float(v) for v in text.split(",")]
    except ValueError:
        vals = []
    if len(vals) != n:
        raise InputError(f"{name} {text!r}: give {n} numbers separated by commas")
    return vals


def add_arguments(parser):
    """Options of the verb."""
    add_profile(parser, "field")
    parser.add_argument("--robot", type=Path, default=None,
                        help="robot profile: its first marker's size, height and family")
    parser.add_argument("--marker-mm", type=float, default=None,
                        help="marker black-square side [mm] (overrides the profile)")
    parser.add_argument("--marker-height-mm", type=float, default=None,
                        help="marker face height above the floor [mm]")
    parser.add_argument("--family", default=None, help="marker dictionary (DICT_...)")
    parser.add_argument("--camera-at", required=True, metavar="X,Y,Z",
                        help="camera lens position in floor metres, e.g. 1.8,-1.8,2.4")
    parser.add_argument("--aim", required=True, metavar="X,Y",
                        help="floor point the camera looks at [m]")
    parser.add_argument("--hfov-deg", type=float, default=68.0,
                        help="horizontal field of view [deg] (default 68)")
    parser.add_argument("--lens", type=Path, default=None,
                        help="camera profile from `vidodo lens` (replaces --hfov-deg/--size)")
    parser.add_argument("--size", default="1920x1080", help="video size WxH (default 1920x1080)")
    parser.add_argument("--corner-noise-px", type=float, default=0.3,
                        help="1-sigma corner noise [px] (a graded run's track.quality.json "
                             "has it as corner_sigma_px; default 0.3)")
    parser.add_argument("--registration-px", type=float, default=0.0,
                        help="floor registration RMS [px] (`vidodo register`'s rms_px); "
                             "with --registration-points adds the registration's error")
    parser.add_argument("--registration-points", type=int, default=0,
                        help="points of that registration (n_points)")
    parser.add_argument("--speed-mps", type=float, default=0.5,
                        help="typical drive speed the rolling-shutter timing term assumes "
                             "[m/s] (default 0.5; the map's title states it)")
    parser.add_argument("--min-cell-px", type=float, default=4.0,
                        help="smallest marker cell that detects [px] (default 4)")
    parser.add_argument("-o", "--out", type=Path, required=True, help="folder to write into")
    add_force(parser)


def _marker(args):
    from dataclasses import replace

    from ..errors import InputError
    from ..profiles import Marker, load_robot

    m = Marker(id=0, family="DICT_4X4_50", size_m=0.15, z_m=0.3)
    margin = 0.0
    if args.robot is not None:
        robot = load_robot(args.robot)
        margin = min(robot.length_m, robot.width_m) / 2  # the marker cannot reach the wall
        if robot.markers:
            m = robot.markers[0]
    elif args.marker_mm is None:
        raise InputError("give --robot or --marker-mm (and --marker-height-mm)")
    if args.marker_mm is not None:
        m = replace(m, size_m=args.marker_mm / 1000)
    if args.marker_height_mm is not None:
        m = replace(m, z_m=args.marker_height_mm / 1000)
    if args.family is not None:
        m = replace(m, family=args.family)
    if m.size_m <= 0 or m.z_m < 0:
        raise InputError("--marker-mm must be positive and --marker-height-mm not negative")
    return m, margin


def _camera(args):
    from ..errors import InputError
    from ..planner import ProposedCamera
    from ..profiles import load_camera

    x, y, z = _numbers(args.camera_at, 3, "--camera-at")
    lx, ly = _numbers(args.aim, 2, "--aim")
    if z <= 0:
        raise InputError(f"--camera-at {args.camera_at}: the height must be above the floor")
    if args.lens is not None:
        lens = load_camera(args.lens)
        return ProposedCamera(x, y, z, lx, ly, lens.width_px, lens.height_px, None,
                              lens.fx_px, tuple(lens.distortion))
    w, h = (int(v) for v in _numbers(args.size.replace("x", ","), 2, "--size"))
    if not 10 < args.hfov_deg < 170 or w < 16 or h < 16:
        raise InputError("--hfov-deg must be between 10 and 170 and --size at least 16x16")
    return ProposedCamera(x, y, z, lx, ly, w, h, args.hfov_deg)


def _readout_sigma_s(args):
    """The track's readout uncertainty: 0 with a lens profile that gives ``readout_s``."""
    from ..planner import UNKNOWN_READOUT_SIGMA_S
    from ..profiles import load_camera

    if args.lens is not None and load_camera(args.lens).readout_s > 0:
        return 0.0
    return UNKNOWN_READOUT_SIGMA_S


def run(args) -> int:
    """Compute the map and the suggestions, write plan.png and plan.json."""
    import numpy as np

    from ..errors import InputError
    from ..outputs import staged_dir
    from ..plan_picture import write_plan_png
    from ..planner import PlanSettings, plan_map, suggest
    from ..profiles import load_field

    fld = load_field(args.field)
    marker, margin = _marker(args)
    cam = _camera(args)
    if args.corner_noise_px <= 0 or args.min_cell_px <= 0:
        raise InputError("--corner-noise-px and --min-cell-px must be positive")
    if not args.speed_mps >= 0:
        raise InputError("--speed-mps must not be negative")
    settings = PlanSettings(sigma_corner_px=args.corner_noise_px,
                            min_cell_px=args.min_cell_px, margin_m=margin,
                            registration_px=max(args.registration_px, 0.0),
                            registration_points=max(args.registration_points, 0),
                            speed_mps=args.speed_mps, readout_sigma_s=_readout_sigma_s(args))
    plan = plan_map(fld, marker, cam, settings)
    sug = suggest(fld, marker, cam, settings)
    det = plan.detectable
    summary = {
        "detectable_share": float(det.mean()), "in_view_share": float(plan.in_view.mean()),
        "worst_sigma_xy_m": float(np.nanmax(np.where(det, plan.sigma_xy_m, np.nan)))
        if det.any() else None,
        "median_sigma_xy_m": float(np.nanmedian(np.where(det, plan.sigma_xy_m, np.nan)))
        if det.any() else None,
        "smallest_cell_px": float(np.nanmin(plan.cell_px)) if plan.in_view.any() else None,
        "lowest_camera_height_m": sug.lowest_height_m,
        "smallest_marker_m": sug.smallest_marker_m,
        "settings": {"corner_noise_px": args.corner_noise_px,
                     "registration_px": settings.registration_px,
                     "registration_points": settings.registration_points,
                     "min_cell_px": args.min_cell_px, "grid_m": settings.grid_m,
                     "speed_mps": settings.speed_mps,
                     "readout_sigma_s": settings.readout_sigma_s,
                     "margin_m": margin},
    }
    with staged_dir(args.out, inputs=(args.field, args.robot, args.lens), force=args.force,
                    command="vidodo plan") as stage:
        write_plan_png(plan, fld, marker, stage / "plan.png", settings=settings)
        (stage / "plan.json").write_text(json.dumps(summary, indent=2) + "\n")
    print(f"marker detectable on {100 * det.mean():.0f}% of the field, in view on "
          f"{100 * plan.in_view.mean():.0f}%")
    if summary["worst_sigma_xy_m"] is not None:
        print(f"expected 1-sigma per axis: median {summary['median_sigma_xy_m'] * 1000:.2f} "
              f"mm, worst {summary['worst_sigma_xy_m'] * 1000:.2f} mm")
    for what, v in (("lowest camera height (same spot and aim)", sug.lowest_height_m),
                    ("smallest marker (this camera, points in view)", sug.smallest_marker_m)):
        print(f"{what}: " + (f"{v:.3f} m" if v is not None else
                             "none in the range tried (move or turn the camera)"))
    print(f"wrote {args.out / 'plan.png'} and {args.out / 'plan.json'}")
    return 0
