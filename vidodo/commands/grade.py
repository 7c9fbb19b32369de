"""``vidodo grade VIDEO LOG --robot R.toml --field F.toml --out DIR``: the main job."""

from __future__ import annotations

import math
import sys
from pathlib import Path

from ..errors import EXIT_OK, EXIT_TOLERANCE, InputError, RegistrationRefused, VidodoError
from ..units import length_factor
from . import registration_options
from ._options import (
    add_force,
    add_old_spelling,
    add_out,
    add_profile,
    add_replay_scale,
    add_switch,
    add_units,
)

NAME = "grade"
HELP = "measure the run from the video, line up the log, report drift and events"
DESCRIPTION = (
    "Track the robot in the footage, put the robot's log on the video clock, place every "
    "odometry source on the floor at motion start, and write drift.csv, events.csv, "
    "summary.json and track.csv into --out. Prints a short verdict. Exit 0 when every "
    "source is within tolerance (or none was set), 4 when some source is outside, 3 when "
    "the run could not be measured."
)



def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("video", type=Path, help="the footage of the run")
    parser.add_argument("log", type=Path, help="the robot's log CSV")
    add_profile(parser, "robot")
    add_profile(parser, "field")
    add_profile(parser, "camera", "camera profile (TOML), if calibrated")
    parser.add_argument("--track", type=Path,
                        help="reuse this truth track (track.csv) instead of tracking the video")
    registration_options.add_arguments(parser)
    parser.add_argument("--clock-offset-s", type=float, metavar="S",
                        help="video time minus log time [s]; found automatically if absent")
    add_old_spelling(parser, "--clock-offset", "clock_offset_s", type=float)
    parser.add_argument("--tol-pos-m", type=float, metavar="M",
                        help="largest final position error that passes [m]")
    parser.add_argument("--tol-heading-deg", type=float, metavar="DEG",
                        help="largest final heading error that passes [deg]")
    add_units(parser, "printed verdict and the plots")
    add_out(parser, "output folder", required=True)
    add_switch(parser, "report", True, "write the plots, the HTML report and the replay")
    add_switch(parser, "replay", True, "write the annotated replay video")
    add_switch(parser, "grid", True, "draw the registered tile grid, faint, in the replay")
    add_force(parser)
    add_replay_scale(parser)


def _fmt(v, scale, digits=0, unit=""):
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "n/a"
    return f"{v * scale:.{digits}f}{unit}"


def _fig(m, name, scale, digits=0, unit=""):
    """A source's figure with its 1-sigma (``12 +-0.3 mm``) when the metrics carry one."""
    text = _fmt(getattr(m, name), scale, digits, unit)
    sig = (m.sigma or {}).get(name)
    if text == "n/a" or sig is None or not math.isfinite(sig):
        return text
    # more digits where the sigma would round to zero (a "+-0.0" would read as exact)
    s, sig_digits = abs(sig * scale), max(digits, 1)
    if 0 < s < 0.5 * 10.0**-sig_digits:
        sig_digits = min(4, -math.floor(math.log10(s)))
    return f"{_fmt(getattr(m, name), scale, digits)} +-{_fmt(sig, scale, sig_digits, unit)}"


def verdict_lines(result, *, units="mm"):
    """The short terminal verdict, one line per source plus events and clock."""
    k = length_factor(units)
    dig = 0 if units == "mm" else (3 if units == "m" else 2)
    c = result.clock
    lines = []
    sign = "+" if c.offset_s >= 0 else "-"
    head = f"clock: video = log {sign} {abs(c.offset_s):.4f} s"
    if c.method == "manual":
        lines.append(f"{head} (manual)")
    else:
        sig = "?" if c.sigma_s is None else f"{c.sigma_s * 1000:.1f}"
        lines.append(f"{head} (+-{sig} ms, confidence {c.confidence:.2f}, from {c.source})")
    for name, m in result.metrics.items():
        p = result.passed.get(name)
        mark = "PASS" if p else ("FAIL" if p is False else "    ")
        lines.append(
            f"{mark} {name:<14} final {_fig(m, 'final_err_m', k, dig, ' ' + units)}"
            f" / {_fig(m, 'final_heading_err_rad', 180 / math.pi, 1, ' deg')}"
            f"  drift {_fig(m, 'drift_pct', 1, 1, ' %')}"
            f"  ATE {_fig(m, 'ate_rmse_m', k, dig, ' ' + units)}"
            f"  max {_fig(m, 'max_err_m', k, dig, ' ' + units)} at "
            f"{_fmt(m.max_err_t_s, 1, 1, ' s')}")
    n = len(result.event_list)
    if n:
        kinds = {}
        for e in result.event_list:
            kinds[e.kind] = kinds.get(e.kind, 0) + 1
        lines.append("events: " + ", ".join(f"{v} {kk}" for kk, v in kinds.items()))
    else:
        lines.append("events: none")
    lines.append(f"verdict: {result.verdict}")
    return lines


