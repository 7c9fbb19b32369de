"""Pose tracks the robot believed: one per odometry source, rebuilt from its log.

Per log step, each wheel's rim travel (counts times metres per count, wheel sign
applied) is solved for the body increment ``(ux, uy, dtheta)`` by least squares with
the single wheel model (:func:`vidodo.wheels.solve_twist`); with heading from the IMU
``dtheta`` is the IMU's heading change and the wheels give the rest. The wheels' rim
travel under a twist held constant over the step is exactly ``A @ (twist * dt)``, so
the solve yields exponential coordinates, and :func:`vidodo.se2.integrate_increments`
chains them as constant-curvature arcs (Lynch & Park, *Modern Robotics*, 2017,
sec. 13.4), not Euler steps.

Velocities in the tracks are body-frame twists at each sample, from the two
neighbouring steps (centred, so they carry no half-step lag); one-sided at the ends.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .errors import InputError, ObservabilityError
from .logs import LogData
from .profiles import RobotProfile, Source
from .se2 import integrate_increments, rotate
from .wheels import check_observable, solve_twist

__all__ = ["TRACK_COLUMNS", "OdometryResult", "rim_travel", "integrate_source",
           "source_track", "logged_track", "odometry_result", "odometry_tracks"]

TRACK_COLUMNS = ["t_s", "x_m", "y_m", "heading_rad", "vx_mps", "vy_mps", "omega_radps"]


@dataclass(frozen=True)
class OdometryResult:
    """Every odometry source rebuilt from one log."""

    tracks: dict[str, pd.DataFrame]
    """Per source name: columns :data:`TRACK_COLUMNS` (poses [m, rad], twist [m/s, rad/s])."""
    warnings: list[str] = field(default_factory=list)
    """Sources left out and why, one line each."""


def rim_travel(log, wheels) -> np.ndarray:
    """Rim travel of each wheel over each log step.

    Parameters
    ----------
    log : LogData or DataFrame
        A log read by :func:`vidodo.logs.read_log` (or its ``frame``).
    wheels : sequence of Wheel

    Returns
    -------
    ndarray of shape (M - 1, N)
        Rim travel per step (rows) and wheel (columns), wheel sign applied [m].
    """
    frame = log.frame if isinstance(log, LogData) else log
    cols = []
    for w in wheels:
        key = f"ticks_{w.name}"
        if key not in frame.columns:
            raise InputError(f"log has no counts for wheel '{w.name}' (column {key!r})")
        d = np.diff(frame[key].to_numpy(dtype=np.int64))
        cols.append(w.sign * d.astype(float) * w.metres_per_tick)
    return np.column_stack(cols) if cols else np.zeros((max(len(frame) - 1, 0), 0))


def _centred_rates(t_s, inc) -> np.ndarray:
    """Per-sample rates from per-step increments: (inc[k-1] + inc[k]) / (t[k+1] - t[k-1])."""
    t = np.asarray(t_s, dtype=float)
    m = t.size
    out = np.zeros((m, inc.shape[1]))
    if m < 2:
        return out
    dt = np.diff(t)
    out[0] = inc[0] / dt[0]
    out[-1] = inc[-1] / dt[-1]
    if m > 2:
        out[1:-1] = (inc[:-1] + inc[1:]) / (t[2:] - t[:-2])[:, None]
    return out


def integrate_source(t_s, rim, wheels, *, imu_heading_rad=None, no_sideways=False,
                     weights=None, name="source") -> pd.DataFrame:
    """Pose track of one group of wheels (optionally with IMU heading).

    Parameters
    ----------
    t_s : ndarray of shape (M,)
        Sample times [s], strictly increasing.
    rim : ndarray of shape (M - 1, N)
        Rim travel per step and wheel [m] (see :func:`rim_travel`).
    wheels : sequence of Wheel
    imu_heading_rad : ndarray of shape (M,), optional
        Continuous heading [rad]; its change per step replaces the wheels' turning.
    no_sideways : bool
        Constrain sideways body motion to zero (tank and differential drives).
    weights : ndarray of shape (N,), optional
        Per-wheel weights for the least-squares solve.
    name : str
        Source name for messages.

    Returns
    -------
    DataFrame
        Columns :data:`TRACK_COLUMNS`, starting at (0, 0, 0).

    Raises
    ------
    ObservabilityError
        When the wheels (and IMU) cannot determine the body increment, naming the source
        and the unseen motion.
    """
    t = np.asarray(t_s, dtype=float)
    rim = np.asarray(rim, dtype=float).reshape(max(t.size - 1, 0), len(wheels))
    dtheta = None
    if imu_heading_rad is not None:
        dtheta = np.diff(np.asarray(imu_heading_rad, dtype=float))
    check_observable(wheels, omega_known=dtheta is not None, no_sideways=no_sideways,
                     where=f"source '{name}'")
    inc = solve_twist(wheels, rim, omega=dtheta, no_sideways=no_sideways, weights=weights)
    pose = integrate_increments(inc)
    rates = _centred_rates(t, inc)
    return pd.DataFrame({"t_s": t, "x_m": pose[:, 0], "y_m": pose[:, 1],
                         "heading_rad": pose[:, 2], "vx_mps": rates[:, 0],
                         "vy_mps": rates[:, 1], "omega_radps": rates[:, 2]})


def source_track(log: LogData, robot: RobotProfile, source: Source) -> pd.DataFrame:
    """Pose track of one profile source from a log (see :func:`integrate_source`)."""
    wheels = [robot.wheel(n) for n in source.wheels]
    imu = None
    if source.heading == "imu":
        if "imu_heading_rad" not in log.frame.columns:
            raise InputError(f"source '{source.name}' takes heading from the IMU but the log "
                             "has no IMU heading; add an [imu] table to the robot profile")
        imu = log.frame["imu_heading_rad"].to_numpy()
    return integrate_source(log.frame["t_s"].to_numpy(), rim_travel(log, wheels), wheels,
                            imu_heading_rad=imu, no_sideways=source.no_sideways,
                            name=source.name)


def logged_track(log: LogData) -> pd.DataFrame:
    """The robot's own logged pose as a track (its own frame), twist by differences."""
    f = log.frame
    t = f["t_s"].to_numpy()
    x, y, h = (f[c].to_numpy(dtype=float) for c in ("pose_x_m", "pose_y_m", "pose_heading_rad"))
    inc_floor = np.column_stack([np.diff(x), np.diff(y), np.diff(h)])
    rates = _centred_rates(t, inc_floor)
    vx, vy = rotate(rates[:, 0], rates[:, 1], -h)
    return pd.DataFrame({"t_s": t, "x_m": x, "y_m": y, "heading_rad": h, "vx_mps": vx,
                         "vy_mps": vy, "omega_radps": rates[:, 2]})


