"""The robot's sensors and log: encoder ticks, IMU heading, the log clock.

* Log clock: ``t_log = (t_video - offset) * (1 + rate_error)``. The robot samples
  every ``1 / rate_hz`` on its own clock with Gaussian jitter (clipped to 0.4 of the
  period); the logged time is rounded to the log's time unit (microseconds for
  seconds) and the sensors are read at exactly that instant, so the logged time is
  the true sample time on the log clock.
* Encoders use the single wheel model (:mod:`vidodo.wheels`): drive wheels turn with
  the *commanded* motion (so they slip in an impact and stand still in a shove),
  tracking wheels roll with the *true* body motion (and read nothing while lifted).
  The continuous count is floored to an integer and stored in a signed 16- or 32-bit
  counter that wraps (two's complement).
* IMU heading: ``(1 + scale_error) * (true heading change) + integrated bias (random
  walk) + white noise + jumps``, in degrees, wrapped to (-180, 180], zero at the
  first sample.
* Logged pose (optional): the robot's own estimate from one source, integrated with
  the midpoint-heading rule (common practice in robot firmware) in its start frame.

:func:`ideal_odometry` integrates the logged ticks with the exact profile using
closed-form drivetrain formulas written here independently of
:func:`vidodo.wheels.solve_twist`:

* differential drive: ``v = (s_R + s_L) / 2``, ``w = (s_R - s_L) / b``
  (Siegwart, Nourbakhsh & Scaramuzza, 2011, sec. 3.2);
* mecanum, X layout: ``vx = (fl + fr + rl + rr) / 4``, ``vy = (-fl + fr + rl - rr) / 4``,
  ``w = (-fl + fr - rl + rr) / (4 (lx + ly))`` (inverse of Lynch & Park 2017, eq. 13.10);
* three tracking wheels: ``dtheta = (s_R - s_L) / (d_L + d_R)``,
  ``dx = (s_L d_R + s_R d_L) / (d_L + d_R)``, ``dy = s_B - x_B dtheta``
  (from ``v + w x r``, Lynch & Park 2017, ch. 13);
* two tracking wheels and IMU: ``dx = s_par + y_par dtheta``, ``dy = s_B - x_B dtheta``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..outputs import column_prefix
from ..profiles import ANGLE_UNITS_RAD, LENGTH_UNITS_M, TIME_UNITS_S, RobotProfile
from ..se2 import integrate_increments
from ..wheels import rim_to_ticks, twist_to_rim
from .motion import GRID_DT_S, Motion
from .scenario import Scenario

__all__ = ["LogSynthesis", "synthesize_log", "wrap_counter", "unwrap_counter",
           "wrap_deg", "ideal_odometry", "log_times"]

_IMU_DECIMALS = 4
_POSE_DECIMALS = 5


@dataclass(frozen=True, eq=False)
class LogSynthesis:
    """A synthesized robot log and what it was made from."""

    log: pd.DataFrame
    """The log as written to log.csv (column names from the robot profile)."""
    t_log_s: np.ndarray
    """Each sample's log-clock time [s] (equal to the logged time)."""
    t_video_s: np.ndarray
    """Each sample's video-clock time [s]."""
    ticks_continuous: dict
    """Wheel name -> continuous count before flooring and wrapping [ticks]."""
    imu_heading_rad: np.ndarray | None
    """Logged IMU heading, unwrapped [rad] (None without IMU)."""
    odometry_ideal: pd.DataFrame
    """Per sample: t_log_s and per source <prefix>_x_m, _y_m, _heading_rad."""
    meta: dict
    """Clock and sensor parameters for truth/meta.json."""


def wrap_counter(counts, bits):
    """Store integer counts in a signed two's-complement counter of ``bits`` bits.

    Examples
    --------
    >>> wrap_counter(np.array([32767, 32768, -32769]), 16).tolist()
    [32767, -32768, 32767]
    """
    c = np.asarray(counts, dtype=np.int64)
    if bits >= 64 or bits <= 0:
        return c
    half = 1 << (bits - 1)
    return ((c + half) % (1 << bits)) - half


def unwrap_counter(counts, bits):
    """Cumulative counts from a wrapping counter (differences taken modulo 2**bits)."""
    c = np.asarray(counts, dtype=np.int64)
    if bits >= 64 or bits <= 0 or c.size == 0:
        return c
    d = wrap_counter(np.diff(c), bits)
    return np.concatenate([[c[0]], c[0] + np.cumsum(d)])


