"""Tuning a robot profile: the wiring around the profile fit.

:mod:`vidodo.profile_fit` only estimates. This module grades runs around it: the
anchored drift of every source with the profile handed in and with the corrected one
(:func:`anchored_drift`, :func:`drift_comparison`), and the two-pass fit
(:func:`fit_profile_with_events`): events found by grading with a wrong profile are not
trusted (an inverted encoder looks like a tracking wheel lifted all run), so the first
pass relies on the robust loss alone, events are then looked for with the corrected
profile and the fitted clock, and the second pass leaves those windows out.
:func:`tune_profile` does all of it for a set of runs and :func:`write_tuning` writes
``robot.toml``, ``fit.csv`` and ``drift.csv``.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .csvsafe import write_csv
from .odometry import odometry_result
from .outputs import staged_dir
from .pipeline import GradeResult, GradeSettings, grade_tracks
from .profile_fit import FitRun, FitSettings, ProfileFit, fit_profile, with_clock, write_profile
from .profiles import RobotProfile

__all__ = ["TuneResult", "grade_on_run_clock", "anchored_drift", "event_windows",
           "fit_profile_with_events", "drift_comparison", "tune_profile", "write_tuning",
           "tune_from_grade"]


@dataclass(frozen=True)
class TuneResult:
    """A fitted profile and what it changes."""

    fit: ProfileFit
    """The second pass of :func:`fit_profile_with_events`."""
    drift: pd.DataFrame
    """Anchored drift before and after, per run and source (:func:`drift_comparison`)."""


def grade_on_run_clock(run: FitRun, log, robot: RobotProfile) -> GradeResult:
    """Grade ``log`` read with ``robot`` against the run's truth on the run's clock.

    Parameters
    ----------
    run : FitRun
        Truth track and clock (offset [s], rate [-], reference log time [s]).
    log : LogData
        The log read with ``robot``.
    robot : RobotProfile

    Returns
    -------
    GradeResult
        As :func:`vidodo.pipeline.grade_tracks` gives it, the clock held at the run's.
    """

    tracks = {}
    for name, df in odometry_result(log, robot).tracks.items():
        d = df.copy()
        t = d["t_s"].to_numpy(float)
        # fold the rate term into the log times so a plain offset maps them exactly
        d["t_s"] = t + run.rate * (t - run.ref_log_s)
        tracks[name] = d
    return grade_tracks(run.truth, log, robot, GradeSettings(clock_offset_s=run.offset_s),
                        odometry=tracks)


def anchored_drift(run: FitRun, log, robot: RobotProfile) -> dict:
    """Anchored drift figures per odometry source, as ``vidodo grade`` computes them.

    The log is graded against the run's truth track with
    :func:`vidodo.pipeline.grade_tracks` on the run's clock (offset and rate held, so
    the profile is the only thing that changes between two calls).

    Parameters
    ----------
    run : FitRun
        Truth track with ``sigma_xy_m`` and ``sigma_heading_rad`` columns.
    log : LogData
        The log read with ``robot`` (:func:`vidodo.logs.read_log`).
    robot : RobotProfile

    Returns
    -------
    dict of str -> SourceMetrics
    """
    return dict(grade_on_run_clock(run, log, robot).metrics)


def event_windows(run: FitRun, log, robot: RobotProfile) -> tuple:
    """Video-clock windows ``(t_start_s, t_end_s)`` of the events the grading pipeline
    finds when the log is read with ``robot``."""
    ev = grade_on_run_clock(run, log, robot).events
    if ev is None or not len(ev):
        return ()
    return tuple(zip(ev["t_start_s"].astype(float), ev["t_end_s"].astype(float),
                     strict=True))


def fit_profile_with_events(runs, robot: RobotProfile, read_logs,
                            settings: FitSettings | None = None) -> ProfileFit:
    """Fit twice: once without event windows, then leaving out the events found with
    the first corrected profile.

    Events found with a wrong profile are unreliable (an inverted encoder looks like a
    tracking wheel lifted for the whole run), so the first pass relies on the robust
    loss alone; the grading pipeline then looks for events with the corrected profile,
    and the second pass leaves those windows out (plus any the runs already carry).

    Parameters
    ----------
    runs : sequence of FitRun
        Logs read with ``robot``.
    robot : RobotProfile
    read_logs : callable
        ``read_logs(profile) -> list of LogData``, the runs' logs read with ``profile``
        (same order as ``runs``).
    settings : FitSettings, optional
        Passed to :func:`~vidodo.profile_fit.fit_profile`.

    Returns
    -------
    ProfileFit
        The second pass, with a warning naming the windows left out. Its ``clocks``
        include the first pass's clock corrections (the second pass starts from them).
    """
    runs = list(runs)
    first = fit_profile(runs, robot, settings)
    logs = read_logs(first.corrected_robot)
    # the first pass may have corrected the clock too: look for events on that clock
    runs = [with_clock(r, first.clocks.get(r.name)) for r in runs]
    runs2, notes = [], []
    for run, log in zip(runs, logs, strict=True):
        ev = event_windows(run, log, first.corrected_robot)
        if ev:
            notes.append(f"run {run.name}: " + ", ".join(f"{a:.2f}-{b:.2f} s" for a, b in ev))
        runs2.append(dataclasses.replace(run, exclude_windows=tuple(run.exclude_windows) + ev))
    second = fit_profile(runs2, robot, settings)
    if notes:
        second = dataclasses.replace(second, warnings=second.warnings + (
            "event windows left out (found with the first corrected profile): "
            + "; ".join(notes),))
    return second


def drift_comparison(before: dict, after: dict, run_name: str = "") -> pd.DataFrame:
    """Before/after table of anchored drift per source.

    Parameters
    ----------
    before, after : dict of str -> SourceMetrics
        From :func:`anchored_drift` with the profile handed in and the corrected one.
    run_name : str

    Returns
    -------
    DataFrame
        Columns ``run, source``, then ``final_err_m``, ``max_err_m``, ``ate_rmse_m``
        before and after (suffixes ``_before``, ``_after``) and their ratios
        ``final_err_ratio``, ``max_err_ratio``, ``ate_rmse_ratio`` (before / after).
    """
    rows = []
    for name in before:
        if name not in after:
            continue
        b, a = before[name], after[name]
        row = {"run": run_name, "source": name}
        for key in ("final_err_m", "max_err_m", "ate_rmse_m"):
            row[f"{key}_before"] = getattr(b, key)
            row[f"{key}_after"] = getattr(a, key)
        for key in ("final_err_m", "max_err_m", "ate_rmse_m"):
            vb, va = row[f"{key}_before"], row[f"{key}_after"]
            row[f"{key.removesuffix('_m')}_ratio"] = (
                float("nan") if vb is None or va is None else
                (vb / va if va > 0 else float("inf")))
        rows.append(row)
    return pd.DataFrame(rows)


def tune_profile(runs, robot: RobotProfile, read_logs,
                 settings: FitSettings | None = None) -> TuneResult:
    """Fit the profile to the runs (two passes) and grade each run before and after.

    Parameters
    ----------
    runs : sequence of FitRun
        Logs read with ``robot``.
    robot : RobotProfile
        The profile to correct.
    read_logs : callable
        ``read_logs(profile) -> list of LogData`` in the order of ``runs``.
    settings : FitSettings, optional
        Window length [s], whether to fit the clock, wanted precision.

    Returns
    -------
    TuneResult
        Before and after are graded on the fitted clock, so the profile is the only
        difference between them.
    """
    runs = list(runs)
    fit = fit_profile_with_events(runs, robot, read_logs, settings)
    logs_before, logs_after = read_logs(robot), read_logs(fit.corrected_robot)
    tables = []
    for run, before_log, after_log in zip(runs, logs_before, logs_after, strict=True):
        run = with_clock(run, fit.clocks.get(run.name))
        before = anchored_drift(run, before_log, robot)
        after = anchored_drift(run, after_log, fit.corrected_robot)
        tables.append(drift_comparison(before, after, run.name))
    drift = pd.concat(tables, ignore_index=True) if tables else pd.DataFrame()
    return TuneResult(fit=fit, drift=drift)


def write_tuning(result: TuneResult | ProfileFit, out_dir) -> None:
    """Write ``robot.toml``, ``fit.csv`` and (for a :class:`TuneResult`) ``drift.csv``.

    Parameters
    ----------
    result : TuneResult or ProfileFit
    out_dir : str or Path
        Folder to write (staged: nothing half-written on failure).
    """
    fit = result.fit if isinstance(result, TuneResult) else result
    with staged_dir(Path(out_dir)) as stage:
        write_profile(fit, stage / "robot.toml")
        write_csv(fit.table, stage / "fit.csv", float_format="%.9g")
        if isinstance(result, TuneResult):
            write_csv(result.drift, stage / "drift.csv", float_format="%.6g")


def tune_from_grade(result: GradeResult, run_dir, out_dir) -> ProfileFit:
    """Fit the robot profile to one graded run folder; write robot.toml and fit.csv.

    One pass, leaving out the events the grade found (quick; ``vidodo tune`` does the
    two-pass fit).

    Parameters
    ----------
    result : GradeResult
        The grade of ``run_dir``.
    run_dir : str or Path
        Run folder with ``robot.toml`` and ``log.csv``.
    out_dir : str or Path
        Folder to write.

    Returns
    -------
    ProfileFit
    """
    from .logs import read_log
    from .profiles import load_robot

    run_dir = Path(run_dir)
    robot = load_robot(run_dir / "robot.toml")
    log = read_log(run_dir / "log.csv", robot)
    c = result.clock
    run = FitRun(name=run_dir.name, truth=result.truth, log=log.frame, offset_s=c.offset_s,
                 exclude_windows=tuple((e.t_start_s, e.t_end_s) for e in result.event_list),
                 rate=c.rate, ref_log_s=c.ref_log_s)
    fit = fit_profile([run], robot)
    write_tuning(fit, out_dir)
    return fit
