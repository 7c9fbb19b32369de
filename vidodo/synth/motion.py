"""Truth motion of the robot body and the camera, with injected faults.

The planner turns the scenario's path segments into trapezoidal speed profiles
(constant acceleration, cruise, constant deceleration; common practice) and samples
them on a fine grid (1 kHz); every profile starts on a grid node. Each grid step
holds a body-frame increment ``(ux_m, uy_m, dtheta_rad)``: straight lines, turns in
place, strafes and arcs all have a fixed direction of twist within a segment, so
chaining the increments with
the SE(2) exponential (:mod:`vidodo.se2`) is exact.

Two motions come out: the *commanded* one (what the drive wheels turn with) and the
*true* one (what the body does). They differ only in faults:

* ``impact``: the body decelerates sharply (``decel_mps2``) to a stall, holds for the
  fault's duration, then regains traction over ``recover_s``; the commanded motion
  (and so the drive wheels) carries on.
* ``shove``: the body is pushed by ``(dx_m, dy_m, dheading)`` (body frame, a
  raised-cosine profile) while the commanded motion is still.
* ``pod_lift`` and ``imu_jump`` leave the body alone; they are sensor faults
  (:mod:`vidodo.synth.sensors`) and only their windows are recorded here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from ..errors import InputError
from ..se2 import exp_increment, integrate_increments, rotate, wrap_angle
from ..wheels import twist_to_rim
from .scenario import Fault, Scenario

__all__ = ["GRID_DT_S", "Motion", "FaultWindow", "simulate_motion", "trapezoid",
           "camera_base_pose", "camera_pose_fn", "EVENT_UNITS"]

GRID_DT_S = 1e-3
"""Internal time step of the truth motion [s]."""

EVENT_UNITS = {"impact": "m", "shove": "m", "pod_lift": "m", "heading_jump": "rad"}
"""Unit of each truth event's magnitude."""


@dataclass(frozen=True)
class FaultWindow:
    """One injected fault placed on the video clock."""

    kind: str
    """Truth event kind: impact, shove, pod_lift or heading_jump."""
    t_start_s: float
    t_end_s: float
    x_m: float
    """Truth position at the start [m]."""
    y_m: float
    magnitude: float
    """See :data:`EVENT_UNITS` [m or rad]."""
    sources: tuple[str, ...]
    """Odometry sources the fault corrupts."""
    fault: Fault


