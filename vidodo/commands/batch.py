"""``vidodo batch DIR --out OUT``: grade every run folder under DIR in parallel.

A run folder holds ``video.mp4``, ``log.csv``, ``robot.toml``, ``field.toml`` and
optionally ``camera.toml`` (the layout ``vidodo render`` writes). Each run is graded in
its own worker process into ``OUT/<run>/`` (drift.csv, events.csv, summary.json, plots,
report.html). A run that fails is reported with its error and does not stop the
others. ``OUT/batch.csv`` has one row per run; ``OUT/drift_trend.png`` shows each
source's drift across the runs, in folder-name order (name runs by date to see a
season's trend).

Exit codes: 0 every run graded, 5 some graded and some failed, 3 none graded, 2 no run
folder found or bad arguments.
"""

from __future__ import annotations

import math
import os
import sys
from pathlib import Path

from ..errors import InputError
from ._options import add_force, add_out, add_replay_scale, add_switch, add_units

NAME = "batch"
HELP = "grade every run folder under a directory, in parallel; one table for all"
DESCRIPTION = (
    "Grade every run folder (video.mp4, log.csv, robot.toml, field.toml, optional "
    "camera.toml) found under DIR, in parallel worker processes. Each run's outputs go "
    "to OUT/<run>/; OUT/batch.csv has one row per run (status, error, figures per "
    "source) and OUT/drift_trend.png plots drift across runs. A failing run does not "
    "stop the others. Exit 0 all graded, 5 some failed, 3 none graded."
)


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("dir", type=Path, help="folder holding run folders (searched deeply)")
    add_out(parser, "output folder", required=True)
    parser.add_argument("--jobs", type=int, default=None,
                        help="worker processes (default: number of CPUs)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="grade on a Dask cluster instead (e.g. tcp://host:8786; needs "
                        "pip install 'vidodo[dask]' and the same paths on every worker)")
    add_units(parser, "printed lines and plots")
    add_switch(parser, "replay", False, "write each run's annotated replay")
    add_replay_scale(parser)
    add_switch(parser, "report", True, "write each run's plots and HTML report")
    parser.add_argument("--tol-pos-m", type=float, metavar="M",
                        help="largest final position error that passes [m]")
    parser.add_argument("--tol-heading-deg", type=float, metavar="DEG",
                        help="largest final heading error that passes [deg]")
    add_force(parser)


def _line(rec, unit) -> str:
    from ..units import format_length

    if rec["status"] != "graded":
        return f"FAILED  {rec['run']}: {rec['error']}"
    s = rec["summary"] or {}
    parts = []
    for name, m in (s.get("sources") or {}).items():
        parts.append(f"{name} {format_length(m.get('final_err_m'), unit)}")
    verdict = s.get("verdict", "")
    return f"{verdict:<7} {rec['run']}: final error " + ", ".join(parts)


def run(args) -> int:
    """Find, grade in parallel, write the table and the trend plot."""
    from ..batch import (
        TABLE,
        TREND_PNG,
        exit_code_for,
        find_runs,
        grade_folders,
        write_batch_outputs,
    )
    from ..input_checks import positive_option
    from ..outputs import staged_dir
    from ..progress import progress_bar

    if args.jobs is not None and args.jobs < 1:
        raise InputError(f"--jobs {args.jobs}: must be at least 1")
    positive_option("--tol-pos-m", args.tol_pos_m)
    positive_option("--tol-heading-deg", args.tol_heading_deg)
    out_root = args.out.resolve()
    root = args.dir.resolve()
    if out_root == root or out_root in root.parents:
        raise InputError(f"{args.out}: is (or holds) the folder of runs {args.dir}; give an "
                         "output folder outside it, e.g. --out graded")
    runs = [d for d in find_runs(args.dir) if out_root not in (d.resolve(),
                                                                *d.resolve().parents)]
    if not runs:
        raise InputError(f"{args.dir}: no run folder found (a folder holding video.mp4 and "
                         "log.csv); check the path")
    jobs = args.jobs or os.cpu_count() or 1
    options = {"tol_pos_m": args.tol_pos_m,
               "tol_heading_rad": None if args.tol_heading_deg is None
               else math.radians(args.tol_heading_deg),
               "report": args.report, "replay": args.replay, "units": args.units,
               "replay_scale": args.replay_scale}
    # the whole batch is one staged set: every run's folder, batch.csv and the trend
    with staged_dir(out_root, inputs=runs, force=args.force,
                    command="vidodo batch") as stage:
        with progress_bar(len(runs), "batch", unit="run", quiet=args.quiet) as bar:
            records = grade_folders(runs, args.dir, stage, options, jobs=jobs,
                                    on_done=lambda rec: bar.update(1),
                                    scheduler=args.scheduler)
        for rec in records:  # where the run's folder will be once the set is in place
            rec["out"] = str(out_root / rec["run"])
        write_batch_outputs(records, stage, unit=args.units)
    table, trend = out_root / TABLE, out_root / TREND_PNG
    graded = sum(r["status"] == "graded" for r in records)
    for rec in records:
        if rec["status"] != "graded":
            print(f"vidodo batch: {rec['run']}: {rec['error']}", file=sys.stderr)
    if not args.quiet:
        for rec in records:
            print(_line(rec, args.units))
        print(f"graded {graded} of {len(records)} runs; table {table}; trend {trend}")
    return exit_code_for(records)
