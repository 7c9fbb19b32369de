"""``vidodo picture ROBOT.toml --out robot.png``: a top view of the robot profile."""

from __future__ import annotations

from pathlib import Path

from ._options import add_force

NAME = "picture"
HELP = "draw the robot profile as a top view to scale (PNG), to check it at a glance"
DESCRIPTION = (
    "Read a robot profile and draw it from above, front up, to scale: the footprint, "
    "every wheel with its name, the direction in which its counts rise, roller angle and "
    "sign, the tracking wheels' lever arms, the markers with their offsets and the "
    "reference point. A wheel on the wrong side or an arrow pointing backwards shows at "
    "once. Exit 2 when the profile does not load, or when --out is the profile or an "
    "existing PNG vidodo did not write (add --force to replace the latter)."
)


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("robot", type=Path, help="robot profile (TOML)")
    parser.add_argument("-o", "--out", type=Path, default=Path("robot.png"),
                        help="PNG to write (default robot.png)")
    add_force(parser, "file")


def run(args) -> int:
    """Load the profile, draw it, print the path."""
    from ..outputs import atomic_file, check_file_target
    from ..profiles import load_robot
    from ..robot_picture import is_vidodo_png, write_robot_picture

    check_file_target(args.out, inputs=(args.robot,), force=args.force,
                      signature=is_vidodo_png)
    robot = load_robot(args.robot)
    with atomic_file(args.out, inputs=(args.robot,), force=args.force,
                     signature=is_vidodo_png) as tmp:
        write_robot_picture(robot, tmp)
    print(f"wrote {args.out}")
    return 0
