"""Planar rigid motion (SE(2)): angle wrapping, the exponential map, pose composition.

Poses are ``(x_m, y_m, heading_rad)`` in the floor frame; heading is counter-clockwise
from floor +x. Body-frame twists and increments are ordered ``(vx, vy, omega)``: x
forward, y to the left, omega counter-clockwise.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "wrap_angle",
    "rotate",
    "exp_increment",
    "log_increment",
    "integrate_increments",
    "integrate_twist",
    "relative_pose",
    "to_body_frame",
    "interpolate_poses",
]


def wrap_angle(angle_rad):
    """Wrap angles to [-pi, pi).

    Parameters
    ----------
    angle_rad : array_like
        Angles [rad].

    Returns
    -------
    ndarray or float
        The same angles wrapped to [-pi, pi) [rad].

    Examples
    --------
    >>> float(wrap_angle(3 * np.pi / 2))
    -1.5707963267948966
    """
    a = np.asarray(angle_rad, dtype=float)
    out = (a + np.pi) % (2.0 * np.pi) - np.pi
    return float(out) if out.ndim == 0 else out


def rotate(dx, dy, angle_rad):
    """Rotate planar vectors counter-clockwise by ``angle_rad``.

    Returns
    -------
    tuple of ndarray
        Rotated components ``(x, y)``.
    """
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    return c * dx - s * dy, s * dx + c * dy


def exp_increment(ux, uy, dtheta):
    """Body-frame displacement after moving with a constant twist for one step.

    The step's twist times its duration is ``(ux, uy, dtheta)`` (exponential
    coordinates). The robot follows a constant-curvature arc, so the displacement
    is exact, not an Euler approximation (Lynch & Park, *Modern Robotics*, 2017,
    section 13.4).

    Parameters
    ----------
    ux, uy : array_like
        Along-body and sideways components of twist times duration [m].
    dtheta : array_like
        Heading change over the step [rad].

    Returns
    -------
    tuple of ndarray
        Displacement ``(dx_b, dy_b)`` in the body frame at the start of the step [m].
    """
    ux = np.asarray(ux, dtype=float)
    uy = np.asarray(uy, dtype=float)
    a, b = _arc_coefficients(dtheta)
    return a * ux - b * uy, b * ux + a * uy


def log_increment(dx_m, dy_m, dtheta_rad):
    """Exponential coordinates ``(ux, uy, dtheta)`` of a relative pose.

    Inverse of :func:`exp_increment`: the constant twist times duration that carries
    the body from the start pose to the relative pose ``(dx, dy, dtheta)`` on one
    constant-curvature arc (Lynch & Park, *Modern Robotics*, 2017, section 13.4).

    Returns
    -------
    ndarray of shape (N, 3)
        ``(ux_m, uy_m, dtheta_rad)``.
    """
    dx = np.asarray(dx_m, dtype=float)
    dy = np.asarray(dy_m, dtype=float)
    th = np.asarray(dtheta_rad, dtype=float)
    a, b = _arc_coefficients(th)
    det = a * a + b * b
    ux = (a * dx + b * dy) / det
    uy = (-b * dx + a * dy) / det
    return np.column_stack([np.atleast_1d(ux), np.atleast_1d(uy), np.atleast_1d(th)])


def _arc_coefficients(dtheta):
    """sin(th)/th and (1 - cos th)/th, with their series for small angles."""
    th = np.asarray(dtheta, dtype=float)
    small = np.abs(th) < 1e-6
    th_safe = np.where(small, 1.0, th)
    a = np.where(small, 1.0 - th**2 / 6.0, np.sin(th_safe) / th_safe)
    b = np.where(small, th / 2.0 - th**3 / 24.0, (1.0 - np.cos(th_safe)) / th_safe)
    return a, b


def integrate_increments(increments, start_pose=(0.0, 0.0, 0.0)):
    """Chain body-frame increments into floor-frame poses with the SE(2) exponential.

    Parameters
    ----------
    increments : ndarray of shape (N, 3)
        Per-step ``(ux_m, uy_m, dtheta_rad)``: twist times step duration, in the body
        frame at the start of each step.
    start_pose : tuple of float
        ``(x_m, y_m, heading_rad)`` before the first step.

    Returns
    -------
    ndarray of shape (N + 1, 3)
        Poses ``(x_m, y_m, heading_rad)``, the first being ``start_pose``. Heading is
        continuous (not wrapped).
    """
    inc = np.asarray(increments, dtype=float).reshape(-1, 3)
    x0, y0, h0 = (float(v) for v in start_pose)
    heading = h0 + np.concatenate([[0.0], np.cumsum(inc[:, 2])])
    dxb, dyb = exp_increment(inc[:, 0], inc[:, 1], inc[:, 2])
    dxw, dyw = rotate(dxb, dyb, heading[:-1])
    x = x0 + np.concatenate([[0.0], np.cumsum(dxw)])
    y = y0 + np.concatenate([[0.0], np.cumsum(dyw)])
    return np.column_stack([x, y, heading])


def integrate_twist(t_s, twist, start_pose=(0.0, 0.0, 0.0)):
    """Integrate a body twist sampled at ``t_s`` (held constant over each interval).

    Parameters
    ----------
    t_s : ndarray of shape (N,)
        Sample times [s], non-decreasing.
    twist : ndarray of shape (N, 3)
        Body twist ``(vx_mps, vy_mps, omega_radps)``; row k holds over [t_k, t_k+1).
    start_pose : tuple of float
        Pose at ``t_s[0]``.

    Returns
    -------
    ndarray of shape (N, 3)
        Pose at each sample time.
    """
    t = np.asarray(t_s, dtype=float)
    tw = np.asarray(twist, dtype=float).reshape(-1, 3)
    dt = np.diff(t)
    return integrate_increments(tw[:-1] * dt[:, None], start_pose)


def relative_pose(pose_a, pose_b):
    """Pose of ``b`` expressed in the frame of ``a`` (``a^-1 b``), row by row.

    Parameters
    ----------
    pose_a, pose_b : ndarray of shape (N, 3)
        Poses ``(x_m, y_m, heading_rad)``.

    Returns
    -------
    ndarray of shape (N, 3)
        Relative poses; heading wrapped to [-pi, pi).
    """
    a = np.asarray(pose_a, dtype=float).reshape(-1, 3)
    b = np.asarray(pose_b, dtype=float).reshape(-1, 3)
    dx, dy = rotate(b[:, 0] - a[:, 0], b[:, 1] - a[:, 1], -a[:, 2])
    return np.column_stack([dx, dy, wrap_angle(b[:, 2] - a[:, 2])])


def to_body_frame(dx_m, dy_m, heading_rad):
    """Split a floor-frame error vector into along-track and cross-track parts.

    Returns
    -------
    tuple of ndarray
        ``(along_m, cross_m)``: the component along the heading and the one 90 degrees
        to its left.
    """
    return rotate(dx_m, dy_m, -np.asarray(heading_rad, dtype=float))


def interpolate_poses(t_query_s, t_s, poses):
    """Poses at ``t_query_s``, linear in position and in the unwrapped heading.

    Parameters
    ----------
    t_query_s : array_like of shape (M,)
        Times wanted [s].
    t_s : array_like of shape (N,)
        Increasing sample times [s].
    poses : array_like of shape (N, 3)
        ``(x_m, y_m, heading_rad)`` at ``t_s``.

    Returns
    -------
    ndarray of shape (M, 3)
        Interpolated poses, heading continuous (not wrapped); NaN outside the span of
        ``t_s`` and everywhere when fewer than two samples are given.

    Examples
    --------
    Halfway between headings of 170 and -170 degrees the heading is 180 (through the
    wrap, not through zero):

    >>> p = interpolate_poses([0.5], [0.0, 1.0], [[0, 0, np.radians(170)],
    ...                                           [2, 0, np.radians(-170)]])
    >>> np.round([p[0, 0], np.degrees(p[0, 2])], 6).tolist()
    [1.0, 180.0]
    """
    tq = np.asarray(t_query_s, dtype=float).ravel()
    t = np.asarray(t_s, dtype=float).ravel()
    p = np.asarray(poses, dtype=float).reshape(-1, 3)
    out = np.full((tq.size, 3), np.nan)
    if t.size < 2:
        return out
    for i, v in enumerate((p[:, 0], p[:, 1], np.unwrap(p[:, 2]))):
        out[:, i] = np.interp(tq, t, v, left=np.nan, right=np.nan)
    return out
