"""Do the encoders agree with each other? Sign slips and swapped columns, from the log alone.

Every wheel reads its contact point's velocity along its rolling direction (the single
wheel model, :mod:`vidodo.wheels`), so a set of wheels that over-determines the body
motion (more wheels, plus the IMU's turn rate, than the body has degrees of freedom)
must agree: the rim travel of each wheel over a short interval equals ``A @ twist``.
A wrong ``sign`` or two swapped ``column`` names breaks that agreement for every moving
interval, not just during a slip. So each single edit of the profile (flip one wheel's
sign, swap two wheels' columns, flip the IMU's sign) is tried, and the one that makes
the wheels agree best is named if it is far better than the profile as written.

The score of a configuration is the least-squares residual of all moving intervals
over their total rim travel (both squared), after leaving out the worst tenth of the
intervals so that short slips and bumps do not decide.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .wheels import wheel_rows

__all__ = ["EncoderVerdict", "EncoderSettings", "check_encoders", "interval_travel"]


@dataclass(frozen=True)
class EncoderSettings:
    """Thresholds of the encoder agreement check."""

    interval_s: float = 0.1
    """Length of the intervals the log is cut into [s]."""
    moving_m: float = 0.004
    """An interval counts as moving when some wheel rolls this far [m]."""
    good_score: float = 0.05
    """Residual share below which the wheels agree (a few percent: slip, noise)."""
    better_factor: float = 4.0
    """A single edit is named when it lowers the residual share by this factor."""
    trim_share: float = 0.1
    """Share of the worst intervals left out of the score."""


@dataclass(frozen=True)
class EncoderVerdict:
    """Outcome of :func:`check_encoders`."""

    status: str
    """'pass', 'warn' or 'fail'."""
    score: float
    """Residual share of the profile as written (0: perfect agreement)."""
    best_edit: str
    """The single edit that fits best ('' when the profile as written is best)."""
    best_score: float
    motion: str
    """How each wheel moved while driving straight and while turning."""
    still: tuple[str, ...]
    """Wheels that never moved while others did."""
    detail: str


def interval_travel(t_s, ticks, wheels, imu_rad=None, interval_s=0.1):
    """Rim travel per wheel and heading change per interval.

    Parameters
    ----------
    t_s : ndarray of shape (N,)
        Sample times [s], increasing.
    ticks : ndarray of shape (N, W)
        Unwrapped cumulative counts per wheel, sign not applied.
    wheels : sequence of Wheel
        The wheel whose counts are in column ``i`` of ``ticks``.
    imu_rad : ndarray of shape (N,), optional
        Continuous heading [rad].
    interval_s : float

    Returns
    -------
    travel_m : ndarray of shape (M, W)
    dtheta_rad : ndarray of shape (M,) or None
    """
    t = np.asarray(t_s, float)
    edges = np.arange(t[0], t[-1] + 1e-12, interval_s)
    if edges.size < 3:
        edges = np.linspace(t[0], t[-1], 3)
    scale = np.array([w.sign * w.metres_per_tick for w in wheels])
    at = np.column_stack([np.interp(edges, t, ticks[:, i]) for i in range(ticks.shape[1])])
    travel = np.diff(at, axis=0) * scale
    dth = None if imu_rad is None else np.diff(np.interp(edges, t, imu_rad))
    return travel, dth


def _unknowns(wheels) -> list[int]:
    """Body motions the wheels can have: (vx, omega) for parallel plain wheels."""
    plain = all(abs(w.roller_rad) < 1e-9 for w in wheels)
    parallel = all(abs(math.sin(w.direction_rad)) < 1e-9 for w in wheels)
    return [0, 2] if plain and parallel else [0, 1, 2]


def _score(travel, dth, rows, cols, lever_m, trim_share):
    """Residual share of a least-squares fit of every interval; also the twists."""
    a = rows[:, cols]
    b = travel
    if dth is not None:
        imu_row = np.zeros((1, len(cols)))
        imu_row[0, cols.index(2)] = lever_m
        a = np.vstack([a, imu_row])
        b = np.column_stack([travel, dth * lever_m])
    sol, *_ = np.linalg.lstsq(a, b.T, rcond=None)
    resid = b - (a @ sol).T
    r2 = np.sum(resid**2, axis=1)
    s2 = np.sum(b**2, axis=1)
    keep = r2 <= np.quantile(r2, 1.0 - trim_share) if r2.size > 5 else np.ones_like(r2, bool)
    twist = np.zeros((b.shape[0], 3))
    twist[:, cols] = sol.T
    return float(np.sum(r2[keep]) / max(np.sum(s2[keep]), 1e-12)), twist


def _edits(ticks, wheels, imu):
    """(label, ticks, imu sign factor) for the profile and each single edit."""
    out = [("", ticks, 1.0)]
    n = len(wheels)
    for i in range(n):
        t = ticks.copy()
        t[:, i] = -t[:, i]
        out.append((f"sign of wheel '{wheels[i].name}' is backwards: set sign = "
                    f"{-wheels[i].sign}", t, 1.0))
    for i in range(n):
        for j in range(i + 1, n):
            t = ticks.copy()
            t[:, [i, j]] = t[:, [j, i]]
            out.append((f"columns of wheels '{wheels[i].name}' and '{wheels[j].name}' are "
                        f"swapped: give '{wheels[i].name}' column '{wheels[j].column}' and "
                        f"'{wheels[j].name}' column '{wheels[i].column}'", t, 1.0))
    if imu is not None:
        out.append(("the IMU heading turns the wrong way: flip sign in [imu]", ticks, -1.0))
    return out


def _motion_text(travel, twist, wheels, rows):
    """How each wheel moved while driving straight and while turning, against the
    direction the profile expects."""
    speed = np.hypot(twist[:, 0], twist[:, 1])
    parts = []
    for label, sel, col in (("driving straight", (speed > 0.004) & (np.abs(twist[:, 2]) <
                                                                    0.2 * speed / 0.2), 0),
                            ("turning on the spot", np.abs(twist[:, 2]) * 0.2 > 2 * speed, 2)):
        if sel.sum() < 3:
            continue
        ref = np.sign(twist[sel, col])
        seen = []
        for i, w in enumerate(wheels):
            expect = np.sign(rows[i, col]) if abs(rows[i, col]) > 1e-9 else 0.0
            got = np.sign(np.median(np.sign(travel[sel, i]) * ref))
            mark = {1.0: "+", -1.0: "-", 0.0: "0"}[float(got)]
            want = {1.0: "+", -1.0: "-", 0.0: "0"}[float(expect)]
            seen.append(f"{w.name} {mark}" + ("" if mark == want else f" (expected {want})"))
        parts.append(f"{label}: " + ", ".join(seen))
    return "; ".join(parts)


def check_encoders(t_s, ticks, wheels, imu_rad=None, settings=EncoderSettings()):
    """Check that the encoders agree; name the one edit that makes them agree.

    Parameters
    ----------
    t_s : ndarray of shape (N,)
        Sample times [s].
    ticks : ndarray of shape (N, W)
        Unwrapped cumulative counts in the columns the profile names, sign not applied.
    wheels : sequence of Wheel
    imu_rad : ndarray of shape (N,), optional
        IMU heading [rad], continuous, the profile's sign and scale applied.
    settings : EncoderSettings

    Returns
    -------
    EncoderVerdict
    """
    wheels = list(wheels)
    travel, dth = interval_travel(t_s, ticks, wheels, imu_rad, settings.interval_s)
    moving = np.max(np.abs(travel), axis=1) > settings.moving_m
    if dth is not None:
        moving |= np.abs(dth) > math.radians(1.0)
    still = tuple(w.name for i, w in enumerate(wheels)
                  if moving.any() and np.sum(np.abs(travel[moving, i])) <
                  0.01 * np.max(np.sum(np.abs(travel[moving]), axis=0)))
    if moving.sum() < 5:
        return EncoderVerdict("warn", math.nan, "", math.nan, "", still,
                              "the log shows almost no motion: nothing to compare")
    rows = wheel_rows(wheels)
    cols = _unknowns(wheels)
    lever = float(np.median(np.abs(rows[:, 2]))) or 0.1
    n_meas = len(wheels) + (dth is not None)
    if n_meas <= len(cols):
        return EncoderVerdict(
            "warn", math.nan, "", math.nan, "", still,
            f"{len(wheels)} wheels{' and the IMU' if dth is not None else ''} cannot be "
            "checked against each other (no redundancy); look at the robot picture and "
            "check each sign by pushing the robot forward by hand")
    results = []
    for label, t, imu_sign in _edits(ticks, wheels, dth):
        tr, _ = interval_travel(t_s, t, wheels, None, settings.interval_s)
        d = None if dth is None else dth * imu_sign
        sc, tw = _score(tr[moving], None if d is None else d[moving], rows, cols, lever,
                        settings.trim_share)
        results.append((sc, label, tw))
    score0, _, twist0 = results[0]
    best = min(results, key=lambda r: r[0])
    motion = _motion_text(travel[moving], best[2], wheels, rows)
    if best[1] and best[0] * settings.better_factor < score0:
        return EncoderVerdict("fail", score0, best[1], best[0], motion, still,
                              f"the wheels disagree ({score0:.0%} of their travel left "
                              f"unexplained); with this one change {best[0]:.1%}")
    if still:
        return EncoderVerdict("fail", score0, "", best[0], motion, still,
                              f"wheel(s) {', '.join(still)} never moved while the others did")
    if score0 <= settings.good_score:
        return EncoderVerdict("pass", score0, "", score0, motion, still,
                              f"wheels and IMU agree ({score0:.1%} of travel unexplained)")
    return EncoderVerdict("warn", score0, "", best[0], motion, still,
                          f"the wheels agree only roughly ({score0:.0%} of travel "
                          "unexplained) and no single sign or column change explains it; "
                          "check positions, radii and ticks per revolution")
