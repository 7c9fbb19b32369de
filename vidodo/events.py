"""Slip and collision events: where the robot's sensors and the truth track part ways.

Every test compares what a sensor reported with what the truth track says the body
did, over short windows, in units of the truth track's own 1-sigma, so noise of the
measurement is never reported as slip.

Signals (all on the truth track's sample times, video clock)
------------------------------------------------------------
* **Wheel residual.** For each encoder wheel i, over a centred window of ``window_s``
  (default 0.15 s, about 4-5 frames of 30 fps video): the rim travel it reported,
  ``m_i``, and the rim travel the truth body motion implies, ``p_i = A_i @ u`` where
  ``u`` is the truth body motion over the window in exponential coordinates (the
  SE(2) log of the relative pose) and ``A_i`` the wheel's row of the single wheel
  model (:func:`vidodo.wheels.wheel_rows`). The 1-sigma of ``p_i`` follows from the
  truth 1-sigma at both window ends: ``sigma_d = sqrt(s_a^2 + s_b^2)`` per position
  component and the same for heading, propagated through ``A_i``. The noise scale is
  then checked against the data: if the median absolute residual, over the run or
  within 1.5 s, says the truth noise is larger than its stated sigma, the larger
  value is used (a robust 1.4826 * MAD estimate, common practice); so a stretch of
  footage where the camera sways more than the track admits raises the thresholds
  there.
* **Deceleration.** Second difference of truth position over ``impact_window_s``
  (default 0.067 s, two frames at 30 fps), projected on the direction of travel just
  before; 1-sigma ``sqrt(6) * sigma_xy / W^2``, checked against the data from the
  spread of its sample-to-sample changes (so the robot's own braking is not taken
  for noise). A smoothed track's stated sigma includes slow errors that this
  difference does not see, so here the measured jitter may also lower the level, to
  a fifth of the stated one at most; the deceleration floors below still apply.
* **Heading error.** IMU heading minus truth heading, differenced over
  ``heading_window_s``.

Kinds
-----
``wheel_slip``
    Drive wheels report motion the body did not make: where ``|m_i| >= |p_i|``,
    ``|m_i - p_i|`` exceeds both ``k_on`` sigma and ``slip_ratio_on`` of
    ``max(|m_i|, |p_i|, speed_floor * window)`` for some drive wheel (stall against an
    obstacle, wheel spin). Magnitude: metres lost, the mean over drive wheels of the
    excess rim travel [m]; the detail gives the peak slip ratio.
``shove``
    The body moved while the drive wheels did not: where ``|p_i| > |m_i|``,
    ``|m_i - p_i|`` passes the same two tests, or, for drives that cannot move
    sideways (parallel plain wheels), the body's sideways motion exceeds ``k_on``
    sigma and ``lateral_speed_on``.
    Magnitude: body displacement over the event [m].
``pod_lift``
    A tracking (unpowered) wheel disagrees with the truth by the same two tests while
    every drive wheel agrees. Magnitude: rim travel the wheel missed [m].
``impact``
    Deceleration above ``max(k_on sigma_a, impact_decel_min)``, outside shoves (a push
    accelerates and stops the body by itself). Magnitude: peak deceleration [m/s^2].
``heading_jump``
    The IMU-minus-truth heading changes by more than ``max(k_on sigma, 1.5 deg)``
    within ``heading_window_s``. Magnitude: the change over the event [rad].

Defaults and why
----------------
* ``k_on = 5``, ``k_off = 2.5`` sigma: a Gaussian exceeds 5 sigma about once in 1.7
  million samples (handbook value of the normal tail), i.e. less than once in a day of
  30 fps footage, so measurement noise alone does not open an event; the exit level
  at half the entry level is the usual hysteresis so an event does not flicker.
* ``slip_ratio_on = 0.3``, ``slip_ratio_off = 0.15``: tyre force peaks at slip ratios
  near 0.1-0.2 and braking systems regulate at 0.1-0.3 (car-tyre figures, common
  practice; foam tiles differ); above 0.3 the wheel is clearly sliding rather than
  creeping. The slip ratio uses ``max(|m|, |p|, speed_floor * window)`` as its
  denominator with ``speed_floor = 0.05 m/s`` so a robot creeping at a few mm/s cannot
  produce huge ratios from encoder quantisation.
* ``lateral_speed_on = 0.05 m/s``: a tank drive turning hard scrubs sideways at well
  under that; a push is faster.
* ``impact_decel_min = 4 m/s^2``: above the 1-2 m/s^2 that small robots use to
  accelerate and brake under control, below the 10+ m/s^2 of hitting a wall at
  0.5 m/s (stopping in under 50 ms). A smoothed truth track spreads such a stop over
  several frames and lowers its peak, so within 0.15 s of a wheel-slip onset (the
  wheels went on turning: the stop was not commanded) 2.5 m/s^2 is enough.
* ``1.5 deg`` heading jump: below that, the cross-track error it causes over a metre
  (26 mm) is within what tile-floor odometry drifts anyway.
* Minimum durations (0.1 s for slip, shove and pod lift) remove single-window
  blips; events of one kind closer than ``merge_gap_s`` (0.2 s) are merged.
* Each event's start and end are refined by a hinge (change-point) fit of the
  cumulative discrepancy, linear or quadratic after the change, so they do not
  depend on the window length nor on how abruptly the fault begins.

Truth glitches
--------------
When two odometry sources built from disjoint wheels (drive and tracking wheels) agree
with each other over a window but both disagree with the truth track (by ``k_on``
sigma and 1 cm or 1 deg), the truth is the odd one out (a tracking or registration
error) and no event is claimed there; a warning says where. A real fault always
leaves one of the two agreeing with the truth: slips, shoves and impacts upset the
drive wheels, lifts the tracking wheels.

A source is listed as affected when its relative pose error over the event (Sturm et
al., IROS 2012, RPE over the event's span) exceeds 3 sigma of the truth and at least
1 cm or 1 degree.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.special import ndtri

from .robust import median_abs_deviation
from .se2 import interpolate_poses, log_increment, relative_pose, wrap_angle
from .wheels import wheel_rows

__all__ = ["EventSettings", "Event", "EventResult", "detect_events", "hysteresis",
           "events_frame", "active_kinds", "EVENT_COLUMNS", "EVENT_KINDS"]

LOCAL_NOISE_HALF_S = 1.5
"""Half-width of the window of the local noise check [s]."""
EVENT_KINDS = ("wheel_slip", "shove", "pod_lift", "impact", "heading_jump")
EVENT_COLUMNS = ["kind", "t_start_s", "t_end_s", "x_m", "y_m", "magnitude", "magnitude_unit",
                 "sources", "detail"]


@dataclass(frozen=True)
class EventSettings:
    """Thresholds of the event detectors (see the module docstring for the defaults)."""

    window_s: float = 0.15
    """Window of the wheel residuals [s]."""
    k_on: float = 5.0
    """Entry level in sigma of the truth track."""
    k_off: float = 2.5
    """Exit level in sigma."""
    slip_ratio_on: float = 0.3
    """Entry slip ratio."""
    slip_ratio_off: float = 0.15
    """Exit slip ratio."""
    speed_floor_mps: float = 0.05
    """Least speed in the slip-ratio denominator [m/s]."""
    lateral_speed_on_mps: float = 0.05
    """Sideways speed that counts as a shove for a drive that cannot slide [m/s]."""
    impact_window_s: float = 0.067
    """Step of the second difference for deceleration [s]."""
    impact_decel_min_mps2: float = 4.0
    """Least deceleration reported as an impact [m/s^2]."""
    impact_decel_with_slip_mps2: float = 2.5
    """Least deceleration reported as an impact within 0.15 s of a wheel-slip onset."""
    heading_window_s: float = 0.2
    """Window of the heading-error change [s]."""
    heading_jump_min_rad: float = math.radians(1.5)
    """Least heading jump reported [rad]."""
    min_duration_s: float = 0.1
    """Shortest slip, shove or pod-lift event [s]."""
    merge_gap_s: float = 0.2
    """Events of one kind closer than this are merged [s]."""
    min_lost_m: float = 0.01
    """Least metres lost (or pushed) for a slip, shove or pod-lift event [m]."""


@dataclass(frozen=True)
class Event:
    """One detected event."""

    kind: str
    """One of :data:`EVENT_KINDS`."""
    t_start_s: float
    """Onset, video clock [s]."""
    t_end_s: float
    """End, video clock [s]."""
    x_m: float
    """Truth floor position at onset, x [m]."""
    y_m: float
    """Truth floor position at onset, y [m]."""
    magnitude: float
    """Size in ``magnitude_unit``: metres lost, metres pushed, m/s^2 or rad."""
    magnitude_unit: str
    """'m', 'm/s^2' or 'rad'."""
    sources: tuple[str, ...]
    """Odometry sources whose error changed over the event."""
    detail: str
    """Human-readable detail (wheels involved, peak slip ratio)."""


@dataclass(frozen=True)
class EventResult:
    """Events of one run and what could not be checked."""

    events: tuple[Event, ...]
    """Detected events, sorted by onset."""
    noise_scale: dict = field(default_factory=dict)
    """Median factor by which observed residual noise exceeded the stated truth sigma,
    per test."""
    warnings: tuple[str, ...] = ()
    """Tests that could not run, and why."""


def hysteresis(t_s, score, *, on=1.0, off=0.5, min_duration_s=0.0, merge_gap_s=0.0):
    """Segments where ``score`` rises above ``on`` and stays above ``off``.

    Parameters
    ----------
    t_s : ndarray of shape (N,)
        Sample times [s].
    score : ndarray of shape (N,)
        Detector score (NaN counts as below ``off``).
    on, off : float
        Entry and exit levels, ``off <= on``.
    min_duration_s : float
        Segments shorter than this are dropped (after merging) [s].
    merge_gap_s : float
        Segments separated by less than this are merged [s].

    Returns
    -------
    list of tuple of int
        ``(first, last)`` sample indices, inclusive.
    """
    t = np.asarray(t_s, dtype=float)
    s = np.nan_to_num(np.asarray(score, dtype=float), nan=-np.inf)
    segs = []
    inside = False
    start = 0
    for k in range(len(s)):
        if not inside and s[k] >= on:
            inside, start = True, k
            while start > 0 and s[start - 1] >= off:
                start -= 1
        elif inside and s[k] < off:
            inside = False
            segs.append([start, k - 1])
    if inside:
        segs.append([start, len(s) - 1])
    merged = []
    for seg in segs:
        if merged and t[seg[0]] - t[merged[-1][1]] < merge_gap_s:
            merged[-1][1] = seg[1]
        else:
            merged.append(seg)
    return [(a, b) for a, b in merged if t[b] - t[a] >= min_duration_s - 1e-9]


def _interp(tq, t, v):
    return np.interp(tq, t, v, left=np.nan, right=np.nan)


def _hinge(t, d, lo, hi, side, t0_lo=-np.inf, t0_hi=np.inf):
    """Change point of ``d`` in [lo, hi]: flat then rising ('start') or the reverse.

    Least-squares fit of ``c + r * max(0, t - t0)**p`` (start) or
    ``c + r * max(0, t0 - t)**p`` (end) over the samples in [lo, hi], for ``p`` = 1 (a
    change of rate: slip at constant speed) and ``p`` = 2 (a change of acceleration: a
    push that builds up smoothly); the better fit gives t0.
    """
    m = (t >= lo) & (t <= hi) & np.isfinite(d)
    tt, dd = t[m], d[m]
    if tt.size < 4:
        return None
    best, arg = np.inf, None
    for t0 in tt[1:-1]:
        if not t0_lo <= t0 <= t0_hi:
            continue
        base = np.maximum(0.0, tt - t0) if side == "start" else np.maximum(0.0, t0 - tt)
        for power in (1, 2, 3):
            a = np.column_stack([np.ones_like(base), base**power])
            coef, *_ = np.linalg.lstsq(a, dd, rcond=None)
            sse = float(((a @ coef - dd) ** 2).sum())
            if sse < best:
                best, arg = sse, float(t0)
    return arg


def _robust_scale(z):
    z = z[np.isfinite(z)]
    if z.size < 20:
        return 1.0
    return max(1.0, float(median_abs_deviation(z, scale="normal")))


_MAD_PER_SIGMA = float(ndtri(0.75))
"""Median absolute deviation of a unit normal (0.6745), as scipy's
``median_abs_deviation(scale="normal")`` divides by it."""


def _noise_scale(t, z, half_s=LOCAL_NOISE_HALF_S, floor=1.0):
    """Per-sample factor by which the residuals ``z`` (in sigma) exceed their sigma.

    The larger of the run's robust spread (normalised median absolute deviation) and
    that within +-``half_s`` (the same about zero, common practice), never below
    ``floor``. The local part catches
    stretches where the truth track is worse than it says (a swaying hand-held camera);
    a fault of a few tenths of a second barely moves a median over three seconds.
    """
    z = np.asarray(z, dtype=float).reshape(len(t), -1)
    zz = z[np.isfinite(z)]
    base = max(floor, float(median_abs_deviation(zz, scale="normal"))) \
        if zz.size >= 20 else 1.0
    out = np.full(len(t), base)
    az = np.abs(z)
    lo = np.searchsorted(t, t - half_s)
    hi = np.searchsorted(t, t + half_s, side="right")
    # scipy's median_abs_deviation(win, center=_zero, scale="normal") per window is
    # median(|win - 0|) / ndtri(0.75) (its "normal" scale); its argument checks cost more
    # than the median over a few hundred samples, so the same arithmetic (bit for bit) is
    # done here directly
    for i in range(len(t)):
        win = az[lo[i]:hi[i]].ravel()
        win = win[np.isfinite(win)]
        if win.size >= 20:
            out[i] = max(out[i], float(np.median(win)) / _MAD_PER_SIGMA)
    return out


class _Truth:
    """Truth poses and sigmas, interpolated at arbitrary times."""

    def __init__(self, truth):
        self.t = truth["t_s"].to_numpy(float)
        ok = np.isfinite(truth[["x_m", "y_m", "heading_rad"]].to_numpy(float)).all(axis=1)
        if "detected" in truth:
            det = truth["detected"].to_numpy(bool)
            if "interpolated" in truth:
                det = det | truth["interpolated"].to_numpy(bool)
            ok &= det
        self.ok = ok
        tt = self.t[ok]
        self.tt = tt
        self.x = truth["x_m"].to_numpy(float)[ok]
        self.y = truth["y_m"].to_numpy(float)[ok]
        self.h = np.unwrap(truth["heading_rad"].to_numpy(float)[ok])
        sxy = truth["sigma_xy_m"].to_numpy(float)[ok] if "sigma_xy_m" in truth else None
        sh = truth["sigma_heading_rad"].to_numpy(float)[ok] if "sigma_heading_rad" in truth \
            else None
        self.sxy = _clean_sigma(sxy, 0.002, len(tt))
        self.sh = _clean_sigma(sh, math.radians(0.5), len(tt))

    def pose(self, tq):
        if self.tt.size < 2:
            return np.full((np.size(tq), 3), np.nan)
        out = interpolate_poses(tq, self.tt, np.column_stack([self.x, self.y, self.h]))
        # no pose inside gaps of missing detections longer than 0.25 s
        idx = np.clip(np.searchsorted(self.tt, tq), 1, len(self.tt) - 1)
        gap = (self.tt[idx] - self.tt[idx - 1]) > 0.25
        out[gap] = np.nan
        return out

    def sigma(self, tq):
        return (_interp(tq, self.tt, self.sxy), _interp(tq, self.tt, self.sh))


def _clean_sigma(v, default, n):
    if v is None:
        return np.full(n, default)
    v = np.where(np.isfinite(v) & (v > 0), v, np.nan)
    fill = np.nanmedian(v) if np.isfinite(v).any() else default
    return np.where(np.isfinite(v), v, fill)


def _window_motion(tr: _Truth, t, w):
    a, b = tr.pose(t - w / 2), tr.pose(t + w / 2)
    u = log_increment(*relative_pose(a, b).T)
    u[~np.isfinite(a).all(axis=1) | ~np.isfinite(b).all(axis=1)] = np.nan
    sa, ha = tr.sigma(t - w / 2)
    sb, hb = tr.sigma(t + w / 2)
    return u, np.sqrt(sa**2 + sb**2), np.sqrt(ha**2 + hb**2), a, b


def _wheel_residuals(tr, t, travel, wheels, st):
    """Reported and predicted rim travel over the window, and the 1-sigma."""
    w = st.window_s
    u, sd, sdh, _, _ = _window_motion(tr, t, w)
    rows = wheel_rows(wheels)
    pred = u @ rows.T
    sig = np.sqrt(np.outer(sd**2, (rows[:, :2] ** 2).sum(axis=1))
                  + np.outer(sdh**2, rows[:, 2] ** 2))
    tw = travel["t_s"].to_numpy(float)
    meas = np.column_stack([
        _interp(t + w / 2, tw, travel[wh.name].to_numpy(float))
        - _interp(t - w / 2, tw, travel[wh.name].to_numpy(float)) for wh in wheels])
    q = np.array([wh.metres_per_tick for wh in wheels])
    sig = np.sqrt(sig**2 + 2 * (q[None, :] / math.sqrt(12)) ** 2)
    return meas, pred, sig, u, sd


def _ratio_score(excess, meas, pred, sig, st, k_scale):
    """min(excess / (k_on sigma), ratio / ratio_on), the entry test as a score >= 1."""
    den = np.maximum(np.maximum(np.abs(meas), np.abs(pred)), st.speed_floor_mps * st.window_s)
    ratio = excess / den
    zs = excess / (st.k_on * sig * k_scale)
    return np.minimum(zs, ratio / st.slip_ratio_on), ratio


def _cumulative(t, travel, wheels, tr):
    """Cumulative discrepancy (reported minus truth-implied rim travel) per wheel."""
    tw = travel["t_s"].to_numpy(float)
    rows = wheel_rows(wheels)
    p = tr.pose(t)
    rel = log_increment(*relative_pose(p[:-1], p[1:]).T)
    pred = np.vstack([np.zeros((1, len(wheels))), np.nancumsum(rel @ rows.T, axis=0)])
    meas = np.column_stack([_interp(t, tw, travel[w.name].to_numpy(float)) for w in wheels])
    meas = meas - meas[np.isfinite(meas).all(axis=1)][0] if np.isfinite(meas).any() else meas
    return meas - pred


def _levels(st, scale_on=1.0):
    return dict(on=1.0 * scale_on, off=st.k_off / st.k_on * scale_on)


def _refine(t, d, a, b, w):
    """Onset and end from hinge fits of the cumulative discrepancy ``d``."""
    mid = 0.5 * (t[a] + t[b])
    # the first window that clearly sees a fault is centred at most about w/4 after
    # it starts for any fault big enough to be found; earlier samples are baseline
    # (a smoothed truth track rings before a stop, which must not pull the onset)
    t0 = _hinge(t, d, t[a] - w - 0.3, mid, "start", t0_lo=t[a] - 0.25 * w - 0.04)
    t1 = _hinge(t, d, mid, t[b] + w + 0.3, "end", t0_hi=t[b] + 0.25 * w + 0.04)
    t0 = t[a] if t0 is None else t0
    t1 = t[b] if t1 is None else t1
    if t1 < t0:
        t0, t1 = min(t0, t1), max(t0, t1)
    return t0, t1


def _affected(source_poses, tr, t0, t1):
    if not source_poses:
        return ()
    pad = 0.2
    ta, tb = t0 - pad, t1 + pad
    qa, qb = tr.pose(np.array([ta])), tr.pose(np.array([tb]))
    sxy, sh = tr.sigma(np.array([ta, tb]))
    lim_xy = max(3 * math.sqrt(float((sxy**2).sum())), 0.01)
    lim_h = max(3 * math.sqrt(float((sh**2).sum())), math.radians(1.0))
    out = []
    for name, (ts, poses) in source_poses.items():
        pa, pb = interpolate_poses([ta, tb], ts, poses)
        if not (np.isfinite(pa).all() and np.isfinite(pb).all() and np.isfinite(qa).all()
                and np.isfinite(qb).all()):
            continue
        e = relative_pose(relative_pose(qa, qb), relative_pose(pa, pb))[0]
        if math.hypot(e[0], e[1]) > lim_xy or abs(e[2]) > lim_h:
            out.append(name)
    return tuple(out)


def detect_events(truth, wheel_travel, robot, *, imu_heading=None, source_poses=None,
                  settings: EventSettings | None = None) -> EventResult:
    """Find slip, shove, pod-lift, impact and heading-jump events.

    Parameters
    ----------
    truth : DataFrame
        Truth track (video clock): ``t_s, x_m, y_m, heading_rad, sigma_xy_m,
        sigma_heading_rad`` and optionally ``detected, interpolated``.
    wheel_travel : DataFrame or None
        ``t_s`` (video clock) and one column per wheel name with its cumulative rim
        travel, wheel sign applied [m].
    robot : RobotProfile
        Wheel geometry; powered wheels are drive wheels, the others tracking wheels.
    imu_heading : DataFrame, optional
        ``t_s`` (video clock), ``heading_rad`` (continuous) from the IMU.
    source_poses : dict of str -> (ndarray (M,), ndarray (M, 3)), optional
        Per odometry source, video times and poses (any frame): to list the sources
        affected, and to cross-check the truth (see "Truth glitches").
    settings : EventSettings, optional

    Returns
    -------
    EventResult
    """
    st = settings or EventSettings()
    tr = _Truth(truth)
    warn = []
    if tr.tt.size < 10:
        return EventResult((), {}, ("events not detected: fewer than 10 truth samples",))
    t = tr.tt
    have = set(wheel_travel.columns) if wheel_travel is not None else set()
    drive = [w for w in robot.wheels if w.powered and w.name in have]
    pods = [w for w in robot.wheels if not w.powered and w.name in have]
    src = source_poses or {}
    pair = _independent_pair(robot, list(src))
    glitch = (_truth_glitches(tr, t, src, pair, st) if pair is not None
              else np.zeros(len(t), dtype=bool))
    scan = _Scan(tr, t, tr.pose(t), st, src, glitch)
    drive_bad = np.zeros(len(t))
    if drive:
        drive_bad = _drive_wheel_events(scan, wheel_travel, drive, robot)
    else:
        warn.append("wheel slip and shove not checked: no drive-wheel counts in the log")
    if pods:
        _pod_events(scan, wheel_travel, pods, drive_bad)
    elif any(not w.powered for w in robot.wheels):
        warn.append("pod lift not checked: no tracking-wheel counts in the log")
    slip_onsets = [e.t_start_s for e in scan.events if e.kind == "wheel_slip"]
    shoves = [(e.t_start_s, e.t_end_s) for e in scan.events if e.kind == "shove"]
    _impacts(tr, t, scan.pose_t, st, scan.noise, scan.add, slip_onsets, shoves, glitch,
             scan.suppressed)
    if imu_heading is not None and len(imu_heading) >= 10:
        _heading_jumps(tr, t, scan.pose_t, imu_heading, st, scan.noise, scan.add, glitch,
                       scan.suppressed)
    elif robot.imu is not None:
        warn.append("heading jumps not checked: no IMU heading in the log")
    if scan.suppressed:
        warn.append(
            f"the truth track disagrees with two independent odometry sources ({pair[0]}, "
            f"{pair[1]}) at {len(scan.suppressed)} place(s) (first at "
            f"{min(scan.suppressed):.2f} s): no event claimed there; the footage or the "
            "tracking may be poor there")
    gaps = np.diff(t) > 0.25
    if gaps.any():
        warn.append(f"events not checked inside {int(gaps.sum())} gap(s) of the truth track "
                    f"(longest {float(np.diff(t).max()):.2f} s)")
    events = sorted(scan.events, key=lambda e: (e.t_start_s, e.kind))
    return EventResult(tuple(events), scan.noise, tuple(warn))


class _Scan:
    """What every detector of :func:`detect_events` shares, and the events found."""

    def __init__(self, tr, t, pose_t, st, src, glitch):
        self.tr, self.t, self.pose_t, self.st, self.src = tr, t, pose_t, st, src
        self.glitch = glitch
        self.events: list[Event] = []
        self.suppressed: list[float] = []
        self.noise: dict = {}

    def add(self, kind, t0, t1, mag, unit, detail):
        """Record an event; its position is the truth pose at onset."""
        t, tr = self.t, self.tr
        p = tr.pose(np.array([t0]))[0]
        if not np.isfinite(p).all():
            p = tr.pose(np.array([t[np.argmin(np.abs(t - t0))]]))[0]
        self.events.append(Event(kind, float(t0), float(t1), float(p[0]), float(p[1]),
                                 float(mag), unit, _affected(self.src, tr, t0, t1), detail))

    def spans(self, score):
        """Stretches where ``score`` crosses 1 (hysteresis), leaving out truth glitches."""
        st = self.st
        for a, b in hysteresis(self.t, score, on=1.0, off=st.k_off / st.k_on,
                               min_duration_s=st.min_duration_s, merge_gap_s=st.merge_gap_s):
            if _mostly(self.glitch, a, b):
                self.suppressed.append(float(self.t[a]))
                continue
            yield a, b


def _drive_wheel_events(scan: _Scan, wheel_travel, drive, robot) -> np.ndarray:
    """Wheel slip (a wheel turned more than the body moved) and shove (less); returns
    the per-sample drive-wheel score (pod lifts are not claimed where it is high)."""
    t, st, tr = scan.t, scan.st, scan.tr
    meas, pred, sig, u, sd = _wheel_residuals(tr, t, wheel_travel, drive, st)
    more = np.abs(meas) >= np.abs(pred)
    excess = np.where(more, np.abs(meas - pred), 0.0)
    deficit = np.where(~more, np.abs(meas - pred), 0.0)
    ks = _noise_scale(t, (meas - pred) / sig)
    scan.noise["drive_wheels"] = float(np.median(ks))
    slip_score, slip_ratio = _ratio_score(excess, meas, pred, sig, st, ks[:, None])
    shove_score, _ = _ratio_score(deficit, meas, pred, sig, st, ks[:, None])
    s_slip = np.nanmax(np.where(np.isfinite(slip_score), slip_score, -np.inf), axis=1)
    s_shove = np.nanmax(np.where(np.isfinite(shove_score), shove_score, -np.inf), axis=1)
    no_side = any(s.no_sideways for s in robot.resolved_sources()
                  if set(s.wheels) & {w.name for w in drive}) or _parallel_plain(drive)
    if no_side:
        lat = np.abs(u[:, 1])
        zl = lat / (st.k_on * sd * ks)
        rl = lat / (st.lateral_speed_on_mps * st.window_s)
        s_shove = np.fmax(s_shove, np.minimum(zl, rl))
    cum = _cumulative(t, wheel_travel, drive, tr)
    lat_cum = np.zeros(len(t))
    if no_side:
        pose_t = scan.pose_t
        step = log_increment(*relative_pose(pose_t[:-1], pose_t[1:]).T)[:, 1]
        lat_cum[1:] = np.nancumsum(step)
    for a, b in scan.spans(s_slip):
        lost = cum[b] - cum[a]
        k = int(np.nanargmax(np.abs(lost)))
        t0, t1 = _refine(t, cum[:, k], a, b, st.window_s)
        i0, i1 = np.searchsorted(t, [t0 - st.window_s / 2, t1 + st.window_s / 2])
        i1 = min(max(i1, i0 + 1), len(t))
        dl = _span(t, cum, t0, t1)
        lost_m = float(np.nanmean(np.abs(dl)))
        if lost_m < st.min_lost_m:
            continue
        seg = slip_ratio[i0:i1]
        peak = float(np.nanmax(seg)) if np.isfinite(seg).any() else float("nan")
        wk = drive[int(np.nanargmax(np.abs(dl)))].name
        scan.add("wheel_slip", t0, t1, lost_m, "m",
                 f"peak slip ratio {min(peak, 1.0):.2f}; most on wheel {wk}; "
                 + _per_wheel_mm(drive, dl))
    for a, b in scan.spans(s_shove):
        # change-point signal: how far the body has moved unseen by the drive wheels
        # (their cumulative discrepancy, and sideways travel if they cannot slide),
        # from shortly before the event
        r0 = int(np.searchsorted(t, t[a] - st.window_s - 0.3))
        unseen = np.sqrt(np.mean((cum - cum[r0]) ** 2, axis=1)
                         + (lat_cum - lat_cum[r0]) ** 2)
        t0, t1 = _refine(t, unseen, a, b, st.window_s)
        pa, pb = tr.pose(np.array([t0, t1]))
        moved = math.hypot(pb[0] - pa[0], pb[1] - pa[1])
        if moved < st.min_lost_m and abs(wrap_angle(pb[2] - pa[2])) < math.radians(2):
            continue
        scan.add("shove", t0, t1, moved, "m",
                 f"body moved {moved * 1000:.0f} mm, turned "
                 f"{math.degrees(wrap_angle(pb[2] - pa[2])):+.1f} deg; drive wheels "
                 + _per_wheel_mm(drive, _span(t, cum, t0, t1)))
    return np.fmax(np.nan_to_num(s_slip, nan=0, neginf=0),
                   np.nan_to_num(s_shove, nan=0, neginf=0))


def _per_wheel_mm(wheels, travel_m) -> str:
    return ", ".join(f"{w.name} {v * 1000:+.0f} mm" for w, v in zip(wheels, travel_m,
                                                                   strict=True))


def _pod_events(scan: _Scan, wheel_travel, pods, drive_bad) -> None:
    """Pod lift: a tracking wheel missed travel the body made (not claimed where the
    drive wheels are in trouble themselves)."""
    t, st, tr = scan.t, scan.st, scan.tr
    meas, pred, sig, _, _ = _wheel_residuals(tr, t, wheel_travel, pods, st)
    res = meas - pred
    ks = _noise_scale(t, res / sig)
    scan.noise["tracking_wheels"] = float(np.median(ks))
    score, _ = _ratio_score(np.abs(res), meas, pred, sig, st, ks[:, None])
    cum = _cumulative(t, wheel_travel, pods, tr)
    off = st.k_off / st.k_on
    for j, pod in enumerate(pods):
        for a, b in scan.spans(np.where(drive_bad < off, score[:, j], np.nan)):
            t0, t1 = _refine(t, cum[:, j], a, b, st.window_s)
            missed = float(abs(_span(t, cum[:, j:j + 1], t0, t1)[0]))
            if missed < st.min_lost_m:
                continue
            scan.add("pod_lift", t0, t1, missed, "m",
                     f"tracking wheel {pod.name} missed {missed * 1000:.0f} mm")


def _independent_pair(robot, names):
    """Two odometry sources built from disjoint wheels (drive vs tracking), or None."""
    wheels_of = {src.name: set(src.wheels) for src in robot.resolved_sources()}
    cands = [n for n in names if n in wheels_of and wheels_of[n]]
    powered = {w.name for w in robot.wheels if w.powered}
    drive = [n for n in cands if wheels_of[n] <= powered]
    pods = [n for n in cands if not wheels_of[n] & powered]
    if not drive or not pods:
        return None
    pods.sort(key=lambda n: 0 if "imu" in n else 1)
    return drive[0], pods[0]


def _truth_glitches(tr, t, source_poses, pair, st):
    """Samples where two independent odometry sources agree and the truth does not.

    Over each window of ``window_s`` the body motion (SE(2) log of the relative pose)
    of the truth and of both sources is compared. If both sources differ from the
    truth by more than ``k_on`` sigma and 1 cm (or 1 deg), while they differ from each
    other by less than half of that, the truth track is the odd one out: a tracking
    or registration error, not an event.

    Returns
    -------
    ndarray of bool, shape (N,)
    """
    w = st.window_s
    u, sd, sdh, _, _ = _window_motion(tr, t, w)
    motions = []
    for name in pair:
        ts, poses = source_poses[name]
        pa = interpolate_poses(t - w / 2, ts, poses)
        pb = interpolate_poses(t + w / 2, ts, poses)
        motions.append(log_increment(*relative_pose(pa, pb).T))
    a, b = motions
    da = np.hypot(a[:, 0] - u[:, 0], a[:, 1] - u[:, 1])
    db = np.hypot(b[:, 0] - u[:, 0], b[:, 1] - u[:, 1])
    dab = np.hypot(a[:, 0] - b[:, 0], a[:, 1] - b[:, 1])
    lim = np.maximum(st.k_on * sd, 0.01)
    off_xy = (da > lim) & (db > lim) & (dab < 0.5 * np.minimum(da, db))
    ha, hb = np.abs(a[:, 2] - u[:, 2]), np.abs(b[:, 2] - u[:, 2])
    hab = np.abs(a[:, 2] - b[:, 2])
    limh = np.maximum(st.k_on * sdh, math.radians(1.0))
    off_h = (ha > limh) & (hb > limh) & (hab < 0.5 * np.minimum(ha, hb))
    return np.nan_to_num(off_xy | off_h).astype(bool)


def _mostly(mask, a, b, frac=0.5):
    return bool(mask[a:b + 1].mean() > frac) if b >= a else False


def _span(t, cum, t0, t1):
    c = np.asarray(cum, dtype=float).reshape(len(t), -1)
    a = np.array([_interp(t0, t, c[:, i]) for i in range(c.shape[1])])
    b = np.array([_interp(t1, t, c[:, i]) for i in range(c.shape[1])])
    return b - a


def _parallel_plain(wheels):
    if not wheels:
        return False
    plain = all(abs(w.roller_rad) < 1e-9 for w in wheels)
    dirs = {round(math.sin(w.direction_rad), 6) for w in wheels}
    return plain and len(dirs) == 1


def _impacts(tr, t, pose_t, st, noise, add, slip_onsets=(), shoves=(), glitch=None,
             suppressed=None):
    w = st.impact_window_s
    pm, p0, pp = tr.pose(t - w), pose_t, tr.pose(t + w)
    acc = (pp[:, :2] - 2 * p0[:, :2] + pm[:, :2]) / w**2
    vel = (p0[:, :2] - pm[:, :2]) / w
    sp = np.hypot(vel[:, 0], vel[:, 1])
    sxy, _ = tr.sigma(t)
    sig_a = math.sqrt(6.0) * sxy / w**2
    sig_v = math.sqrt(2.0) * sxy / w
    with np.errstate(invalid="ignore", divide="ignore"):
        dirv = vel / sp[:, None]
        decel = -(acc * dirv).sum(axis=1)
    decel[sp < 3 * sig_v] = np.nan
    # noise check on sample-to-sample changes: the robot's own (slow) accelerations
    # must not count as noise, the jitter of a noisy track must
    # a smoothed track's stated sigma includes slow errors that a two-frame second
    # difference does not see, so the measured jitter may lower the level (to a fifth
    # at most); the deceleration floors still hold
    dz = np.diff(decel / sig_a) / math.sqrt(2.0)
    ks = _noise_scale(t, np.concatenate([dz, [np.nan]]), floor=0.2)
    noise["deceleration"] = float(np.median(ks))
    floor = np.full(len(t), st.impact_decel_min_mps2)
    for ts in slip_onsets:
        # the drive wheels went on turning as the body stopped: the deceleration was
        # not commanded, so a smaller one is enough
        floor[np.abs(t - ts) <= 0.15] = st.impact_decel_with_slip_mps2
    level = np.maximum(st.k_on * sig_a * ks, floor)
    score = decel / level
    for a, b in hysteresis(t, score, on=1.0, off=0.5, min_duration_s=0.0,
                           merge_gap_s=st.merge_gap_s):
        seg = decel[a:b + 1]
        k = a + int(np.nanargmax(seg))
        # parabola through the peak for a sub-sample onset (the second difference of
        # a velocity step peaks at the step)
        tk = t[k]
        if a < k < b and np.isfinite(decel[k - 1]) and np.isfinite(decel[k + 1]):
            den = decel[k - 1] - 2 * decel[k] + decel[k + 1]
            if den < 0:
                frac = float(np.clip(0.5 * (decel[k - 1] - decel[k + 1]) / den, -0.5, 0.5))
                tk = t[k] + frac * (t[k + 1] - t[k - 1]) / 2
        # the peak sits in the middle of the deceleration: the stop takes about
        # v_before / decel, so the onset is half of that earlier (at most one step)
        v0 = float(np.nanmax(sp[max(a - 3, 0):a + 1])) if np.isfinite(
            sp[max(a - 3, 0):a + 1]).any() else 0.0
        onset = tk - min(0.5 * v0 / float(decel[k]), w)
        if any(a0 <= tk <= b0 for a0, b0 in shoves):
            continue  # the body being pushed: its acceleration belongs to the shove
        near = np.abs(t - tk) <= 0.1
        if glitch is not None and glitch[near].any():
            if suppressed is not None:
                suppressed.append(float(tk))
            continue
        add("impact", onset, max(t[b], tk), float(decel[k]), "m/s^2",
            f"speed before {v0:.2f} m/s")


def _heading_jumps(tr, t, pose_t, imu, st, noise, add, glitch=None, suppressed=None):
    ti = imu["t_s"].to_numpy(float)
    hi = np.unwrap(imu["heading_rad"].to_numpy(float))
    e = _interp(t, ti, hi) - pose_t[:, 2]
    w = st.heading_window_s
    ea = _interp(t - w / 2, t, e)
    eb = _interp(t + w / 2, t, e)
    de = eb - ea
    _, sh = tr.sigma(t)
    sig = np.sqrt(2.0) * sh
    ks = _noise_scale(t, de / sig)
    noise["heading"] = float(np.median(ks))
    level = np.maximum(st.k_on * sig * ks, st.heading_jump_min_rad)
    score = np.abs(de) / level
    for a, b in hysteresis(t, score, on=1.0, off=st.k_off / st.k_on, min_duration_s=0.0,
                           merge_gap_s=st.merge_gap_s):
        if glitch is not None and _mostly(glitch, a, b):
            if suppressed is not None:
                suppressed.append(float(t[a]))
            continue
        t0, t1 = _refine(t, e, a, b, w)
        # a step sits between two samples: use them when one step carries most of it
        i0, i1 = np.searchsorted(t, [t0 - w / 2, t1 + w / 2])
        steps = np.diff(e[i0:i1 + 1])
        span = _interp(t1, t, e) - _interp(t0, t, e)
        if steps.size and np.isfinite(steps).any():
            k = i0 + int(np.nanargmax(np.abs(steps)))
            if abs(e[k + 1] - e[k]) > 0.5 * abs(span):
                t0, t1 = 0.5 * (t[k] + t[k + 1]), t[k + 1]
        before = e[(t >= t0 - 0.3) & (t <= t0)]
        after = e[(t >= t1) & (t <= t1 + 0.3)]
        jump = float(np.nanmedian(after) - np.nanmedian(before)) \
            if np.isfinite(before).any() and np.isfinite(after).any() else float(span)
        if abs(jump) < st.heading_jump_min_rad:
            continue
        add("heading_jump", t0, t1, jump, "rad", f"IMU heading jumped "
            f"{math.degrees(jump):+.1f} deg against the truth")


def events_frame(events) -> pd.DataFrame:
    """Events as the events.csv table (``sources`` joined with ';')."""
    rows = [[e.kind, e.t_start_s, e.t_end_s, e.x_m, e.y_m, e.magnitude, e.magnitude_unit,
             ";".join(e.sources), e.detail] for e in events]
    return pd.DataFrame(rows, columns=EVENT_COLUMNS)


def active_kinds(t_s, events, *, pad_s=0.0):
    """Per sample time, the event kinds active then, joined with ';' (sorted)."""
    t = np.asarray(t_s, dtype=float)
    out = [set() for _ in range(len(t))]
    for e in events:
        lo, hi = np.searchsorted(t, [e.t_start_s - pad_s, e.t_end_s + pad_s], side="left")
        hi = max(hi, lo + 1) if lo < len(t) else hi
        for k in range(lo, min(hi, len(t))):
            out[k].add(e.kind)
    return [";".join(sorted(s)) for s in out]
