"""The registration's own error carried into the robot's pose of one frame.

Each marker corner is mapped to the floor through the frame's registration; an error
in the registration's parameters moves every corner (:func:`~vidodo.registration.
uncertainty.floor_point_covariance` gives each corner's derivative ``J_n`` with respect
to them). The rigid pose fit follows its corners: to first order its pose moves by
``G = (A^T A)^-1 sum_n A_n^T J_n`` per unit of the parameters (the least-squares step
of the unweighted rigid fit :func:`~vidodo.tracking.pose_fit.fit_pose` makes), so the pose
covariance from the registration is ``G C G^T`` (linear propagation, JCGM 100:2008
section 5.1.2). Unlike corner noise this error is the same for every corner of a frame,
so the fit's residuals never show it, and for a still camera it is the same in every
frame, so the smoother cannot average it.
"""

from __future__ import annotations

import numpy as np

from ..registration.uncertainty import floor_point_covariance

__all__ = ["registration_pose_cov"]


def _gain_cov(fix, corners, heights, reg):
    """``G C G^T`` for the corners (pixels in ``reg``'s image) at their heights."""
    cov = getattr(reg, "param_cov", None)
    if cov is None:
        return np.zeros((3, 3))
    jac = np.concatenate([floor_point_covariance(reg, c, z)[1]
                          for c, z in zip(corners, heights, strict=True)])
    if not np.all(np.isfinite(jac)):
        return np.full((3, 3), np.nan)
    a = fix.jac
    g = np.linalg.solve(np.einsum("nji,njk->ik", a, a), np.einsum("nji,njp->ip", a, jac))
    return g @ np.asarray(cov, float) @ g.T


def registration_pose_cov(fix, detections, markers, reg):
    """Covariance of the fitted pose (x, y, heading) from the registration's error.

    Parameters
    ----------
    fix : PoseFix
        The frame's pose fit (its ``jac`` and ``floor_m``).
    detections : list of Detection
        The detections the fit used, in its order.
    markers : sequence of profiles.Marker
    reg : FrameRegistration
        The registration the corners were mapped through; with ``tied_to`` (tracked
        corners' floor positions from an earlier registration) that one's error is
        added, scaled by ``tied_share``.

    Returns
    -------
    ndarray (3, 3)
        [m^2, m rad, rad^2]; zeros when no covariance is known.
    """
    corners = [np.asarray(d.corners_px, float) for d in detections]
    heights = [markers[d.marker_index].z_m for d in detections]
    out = _gain_cov(fix, corners, heights, reg)
    tied = getattr(reg, "tied_to", None)
    if tied is not None and getattr(reg, "tied_share", 0.0) > 0:
        # The same floor corners as the earlier registration saw them.
        floor = np.asarray(fix.floor_m, float)
        at = np.cumsum([0] + [len(c) for c in corners])
        seen = [tied.floor_to_image(np.column_stack([floor[a:b], np.full(b - a, z)]))
                for a, b, z in zip(at[:-1], at[1:], heights, strict=True)]
        out = out + float(reg.tied_share) * _gain_cov(fix, seen, heights, tied)
    return out
