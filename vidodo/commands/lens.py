"""``vidodo lens``: calibrate a camera from views of a flat board and save a camera profile."""

from __future__ import annotations

from pathlib import Path

from .. import lens
from ..errors import InputError
from ..outputs import atomic_file
from ..profiles import camera_to_dict, dump_toml
from ._options import add_force

NAME = "lens"
HELP = "calibrate the lens from a board clip or images; write a camera profile"
DESCRIPTION = (
    "Find a checkerboard (inner corners COLSxROWS) or a ChArUco board (squares COLSxROWS, "
    "with --charuco) in still images, an image folder or a video clip, fit focal length, "
    "principal point and distortion, and save them as a camera profile (TOML). "
    "Exit 2 for unreadable input, 3 when the board is found in too few views."
)

VIDEO_SUFFIXES = (".mp4", ".mov", ".mkv", ".avi", ".m4v", ".webm")


def _board(text: str) -> tuple[int, int]:
    try:
        cols, rows = (int(v) for v in text.lower().split("x"))
    except ValueError:
        raise InputError(f"--board {text!r}: write it as COLSxROWS, e.g. 9x6") from None
    return cols, rows


def add_arguments(parser):
    parser.add_argument("inputs", nargs="+", type=Path,
                        help="image files, a folder of images, or one video clip")
    parser.add_argument("--board", default="9x6",
                        help="checkerboard inner corners, or ChArUco squares (default 9x6)")
    parser.add_argument("--square-mm", type=float, required=True,
                        help="side of one board square [mm]")
    parser.add_argument("--charuco", metavar="DICT", default=None,
                        help="the board is ChArUco with this marker dictionary, "
                             "e.g. DICT_5X5_100")
    parser.add_argument("--marker-mm", type=float, default=None,
                        help="ChArUco marker side [mm] (default 0.7 x square)")
    parser.add_argument("--every-s", type=float, default=0.5,
                        help="for a clip: try one frame every this many seconds")
    parser.add_argument("--square-pixels", action="store_true",
                        help="force fx = fy")
    parser.add_argument("--no-tangential", action="store_true",
                        help="fix the tangential distortion terms at zero")
    parser.add_argument("--readout-ms", type=float, default=0.0,
                        help="rolling-shutter readout time to store in the profile [ms]")
    parser.add_argument("-o", "--out", type=Path, default=Path("camera.toml"),
                        help="camera profile to write (default camera.toml)")
    add_force(parser, "file")


SIGNATURE = b"# camera profile written by vidodo lens"


def run(args) -> int:
    from ..outputs import check_file_target

    target = dict(inputs=args.inputs, force=args.force, signature=SIGNATURE)
    check_file_target(args.out, **target)
    board = _board(args.board)
    if args.square_mm is None or args.square_mm <= 0:
        raise InputError(f"--square-mm {args.square_mm}: must be positive")
    marker_m = args.marker_mm / 1000.0 if args.marker_mm else None
    kw = dict(dictionary=args.charuco, marker_m=marker_m,
              model=lens.LensModel(fix_aspect=args.square_pixels,
                                   zero_tangent=args.no_tangential))
    video = [p for p in args.inputs if p.suffix.lower() in VIDEO_SUFFIXES]
    if video:
        if len(args.inputs) != 1:
            raise InputError(f"{video[0]}: give one video clip on its own, "
                             "or image files only")
        cam, report = lens.calibrate_video(video[0], board, args.square_mm / 1000.0,
                                           every_s=args.every_s, **kw)
    else:
        cam, report = lens.calibrate_images(args.inputs, board, args.square_mm / 1000.0,
                                            **kw)
    if args.readout_ms:
        from dataclasses import replace
        cam = replace(cam, readout_s=args.readout_ms / 1000.0)
    header = (f"camera profile written by vidodo lens from {report.n_used} views, "
              f"reprojection error {report.rms_px:.3f} px RMS")
    with atomic_file(args.out, **target) as tmp:
        tmp.write_text(dump_toml(camera_to_dict(cam), header=header))
    if not args.quiet:
        for line in report.lines():
            print(line)
        print(f"fx {cam.fx_px:.2f} px, fy {cam.fy_px:.2f} px, "
              f"cx {cam.cx_px:.2f} px, cy {cam.cy_px:.2f} px")
        print("distortion (k1, k2, p1, p2, k3...): "
              + ", ".join(f"{v:.5f}" for v in cam.distortion))
    print(f"wrote {args.out}")
    return 0
