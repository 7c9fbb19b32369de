"""Pinhole projection with lens distortion for many poses at once (numpy).

``cv2.projectPoints`` and ``cv2.Rodrigues`` take one pose per call; a rolling-shutter
frame sees a different pose in every row, and calling OpenCV once per row band costs
far more in call overhead than in arithmetic. These functions do the same arithmetic
over arrays, each point with its own rotation and translation, in the order of
OpenCV's ``cvProjectPoints2Internal`` (calib3d, ``calibration.cpp``), so results agree
with OpenCV's to rounding (``tests/test_projection.py`` checks them against it).

Distortion model: OpenCV's (Brown-Conrady radial and tangential terms, the rational
model's ``k4..k6`` and the thin-prism ``s1..s4``); the tilted-sensor terms (14
coefficients with a non-zero tilt) are not handled here (:func:`supported` says so).
"""

from __future__ import annotations

import numpy as np

__all__ = ["rodrigues_many", "project_many", "supported"]


def rodrigues_many(rvecs):
    """Rotation matrices of many Rodrigues vectors, ndarray (N, 3, 3).

    ``R = cos(a) I + (1 - cos(a)) k k^T + sin(a) [k]_x`` with ``a = |r|``, ``k = r / a``
    (Rodrigues' formula, summed as ``cv2.Rodrigues`` does); the identity below machine
    epsilon.

    Parameters
    ----------
    rvecs : array_like of shape (N, 3)
        Rotation vectors [rad].
    """
    r = np.asarray(rvecs, float).reshape(-1, 3)
    theta = np.sqrt(r[:, 0] * r[:, 0] + r[:, 1] * r[:, 1] + r[:, 2] * r[:, 2])
    small = theta < np.finfo(float).eps
    k = r * np.where(small, 0.0, 1.0 / np.where(small, 1.0, theta))[:, None]
    c = np.where(small, 1.0, np.cos(theta))
    s = np.where(small, 0.0, np.sin(theta))
    c1 = 1.0 - c
    kx, ky, kz = k[:, 0], k[:, 1], k[:, 2]
    # term by term as cv2.Rodrigues sums them: c I + c1 k k^T + s [k]_x
    out = np.empty((len(r), 3, 3))
    out[:, 0, 0] = c + c1 * (kx * kx)
    out[:, 0, 1] = c1 * (kx * ky) - s * kz
    out[:, 0, 2] = c1 * (kx * kz) + s * ky
    out[:, 1, 0] = c1 * (kx * ky) + s * kz
    out[:, 1, 1] = c + c1 * (ky * ky)
    out[:, 1, 2] = c1 * (ky * kz) - s * kx
    out[:, 2, 0] = c1 * (kx * kz) - s * ky
    out[:, 2, 1] = c1 * (ky * kz) + s * kx
    out[:, 2, 2] = c + c1 * (kz * kz)
    return out


def _coefficients(dist_coeffs):
    """OpenCV's 14 distortion coefficients, zero-padded, ndarray (14,)."""
    d = np.zeros(14)
    given = np.asarray(dist_coeffs if dist_coeffs is not None else [], float).ravel()
    d[:min(len(given), 14)] = given[:14]
    return d


def supported(dist_coeffs) -> bool:
    """True when :func:`project_many` handles this distortion (no sensor tilt)."""
    d = _coefficients(dist_coeffs)
    return bool(d[12] == 0.0 and d[13] == 0.0)


def project_many(obj, rot, tvec, camera_matrix, dist_coeffs):
    """Project points, each with its own pose, to distorted pixels.

    Parameters
    ----------
    obj : array_like of shape (N, 3)
        Points in the world (floor) frame [m].
    rot : array_like of shape (N, 3, 3) or (3, 3)
        World -> camera rotation of each point (or one for all).
    tvec : array_like of shape (N, 3) or (3,)
        World -> camera translation of each point (or one for all) [m].
    camera_matrix : array_like of shape (3, 3)
        Intrinsics ``fx, fy, cx, cy`` [px] (the skew entry is ignored, as OpenCV does).
    dist_coeffs : array_like
        OpenCV distortion coefficients (up to 12, or 14 with zero tilt).

    Returns
    -------
    ndarray of shape (N, 2)
        Pixels [px].

    Raises
    ------
    ValueError
        For a tilted-sensor model (see :func:`supported`).
    """
    if not supported(dist_coeffs):
        raise ValueError("tilted-sensor distortion is not handled; use cv2.projectPoints")
    k = _coefficients(dist_coeffs)
    p = np.asarray(obj, float).reshape(-1, 3)
    r = np.broadcast_to(np.asarray(rot, float), (len(p), 3, 3))
    t = np.broadcast_to(np.asarray(tvec, float).reshape(-1, 3), (len(p), 3))
    X, Y, Z = p[:, 0], p[:, 1], p[:, 2]
    x = r[:, 0, 0] * X + r[:, 0, 1] * Y + r[:, 0, 2] * Z + t[:, 0]
    y = r[:, 1, 0] * X + r[:, 1, 1] * Y + r[:, 1, 2] * Z + t[:, 1]
    z = r[:, 2, 0] * X + r[:, 2, 1] * Y + r[:, 2, 2] * Z + t[:, 2]
    with np.errstate(divide="ignore"):
        z = np.where(z != 0, 1.0 / z, 1.0)
    x = x * z
    y = y * z
    r2 = x * x + y * y
    r4 = r2 * r2
    r6 = r4 * r2
    a1 = 2 * x * y
    a2 = r2 + 2 * x * x
    a3 = r2 + 2 * y * y
    cdist = 1 + k[0] * r2 + k[1] * r4 + k[4] * r6
    icdist2 = 1.0 / (1 + k[5] * r2 + k[6] * r4 + k[7] * r6)
    xd = x * cdist * icdist2 + k[2] * a1 + k[3] * a2 + k[8] * r2 + k[9] * r4
    yd = y * cdist * icdist2 + k[2] * a3 + k[3] * a1 + k[10] * r2 + k[11] * r4
    K = np.asarray(camera_matrix, float)
    return np.column_stack([xd * K[0, 0] + K[0, 2], yd * K[1, 1] + K[1, 2]])
