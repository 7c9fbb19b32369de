"""Options several verbs share, spelled and explained the same way everywhere."""

from __future__ import annotations

import argparse
from pathlib import Path


def add_out(parser, help_text, **kwargs):
    """``-o/--out``: where the verb writes."""
    parser.add_argument("-o", "--out", type=kwargs.pop("type", Path), help=help_text, **kwargs)


_PROFILE_HELP = {"robot": "robot profile (TOML)", "field": "field profile (TOML)",
                 "camera": "camera profile (TOML)"}


def add_profile(parser, kind, help_text=None, *, required=None):
    """``--robot``, ``--field`` or ``--camera``: the path of a profile (TOML); robot and
    field are required unless ``required=False``, the camera is optional."""
    parser.add_argument(f"--{kind}", type=Path,
                        required=kind != "camera" if required is None else required,
                        help=help_text or _PROFILE_HELP[kind])


def add_units(parser, what="printed figures and plots"):
    """``--units``: display length unit, choices from :data:`vidodo.units.LENGTH_UNITS`."""
    from ..units import LENGTH_UNITS

    parser.add_argument("--units", choices=tuple(LENGTH_UNITS), default="mm",
                        help=f"length unit of the {what} (files stay SI; default: "
                        "%(default)s)")


def add_switch(parser, name, default, help_text):
    """``--NAME/--no-NAME``, the same pair on every verb; only the default differs."""
    parser.add_argument(f"--{name}", action=argparse.BooleanOptionalAction, default=default,
                        help=f"{help_text} (default: {'on' if default else 'off'})")


def add_old_spelling(parser, old, dest, **kwargs):
    """An earlier spelling of an option, still accepted but not shown in ``--help``."""
    parser.add_argument(old, dest=dest, help=argparse.SUPPRESS, default=argparse.SUPPRESS,
                        **kwargs)


_FORCE_HELP = {
    "folder": "write into a folder holding other files (they are kept; inputs are never "
              "touched)",
    "file": "replace an existing file vidodo did not write (never an input)",
}


def add_force(parser, kind: str = "folder") -> None:
    """``--force``: write over what the output rules would refuse (never an input)."""
    parser.add_argument("--force", action="store_true", help=_FORCE_HELP[kind])


def add_replay_scale(parser):
    """``--replay-scale S``: replay size relative to the footage (None: the default of
    :data:`vidodo.report.replay.DEFAULT_SCALE`, not imported here: it would load the
    plotting library at every start)."""

    def scale(text):
        v = float(text)
        if not 0.0 < v <= 1.0:
            raise argparse.ArgumentTypeError(f"must be in (0, 1], got {text}")
        return v

    parser.add_argument("--replay-scale", type=scale, metavar="FRACTION", default=None,
                        help="replay size relative to the footage (default: half; 1 for "
                        "full resolution)")