def wrap_deg(angle_deg):
    """Wrap angles to (-180, 180] degrees."""
    a = np.asarray(angle_deg, dtype=float)
    return -((-a + 180.0) % 360.0 - 180.0)


def log_times(sc: Scenario, duration_s: float, rng) -> tuple[np.ndarray, np.ndarray]:
    """Sample times on the log clock and the video clock.

    The log starts at log time 0 and runs until 0.3 s before the end of the video.

    Returns
    -------
    t_log_s, t_video_s : ndarray of shape (N,)
    """
    lg = sc.log
    unit = TIME_UNITS_S[lg.time_unit]
    step = 1e-6 if lg.time_unit == "s" else unit  # seconds are written with 6 decimals
    k = 1.0 + lg.clock_rate_error
    t_end_log = (duration_s - 0.3 - lg.clock_offset_s) * k
    n = int(math.floor(t_end_log * lg.rate_hz)) + 1
    if n < 2:
        from ..errors import InputError

        raise InputError(f"{sc.where} [log]: clock_offset_s = {lg.clock_offset_s} leaves no "
                         "log inside the video; make it smaller than the video length")
    period = 1.0 / lg.rate_hz
    jit = np.clip(rng.normal(0.0, lg.jitter_s, n), -0.4 * period, 0.4 * period) \
        if lg.jitter_s > 0 else np.zeros(n)
    jit[0] = 0.0
    t_log = np.arange(n) * period + jit
    t_log = np.round(t_log / step) * step
    t_log = np.maximum.accumulate(t_log)
    keep = np.concatenate([[True], np.diff(t_log) > 0])
    t_log = t_log[keep]
    t_video = t_log / k + lg.clock_offset_s
    return t_log, t_video


def _cumulative_at(m: Motion, inc_rim, t_video):
    """Cumulative rim travel per wheel at the given times, from per-step travel."""
    cum = np.vstack([np.zeros((1, inc_rim.shape[1])), np.cumsum(inc_rim, axis=0)])
    t = np.clip(t_video, 0.0, m.t_s[-1])
    return np.column_stack([np.interp(t, m.t_s, cum[:, j]) for j in range(cum.shape[1])])


def _imu(sc: Scenario, m: Motion, t_video, rng):
    imu = sc.imu
    heading = m.pose_at(t_video)[:, 2]
    n = len(t_video)
    dt = np.diff(t_video, prepend=t_video[0])
    bias = imu.bias_radps + np.cumsum(
        rng.normal(0.0, 1.0, n) * imu.bias_walk_radps_per_sqrt_s * np.sqrt(dt))
    drift = np.cumsum(bias * dt)
    noise = rng.normal(0.0, imu.noise_rad, n) if imu.noise_rad > 0 else np.zeros(n)
    jumps = np.zeros(n)
    for fw in m.faults:
        if fw.kind == "heading_jump":
            jumps += np.where(t_video >= fw.t_start_s, fw.magnitude, 0.0)
    rel = (1.0 + imu.scale_error) * (heading - heading[0]) + drift + noise + jumps
    deg = np.round(wrap_deg(np.degrees(rel)), _IMU_DECIMALS)
    return wrap_deg(deg) + 0.0


# ------------------------------------------------------------------ closed forms
def _rim_from_log(robot: RobotProfile, log: pd.DataFrame, names):
    """Rim travel since the first sample per wheel, from logged (wrapping) counts [m]."""
    out = []
    for name in names:
        w = robot.wheel(name)
        c = unwrap_counter(log[w.column].to_numpy(np.int64), w.counter_bits)
        c = c - c[0]
        out.append(w.sign * c * (2.0 * math.pi * w.radius_m / (w.ticks_per_rev * w.gear_ratio)))
    return np.column_stack(out)


def _tank_increments(robot, d):
    left, right = robot.wheel("left"), robot.wheel("right")
    b = left.y_m - right.y_m
    s_l, s_r = d[:, 0], d[:, 1]
    return np.column_stack([(s_r + s_l) / 2.0, np.zeros(len(d)), (s_r - s_l) / b])


