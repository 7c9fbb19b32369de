"""``vidodo tune RUN... --robot R.toml --out DIR``: a corrected robot profile from truth."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import pandas as pd

from ..errors import InputError
from ..logs import read_log
from ..profile_fit import FitRun, FitSettings
from ..profiles import load_robot
from ..tuning import tune_profile, write_tuning
from ._options import add_force, add_old_spelling, add_out

NAME = "tune"
HELP = "fit wheel radii, offsets and IMU scale to the video truth; write a corrected profile"
DESCRIPTION = (
    "From one or more graded runs of the same robot (grade output folders, or VIDEO LOG "
    "pairs that are graded first) fit each wheel's radius and offset, the IMU scale and "
    "bias, and the log clock's offset and rate to the truth track, leaving out the event "
    "windows found with the corrected profile. Writes DIR/robot.toml (the corrected "
    "profile), DIR/fit.csv (every value with its standard error and whether the runs "
    "pin it down) and DIR/drift.csv "
    "(anchored drift per source before and after the correction)."
)


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("inputs", nargs="+", type=Path,
                        help="grade output folders, or VIDEO LOG pairs to grade first")
    parser.add_argument("--robot", type=Path,
                        help="robot profile to correct (default: the one the grade used)")
    parser.add_argument("--field", type=Path, help="field profile (for VIDEO LOG pairs)")
    parser.add_argument("--camera", type=Path, help="camera profile (for VIDEO LOG pairs)")
    add_out(parser, "folder to write", required=True)
    add_force(parser)
    parser.add_argument("--window-s", type=float, default=0.4, metavar="S",
                        help="length of each fitting window [s] (default: %(default)s)")
    add_old_spelling(parser, "--window", "window_s", type=float)
    parser.add_argument("--no-clock", action="store_true",
                        help="keep the graded clock offset; do not fit offset and rate")


# ------------------------------------------------------------------------ inputs
def _grade_dir_run(folder: Path, robot_arg):
    """FitRun, log path and robot path from a grade output folder."""
    summary_p = folder / "summary.json"
    drift_p = folder / "drift.csv"
    for p in (summary_p, drift_p):
        if not p.exists():
            raise InputError(f"{p}: not found; pass a folder written by 'vidodo grade --out'")
    summary = json.loads(summary_p.read_text(encoding="utf-8"))
    inputs = summary.get("inputs", {})
    log_path = inputs.get("log")
    if not log_path:
        raise InputError(f"{summary_p}: 'inputs' names no log; re-grade the run")
    robot_path = robot_arg or inputs.get("robot")
    if not robot_path:
        raise InputError(f"{summary_p}: 'inputs' names no robot profile; pass --robot")
    clock = summary.get("clock", {})
    if "offset_s" not in clock:
        raise InputError(f"{summary_p}: no clock offset; re-grade the run")
    if (folder / "track.csv").exists():  # the full truth track, with detection flags
        from ..pipeline import read_track_csv

        truth = read_track_csv(folder / "track.csv")
    else:
        drift = pd.read_csv(drift_p)
        need = ["t_s", "truth_x_m", "truth_y_m", "truth_heading_rad", "truth_sigma_xy_m",
                "truth_sigma_heading_rad"]
        missing = [c for c in need if c not in drift.columns]
        if missing:
            raise InputError(f"{drift_p}: missing column(s) {missing}; re-grade the run")
        truth = pd.DataFrame({c.removeprefix("truth_"): drift[c] for c in need[1:]})
        truth.insert(0, "t_s", drift["t_s"])
    log_path = Path(log_path)
    if not log_path.is_absolute() and not log_path.exists():
        log_path = folder / log_path
    # the grade's events were found with the profile being corrected, so they are not
    # trusted: the fit finds them again with its corrected profile
    spec = dict(name=folder.name, truth=truth, offset_s=float(clock["offset_s"]),
                rate=float(clock.get("rate", 0.0) or 0.0),
                ref_log_s=float(clock.get("ref_log_s", 0.0) or 0.0))
    return spec, log_path, Path(robot_path)


def _graded_pair(video: Path, log: Path, args, robot_path):
    """Grade a VIDEO LOG pair with the pipeline and return the same as above."""
    from .. import pipeline
    from ..profiles import load_camera, load_field

    if args.field is None:
        raise InputError("tune: VIDEO LOG pairs need --field (the field profile)")
    robot = load_robot(robot_path)
    field = load_field(args.field)
    camera = load_camera(args.camera) if args.camera else None
    result = pipeline.grade_run(video, log, robot, field, camera)
    clock = result.clock
    spec = dict(name=video.stem, truth=result.truth, offset_s=float(clock.offset_s),
                rate=float(getattr(clock, "rate", 0.0)),
                ref_log_s=float(getattr(clock, "ref_log_s", 0.0)))
    return spec, log, robot_path


def _collect(args):
    specs = []
    items = list(args.inputs)
    i = 0
    while i < len(items):
        p = items[i]
        if p.is_dir():
            specs.append(_grade_dir_run(p, args.robot))
            i += 1
        elif i + 1 < len(items) and items[i + 1].is_file():
            if args.robot is None:
                raise InputError("tune: VIDEO LOG pairs need --robot (the profile to correct)")
            specs.append(_graded_pair(p, items[i + 1], args, args.robot))
            i += 2
        else:
            raise InputError(f"{p}: not a grade folder, and not followed by a log file; "
                             "pass grade output folders or VIDEO LOG pairs")
    seen: dict = {}
    for spec, _log, _robot in specs:  # run names label table rows: keep them unique
        n = seen[spec["name"]] = seen.get(spec["name"], 0) + 1
        if n > 1:
            spec["name"] = f"{spec['name']}-{n}"
    robots = {str(s[2].resolve()) for s in specs}
    if len(robots) > 1:
        raise InputError(f"tune: the runs were graded with different robot profiles "
                         f"{sorted(robots)}; pass --robot to name the one to correct")
    return specs


# ------------------------------------------------------------------------ display
def _display(row) -> tuple[str, str, str, str]:
    """Profile, estimate, standard error and change in display units."""
    kind, unit = row["kind"], row["unit"]

    def f(v, scale, fmt):
        return "-" if v is None or (isinstance(v, float) and math.isnan(v)) else fmt.format(
            v * scale)

    if kind == "sign":
        return (f(row["profile"], 1, "{:+.0f}"), f(row["estimate"], 1, "{:+.0f}"), "", "")
    if unit == "m":
        pct = (row["change"] / row["profile"] * 100.0) if kind == "radius" else None
        ch = f(row["change"], 1e3, "{:+.2f} mm")
        if pct is not None and not math.isnan(pct):
            ch += f" ({pct:+.2f} %)"
        return (f(row["profile"], 1e3, "{:.2f} mm"), f(row["estimate"], 1e3, "{:.2f} mm"),
                f(row["std_error"], 1e3, "{:.3f} mm"), ch)
    if kind == "imu_scale":
        return (f(row["profile"], 1, "{:.5f}"), f(row["estimate"], 1, "{:.5f}"),
                f(row["std_error"], 1, "{:.5f}"), f(row["change"], 100, "{:+.3f} %"))
    if kind == "imu_bias":
        k = 180.0 / math.pi
        return ("0", f(row["estimate"], k, "{:+.4f} deg/s"), f(row["std_error"], k,
                "{:.4f} deg/s"), "")
    if kind == "clock_rate":
        return ("0", f(row["estimate"], 1e6, "{:+.0f} ppm"),
                f(row["std_error"], 1e6, "{:.0f} ppm"), "")
    return (f(row["profile"], 1e3, "{:.1f} ms"), f(row["estimate"], 1e3, "{:.1f} ms"),
            f(row["std_error"], 1e3, "{:.1f} ms"), f(row["change"], 1e3, "{:+.1f} ms"))


def format_table(table: pd.DataFrame) -> str:
    """The fitted values as aligned text, display units."""
    head = ("value", "profile", "fitted", "std err", "change", "pinned", "written")
    lines = [head]
    for _, r in table.iterrows():
        p, e, s, c = _display(r)
        lines.append((r["parameter"], p, e, s, c, r["identifiable"],
                      "yes" if r["written"] else ""))
    widths = [max(len(x[i]) for x in lines) for i in range(len(head))]
    out = ["  ".join(x[i].ljust(widths[i]) for i in range(len(head))).rstrip() for x in lines]
    return "\n".join(out)


# ---------------------------------------------------------------------------- run
def run(args) -> int:
    """Collect the runs, fit, write the profile and the tables, print the values."""
    from ..outputs import check_target, staged_dir

    check_target(args.out, inputs=(*args.inputs, args.robot), force=args.force)
    specs = _collect(args)
    inputs = [*args.inputs, args.robot, args.field, args.camera,
              *(p for s in specs for p in s[1:])]
    with staged_dir(args.out, inputs=inputs, force=args.force,
                    command="vidodo tune") as stage:
        robot_path = specs[0][2]
        robot = load_robot(robot_path)
        logs = [read_log(s[1], robot) for s in specs]
        runs = [FitRun(log=lg.frame, **s[0]) for s, lg in zip(specs, logs, strict=True)]
        tuned = tune_profile(runs, robot, lambda prof: [read_log(s[1], prof) for s in specs],
                             FitSettings(window_s=args.window_s,
                                         fit_clock=not args.no_clock))
        fit, drift = tuned.fit, tuned.drift
        write_tuning(tuned, stage)
    for w in fit.warnings:
        print(f"vidodo tune: warning: {w}", file=sys.stderr)
    if not args.quiet:
        n = sum(fit.n_windows.values())
        print(f"{len(runs)} run(s), {n} windows of {args.window_s:g} s outside events")
        print(format_table(fit.table))
        if len(drift):
            print("\nanchored drift before -> after the correction:")
            for _, r in drift.iterrows():
                parts = []
                for key, label in (("final_err", "final"), ("max_err", "max"),
                                   ("ate_rmse", "ATE")):
                    b, a = r[f"{key}_m_before"], r[f"{key}_m_after"]
                    if pd.notna(b) and pd.notna(a):
                        parts.append(f"{label} {b * 1e3:.1f} -> {a * 1e3:.1f} mm")
                print(f"  {r['run']} {r['source']}: " + ", ".join(parts))
        print(f"\ncorrected profile -> {args.out / 'robot.toml'}")
    return 0
