"""Pre-flight check: will this run grade? A checklist in a few seconds, before the analysis.

:func:`preflight` loads the profiles strictly, reads the log's header and columns,
checks the time unit and the counter widths against the data, checks that the encoders
agree with each other and with the IMU (:mod:`vidodo.preflight_encoders`: sign slips and
swapped columns), and, when a video is given, looks at its first seconds for the marker,
registers the floor and predicts whether the marker stays large enough everywhere on
the field (:mod:`vidodo.preflight_video`). Each item is a :class:`Check` with ``pass``,
``warn`` or ``fail`` and what to do.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .blas_threads import one_blas_thread
from .checklist import STATUSES, Check
from .csvsafe import read_csv_checked
from .errors import InputError
from .profiles import TIME_UNITS_S, RobotProfile, load_camera, load_field, load_robot

__all__ = ["Check", "PreflightResult", "PreflightSettings", "preflight", "check_counter",
           "check_log_time", "STATUSES", "PLAUSIBLE_STEP_S"]

PLAUSIBLE_STEP_S = (2e-4, 0.5)
"""Median log step that a robot's control loop plausibly has: 2 kHz to 2 Hz (common
practice; robot control loops run at tens to hundreds of hertz)."""
COUNTER_WIDTHS = (8, 16, 24, 32)


@dataclass(frozen=True)
class PreflightSettings:
    """How much of the video the pre-flight check reads."""

    first_s: float = 3.0
    """Seconds of video read from its start [s]."""
    frame_step: int = 3
    """Look at every this many frames."""
    min_cell_px: float = 4.0
    """Smallest marker cell that detects reliably (README: 4-5 px) [px]."""


@dataclass(frozen=True)
class PreflightResult:
    """The checklist."""

    checks: tuple[Check, ...]

    @property
    def status(self) -> str:
        """The worst status of all checks."""
        return max((c.status for c in self.checks), key=STATUSES.index, default="pass")

    def named(self, name: str) -> Check:
        """The check called ``name``."""
        return next(c for c in self.checks if c.name == name)


def _load(kind, loader, path):
    try:
        return loader(path), Check(f"{kind} profile", "pass", f"{path} loads")
    except InputError as exc:
        return None, Check(f"{kind} profile", "fail", str(exc), "fix the profile as the "
                           "message says")


def _read_table(path) -> pd.DataFrame:
    raw = read_csv_checked(path, "check the path", "save it as plain CSV", sep=None,
                           engine="python", skipinitialspace=True)
    raw.columns = [str(c).strip().lstrip("\ufeff") for c in raw.columns]
    return raw


def _named_columns(robot: RobotProfile) -> list[tuple[str, str]]:
    """(what, column) for every column the profile names."""
    out = [("time", robot.time_column)]
    for w in robot.wheels:
        for c in (w.column, w.raw_a_column, w.raw_b_column):
            if c:
                out.append((f"wheel '{w.name}'", c))
    if robot.imu is not None:
        out.append(("[imu]", robot.imu.column))
    if robot.pose is not None:
        out += [("[pose]", robot.pose.x_column), ("[pose]", robot.pose.y_column),
                ("[pose]", robot.pose.heading_column)]
    return out


def check_columns(raw: pd.DataFrame, robot: RobotProfile, where) -> Check:
    """Every column the profile names is in the log and holds numbers."""
    missing, text = [], []
    for what, col in _named_columns(robot):
        if col not in raw.columns:
            near = difflib.get_close_matches(col, list(raw.columns), n=1)
            missing.append(f"{what} column '{col}'" + (f" (did you mean '{near[0]}'?)"
                                                      if near else ""))
        elif pd.to_numeric(raw[col], errors="coerce").notna().sum() < 0.9 * len(raw):
            text.append(f"{what} column '{col}'")
    if missing:
        return Check("log columns", "fail", f"{where}: missing " + "; ".join(missing),
                     f"rename the column in the profile; the log has {list(raw.columns)}")
    if text:
        return Check("log columns", "fail", f"{where}: not numbers in " + ", ".join(text),
                     "point the profile at numeric columns")
    return Check("log columns", "pass", f"all {len(_named_columns(robot))} columns found, "
                 f"{len(raw)} rows")


def check_log_time(t_raw, unit: str, video_s: float | None = None) -> tuple[Check, str]:
    """Does the declared time unit fit the log's step (and the video's length)?

    Returns
    -------
    check : Check
    unit : str
        The unit that fits best (the declared one when it fits).
    """
    t = np.asarray(t_raw, float)
    t = t[np.isfinite(t)]
    if t.size < 3 or not np.all(np.diff(t) >= 0):
        return Check("time unit", "fail", "the time column is not increasing",
                     "check that time_column names the log's time stamps"), unit
    step, span = float(np.median(np.diff(t))), float(t[-1] - t[0])

    def fits(u):
        ok = PLAUSIBLE_STEP_S[0] <= step * TIME_UNITS_S[u] <= PLAUSIBLE_STEP_S[1]
        if video_s:  # the log should cover a span of the same order as the video
            ok &= 0.1 <= span * TIME_UNITS_S[u] / video_s <= 10.0
        return ok

    if fits(unit):
        return Check("time unit", "pass", f"'{unit}': median step "
                     f"{step * TIME_UNITS_S[unit] * 1000:.3g} ms, span "
                     f"{span * TIME_UNITS_S[unit]:.1f} s"), unit
    good = [u for u in TIME_UNITS_S if fits(u)]
    f = TIME_UNITS_S[unit]
    found = (f"read as '{unit}' the log steps {step * f:.3g} s and spans {span * f:.3g} s"
             + (f" (video {video_s:.1f} s)" if video_s else ""))
    if not good:
        return Check("time unit", "fail", found, "no time unit fits; check time_column"), unit
    best = min(good, key=lambda u: abs(math.log10(step * TIME_UNITS_S[u] / 0.01)))
    return Check("time unit", "fail", found + f"; as '{best}' it steps "
                 f"{step * TIME_UNITS_S[best] * 1000:.3g} ms",
                 f"set time_unit = '{best}' in the profile's [log] table"), best


def check_counter(values, bits: int) -> tuple[str, int, str]:
    """Does a counter column fit the declared width?

    Returns
    -------
    status : str
    bits : int
        The width that fits (the declared one when it fits).
    detail : str
    """
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if v.size < 2:
        return "pass", bits, ""
    if 0 < bits < 64:
        lo, hi = -(2.0 ** (bits - 1)), 2.0**bits - 1
        if v.min() < lo or v.max() > hi:
            wider = [k for k in (*COUNTER_WIDTHS, 64) if k > bits and v.min() >= -(2.0 ** (
                k - 1)) and v.max() <= 2.0**k - 1]
            k = wider[0] if wider else 0
            return "fail", (32 if k in (24, 64) else k), (
                f"holds {v.max() if v.max() > hi else v.min():.0f}, outside a {bits}-bit "
                "counter")
    d = np.diff(v)
    for k in COUNTER_WIDTHS:
        if bits and k >= bits:
            break
        m = 2.0**k
        if v.min() < -m / 2 or v.max() > m - 1:
            continue  # the values do not fit a k-bit counter
        wrapped = (d + m / 2) % m - m / 2
        typical = float(np.quantile(np.abs(wrapped), 0.99)) + 1.0
        jumps = np.abs(d) > m / 2
        if jumps.any() and 20 * typical < m / 2 and np.max(np.abs(wrapped)) < m / 4:
            return "fail", k, (f"jumps by about {m:.0f} {int(jumps.sum())} time(s): a "
                               f"{k}-bit counter wrapping")
    return "pass", bits, ""


def _check_counters(raw, robot):
    found, fixes, bits = [], [], {}
    for w in robot.wheels:
        if not w.column or w.column not in raw.columns:
            continue
        status, k, detail = check_counter(pd.to_numeric(raw[w.column], errors="coerce"),
                                          w.counter_bits)
        bits[w.name] = k
        if status != "pass":
            found.append(f"wheel '{w.name}' column '{w.column}' {detail}")
            fixes.append(f"counter_bits = {k} for '{w.name}'")
    if found:
        return Check("counter width", "fail", "; ".join(found), "set " + ", ".join(fixes)
                     + " in its [[wheel]]"), bits
    return Check("counter width", "pass", "every counter fits its declared width"), bits


def _encoders(log_path, robot, unit, bits):
    """The encoder agreement check on a log read with the repaired unit and widths."""
    from .logs import read_log
    from .preflight_encoders import check_encoders

    fixed = dataclasses.replace(
        robot, time_unit=unit,
        wheels=tuple(dataclasses.replace(w, counter_bits=bits.get(w.name, w.counter_bits))
                     for w in robot.wheels))
    try:
        log = read_log(log_path, fixed)
    except InputError as exc:
        return Check("encoder directions", "warn", f"not checked: {exc}",
                     "fix the items above first"), None
    f = log.frame
    if any(f"ticks_{w.name}" not in f for w in robot.wheels):
        return Check("encoder directions", "warn", "not checked: raw optical channels",
                     ""), log
    ticks = np.column_stack([f[f"ticks_{w.name}"].to_numpy(float) for w in robot.wheels])
    imu = f["imu_heading_rad"].to_numpy(float) if "imu_heading_rad" in f else None
    v = check_encoders(f["t_s"].to_numpy(float), ticks, robot.wheels, imu)
    todo = {"fail": v.best_edit or "check the wheels named above",
            "warn": "look at the robot picture (`vidodo picture`)", "pass": ""}[v.status]
    detail = v.detail + (f". {v.motion}" if v.motion else "")
    return Check("encoder directions", v.status, detail, todo), log


def _log_checks(robot, log_path, video_s):
    checks = []
    try:
        raw = _read_table(log_path)
    except InputError as exc:
        return [Check("log columns", "fail", str(exc), "give the robot's log CSV")], None
    checks.append(check_columns(raw, robot, log_path))
    if checks[-1].status == "fail":
        return checks, None
    t_check, unit = check_log_time(pd.to_numeric(raw[robot.time_column], errors="coerce"),
                                   robot.time_unit, video_s)
    checks.append(t_check)
    c_check, bits = _check_counters(raw, robot)
    checks.append(c_check)
    enc, log = _encoders(log_path, robot, unit, bits)
    checks.append(enc)
    return checks, log


def preflight(robot_path, field_path, log_path, video_path=None, camera_path=None, *,
              settings: PreflightSettings = PreflightSettings()) -> PreflightResult:
    """Run every check that the given files allow.

    Parameters
    ----------
    robot_path, field_path, log_path : path
        Robot profile, field profile, robot log CSV.
    video_path : path, optional
        The run's video; only its first ``settings.first_s`` seconds are read.
    camera_path : path, optional
        Camera profile (lens).
    settings : PreflightSettings

    Returns
    -------
    PreflightResult

    Notes
    -----
    Runs with one BLAS thread (:func:`vidodo.blas_threads.one_blas_thread`), also when
    called from Python.
    """
    with one_blas_thread():
        return _preflight(robot_path, field_path, log_path, video_path, camera_path,
                          settings)


def _preflight(robot_path, field_path, log_path, video_path, camera_path, settings):
    robot, c_robot = _load("robot", load_robot, robot_path)
    fld, c_field = _load("field", load_field, field_path)
    checks = [c_robot, c_field]
    camera = None
    if camera_path is not None:
        camera, c_cam = _load("camera", load_camera, camera_path)
        checks.append(c_cam)
    video_s = None
    frames = None
    if video_path is not None:
        from .preflight_video import read_first_frames

        frames, video_s, c_video = read_first_frames(Path(video_path), settings)
        checks.append(c_video)
    log = None
    if robot is not None:
        log_checks, log = _log_checks(robot, Path(log_path), video_s)
        checks += log_checks
    if frames and robot is not None and fld is not None:
        from .preflight_video import video_checks

        checks += video_checks(frames, robot, fld, camera, log, settings)
    return PreflightResult(tuple(checks))