def _mecanum_increments(robot, d):
    fl = robot.wheel("front_left")
    k = abs(fl.x_m) + abs(fl.y_m)
    a, b, c, e = d[:, 0], d[:, 1], d[:, 2], d[:, 3]  # fl, fr, rl, rr
    return np.column_stack([(a + b + c + e) / 4.0, (-a + b + c - e) / 4.0,
                            (-a + b - c + e) / (4.0 * k)])


def _three_wheel_increments(robot, d):
    left, right = robot.wheel("pod_left"), robot.wheel("pod_right")
    back = robot.wheel("pod_perpendicular")
    d_l, d_r, x_b = left.y_m, -right.y_m, back.x_m
    s_l, s_r, s_b = d[:, 0], d[:, 1], d[:, 2]
    dth = (s_r - s_l) / (d_l + d_r)
    return np.column_stack([(s_l * d_r + s_r * d_l) / (d_l + d_r), s_b - x_b * dth, dth])


def _two_wheel_imu_increments(robot, d, dth):
    par, back = robot.wheel("pod_parallel"), robot.wheel("pod_perpendicular")
    return np.column_stack([d[:, 0] + par.y_m * dth, d[:, 1] - back.x_m * dth, dth])


def source_increments(sc: Scenario, log: pd.DataFrame, imu_heading_rad=None) -> dict:
    """Body increments between consecutive log samples per odometry source.

    Returns
    -------
    dict
        Source name -> ndarray of shape (N-1, 3) ``(dx_m, dy_m, dtheta_rad)``.
    """
    robot = sc.robot
    out = {}
    for src in robot.resolved_sources():
        rim = np.diff(_rim_from_log(robot, log, src.wheels), axis=0)
        if src.name == "drive":
            inc = (_tank_increments(robot, rim) if sc.drivetrain.kind == "tank"
                   else _mecanum_increments(robot, rim))
        elif src.heading == "imu":
            dth = np.diff(imu_heading_rad)
            if sc.tracking.layout == "three":
                # two parallel wheels averaged, heading from the IMU
                left, right = robot.wheel("pod_left"), robot.wheel("pod_right")
                sx = (rim[:, 0] + left.y_m * dth + rim[:, 1] + right.y_m * dth) / 2.0
                back = robot.wheel("pod_perpendicular")
                inc = np.column_stack([sx, rim[:, 2] - back.x_m * dth, dth])
            else:
                inc = _two_wheel_imu_increments(robot, rim, dth)
        else:
            inc = _three_wheel_increments(robot, rim)
        out[src.name] = inc
    return out


def ideal_odometry(sc: Scenario, log: pd.DataFrame, t_log_s, imu_heading_rad=None):
    """Pose per source from the logged ticks with the exact profile (SE(2) exponential).

    Returns
    -------
    pandas.DataFrame
        ``t_log_s`` and per source ``<prefix>_x_m, <prefix>_y_m, <prefix>_heading_rad``,
        each source starting at (0, 0, 0) at the first sample.
    """
    cols = {"t_log_s": np.asarray(t_log_s, float)}
    for name, inc in source_increments(sc, log, imu_heading_rad).items():
        pose = integrate_increments(inc)
        p = column_prefix(name)
        cols[f"{p}_x_m"], cols[f"{p}_y_m"], cols[f"{p}_heading_rad"] = pose.T
    return pd.DataFrame(cols)


def _midpoint_pose(inc):
    """Firmware-style integration: translate along the mid-step heading."""
    th = np.concatenate([[0.0], np.cumsum(inc[:, 2])])
    mid = th[:-1] + inc[:, 2] / 2.0
    c, s = np.cos(mid), np.sin(mid)
    dx = c * inc[:, 0] - s * inc[:, 1]
    dy = s * inc[:, 0] + c * inc[:, 1]
    return np.column_stack([np.concatenate([[0.0], np.cumsum(dx)]),
                            np.concatenate([[0.0], np.cumsum(dy)]), th])


