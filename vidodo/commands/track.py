"""``vidodo track VIDEO --robot R.toml --field F.toml --out track.csv``: the truth track."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np

from ..errors import RegistrationRefused
from ..outputs import atomic_file, jsonable
from ..profiles import load_camera, load_field, load_robot
from ..progress import Progress
from . import registration_options
from ._options import add_force, add_out, add_profile

NAME = "track"
HELP = "measure the robot's floor pose in every frame of a video (the truth track)"
DESCRIPTION = (
    "Find the robot's marker(s) in every frame, map them to the floor through the "
    "floor registration (correcting the marker height and the rolling shutter), smooth "
    "and write one CSV row per frame: t_s, x_m, y_m, heading_rad, sigma_xy_m, "
    "sigma_heading_rad, vx_mps, vy_mps, speed_mps, omega_radps, ax_mps2, ay_mps2, "
    "detected, interpolated. A JSON file with the quality figures and a CSV of the floor "
    "registrations used (<name>.floor.csv, for the replay) are written beside it."
)


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("video", type=Path, help="the footage (MP4, MOV, ...)")
    add_profile(parser, "robot")
    add_profile(parser, "field")
    add_profile(parser, "camera", "camera profile (TOML): lens, readout")
    from ..tracking.detector import REFINE_METHODS

    add_out(parser, "track CSV to write", required=True)
    add_force(parser, "file")
    parser.add_argument("--refine", choices=tuple(REFINE_METHODS),
                        default="apriltag", help="corner refinement (default: %(default)s)")
    parser.add_argument("--detector", choices=("auto", "opencv", "apriltag3"), default="auto",
                        help="marker detector: OpenCV, the AprilTag 3 library (AprilTag "
                        "markers; pip install 'vidodo[apriltag3]'), or auto = OpenCV and "
                        "the library where OpenCV finds nothing (default: %(default)s)")
    parser.add_argument("--readout-ms", type=float,
                        help="rolling-shutter readout time [ms] (default: camera profile)")
    parser.add_argument("--max-gap-s", type=float, default=0.25,
                        help="bridge gaps up to this long, leave longer ones empty "
                        "(default: %(default)s)")
    registration_options.add_arguments(parser)


def _quality_json(result) -> str:
    return json.dumps({"quality": jsonable(result.quality), "warnings": result.warnings},
                      indent=2)


TRACK_SIGNATURE = b"t_s,x_m,"
QUALITY_SIGNATURE = b'{\n  "quality"'


FLOOR_SIGNATURE = b"t_s,ok,method,"


def _targets(args):
    from ..tracking.floor_poses import floor_poses_path

    out = Path(args.out)
    return ((out, TRACK_SIGNATURE), (out.with_suffix(".quality.json"), QUALITY_SIGNATURE),
            (floor_poses_path(out), FLOOR_SIGNATURE))


def _inputs(args):
    return (args.video, args.robot, args.field, args.camera, getattr(args, "points", None))


def _write(result, out: Path, args=None, registrations=()):
    from ..tracking.floor_poses import floor_poses_path, write_floor_poses
    from ..tracking.result import save_track_csv

    kw = {} if args is None else dict(inputs=_inputs(args), force=args.force)
    with atomic_file(out, signature=TRACK_SIGNATURE, **kw) as tmp:
        save_track_csv(result, tmp)
    with atomic_file(out.with_suffix(".quality.json"), signature=QUALITY_SIGNATURE,
                     **kw) as tmp:
        tmp.write_text(_quality_json(result))
    if registrations:
        # the registrations the track was measured with, for the pictures drawn from it
        with atomic_file(floor_poses_path(out), signature=FLOOR_SIGNATURE, **kw) as tmp:
            write_floor_poses(registrations, tmp,
                              detection_readout_s=float(result.quality.get("readout_s") or 0))


def run(args) -> int:
    """Track, write the CSV (also the part before a truncation), report."""
    from ..input_checks import camera_matches_video
    from ..outputs import check_file_target
    from ..tracking.floor_poses import RecordingRegistrar
    from ..tracking.settings import TrackSettings
    from ..tracking.tracker import track_video
    from ..video import VideoTruncatedError

    for path, sig in _targets(args):
        check_file_target(path, inputs=_inputs(args), force=args.force, signature=sig)
    robot = load_robot(args.robot)
    field = load_field(args.field)
    camera = load_camera(args.camera) if args.camera else None
    camera_matches_video(camera, args.video)
    registrar = RecordingRegistrar(registration_options.registrar_from_args(args, field,
                                                                            camera))
    readout = None if args.readout_ms is None else args.readout_ms / 1000.0
    try:
        with Progress(desc="tracking", quiet=args.quiet) as bar:
            settings = TrackSettings(refine=args.refine, detector=args.detector,
                                     readout_s=readout, max_gap_s=args.max_gap_s)
            result = track_video(args.video, robot, field, camera, settings,
                                 registrar=registrar, progress=bar)
    except RegistrationRefused as exc:
        registration_options.write_preview(exc, args.out.with_suffix(".preview.png"))
        raise
    except VideoTruncatedError as exc:
        if exc.partial is None:
            raise
        _write(exc.partial, args.out, args, registrar.records)
        print(f"vidodo track: warning: track written up to frame {exc.frames_read} "
              f"({exc.t_last_s:.3f} s) -> {args.out}", file=sys.stderr)
        raise
    _write(result, args.out, args, registrar.records)
    for w in result.warnings:
        print(f"vidodo track: warning: {w}", file=sys.stderr)
    if not args.quiet:
        q = result.quality
        tr = result.track
        print(f"{q['frames']} frames, marker found in {q['detected_frames']} "
              f"({100 * q['detected_fraction']:.1f}%), {q['interpolated_frames']} bridged, "
              f"{len(q['long_gaps'])} long gaps -> {args.out}")
        print(f"  marker cells {q['marker_cell_px_min']:.1f}-{q['marker_cell_px_median']:.1f} "
              f"px (min-median), corner noise {q['corner_sigma_px']:.2f} px, median 1-sigma "
              f"{1000 * np.nanmedian(tr['sigma_xy_m']):.1f} mm / "
              f"{np.degrees(np.nanmedian(tr['sigma_heading_rad'])):.2f} deg")
    return 0
