"""``vidodo pick VIDEO --field F.toml --out picker.html``: pick floor points by hand."""

from __future__ import annotations

from pathlib import Path

from ..profiles import load_field
from ._options import add_force, add_out, add_profile

NAME = "pick"
HELP = "write a page for clicking tile corners; it saves the points CSV that --points reads"
DESCRIPTION = (
    "Write one self-contained HTML page (open it from the disk; it needs no server and "
    "loads nothing) showing a frame of VIDEO (the first, or the one at --at; a few more "
    "for a hand-held clip). Clicks snap to tile corners found in the frame, floor "
    "fiducials of the field profile are offered as points, the tile lattice fills in the "
    "floor positions once four are typed, the implied grid is drawn over the frame, and "
    "'Save' downloads u_px,v_px,x_m,y_m rows for 'vidodo track --points' and "
    "'vidodo register --points'. Exit 2 for an unreadable video or profile."
)


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("video", type=Path, help="the footage")
    add_profile(parser, "field")
    parser.add_argument("--at", type=float, metavar="SECONDS", default=None,
                        help="show the frame at this time (default: the first frame, the "
                        "one --points registers)")
    add_out(parser, "page to write (default: <video name>-pick.html beside it)", default=None)
    add_force(parser, "file")


def run(args) -> int:
    """Write the page and say where it is."""
    from ..errors import InputError
    from ..picker import write_picker

    if args.at is not None and not args.at >= 0:
        raise InputError("--at must be a time in seconds, 0 or more")
    field = load_field(args.field)
    out = args.out or args.video.with_name(args.video.stem + "-pick.html")
    path = write_picker(args.video, field, out, at_s=args.at, inputs=(args.field,),
                        force=args.force)
    if not args.quiet:
        print(f"open {path} in a browser, click tile corners, type four floor positions, "
              "Save; then pass the CSV with --points")
    return 0