# ----------------------------------------------------------------------- the log
def synthesize_log(sc: Scenario, m: Motion, seed: int = 0) -> LogSynthesis:
    """Make the robot's log for a scenario's motion.

    Parameters
    ----------
    sc : Scenario
    m : Motion
        From :func:`vidodo.synth.motion.simulate_motion`.
    seed : int
        Seeds the log jitter and the IMU errors.

    Returns
    -------
    LogSynthesis
    """
    robot = sc.robot
    t_log, t_video = log_times(sc, m.duration_s, np.random.default_rng([seed, 4]))
    unit = TIME_UNITS_S[sc.log.time_unit]
    cols: dict = {}
    if sc.log.time_unit == "s":
        cols[robot.time_column] = np.round(t_log, 6)
    else:
        cols[robot.time_column] = np.round(t_log / unit).astype(np.int64)
    drive = [w for w in robot.wheels if w.powered]
    pods = [w for w in robot.wheels if not w.powered]
    rim_cmd = twist_to_rim(drive, m.cmd_inc)
    rim_true = twist_to_rim(pods, m.true_inc) if pods else np.zeros((len(m.cmd_inc), 0))
    for j, w in enumerate(pods):
        if w.name in m.lifted:
            rim_true[m.lifted[w.name], j] = 0.0
    cum = np.hstack([_cumulative_at(m, rim_cmd, t_video),
                     _cumulative_at(m, rim_true, t_video) if pods else np.zeros((len(t_video), 0))])
    continuous = {}
    for j, w in enumerate(drive + pods):
        ticks = rim_to_ticks(w, cum[:, j])
        continuous[w.name] = ticks
        # floor, with 1e-9 count of slack so that float rounding of a wheel at rest
        # (e.g. cos(90 deg) = 6e-17) never reads as -1
        cols[w.column] = wrap_counter(np.floor(ticks + 1e-9).astype(np.int64), w.counter_bits)
    imu_rad = None
    if sc.imu.enabled:
        deg = _imu(sc, m, t_video, np.random.default_rng([seed, 3]))
        cols[robot.imu.column] = deg
        imu_rad = np.unwrap(np.radians(deg))
    log = pd.DataFrame(cols)
    odo = ideal_odometry(sc, log, t_log, imu_rad)
    if sc.log.logs_pose:
        inc = source_increments(sc, log, imu_rad)[sc.log.pose_source]
        pose = _midpoint_pose(inc)
        lu = LENGTH_UNITS_M[sc.log.pose_length_unit]
        au = ANGLE_UNITS_RAD[sc.log.pose_angle_unit]
        half_turn = math.pi / au
        heading = -((-pose[:, 2] / au + half_turn) % (2 * half_turn) - half_turn)
        cols[robot.pose.x_column] = np.round(pose[:, 0] / lu, _POSE_DECIMALS) + 0.0
        cols[robot.pose.y_column] = np.round(pose[:, 1] / lu, _POSE_DECIMALS) + 0.0
        cols[robot.pose.heading_column] = np.round(heading, _POSE_DECIMALS) + 0.0
        log = pd.DataFrame(cols)
    meta = {
        "log_clock": {
            "offset_s": sc.log.clock_offset_s,
            "rate_error": sc.log.clock_rate_error,
            "formula": "t_video_s = t_log_s / (1 + rate_error) + offset_s",
            "first_sample_t_video_s": float(t_video[0]),
            "last_sample_t_video_s": float(t_video[-1]),
            "n_samples": int(len(t_log)),
        },
        "imu": None if not sc.imu.enabled else {
            "scale_error": sc.imu.scale_error,
            "bias_dps": math.degrees(sc.imu.bias_radps),
            "bias_walk_dps_per_sqrt_s": math.degrees(sc.imu.bias_walk_radps_per_sqrt_s),
            "noise_deg": math.degrees(sc.imu.noise_rad),
        },
        "grid_dt_s": GRID_DT_S,
    }
    return LogSynthesis(log=log, t_log_s=t_log, t_video_s=t_video, ticks_continuous=continuous,
                        imu_heading_rad=imu_rad, odometry_ideal=odo, meta=meta)


def format_log_csv(robot: RobotProfile, log: pd.DataFrame) -> str:
    """The log as CSV text: integers as integers, decimals with fixed digits."""
    parts = []
    for col in log.columns:
        v = log[col].to_numpy()
        if np.issubdtype(v.dtype, np.integer):
            parts.append(v.astype(str))
        elif col == robot.time_column:
            parts.append(np.char.mod("%.6f", v))
        else:
            parts.append(np.char.mod("%.5f", v))
    rows = [",".join(r) for r in zip(*parts, strict=True)]
    return ",".join(log.columns) + "\n" + "\n".join(rows) + "\n"