@dataclass(frozen=True, eq=False)
class Motion:
    """Sampled truth and commanded motion on the video clock.

    Grid node k is at ``t_s[k] = k * GRID_DT_S``; step k runs from node k to k+1.
    """

    t_s: np.ndarray
    """Grid node times, shape (K+1,) [s]."""
    cmd_inc: np.ndarray
    """Commanded body increments per step, shape (K, 3) [m, m, rad]."""
    true_inc: np.ndarray
    """True body increments per step, shape (K, 3) [m, m, rad]."""
    pose: np.ndarray
    """True poses at the nodes, shape (K+1, 3) [m, m, rad], heading continuous."""
    cmd_pose: np.ndarray
    """Poses the commanded motion alone would give, shape (K+1, 3)."""
    segment_start_s: tuple[float, ...]
    """Video time each path segment starts [s]."""
    path_start_s: float
    path_end_s: float
    duration_s: float
    """Video length [s]."""
    faults: tuple[FaultWindow, ...]
    lifted: dict
    """Tracking wheel name -> bool array (K,) of steps during which it is lifted."""

    def _at(self, t_s, nodes, inc):
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        k_max = len(inc) - 1
        u = t / GRID_DT_S
        k = np.clip(np.floor(u).astype(np.int64), 0, k_max)
        frac = np.clip(u - k, 0.0, 1.0)
        d = inc[k] * frac[:, None]
        dxb, dyb = exp_increment(d[:, 0], d[:, 1], d[:, 2])
        base = nodes[k]
        dx, dy = rotate(dxb, dyb, base[:, 2])
        return np.column_stack([base[:, 0] + dx, base[:, 1] + dy, base[:, 2] + d[:, 2]])

    def pose_at(self, t_s):
        """True floor pose at any times (clamped to the run).

        Parameters
        ----------
        t_s : array_like of shape (N,)
            Video-clock times [s].

        Returns
        -------
        ndarray of shape (N, 3)
            ``(x_m, y_m, heading_rad)``, heading continuous. Within a grid step the
            pose follows the step's constant twist (the SE(2) exponential).
        """
        return self._at(t_s, self.pose, self.true_inc)

    def commanded_pose_at(self, t_s):
        """Pose the commanded motion alone would give, shape (N, 3)."""
        return self._at(t_s, self.cmd_pose, self.cmd_inc)

    def twist_at(self, t_s, commanded=False):
        """Body twist at any times.

        The twist of each grid step (increment / step) is placed at the step's
        middle and interpolated linearly.

        Returns
        -------
        ndarray of shape (N, 3)
            ``(vx_mps, vy_mps, omega_radps)`` in the body frame.
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        inc = self.cmd_inc if commanded else self.true_inc
        mid = self.t_s[:-1] + GRID_DT_S / 2
        return np.column_stack([np.interp(t, mid, inc[:, j] / GRID_DT_S) for j in range(3)])

    def floor_velocity_at(self, t_s):
        """Floor-frame velocity ``(vx_mps, vy_mps, omega_radps)``, shape (N, 3)."""
        tw = self.twist_at(t_s)
        h = self.pose_at(t_s)[:, 2]
        vx, vy = rotate(tw[:, 0], tw[:, 1], h)
        return np.column_stack([vx, vy, tw[:, 2]])


# ----------------------------------------------------------------------- profiles
def trapezoid(tau_s, length, v_max, a_max):
    """Distance along a trapezoidal (or triangular) speed profile.

    Parameters
    ----------
    tau_s : ndarray
        Time since the profile started [s]; clipped to the profile.
    length : float
        Total distance (>= 0) [m or rad].
    v_max, a_max : float
        Speed and acceleration limits [m/s, m/s^2 or rad/s, rad/s^2].

    Returns
    -------
    s : ndarray
        Distance covered at ``tau_s``.
    duration : float
        Length of the profile [s].
    """
    tau = np.asarray(tau_s, dtype=float)
    if length <= 0:
        return np.zeros_like(tau), 0.0
    if length >= v_max**2 / a_max:
        ta = v_max / a_max
        tc = (length - v_max**2 / a_max) / v_max
        vp = v_max
    else:
        vp = math.sqrt(length * a_max)
        ta, tc = vp / a_max, 0.0
    dur = 2 * ta + tc
    t = np.clip(tau, 0.0, dur)
    s_acc = 0.5 * a_max * np.minimum(t, ta) ** 2
    s_cru = vp * np.clip(t - ta, 0.0, tc)
    td = np.clip(t - ta - tc, 0.0, ta)
    s_dec = vp * td - 0.5 * a_max * td**2
    s = s_acc + s_cru + s_dec
    return np.where(t >= dur, length, s), dur


def _next_node(t_s: float) -> float:
    """The first grid node at or after ``t_s`` (profiles start on nodes) [s]."""
    return round(math.ceil(t_s / GRID_DT_S - 1e-6) * GRID_DT_S, 9)


def _plan(sc: Scenario):
    """Sub-profiles ``(t0, duration, length, unit_twist, v_max, a_max)`` and segment starts."""
    lim = sc.limits
    x, y, th = sc.start_pose
    t = _next_node(sc.video.lead_in_s)
    subs, starts = [], []

    def add(length, unit, v, a):
        nonlocal t
        _, dur = trapezoid(0.0, length, v, a)
        if dur > 0:
            subs.append((t, dur, length, np.asarray(unit, float), v, a))
            t = _next_node(t + dur)

    for seg in sc.segments:
        starts.append(t)
        if seg.kind in ("drive", "strafe"):
            dx, dy = seg.x_m - x, seg.y_m - y
            dist = math.hypot(dx, dy)
            if seg.kind == "drive" and dist > 1e-9:
                turn = wrap_angle(math.atan2(dy, dx) - th)
                add(abs(turn), (0, 0, math.copysign(1, turn)), lim.max_turn_rate_radps,
                    lim.max_turn_accel_radps2)
                th += turn
                add(dist, (1, 0, 0), lim.max_speed_mps, lim.max_accel_mps2)
            elif dist > 1e-9:
                a = math.atan2(dy, dx) - th
                add(dist, (math.cos(a), math.sin(a), 0), lim.max_speed_mps, lim.max_accel_mps2)
            x, y = seg.x_m, seg.y_m
        elif seg.kind == "turn":
            turn = wrap_angle(seg.heading_rad - th)
            add(abs(turn), (0, 0, math.copysign(1, turn)), lim.max_turn_rate_radps,
                lim.max_turn_accel_radps2)
            th += turn
        elif seg.kind == "arc":
            r, ang = seg.radius_m, seg.angle_rad
            add(r * abs(ang), (1, 0, math.copysign(1, ang) / r),
                min(lim.max_speed_mps, lim.max_turn_rate_radps * r),
                min(lim.max_accel_mps2, lim.max_turn_accel_radps2 * r))
            dxb, dyb = exp_increment(r * abs(ang), 0.0, ang)
            ddx, ddy = rotate(dxb, dyb, th)
            x, y, th = x + float(ddx), y + float(ddy), th + ang
        else:  # wait
            subs.append((t, seg.duration_s, 0.0, np.zeros(3), 1.0, 1.0))
            t = _next_node(t + seg.duration_s)
    return subs, starts, t


def _sources_using(robot, *, wheel=None, imu=False, drive=False):
    out = []
    for s in robot.resolved_sources():
        wheels = [robot.wheel(n) for n in s.wheels]
        if (wheel is not None and wheel in s.wheels) or (imu and s.heading == "imu") or (
                drive and any(w.powered for w in wheels)):
            out.append(s.name)
    return out


def simulate_motion(sc: Scenario, seed: int = 0) -> Motion:
    """Sample the truth and commanded motion of a scenario.

    Parameters
    ----------
    sc : Scenario
    seed : int
        Unused by the body motion today (it is fully set by the scenario); kept so
        that every synthesis step takes the same arguments.

    Returns
    -------
    Motion

    Raises
    ------
    InputError
        If a fault is placed where it cannot happen (an impact while still, a shove
        while driving).
    """
    del seed
    subs, starts, path_end = _plan(sc)
    total = path_end + sc.video.tail_s
    if sc.video.max_duration_s is not None:
        total = min(total, sc.video.max_duration_s)
    n = int(math.ceil(total / GRID_DT_S - 1e-9))
    t_nodes = np.arange(n + 1) * GRID_DT_S
    cmd = np.zeros((n, 3))
    for t0, dur, length, unit, v, a in subs:
        if length <= 0:
            continue
        i0 = max(int(t0 / GRID_DT_S) - 1, 0)
        i1 = min(int((t0 + dur) / GRID_DT_S) + 2, n)
        if i0 >= i1:
            continue
        s, _ = trapezoid(t_nodes[i0:i1 + 1] - t0, length, v, a)
        cmd[i0:i1] += np.diff(s)[:, None] * unit[None, :]
    true = cmd.copy()
    mid = t_nodes[:-1] + GRID_DT_S / 2
    windows: list[tuple] = []
    gain = np.ones(n)
    placed = []
    for f in sc.faults:
        t_f = (starts[f.segment] + f.at_s) if f.segment is not None else f.at_s
        if t_f >= total:
            continue  # the run was cut before the fault
        placed.append((t_f, f))
    where = sc.where
    for t_f, f in placed:
        if f.kind != "impact":
            continue
        k = min(int(t_f / GRID_DT_S), n - 1)
        v0 = float(np.hypot(cmd[k, 0], cmd[k, 1]) / GRID_DT_S)
        if v0 < 0.05:
            raise InputError(f"{where} [[fault]] impact at t={t_f:.3f} s: the robot is "
                             f"nearly still ({v0:.3f} m/s); place it in a driving segment")
        t_stop = max(v0 / f.decel_mps2, GRID_DT_S)
        t_hold_end = t_f + max(f.duration_s, t_stop)
        g = np.ones(n)
        g = np.where(mid >= t_f, np.clip(1.0 - (mid - t_f) / t_stop, 0.0, 1.0), g)
        g = np.where(mid >= t_hold_end, np.clip((mid - t_hold_end) / f.recover_s, 0.0, 1.0), g)
        gain *= g
        windows.append((f, t_f, t_hold_end + f.recover_s))
    true *= gain[:, None]
    for t_f, f in placed:
        if f.kind != "shove":
            continue
        t_e = t_f + f.duration_s
        sel = (mid >= t_f - GRID_DT_S) & (mid <= t_e + GRID_DT_S)
        if np.abs(cmd[sel]).max(initial=0.0) > 0:
            raise InputError(f"{where} [[fault]] shove at t={t_f:.3f} s: the drive wheels are "
                             "turning then; place the shove in a 'wait' segment")
        frac = 0.5 * (1 - np.cos(np.pi * np.clip((t_nodes - t_f) / f.duration_s, 0, 1)))
        true += np.diff(frac)[:, None] * np.array([f.dx_m, f.dy_m, f.dheading_rad])[None, :]
        windows.append((f, t_f, t_e))
    pose = integrate_increments(true, sc.start_pose)
    cmd_pose = integrate_increments(cmd, sc.start_pose)
    lifted: dict = {}
    for t_f, f in placed:
        if f.kind == "pod_lift":
            t_e = t_f + f.duration_s
            m = (mid >= t_f) & (mid < t_e)
            lifted[f.wheel] = lifted.get(f.wheel, np.zeros(n, bool)) | m
            windows.append((f, t_f, t_e))
        elif f.kind == "imu_jump":
            windows.append((f, t_f, t_f))
    motion = Motion(t_s=t_nodes, cmd_inc=cmd, true_inc=true, pose=pose, cmd_pose=cmd_pose,
                    segment_start_s=tuple(starts), path_start_s=sc.video.lead_in_s,
                    path_end_s=path_end, duration_s=float(n * GRID_DT_S), faults=(),
                    lifted=lifted)
    events = [_event(sc, motion, f, t0, t1) for f, t0, t1 in windows]
    events.sort(key=lambda e: (e.t_start_s, e.kind))
    object.__setattr__(motion, "faults", tuple(events))
    return motion


def _event(sc: Scenario, m: Motion, f: Fault, t0: float, t1: float) -> FaultWindow:
    robot = sc.robot
    p0 = m.pose_at([t0])[0]
    mid = m.t_s[:-1] + GRID_DT_S / 2
    sel = (mid >= t0) & (mid < t1)
    if f.kind == "impact":
        lost = np.hypot(m.cmd_inc[sel, 0], m.cmd_inc[sel, 1]).sum() - np.hypot(
            m.true_inc[sel, 0], m.true_inc[sel, 1]).sum()
        return FaultWindow("impact", t0, t1, p0[0], p0[1], float(lost),
                           tuple(_sources_using(robot, drive=True)), f)
    if f.kind == "shove":
        p1 = m.pose_at([t1])[0]
        return FaultWindow("shove", t0, t1, p0[0], p0[1], float(np.hypot(*(p1 - p0)[:2])),
                           tuple(_sources_using(robot, drive=True)), f)
    if f.kind == "pod_lift":
        w = robot.wheel(f.wheel)
        rim = twist_to_rim([w], m.true_inc[m.lifted[f.wheel]])[:, 0]
        srcs = _sources_using(robot, wheel=f.wheel)
        if sc.log.logs_pose and sc.log.pose_source in srcs:
            srcs.append("logged")
        return FaultWindow("pod_lift", t0, t1, p0[0], p0[1], float(np.abs(rim.sum())),
                           tuple(srcs), f)
    srcs = _sources_using(robot, imu=True)
    if sc.log.logs_pose and sc.log.pose_source in srcs:
        srcs.append("logged")
    return FaultWindow("heading_jump", t0, t1, p0[0], p0[1], f.magnitude_rad, tuple(srcs), f)


# ------------------------------------------------------------------------- camera
def camera_base_pose(cam) -> tuple[np.ndarray, np.ndarray]:
    """Floor -> camera rotation matrix and translation for a camera spec.

    The optical axis points from the lens centre to the look-at point; image x is
    horizontal (floor z up maps to image up), then the camera is turned about its
    optical axis by ``cam.roll_rad`` (positive: the picture turns counter-clockwise as seen; 180
    deg: a phone held the other way up).

    Returns
    -------
    R : ndarray of shape (3, 3)
    t : ndarray of shape (3,)
        ``X_cam = R @ X_floor + t`` [m].
    """
    rot, _ = look_at_pose(cam.position_m, cam.look_at_m)
    roll = float(getattr(cam, "roll_rad", 0.0))
    if roll:
        c, s = math.cos(roll), math.sin(roll)
        rot = np.array([[c, s, 0.0], [-s, c, 0.0], [0.0, 0.0, 1.0]]) @ rot
    return rot, -rot @ np.asarray(cam.position_m, float)


def look_at_pose(position_m, target_m) -> tuple[np.ndarray, np.ndarray]:
    """Floor -> camera ``(R, t)`` of a level camera at ``position_m`` aimed at ``target_m``.

    Image x is horizontal and image y points down the floor's vertical, so
    ``X_cam = R @ X_floor + t`` [m]; see :func:`camera_base_pose`.
    """
    c = np.asarray(position_m, float)
    f = np.asarray(target_m, float) - c
    f /= np.linalg.norm(f)
    right = np.cross(f, [0.0, 0.0, 1.0])
    if np.linalg.norm(right) < 1e-6:
        raise InputError("camera: looking straight down is not supported; tilt the camera")
    right /= np.linalg.norm(right)
    down = np.cross(f, right)
    rot = np.vstack([right, down, f])
    return rot, -rot @ c


def camera_pose_fn(sc: Scenario, seed: int = 0):
    """The camera pose over time: fixed on a tripod, slowly swaying when hand-held.

    The hand-held sway is a sum of two sinusoids per axis (periods ``sway_period_s``
    and 0.37 of it, random phases from ``seed``) on the three rotation angles and the
    three position coordinates.

    Returns
    -------
    callable
        ``pose(t_s: float) -> (rvec (3,), tvec (3,))``, floor -> camera (OpenCV).
    """
    rot0, _ = camera_base_pose(sc.camera)
    c0 = np.asarray(sc.camera.position_m, float)
    cam = sc.camera
    if cam.mount == "tripod":
        rvec0 = cv2.Rodrigues(rot0)[0].ravel()
        tvec0 = -rot0 @ c0

        def fixed(t_s):
            return rvec0.copy(), tvec0.copy()

        return fixed
    rng = np.random.default_rng([seed, 2])
    phases = rng.uniform(0, 2 * np.pi, size=(6, 2))
    periods = np.array([1.0, 0.37]) * cam.sway_period_s
    weights = np.array([0.8, 0.35])

    def sway(t_s):
        s = weights[None, :] * np.sin(2 * np.pi * t_s / periods[None, :] + phases)
        return s.sum(axis=1)

    def handheld(t_s):
        s = sway(float(t_s))
        r_sway = cv2.Rodrigues(s[:3] * cam.sway_rad)[0]
        rot = r_sway @ rot0
        c = c0 + s[3:] * cam.sway_m
        return cv2.Rodrigues(rot)[0].ravel(), -rot @ c

    return handheld
