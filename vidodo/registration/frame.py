"""One frame's floor registration: camera model and pose, pixels <-> floor metres.

A frame is registered when the camera's intrinsics ``K``, its distortion and its pose
relative to the floor (``rvec, tvec``, floor -> camera, OpenCV convention, floor z up)
are known. Then :meth:`FrameRegistration.image_to_floor` undistorts a pixel, casts its
ray and meets the plane ``z = height_m`` (so a marker raised above the floor is placed
where it really is), and :meth:`FrameRegistration.floor_to_image` projects back.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from ..profiles import FieldProfile
from . import projection

__all__ = ["FrameRegistration", "failed", "project_rows", "field_polygon_px",
           "floor_usable", "NAN3"]

NAN3 = np.full(3, np.nan)


def project_rows(obj, pose, rates, dt, camera_matrix, dist_coeffs, bands=32):
    """Project points each with its own pose ``(rvec + dt*rvec_rate, tvec + dt*tvec_rate)``.

    ``pose`` is ``(rvec, tvec)`` [rad, m] and ``rates`` is ``(rvec_rate, tvec_rate)``
    [rad/s, m/s].

    Points are grouped into ``bands`` equal slices of ``dt``; the pose inside a slice is
    that of its mean ``dt``. The bands are projected together in numpy
    (:func:`.projection.project_many`, OpenCV's arithmetic); a tilted-sensor lens model
    takes one ``cv2.projectPoints`` call per band.

    Returns
    -------
    ndarray of shape (N, 2)
    """
    rvec, tvec = pose
    rvec_rate, tvec_rate = rates
    obj = np.asarray(obj, float).reshape(-1, 3)
    dt = np.asarray(dt, float).ravel()
    out = np.empty((len(obj), 2))
    if len(obj) == 0:
        return out
    lo, hi = float(dt.min()), float(dt.max())
    edges = np.linspace(lo, hi + 1e-12, bands + 1)
    idx = np.clip(np.searchsorted(edges, dt, side="right") - 1, 0, bands - 1)
    count = np.bincount(idx, minlength=bands)
    # each band's mean time, summed in one pass over the points (the same poses as one
    # projectPoints call per band, to rounding)
    d_b = np.bincount(idx, weights=dt, minlength=bands) / np.maximum(count, 1)
    rvec, tvec = np.asarray(rvec, float).ravel(), np.asarray(tvec, float).ravel()
    rv_b = rvec + d_b[:, None] * np.asarray(rvec_rate, float).ravel()
    tv_b = tvec + d_b[:, None] * np.asarray(tvec_rate, float).ravel()
    if projection.supported(dist_coeffs):
        return projection.project_many(obj, projection.rodrigues_many(rv_b)[idx], tv_b[idx],
                                       camera_matrix, dist_coeffs)
    for b in np.flatnonzero(count):
        sel = idx == b
        out[sel] = cv2.projectPoints(obj[sel], rv_b[b], tv_b[b], camera_matrix,
                                     dist_coeffs)[0].reshape(-1, 2)
    return out


# --------------------------------------------------------------------------- result
@dataclass(frozen=True)
class FrameRegistration:
    """One frame's registration: camera model and pose relative to the floor."""

    t_s: float
    """Frame time on the video clock [s]."""
    ok: bool
    """True when the frame was registered."""
    camera_matrix: np.ndarray
    """Intrinsics K, ndarray of shape (3, 3) [px]."""
    dist_coeffs: np.ndarray
    """Distortion coefficients, OpenCV order (k1, k2, p1, p2, k3, ...)."""
    rvec: np.ndarray
    """Floor -> camera rotation (Rodrigues vector), ndarray of shape (3,) [rad]."""
    tvec: np.ndarray
    """Floor -> camera translation, ndarray of shape (3,) [m]."""
    rms_px: float
    """RMS residual of the observations used [px]."""
    rms_floor_m: float
    """The same residuals measured on the floor [m]."""
    n_points: int
    """Observations used (points, corners or seam samples)."""
    method: str
    """How this frame was registered ('markers', 'points', 'grid', 'tracked',
    'features', 'static', or '' when it failed)."""
    reason: str = ""
    """Why the frame could not be registered (empty when ok)."""
    warnings: tuple[str, ...] = ()
    """Caveats (estimated focal length, no distortion model, ...)."""
    readout_s: float = 0.0
    """Rolling shutter: time from reading the top row to the bottom row [s]. With a
    non-zero readout and pose rates, ``rvec, tvec`` are the pose when the top row was
    read (at ``t_s``) and row ``v`` sees the pose ``rvec + dt * rvec_rate`` (and the same
    for ``tvec``) with ``dt = v / height * readout_s``."""
    rvec_rate: np.ndarray | None = None
    """Rate of change of ``rvec`` while the frame is read, ndarray (3,) [rad/s]."""
    tvec_rate: np.ndarray | None = None
    """Rate of change of ``tvec`` while the frame is read, ndarray (3,) [m/s]."""
    prediction_px: float = 0.0
    """Error of the mapping at an image point it was not fitted to, measured by the
    self-check on clicked points left out one at a time: the RMS held-out residual less
    the fit's own residual (in quadrature) [px]; 0 when not measured. It holds the lens
    and pose error that the fit's residuals alone do not show. For a fit refined on the
    tile seams (which did not use the clicks): the clicks' RMS residual against it less
    the click noise (from the points-only fit's residuals), where an F test shows it
    (:func:`~vidodo.registration.uncertainty.held_out_excess_px`), else 0."""
    param_cov: np.ndarray | None = None
    """Covariance of the fitted parameters ``param_names`` (the fit's own, from its
    residuals), ndarray (P, P); None when not known (see
    :mod:`vidodo.registration.uncertainty`)."""
    param_names: tuple[str, ...] = ()
    """Parameters ``param_cov`` covers, in order: 'rvec', 'tvec' (three each), 'focal'
    (log focal length), 'k1', 'k2'."""
    tied_to: FrameRegistration | None = None
    """A frame registered from floor positions mapped through an earlier registration
    (tracked corners) carries that one's error as well: the registration they came from."""
    tied_share: float = 0.0
    """Share of ``tied_to``'s parameter variance still in the floor positions (1 from the
    reference alone, 1 / n when averaged over n independent seam fits) [-]."""

    @property
    def rolling(self) -> bool:
        """True when the rows of this frame see different poses."""
        return bool(self.readout_s > 0 and self.rvec_rate is not None
                    and self.tvec_rate is not None
                    and (np.any(self.rvec_rate != 0) or np.any(self.tvec_rate != 0)))

    def _row_dt(self, v_px):
        h = 2.0 * float(self.camera_matrix[1, 2]) + 1.0  # image height from cy
        return np.clip(np.asarray(v_px, float) / h, 0.0, 1.0) * self.readout_s

    @property
    def rotation(self):
        """Floor -> camera rotation matrix, ndarray of shape (3, 3)."""
        return cv2.Rodrigues(np.asarray(self.rvec, float))[0]

    @property
    def camera_centre_m(self):
        """Camera centre in the floor frame, ndarray of shape (3,) [m]."""
        return -self.rotation.T @ np.asarray(self.tvec, float)

    def homography(self, height_m=0.0):
        """Floor (x, y) at height ``height_m`` -> undistorted pixel, ndarray (3, 3)."""
        r = self.rotation
        t = np.asarray(self.tvec, float) + height_m * r[:, 2]
        return self.camera_matrix @ np.column_stack([r[:, 0], r[:, 1], t])

    def image_to_floor(self, points_px, height_m=0.0):
        """Pixels -> floor positions on the plane ``z = height_m``.

        Parameters
        ----------
        points_px : array_like of shape (N, 2)
            Distorted (as recorded) pixel positions [px].
        height_m : float or array_like of shape (N,)
            Height of the plane above the floor [m] (a raised marker's face).

        Returns
        -------
        ndarray of shape (N, 2)
            Floor (x, y) [m]; NaN where the ray does not meet the plane in front
            of the camera or the frame is not registered.
        """
        pts = np.asarray(points_px, dtype=np.float64).reshape(-1, 2)
        out = np.full((len(pts), 2), np.nan)
        if not self.ok or len(pts) == 0:
            return out
        good = np.all(np.isfinite(pts), axis=1)
        if not good.any():
            return out
        norm = cv2.undistortPoints(pts[good].reshape(-1, 1, 2), self.camera_matrix,
                                   self.dist_coeffs).reshape(-1, 2)
        h = np.broadcast_to(np.asarray(height_m, float), (len(pts),))[good]
        out[good] = self.rays_to_floor(norm, pts[good, 1], h)
        return out

    def rays_to_floor(self, norm, v_px, height_m=0.0):
        """Where undistorted rays meet the plane ``z = height_m``, ndarray (N, 2) [m].

        The second half of :meth:`image_to_floor`, for callers that map the same pixels
        through several poses of one camera (the rays depend on the lens alone).

        Parameters
        ----------
        norm : ndarray of shape (N, 2)
            Normalised image coordinates (``cv2.undistortPoints`` without ``P``).
        v_px : ndarray of shape (N,)
            The pixels' rows [px] (which pose saw them, with a rolling shutter).
        height_m : float or ndarray of shape (N,)
            Height of the plane [m].
        """
        rays_cam = np.column_stack([norm, np.ones(len(norm))])
        h = np.broadcast_to(np.asarray(height_m, float), (len(norm),))
        if self.rolling:
            dt = self._row_dt(v_px)[:, None]  # each row its own pose
            r = projection.rodrigues_many(np.asarray(self.rvec, float) + dt * self.rvec_rate)
            rays = np.einsum("ni,nij->nj", rays_cam, r)
            c = -np.einsum("nji,nj->ni", r, np.asarray(self.tvec, float) + dt * self.tvec_rate)
        else:
            rays = rays_cam @ self.rotation  # R.T @ ray
            c = np.broadcast_to(self.camera_centre_m, (len(rays), 3))
        with np.errstate(divide="ignore", invalid="ignore"):
            s = (h - c[:, 2]) / rays[:, 2]
        xy = c[:, :2] + s[:, None] * rays[:, :2]
        xy[~(s > 0)] = np.nan
        return xy

    def floor_to_image(self, points_m):
        """Floor positions -> distorted pixels.

        Parameters
        ----------
        points_m : array_like of shape (N, 2) or (N, 3)
            Floor (x, y) or (x, y, z) [m].

        Returns
        -------
        ndarray of shape (N, 2)
            Pixels [px]; NaN when the frame is not registered.
        """
        pts = np.asarray(points_m, dtype=np.float64)
        pts = pts.reshape(-1, pts.shape[-1] if pts.ndim > 1 else 2)
        if pts.shape[1] == 2:
            pts = np.column_stack([pts, np.zeros(len(pts))])
        if not self.ok or len(pts) == 0:
            return np.full((len(pts), 2), np.nan)
        img, _ = cv2.projectPoints(pts, np.asarray(self.rvec, float),
                                   np.asarray(self.tvec, float), self.camera_matrix,
                                   self.dist_coeffs)
        img = img.reshape(-1, 2)
        if self.rolling:  # find the row each point is read at (fixed point, converges fast)
            for _ in range(3):
                img = project_rows(pts, (self.rvec, self.tvec), (self.rvec_rate, self.tvec_rate),
                                   self._row_dt(img[:, 1]), self.camera_matrix,
                                   self.dist_coeffs, bands=64)
        return img

    def summary(self) -> dict:
        """Flat dict of the scalar fields (for a per-frame CSV)."""
        c = self.camera_centre_m if self.ok else NAN3
        return {"t_s": self.t_s, "ok": self.ok, "method": self.method,
                "rms_px": self.rms_px, "rms_floor_mm": self.rms_floor_m * 1e3,
                "n_points": self.n_points, "focal_px": float(self.camera_matrix[0, 0]),
                "camera_x_m": c[0], "camera_y_m": c[1], "camera_z_m": c[2],
                "reason": self.reason}


def failed(t_s, reason, camera_matrix=None, dist_coeffs=None) -> FrameRegistration:
    """A registration that did not succeed, carrying its reason."""
    k = np.full((3, 3), np.nan) if camera_matrix is None else camera_matrix
    d = np.zeros(5) if dist_coeffs is None else dist_coeffs
    return FrameRegistration(float(t_s), False, k, d, NAN3.copy(), NAN3.copy(), math.nan,
                             math.nan, 0, "", reason)


def field_polygon_px(reg: FrameRegistration, field_profile: FieldProfile, *, margin_m=0.0,
                     samples=12):
    """The field outline in the image (edges sampled so distortion bends them), (K, 2)."""
    sx, sy = field_profile.size_m
    m = margin_m
    s = np.linspace(0, 1, samples, endpoint=False)
    edges = [np.column_stack([-m + (sx + 2 * m) * s, np.full_like(s, -m)]),
             np.column_stack([np.full_like(s, sx + m), -m + (sy + 2 * m) * s]),
             np.column_stack([sx + m - (sx + 2 * m) * s, np.full_like(s, sy + m)]),
             np.column_stack([np.full_like(s, -m), sy + m - (sy + 2 * m) * s])]
    return reg.floor_to_image(np.vstack(edges))


def floor_usable(reg, field_profile, shape, ignore=None, margin_m=0.0):
    """Bool image: pixels on the field (grown by margin_m) and not ignored."""
    poly = field_polygon_px(reg, field_profile, margin_m=margin_m)
    usable = np.zeros(shape[:2], np.uint8)
    if np.all(np.isfinite(poly)):
        cv2.fillPoly(usable, [np.round(poly).astype(np.int32)], 1)
    usable = usable.astype(bool)
    if ignore is not None:
        usable &= ~np.asarray(ignore, bool)
    return usable


