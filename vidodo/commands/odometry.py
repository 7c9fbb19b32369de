"""``vidodo odometry LOG --robot R.toml --out poses.csv``: every source's pose track."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd

from ..logs import read_log
from ..odometry import TRACK_COLUMNS, odometry_result
from ..outputs import atomic_file, column_prefix
from ..profiles import load_robot
from ._options import add_force, add_out, add_profile

NAME = "odometry"
HELP = "read a robot log and write the pose track of every odometry source"
DESCRIPTION = (
    "Read a robot log (CSV) with its robot profile and write one CSV row per log "
    "sample: t_s, then for each odometry source <source>_x_m, _y_m, _heading_rad, "
    "_vx_mps, _vy_mps, _omega_radps (body twist). Wheel sources start at (0, 0, 0); "
    "'logged' keeps the robot's own frame."
)


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("log", type=Path, help="robot log CSV")
    add_profile(parser, "robot")
    add_out(parser, "pose tracks CSV to write", required=True)
    add_force(parser, "file")


def tracks_table(tracks: dict) -> pd.DataFrame:
    """One wide table: ``t_s`` then each source's columns under its prefix."""
    first = next(iter(tracks.values()))
    cols = {"t_s": first["t_s"].to_numpy()}
    for name, df in tracks.items():
        p = column_prefix(name)
        for c in TRACK_COLUMNS[1:]:
            cols[f"{p}_{c}"] = df[c].to_numpy()
    return pd.DataFrame(cols)


def run(args) -> int:
    """Read, rebuild, write; warnings and a per-source summary to the terminal."""
    from ..outputs import check_file_target

    target = dict(inputs=(args.log, args.robot), force=args.force, signature=b"t_s,")
    check_file_target(args.out, **target)
    robot = load_robot(args.robot)
    log = read_log(args.log, robot)
    result = odometry_result(log, robot)
    table = tracks_table(result.tracks)
    with atomic_file(args.out, **target) as tmp:
        table.to_csv(tmp, index=False, float_format="%.9g")
    for w in log.warnings + result.warnings:
        print(f"vidodo odometry: warning: {w}", file=sys.stderr)
    if not args.quiet:
        t = table["t_s"].to_numpy()
        print(f"{len(table)} samples over {t[-1] - t[0]:.2f} s -> {args.out}")
        for name, df in result.tracks.items():
            path = float(np.sum(np.hypot(np.diff(df["x_m"]), np.diff(df["y_m"]))))
            print(f"  {name}: path {path:.3f} m, final x {df['x_m'].iloc[-1]:.3f} m, "
                  f"y {df['y_m'].iloc[-1]:.3f} m, heading "
                  f"{np.degrees(df['heading_rad'].iloc[-1]):.1f} deg")
    return 0
