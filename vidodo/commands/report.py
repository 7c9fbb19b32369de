"""``vidodo report GRADE_DIR``: rebuild the plots and the HTML report of a grade."""

from __future__ import annotations

from pathlib import Path

from ._options import add_force, add_out, add_replay_scale, add_switch, add_units

NAME = "report"
HELP = "rebuild the plots and the one-file HTML report from a grade folder"
DESCRIPTION = (
    "Read drift.csv, events.csv and summary.json from a folder written by `vidodo grade` "
    "and write field_map.png, error_vs_time.png, speed.png, robot.png and plan.png (when the "
    "profiles and footage named in summary.json can be read) and report.html (one file, "
    "images inside, nothing loaded from elsewhere) beside them, or into --out. With "
    "--replay, also the annotated replay video (needs the footage and profiles named in "
    "summary.json). Exit 2 when a grade file is missing or unreadable."
)


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("grade_dir", type=Path, help="folder written by `vidodo grade --out`")
    add_out(parser, "where to write (default: the grade folder itself)", default=None)
    add_units(parser, "plots and the report")
    add_switch(parser, "replay", False,
               "write replay.mp4 (the footage with tracks drawn in)")
    add_switch(parser, "grid", True, "draw the registered tile grid, faint, in the replay")
    add_force(parser)
    add_replay_scale(parser)


def run(args) -> int:
    """Rebuild the pictures; print what was written."""
    from ..outputs import staged_dir
    from ..progress import progress_bar
    from ..report.build import load_grade_dir, write_report

    data = load_grade_dir(args.grade_dir)  # fail early, before anything is written
    out = args.out or args.grade_dir
    inputs = [(data.summary.get("inputs") or {}).get(k) for k in ("video", "robot", "field",
                                                                  "camera")]
    if args.out is not None:
        inputs.append(args.grade_dir)
    with staged_dir(out, inputs=[i for i in inputs if isinstance(i, str)], force=args.force,
                    carry_over=True, command="vidodo report") as stage, \
            progress_bar(None, "replay", quiet=args.quiet or not args.replay) as bar:
        written = write_report(args.grade_dir, stage, replay=args.replay, units=args.units,
                               progress=bar, grid=args.grid,
                               replay_scale=args.replay_scale)
    if not args.quiet:
        for p in written:
            print(Path(out) / p.name)
    return 0
