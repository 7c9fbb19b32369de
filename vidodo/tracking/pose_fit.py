"""Pose fit: the robot's planar pose from all visible marker corners of one frame.

Corners are mapped to the floor through the frame's registration on the plane at each
marker's height, and the pose is a rigid least-squares fit (Umeyama, IEEE TPAMI
13(4):376, 1991, without scale) with its covariance for 1 px corner noise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..profiles import marker_corners_local

__all__ = ["PoseFix", "fit_pose"]


# ------------------------------------------------------------------- pose fitting
@dataclass(frozen=True)
class PoseFix:
    """The robot pose fitted to one frame's marker corners."""

    x_m: float
    y_m: float
    heading_rad: float
    cov_unit: np.ndarray
    """Covariance of (x, y, heading) for 1 px corner noise, shape (3, 3) [m, rad]."""
    chi2_unit: float
    """Sum of squared residuals whitened for 1 px corner noise [px^2]."""
    dof: int
    """Residual degrees of freedom (2 x corners - 3)."""
    scale: float
    """Size of the marker set seen / size in the profile (1 if sizes are right)."""
    m_per_px: float
    """Floor metres per image pixel at the marker (RMS over axes and corners) [m/px]."""
    floor_m: np.ndarray = None
    """Corners mapped to the floor, ndarray of shape (N, 2) [m]."""
    resid_m: np.ndarray = None
    """Observed minus fitted corner positions, ndarray of shape (N, 2) [m]."""
    weight: np.ndarray = None
    """Inverse floor covariance of each corner for 1 px noise, shape (N, 2, 2) [1/m^2]."""
    jac: np.ndarray = None
    """Jacobian of the fitted corners w.r.t. (x, y, heading), shape (N, 2, 3)."""


def _body_corners(marker):
    """Marker corners in the body frame, ndarray of shape (4, 2) [m]."""
    loc = marker_corners_local(marker.size_m)
    c, s = math.cos(marker.yaw_rad), math.sin(marker.yaw_rad)
    return loc @ np.array([[c, s], [-s, c]]) + (marker.x_m, marker.y_m)


def fit_pose(detections, markers, registration) -> PoseFix | None:
    """Fit the robot's floor pose to the corners of its markers in one frame.

    Each corner is mapped to the floor on the plane at its marker's height, then the
    body-frame corner layout is fitted to them by rigid least squares (Umeyama 1991
    without scale; the scale is kept only as a diagnostic). The covariance comes from
    the local image-to-floor Jacobian of each corner (finite differences of 1 px).

    Parameters
    ----------
    detections : list of Detection
    markers : sequence of profiles.Marker
    registration : FrameRegistration
        Must provide ``image_to_floor(points_px, height_m)``.

    Returns
    -------
    PoseFix or None
        None if the corners could not be mapped to the floor.
    """
    body, floor, jac = [], [], []
    for d in detections:
        m = markers[d.marker_index]
        pts = np.vstack([d.corners_px, d.corners_px + (1.0, 0.0), d.corners_px + (0.0, 1.0)])
        f = np.asarray(registration.image_to_floor(pts, height_m=m.z_m), dtype=float)
        if f.shape != (12, 2) or not np.all(np.isfinite(f)):
            return None
        body.append(_body_corners(m))
        floor.append(f[:4])
        jac.append(np.stack([f[4:8] - f[:4], f[8:12] - f[:4]], axis=2))  # d floor / d (u, v)
    b = np.vstack(body)
    p = np.vstack(floor)
    J = np.concatenate(jac)  # (N, 2, 2)
    mb, mp = b.mean(0), p.mean(0)
    bc, pc = b - mb, p - mp
    sxx = float(np.sum(bc[:, 0] * pc[:, 0] + bc[:, 1] * pc[:, 1]))
    sxy = float(np.sum(bc[:, 0] * pc[:, 1] - bc[:, 1] * pc[:, 0]))
    th = math.atan2(sxy, sxx)
    c, s = math.cos(th), math.sin(th)
    R = np.array([[c, -s], [s, c]])
    t = mp - R @ mb
    scale = math.hypot(sxx, sxy) / max(float(np.sum(bc * bc)), 1e-300)
    rb = b @ R.T
    resid = rb + t - p
    # Whitened linearised least squares: corner noise 1 px -> floor covariance J J^T.
    cov_pts = J @ J.transpose(0, 2, 1)
    try:
        W = np.linalg.inv(cov_pts)
    except np.linalg.LinAlgError:
        return None
    A = np.zeros((len(b), 2, 3))
    A[:, 0, 0] = A[:, 1, 1] = 1.0
    A[:, 0, 2] = -rb[:, 1]
    A[:, 1, 2] = rb[:, 0]
    info = np.einsum("nji,njk,nkl->il", A, W, A)
    try:
        cov = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        return None
    # chi^2 of the weighted fit: one Gauss-Newton step from the unweighted (Umeyama) fit
    # lowers the whitened sum of squares by g^T info^-1 g, g = sum A^T W r (exact for the
    # linearised model), so chi2 / dof estimates the corner variance without the excess
    # of an unweighted fit.
    g = np.einsum("nji,njk,nk->i", A, W, resid)
    chi2 = max(float(np.einsum("ni,nij,nj->", resid, W, resid)) - float(g @ cov @ g), 0.0)
    m_per_px = math.sqrt(float(np.mean(np.einsum("nii->n", cov_pts))) / 2.0)
    return PoseFix(float(t[0]), float(t[1]), th, cov, chi2, 2 * len(b) - 3, scale, m_per_px,
                   p, -resid, W, A)

