"""Command line: parse arguments, call the library, print one line per error.

Each verb lives in ``vidodo/commands/<verb>.py`` and defines ``NAME``, ``HELP``,
``add_arguments(parser)`` and ``run(args) -> int``. Verbs are found automatically, so
adding one never touches this file. Exit codes are listed in :mod:`vidodo.errors`.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import os
import pkgutil
import re
import signal
import sys
import threading
import traceback

# decoder and vision-library chatter would come before the one-line error (issue 14)
os.environ.setdefault("OPENCV_LOG_LEVEL", "ERROR")
os.environ.setdefault("OPENCV_FFMPEG_LOGLEVEL", "-8")

from . import __version__, commands  # noqa: E402
from .blas_threads import one_blas_thread  # noqa: E402
from .errors import EXIT_INTERNAL, EXIT_INTERRUPTED, Interrupted, VidodoError  # noqa: E402


def _verbs(only=None):
    """The verb modules; with ``only``, just that verb's module when it exists (so a
    command does not pay for importing every other verb's libraries)."""
    names = [i.name for i in pkgutil.iter_modules(commands.__path__)
             if not i.name.startswith("_")]
    if only in names:
        names = [only]
    mods = []
    for name in names:
        mod = importlib.import_module(f"{commands.__name__}.{name}")
        if hasattr(mod, "NAME") and hasattr(mod, "run"):
            mods.append(mod)
    order = getattr(commands, "ORDER", ())
    mods.sort(key=lambda m: (order.index(m.NAME) if m.NAME in order else len(order), m.NAME))
    return mods


def build_parser(verb=None) -> argparse.ArgumentParser:
    """The argument parser with every verb (or only ``verb``, when it is one)."""
    parser = argparse.ArgumentParser(
        prog="vidodo",
        description="Check a mobile robot's odometry against video of the run.",
        epilog="Exit codes: 0 ok, 1 internal error, 2 bad input, 3 could not measure, "
        "4 outside tolerance, 5 batch partly failed, 130 interrupted.",
    )
    parser.add_argument("--version", action="version", version=f"vidodo {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    for mod in _verbs(verb):
        desc = getattr(mod, "DESCRIPTION", mod.HELP)
        p = sub.add_parser(mod.NAME, help=mod.HELP, description=desc)
        p.add_argument("--quiet", action="store_true", help="no progress bars, fewer lines")
        p.add_argument("--debug", action="store_true", help="show tracebacks on errors")
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


_NUMPY_REPR = re.compile(r"np\.(?:u?int|float|bool_?|str_)\d*\(([^()]*)\)")


def one_line(exc) -> str:
    """The error's message as one line, numpy scalar reprs shown as plain numbers."""
    text = " ".join(str(exc).split("\n")).strip() or type(exc).__name__
    return _NUMPY_REPR.sub(r"\1", text)


def _raise_interrupted(signum, _frame):
    raise Interrupted(signal.Signals(signum).name)


@contextlib.contextmanager
def _termination_handled():
    """SIGTERM and SIGHUP end the command like Ctrl-C: staged outputs are removed."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    old = {s: signal.signal(s, _raise_interrupted) for s in (signal.SIGTERM, signal.SIGHUP)}
    try:
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)


def main(argv=None) -> int:
    """Entry point of the ``vidodo`` command."""
    argv = sys.argv[1:] if argv is None else list(argv)
    first = next((a for a in argv if not a.startswith("-")), None)
    parser = build_parser(first)
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    if args.debug:
        os.environ["OPENCV_LOG_LEVEL"] = "INFO"
    try:
        with _termination_handled(), one_blas_thread():
            return int(args._run(args) or 0)
    except VidodoError as exc:
        if args.debug:
            traceback.print_exc()
        print(f"vidodo {args.verb}: error: {one_line(exc)}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt as exc:
        how = f" by {exc}" if isinstance(exc, Interrupted) else ""
        print(f"vidodo {args.verb}: interrupted{how}; nothing written", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as exc:  # a bug: say so, keep it to one line unless --debug
        if args.debug:
            traceback.print_exc()
        print(
            f"vidodo {args.verb}: internal error: {type(exc).__name__}: {one_line(exc)} "
            "(run again with --debug for the traceback and report it)",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
