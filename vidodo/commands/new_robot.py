"""``vidodo new-robot --out robot.toml``: a starter robot profile from a few questions."""

from __future__ import annotations

import sys
from pathlib import Path

from ._options import add_force

NAME = "new-robot"
HELP = "write a starter robot profile from a few questions (or an answers file)"
DESCRIPTION = (
    "Ask about the drivetrain (two-wheel differential, four-wheel skid, mecanum), the "
    "tracking wheels (none, two or three), the IMU, the log and the marker, then write a "
    "commented robot.toml and its picture (robot.png beside it). Press Enter to take the "
    "default in brackets. With --answers FILE (TOML, keys as the questions' keys, listed "
    "with --list) nothing is asked; missing keys take their defaults. Exit 2 for a bad "
    "answer or when the answers run out."
)


SIGNATURE = b"# robot profile written by `vidodo new-robot`"
"""First bytes of every profile this verb writes (an existing file without them is kept)."""


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("-o", "--out", type=Path, default=Path("robot.toml"),
                        help="profile to write (default robot.toml)")
    parser.add_argument("--answers", type=Path, default=None,
                        help="TOML file with the answers; nothing is asked")
    parser.add_argument("--picture", type=Path, default=None,
                        help="robot picture to write (default: beside --out, .png)")
    parser.add_argument("--list", action="store_true",
                        help="list the questions' keys and defaults, write nothing")
    add_force(parser, "file")


def _ask(q):
    from ..errors import InputError
    from ..starter import parse_answer

    choices = f" ({'/'.join(q.choices)})" if q.choices else ""
    default = ("yes" if q.default else "no") if q.kind == "bool" else q.default
    while True:
        print(f"{q.text}{choices} [{default}]: ", end="", flush=True)
        line = sys.stdin.readline()
        if not sys.stdin.isatty():  # answers from a pipe: show them, one per line
            print(line.rstrip("\n"))
        if not line:
            raise InputError(f"no answer to '{q.key}' (input ended); answer every "
                             "question or give --answers FILE")
        try:
            return parse_answer(q, line)
        except InputError as exc:
            if not sys.stdin.isatty():
                raise
            print(f"  {exc}")


def run(args) -> int:
    """Ask (or read the answers), write the profile and its picture."""
    from ..errors import InputError
    from ..outputs import atomic_file
    from ..profiles import load_robot, read_toml
    from ..robot_picture import write_robot_picture
    from ..starter import QUESTIONS, complete_answers, next_question, profile_text

    if args.list:
        for q in QUESTIONS:
            print(f"{q.key} = {q.default!r}   # {q.text}")
        return 0
    from ..outputs import check_file_target
    from ..robot_picture import is_vidodo_png

    picture = args.picture or args.out.with_suffix(".png")
    check_file_target(args.out, inputs=(args.answers,), force=args.force, signature=SIGNATURE)
    if picture.absolute() == args.out.absolute():
        raise InputError(f"{picture}: given for both the profile and its picture; "
                         "choose another --picture")
    check_file_target(picture, inputs=(args.answers, args.out), force=args.force,
                      signature=is_vidodo_png)
    if args.answers is not None:
        given, _ = read_toml(args.answers)
        answers = complete_answers(given, str(args.answers))
    else:
        answers = {}
        while (q := next_question(answers)) is not None:
            answers[q.key] = _ask(q)
    text = profile_text(answers)
    with atomic_file(args.out, inputs=(args.answers,), force=args.force,
                     signature=SIGNATURE) as tmp:
        tmp.write_text(text, encoding="utf-8")
        robot = load_robot(tmp)  # what is written must load
        with atomic_file(picture, inputs=(args.answers,), force=args.force,
                         signature=is_vidodo_png) as ptmp:
            write_robot_picture(robot, ptmp)
    print(f"wrote {args.out} and {picture} (open the picture: front up, arrows where "
          "the counts rise)")
    return 0