def _check_options(args) -> None:
    from ..input_checks import finite_option, positive_option

    positive_option("--tol-pos-m", args.tol_pos_m)
    positive_option("--tol-heading-deg", args.tol_heading_deg)
    finite_option("--clock-offset-s", args.clock_offset_s)
    if args.track is None and not args.video.is_file():
        raise InputError(f"{args.video}: file not found; check the video path")
    if args.track is not None and getattr(args, "points", None) is not None:
        raise InputError("--points registers the video for tracking, but --track reuses a "
                         "track (with its own registration): give one of them")


def run(args) -> int:
    """Grade, write, print the verdict; exit 0 pass, 4 outside tolerance."""
    from ..input_checks import with_file_names
    from ..profiles import load_camera, load_field, load_robot

    # profiles first: a mistake in them is refused before the heavy imports
    robot, field = load_robot(args.robot), load_field(args.field)
    camera = load_camera(args.camera) if args.camera else None
    _check_options(args)
    from ..outputs import staged_dir
    from ..pipeline import GradeSettings, Tolerances, grade_run
    from ..progress import progress_bar
    from ..report.grade_files import write_outputs

    tol = Tolerances(
        position_m=args.tol_pos_m,
        heading_rad=None if args.tol_heading_deg is None else math.radians(args.tol_heading_deg))
    registrar = None
    if args.track is None:
        registrar = registration_options.registrar_from_args(args, field, camera)
    inputs = (args.video, args.log, args.robot, args.field, args.camera, args.track,
              getattr(args, "points", None))
    refused = None
    with staged_dir(args.out, inputs=inputs, force=args.force,
                    command="vidodo grade") as stage:
        try:
            with progress_bar(desc="tracking", quiet=args.quiet) as bar:
                result = grade_run(args.video, args.log, robot, field, camera,
                                   settings=GradeSettings(clock_offset_s=args.clock_offset_s,
                                                          tolerances=tol, registrar=registrar),
                                   track=args.track, progress=bar)
        except RegistrationRefused as exc:  # the set is the preview alone
            registration_options.write_preview(exc, stage / "preview.png")
            refused = exc
        except VidodoError as exc:
            raise with_file_names(exc, (args.track or args.video, args.log)) from None
        else:
            write_outputs(result, stage)
            if args.report:
                _pictures(args, stage, registrar)
    if refused is not None:
        raise refused
    for w in result.warnings:
        print(f"vidodo grade: warning: {w}", file=sys.stderr)
    if not args.quiet:
        for line in verdict_lines(result, units=args.units):
            print(line)
        print(f"outputs: {args.out}")
    return EXIT_TOLERANCE if result.verdict == "fail" else EXIT_OK


def _pictures(args, stage, registrar=None) -> None:
    """Plots, report and replay into the staging folder (they appear with the rest)."""
    from ..progress import progress_bar
    from ..report.build import write_report

    replay = args.replay
    if replay and not args.video.is_file():
        replay = False
        print(f"vidodo grade: warning: {args.video}: not found, so no replay video "
              "(graded from --track)", file=sys.stderr)
    with progress_bar(desc="report", quiet=args.quiet) as bar:
        write_report(stage, stage, replay=replay, units=args.units, progress=bar,
                     grid=args.grid, replay_scale=args.replay_scale, registrar=registrar)
