"""``vidodo sheets --robot R.toml --out DIR``: printable markers, checkerboard, floor markers."""

from __future__ import annotations

from pathlib import Path

from ._options import add_force, add_profile

NAME = "sheets"
HELP = "write printable sheets at true scale (PDF + PNG, A4 and US Letter)"
DESCRIPTION = (
    "Write sheets-a4.pdf and sheets-letter.pdf (and each page as a 300 dpi PNG) holding "
    "the robot's markers from its profile (white quiet zone, id and size beside it, a cut "
    "line), a checkerboard for `vidodo lens` and the floor markers of the field profile "
    "(or those given with --floor-ids). Each page has a 100 mm ruler: measure it after "
    "printing; print at 100 % / actual size. Items larger than a page are split over "
    "several pages. Exit 2 for a profile that does not load or an unknown marker id."
)


def _ids(text):
    from ..errors import InputError

    try:
        return [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise InputError(f"--floor-ids {text!r}: give ids separated by commas, "
                         "e.g. 0,1,2,3") from None


def add_arguments(parser):
    """Options of the verb."""
    add_profile(parser, "robot", required=False)
    add_profile(parser, "field", "field profile: its [[floor_marker]] tables are printed",
                required=False)
    parser.add_argument("--floor-ids", default="",
                        help="also print these floor marker ids, e.g. 0,1,2,3")
    parser.add_argument("--floor-family", default="DICT_4X4_50",
                        help="dictionary of --floor-ids (default DICT_4X4_50)")
    parser.add_argument("--floor-size-mm", type=float, default=150.0,
                        help="black-square side of --floor-ids markers [mm] (default 150)")
    parser.add_argument("--board", default="9x6",
                        help="checkerboard inner corners COLSxROWS (as `vidodo lens`)")
    parser.add_argument("--square-mm", type=float, default=None,
                        help="checkerboard square side [mm] (default 18: fits A4 and Letter)")
    parser.add_argument("--no-board", action="store_true", help="leave the checkerboard out")
    parser.add_argument("--paper", default="a4,letter", help="a4, letter or both (default)")
    parser.add_argument("--no-png", action="store_true", help="PDF only")
    parser.add_argument("-o", "--out", type=Path, required=True, help="folder to write into")
    add_force(parser)


def _items(args):
    from ..commands.lens import _board
    from ..errors import InputError
    from ..profiles import load_field, load_robot
    from ..sheets import SQUARE_MM_DEFAULT, checkerboard_item, marker_item

    items = []
    if args.robot is not None:
        robot = load_robot(args.robot)
        if not robot.markers:
            raise InputError(f"{args.robot}: no [[marker]] table; add the robot's marker")
        for m in robot.markers:
            items.append(marker_item(m.family, m.id, m.size_m * 1000,
                                     f"robot '{robot.name}', {m.z_m * 1000:.0f} mm up"))
    if args.field is not None:
        for m in load_field(args.field).floor_markers:
            items.append(marker_item(m.family, m.id, m.size_m * 1000,
                                     f"floor at x {m.x_m:.3f} m, y {m.y_m:.3f} m"))
    if args.floor_size_mm <= 0:
        raise InputError(f"--floor-size-mm {args.floor_size_mm}: must be positive")
    for i in _ids(args.floor_ids):
        items.append(marker_item(args.floor_family, i, args.floor_size_mm, "floor"))
    if not args.no_board:
        square = SQUARE_MM_DEFAULT if args.square_mm is None else args.square_mm
        items.append(checkerboard_item(_board(args.board), square))
    if not items:
        raise InputError("nothing to print: give --robot, --field or --floor-ids")
    return items


def run(args) -> int:
    """Lay out the sheets and write them."""
    from ..errors import InputError
    from ..outputs import staged_dir
    from ..sheets import PAGE_SIZES_MM, write_sheets

    papers = [p.strip().lower() for p in args.paper.split(",") if p.strip()]
    bad = [p for p in papers if p not in PAGE_SIZES_MM]
    if bad or not papers:
        raise InputError(f"--paper {args.paper!r}: use a4, letter or a4,letter")
    items = _items(args)
    with staged_dir(args.out, inputs=(args.robot, args.field), force=args.force,
                    command="vidodo sheets") as stage:
        written = write_sheets(items, stage, papers=papers, png=not args.no_png)
    if not args.quiet:
        for p in written:
            print(Path(args.out) / p.name)
    print("print at 100 % / actual size, then measure the 100 mm ruler on each page")
    return 0
