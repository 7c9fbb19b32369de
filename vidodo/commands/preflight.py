"""``vidodo preflight LOG --robot R.toml --field F.toml [--video V]``: will this run grade?"""

from __future__ import annotations

from pathlib import Path

from ._options import add_profile

NAME = "preflight"
HELP = "quick checklist before grading: profiles, log, encoder signs, marker, floor"
DESCRIPTION = (
    "In a few seconds and without the whole analysis: load the profiles strictly, check "
    "the log's columns, time unit and counter widths, check that the encoders agree with "
    "each other and the IMU (a wheel's sign backwards, two columns swapped), and with "
    "--video look at the first seconds for the marker, register the floor and predict "
    "whether the marker is large enough everywhere. Prints pass / warn / fail per item "
    "with what to do. Exit 0 when nothing fails, 2 when something does."
)


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("log", type=Path, help="robot log CSV")
    add_profile(parser, "robot")
    add_profile(parser, "field")
    parser.add_argument("--video", type=Path, default=None, help="the run's video")
    add_profile(parser, "camera")
    parser.add_argument("--first-s", type=float, default=3.0,
                        help="seconds of video to look at (default 3)")


def checklist_lines(result) -> list[str]:
    """The checklist as terminal lines."""
    width = max(len(c.name) for c in result.checks)
    lines = []
    for c in result.checks:
        lines.append(f"[{c.status.upper():4}] {c.name:<{width}}  {c.detail}")
        if c.todo:
            lines.append(f"{'':7}{'':<{width}}  -> {c.todo}")
    lines.append(f"pre-flight: {result.status}")
    return lines


def run(args) -> int:
    """Run the checks, print the checklist."""
    from ..errors import InputError
    from ..preflight import PreflightSettings, preflight

    if args.first_s <= 0:
        raise InputError(f"--first-s {args.first_s}: must be positive")
    result = preflight(args.robot, args.field, args.log, args.video, args.camera,
                       settings=PreflightSettings(first_s=args.first_s))
    for line in checklist_lines(result):
        print(line)
    return 2 if result.status == "fail" else 0
