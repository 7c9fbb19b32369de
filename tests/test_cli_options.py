"""Command-line options: units in the names, one meaning per switch, choices from the code."""

from __future__ import annotations

import argparse

import pytest

from vidodo.cli_main import build_parser
from vidodo.tracking.detector import REFINE_METHODS
from vidodo.units import LENGTH_UNITS


def _subparsers(parser):
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return action.choices


@pytest.fixture(scope="module")
def verbs():
    return _subparsers(build_parser())


def test_old_spellings_still_parse_but_are_not_shown(verbs):
    """``--clock-offset`` and ``--window`` (no unit) still work, as hidden aliases of
    ``--clock-offset-s`` and ``--window-s``."""
    p = build_parser()
    new = p.parse_args(["grade", "v.mp4", "l.csv", "--robot", "r", "--field", "f", "--out", "o",
                        "--clock-offset-s", "1.5"])
    old = p.parse_args(["grade", "v.mp4", "l.csv", "--robot", "r", "--field", "f", "--out", "o",
                        "--clock-offset", "1.5"])
    assert new.clock_offset_s == old.clock_offset_s == 1.5
    assert p.parse_args(["tune", "g", "--out", "o", "--window", "0.3"]).window_s == 0.3
    assert p.parse_args(["tune", "g", "--out", "o"]).window_s == 0.4
    assert "--clock-offset " not in verbs["grade"].format_help()
    assert "--window " not in verbs["tune"].format_help()


def test_every_option_with_a_number_and_a_unit_metavar_names_its_unit(verbs):
    """An option taking seconds, metres or degrees says so in its name (``_s``, ``_m``,
    ``_deg``, ``_ms``, ``_mm``)."""
    units = {"S": "-s", "M": "-m", "DEG": "-deg", "MS": "-ms", "MM": "-mm"}
    for name, sub in verbs.items():
        for action in sub._actions:
            if action.help == argparse.SUPPRESS or not action.option_strings:
                continue
            suffix = units.get(str(action.metavar))
            if suffix:
                assert any(o.endswith(suffix) for o in action.option_strings), (name, action)


def test_replay_switch_is_one_pair_everywhere(verbs):
    """Every verb that can write the replay takes both ``--replay`` and ``--no-replay``."""
    having = [n for n, sub in verbs.items()
              if any("--replay" in a.option_strings for a in sub._actions)]
    assert set(having) >= {"grade", "demo", "report", "batch"}
    for name in having:
        opts = {o for a in verbs[name]._actions for o in a.option_strings}
        assert {"--replay", "--no-replay"} <= opts, name


def test_out_has_the_short_form_everywhere(verbs):
    """``-o`` is ``--out`` on every verb that writes."""
    for name, sub in verbs.items():
        for action in sub._actions:
            if "--out" in action.option_strings:
                assert "-o" in action.option_strings, name


def test_choices_come_from_the_code(verbs):
    """``--refine`` lists the tracker's methods; ``--units`` the display units."""
    for name, sub in verbs.items():
        for action in sub._actions:
            if "--refine" in action.option_strings:
                assert set(action.choices) == set(REFINE_METHODS)
            if "--units" in action.option_strings:
                assert set(action.choices) == set(LENGTH_UNITS), name