def odometry_result(log: LogData, robot: RobotProfile) -> OdometryResult:
    """Every source of the profile, plus ``logged`` when the log holds a pose.

    Sources the profile lists explicitly must be observable (else
    :class:`ObservabilityError` naming the source). Default sources
    (:meth:`RobotProfile.resolved_sources` when the profile lists none) that the
    layout cannot observe are left out with a warning.

    Parameters
    ----------
    log : LogData
        The log (:func:`vidodo.logs.read_log`), log clock [s].
    robot : RobotProfile
        Wheel geometry [m, rad] and the sources to build.

    Returns
    -------
    OdometryResult
        ``tracks``: per source a DataFrame ``t_s`` [s], ``x_m``, ``y_m`` [m],
        ``heading_rad`` [rad], body twist ``vx_mps``, ``vy_mps`` [m/s], ``omega_radps``
        [rad/s]; ``warnings``.
    """
    tracks: dict[str, pd.DataFrame] = {}
    warnings: list[str] = []
    explicit = bool(robot.sources)
    for src in robot.resolved_sources():
        try:
            tracks[src.name] = source_track(log, robot, src)
        except ObservabilityError as exc:
            if explicit:
                raise
            warnings.append(f"default source '{src.name}' left out: {exc}")
    if robot.pose is not None and "pose_x_m" in log.frame.columns:
        tracks["logged"] = logged_track(log)
    if not tracks:
        raise ObservabilityError(
            f"{robot.path or 'robot profile'}: no odometry source can be rebuilt "
            f"({'; '.join(warnings) or 'the profile has no wheels and no logged pose'})"
        )
    return OdometryResult(tracks, warnings)


def odometry_tracks(log: LogData, robot: RobotProfile) -> dict[str, pd.DataFrame]:
    """Pose track per odometry source; see :func:`odometry_result`.

    Returns
    -------
    dict of str to DataFrame
        Columns :data:`TRACK_COLUMNS`; wheel sources start at (0, 0, 0), ``logged``
        keeps the robot's own frame.
    """
    return odometry_result(log, robot).tracks
