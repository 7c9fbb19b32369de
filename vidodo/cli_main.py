"""Command line: parse arguments, call the library, print one line per error.

Each verb lives in ``vidodo/commands/<verb>.py`` and defines ``NAME``, ``HELP``,
``add_arguments(parser)`` and ``run(args) -> int``. Verbs are found automatically, so
adding one never touches this file. Exit codes are listed in :mod:`vidodo.errors`.
"""

from __future__ import annotations

import argparse
import importlib
import pkgutil
import sys
import traceback

from . import __version__, commands
from .errors import EXIT_INTERNAL, EXIT_INTERRUPTED, VidodoError


def _verbs():
    mods = []
    for info in pkgutil.iter_modules(commands.__path__):
        if info.name.startswith("_"):
            continue
        mod = importlib.import_module(f"{commands.__name__}.{info.name}")
        if hasattr(mod, "NAME") and hasattr(mod, "run"):
            mods.append(mod)
    order = getattr(commands, "ORDER", ())
    mods.sort(key=lambda m: (order.index(m.NAME) if m.NAME in order else len(order), m.NAME))
    return mods


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser with every verb."""
    parser = argparse.ArgumentParser(
        prog="vidodo",
        description="Check a mobile robot's odometry against video of the run.",
        epilog="Exit codes: 0 ok, 1 internal error, 2 bad input, 3 could not measure, "
        "4 outside tolerance, 5 batch partly failed, 130 interrupted.",
    )
    parser.add_argument("--version", action="version", version=f"vidodo {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    for mod in _verbs():
        desc = getattr(mod, "DESCRIPTION", mod.HELP)
        p = sub.add_parser(mod.NAME, help=mod.HELP, description=desc)
        p.add_argument("--quiet", action="store_true", help="no progress bars, fewer lines")
        p.add_argument("--debug", action="store_true", help="show tracebacks on errors")
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def main(argv=None) -> int:
    """Entry point of the ``vidodo`` command."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    try:
        return int(args._run(args) or 0)
    except VidodoError as exc:
        if args.debug:
            traceback.print_exc()
        print(f"vidodo {args.verb}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"vidodo {args.verb}: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as exc:  # a bug: say so, keep it to one line unless --debug
        if args.debug:
            traceback.print_exc()
        print(
            f"vidodo {args.verb}: internal error: {type(exc).__name__}: {exc} "
            "(run again with --debug for the traceback and report it)",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
