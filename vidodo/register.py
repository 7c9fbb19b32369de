"""Floor registration: every frame's pixels mapped to floor metres, and back.

A frame is registered when the camera's intrinsics ``K``, its distortion and its pose
relative to the floor (``rvec, tvec``, floor -> camera, OpenCV convention, floor z up)
are known. Then :meth:`FrameRegistration.image_to_floor` undistorts a pixel, casts its
ray and meets the plane ``z = height_m`` (so a marker raised above the floor is placed
where it really is), and :meth:`FrameRegistration.floor_to_image` projects back.

The reference registration comes from one of three sources:

* ``markers``: fiducials lying flat on the floor at the positions in the field profile,
  found with ``cv2.aruco.ArucoDetector``;
* ``points``: a CSV of pixel-to-floor correspondences for the reference frame (columns
  ``u_px, v_px, x_m, y_m``), e.g. tile corners picked in an image viewer;
* ``grid``: the tile seams found automatically and the field's N x M grid fitted to
  them (:mod:`vidodo.grid`); which corner is the origin comes from the profile's
  ``origin_hint`` or from one floor fiducial.

Markers and points give an initial fit that is then sharpened on the tile seams when
they are visible. The pose comes from the homography ``H ~ K [r1 r2 t]`` (Zhang, IEEE
PAMI 22(11), 2000, section 3.1) and is refined by Levenberg-Marquardt on all
observations. Without a camera profile the focal length is estimated from the
homography (square pixels, principal point at the image centre; Hartley & Zisserman,
*Multiple View Geometry*, 2nd ed., section 8.8), and radial distortion from the
straightness of the tile seams (grid observations only); otherwise it is set to none
and the quality report says so.

Later frames (:class:`FloorRegistrar`) are re-registered to the reference: a cheap
patch check first (a tripod that has not moved keeps the reference registration), then
floor corners tracked from the reference (:mod:`vidodo.floor_features`), floor
fiducials where visible, and feature matching with RANSAC as the last resort. A frame
that cannot be registered comes back with ``ok=False`` and a reason; no exception is
raised per frame. While the camera moves, the tile seams of some later frames are fitted
as well and the tracked corners' floor positions averaged over them, so the reference
frame's own error does not stay in every later frame.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from pathlib import Path

import cv2
import numpy as np
from scipy.optimize import least_squares

from . import floor_features
from .errors import CalibrationError, InputError
from .profiles import CameraProfile, FieldProfile

__all__ = [
    "FrameRegistration",
    "FloorRegistrar",
    "read_points_csv",
    "check_correspondences",
    "focal_from_homography",
    "pose_from_homography",
    "fit_camera",
    "pose_fit_points",
    "project_rows",
    "CameraFit",
    "detect_floor_markers",
    "field_polygon_px",
    "failed",
    "summarise",
    "RegistrationQuality",
    "METHODS",
]

METHODS = ("auto", "markers", "points", "grid")
#: Floor markers are located precisely, so two markers far apart (a long thin spread)
#: still fix the plane; hand-picked points must be spread more (0.05, the default).
MARKER_MIN_SPREAD = 0.02
NAN3 = np.full(3, np.nan)
#: Fewest seam samples for a moving frame's seam fit to count (see ``anchor_every_s``).
ANCHOR_MIN_SAMPLES = 40
#: Moving frames right after the reference that are all used for seam fits (the mean of
#: the floor positions is least certain then); later ones every ``anchor_every_s``.
ANCHOR_EAGER = 6
#: Frames whose one-pose fits give the rolling-shutter rate, and their time span [s].
#: Two (this frame and the last): a line through more frames is less noisy but lags,
#: and on the rendered hand-held runs the lag cost more than the noise.
RATE_FRAMES = 2
RATE_WINDOW_S = 0.2
#: Outlier limit over the median residual length for 2-D Gaussian noise: 0.1 % of
#: Rayleigh residuals exceed 3.72 sigma, and the median is sqrt(2 ln 2) = 1.177 sigma.
RAYLEIGH_LIMIT = 3.72 / math.sqrt(2.0 * math.log(2.0))


def project_rows(obj, rvec, tvec, rvec_rate, tvec_rate, dt, camera_matrix, dist_coeffs,
                 bands=32):
    """Project points each with its own pose ``(rvec + dt*rvec_rate, tvec + dt*tvec_rate)``.

    Points are grouped into ``bands`` equal slices of ``dt`` (one ``cv2.projectPoints``
    call each); the pose inside a slice is that of its mean ``dt``.

    Returns
    -------
    ndarray of shape (N, 2)
    """
    obj = np.asarray(obj, float).reshape(-1, 3)
    dt = np.asarray(dt, float).ravel()
    out = np.empty((len(obj), 2))
    if len(obj) == 0:
        return out
    lo, hi = float(dt.min()), float(dt.max())
    edges = np.linspace(lo, hi + 1e-12, bands + 1)
    idx = np.clip(np.searchsorted(edges, dt, side="right") - 1, 0, bands - 1)
    for b in np.unique(idx):
        sel = idx == b
        d_b = float(dt[sel].mean())
        out[sel] = cv2.projectPoints(obj[sel], np.asarray(rvec, float) + d_b * rvec_rate,
                                     np.asarray(tvec, float) + d_b * tvec_rate,
                                     camera_matrix, dist_coeffs)[0].reshape(-1, 2)
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
        rays_cam = np.column_stack([norm, np.ones(len(norm))])
        h = np.broadcast_to(np.asarray(height_m, float), (len(pts),))[good]
        if self.rolling:
            dt = self._row_dt(pts[good, 1])
            rays = np.empty_like(rays_cam)
            c = np.empty((len(dt), 3))
            for i, d in enumerate(dt):  # each row its own pose
                r = cv2.Rodrigues(np.asarray(self.rvec, float) + d * self.rvec_rate)[0]
                rays[i] = rays_cam[i] @ r
                c[i] = -r.T @ (np.asarray(self.tvec, float) + d * self.tvec_rate)
        else:
            rays = rays_cam @ self.rotation  # R.T @ ray
            c = np.broadcast_to(self.camera_centre_m, (len(rays), 3))
        with np.errstate(divide="ignore", invalid="ignore"):
            s = (h - c[:, 2]) / rays[:, 2]
        xy = c[:, :2] + s[:, None] * rays[:, :2]
        xy[~(s > 0)] = np.nan
        out[good] = xy
        return out

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
                img = project_rows(pts, self.rvec, self.tvec, self.rvec_rate, self.tvec_rate,
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


# ----------------------------------------------------------------- correspondences
def read_points_csv(path):
    """Read pixel-to-floor correspondences.

    Parameters
    ----------
    path : path-like
        CSV with a header and the columns ``u_px, v_px, x_m, y_m`` (others ignored).

    Returns
    -------
    (ndarray of shape (N, 2), ndarray of shape (N, 2))
        Pixels [px] and floor positions [m].

    Raises
    ------
    InputError
        Unreadable file, missing column, or a non-numeric value (naming the line).
    """
    import csv

    p = Path(path)
    try:
        with open(p, newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.reader(fh))
    except FileNotFoundError:
        raise InputError(f"{p}: points file not found; check the path") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{p}: cannot read the points file ({exc})") from None
    rows = [r for r in rows if any(c.strip() for c in r)]
    if not rows:
        raise InputError(f"{p}: empty; write a header u_px,v_px,x_m,y_m and one row "
                         "per point")
    header = [c.strip() for c in rows[0]]
    need = ("u_px", "v_px", "x_m", "y_m")
    missing = [c for c in need if c not in header]
    if missing:
        raise InputError(f"{p}: missing column(s) {', '.join(missing)}; the header must "
                         f"name u_px, v_px, x_m, y_m (found {', '.join(header)})")
    idx = [header.index(c) for c in need]
    values = np.empty((len(rows) - 1, 4))
    for i, row in enumerate(rows[1:]):
        line = i + 2
        for j, (col, k) in enumerate(zip(need, idx, strict=True)):
            text = row[k].strip() if k < len(row) else ""
            try:
                v = float(text)
            except ValueError:
                v = math.nan
            if not math.isfinite(v):
                raise InputError(f"{p}: line {line}, column {col}: {text!r} is not a "
                                 "number; fix or delete that row")
            values[i, j] = v
    return values[:, :2].copy(), values[:, 2:].copy()


def check_correspondences(pixels_px, floor_m, *, where="points", min_spread=0.05):
    """Refuse correspondences that cannot give a homography.

    Raises
    ------
    CalibrationError
        Fewer than 4 points, duplicated points, or nearly collinear points (on the
        floor or in the image): the smallest principal spread is below ``min_spread``
        of the largest.
    """
    px = np.asarray(pixels_px, float).reshape(-1, 2)
    fl = np.asarray(floor_m, float).reshape(-1, 2)
    n = len(px)
    if n < 4:
        raise CalibrationError(f"{where}: {n} point(s), need at least 4 not on one line")
    if len(np.unique(np.round(fl, 6), axis=0)) < 4:
        raise CalibrationError(f"{where}: fewer than 4 distinct floor positions; "
                               "each point needs its own floor position")
    for pts, what in ((fl, "floor"), (px, "image")):
        s = np.linalg.svd(pts - pts.mean(axis=0), compute_uv=False)
        if s[0] <= 0 or s[1] / s[0] < min_spread:
            raise CalibrationError(
                f"{where}: the {n} points are nearly collinear on the {what} "
                f"(spread ratio {s[1] / max(s[0], 1e-12):.3f}); add points off that line")


# ------------------------------------------------------------------ camera geometry
def focal_from_homography(H, principal_point):
    """Focal length from one floor homography, square pixels, known principal point.

    Uses the two constraints of the image of the absolute conic on the plane's
    vanishing points, ``h1' W h2 = 0`` and ``h1' W h1 = h2' W h2`` with
    ``W = K^-T K^-1`` (Zhang 2000, eqs. 3-4), solved in least squares for ``f^2``.

    Returns
    -------
    float or None
        Focal length [px], or None when the view is too close to fronto-parallel
        for it to be observable.
    """
    t = np.array([[1, 0, -principal_point[0]], [0, 1, -principal_point[1]], [0, 0, 1]])
    h = t @ np.asarray(H, float)
    h = h / np.linalg.norm(h[:2, :2])
    a = np.array([h[0, 0] * h[0, 1] + h[1, 0] * h[1, 1],
                  h[0, 0] ** 2 + h[1, 0] ** 2 - h[0, 1] ** 2 - h[1, 1] ** 2])
    b = np.array([h[2, 0] * h[2, 1], h[2, 0] ** 2 - h[2, 1] ** 2])
    bb = float(b @ b)
    if bb < 1e-30:
        return None
    f2 = -float(a @ b) / bb
    if not f2 > 0:
        return None
    f = math.sqrt(f2)
    # Observability: the perspective part must be large enough at this focal length.
    if np.linalg.norm(h[2, :2]) * f < 0.05:
        return None
    return f


def pose_from_homography(H, camera_matrix):
    """Camera pose from a floor -> pixel homography of undistorted pixels.

    ``H ~ K [r1 r2 t]``: ``r1, r2, t`` are the columns of ``K^-1 H`` scaled so that
    ``|r1| = |r2| = 1`` on average and the floor lies in front of the camera;
    ``R = [r1 r2 r1 x r2]`` is made orthonormal by SVD (Zhang 2000, section 3.1 and
    appendix C).

    Returns
    -------
    (ndarray (3,), ndarray (3,))
        rvec [rad], tvec [m].
    """
    a = np.linalg.solve(np.asarray(camera_matrix, float), np.asarray(H, float))
    lam = 2.0 / (np.linalg.norm(a[:, 0]) + np.linalg.norm(a[:, 1]))
    if a[2, 2] < 0:
        lam = -lam
    r1, r2, t = lam * a[:, 0], lam * a[:, 1], lam * a[:, 2]
    r = np.column_stack([r1, r2, np.cross(r1, r2)])
    u, _s, vt = np.linalg.svd(r)
    r = u @ vt
    if np.linalg.det(r) < 0:  # cannot happen with r3 = r1 x r2, kept as a guard
        r = u @ np.diag([1, 1, -1]) @ vt
    return cv2.Rodrigues(r)[0].ravel(), t


@dataclass(frozen=True)
class CameraFit:
    """Result of :func:`fit_camera`."""

    camera_matrix: np.ndarray
    dist_coeffs: np.ndarray
    rvec: np.ndarray
    tvec: np.ndarray
    rms_px: float
    """RMS residual over all observations [px]."""
    rms_floor_m: float
    """RMS residual on the floor [m]."""
    n_points: int
    inliers: np.ndarray
    """Which observations were kept (bool), points first then seam samples."""
    warnings: tuple[str, ...] = ()


def _undistort(px, k, dist):
    return cv2.undistortPoints(px.reshape(-1, 1, 2), k, dist).reshape(-1, 2)


def _ray_floor(norm, r, t):
    """Floor (x, y) where normalised image rays meet z = 0."""
    rays = np.column_stack([norm, np.ones(len(norm))]) @ r
    c = -r.T @ t
    s = -c[2] / rays[:, 2]
    return c[:2] + s[:, None] * rays[:, :2]


def fit_camera(image_size, *, points=None, seams=None, camera: CameraProfile | None = None,
               init=None, fit_focal=None, fit_k1=None, fit_k2=None, loss_px=1.0,
               outlier_px=None):
    """Fit camera pose (and, without a profile, focal length and k1) to floor observations.

    Parameters
    ----------
    image_size : (int, int)
        (width, height) [px].
    points : (ndarray (N, 2), ndarray (N, 2)), optional
        Pixels [px] and their floor positions [m].
    seams : (ndarray (M, 2), ndarray (M,) of int, ndarray (M,)), optional
        Pixels on tile seams [px], the floor axis the seam is constant in (0: a line
        x = value, 1: a line y = value), and that value [m].
    camera : CameraProfile, optional
        Known intrinsics and distortion (held fixed).
    init : (K, dist, rvec, tvec), optional
        Starting model; default from the homography of ``points``.
    fit_focal, fit_k1, fit_k2 : bool, optional
        Free the focal length / first / second radial term (defaults: only without a
        camera profile; k1 with 200 or more seam samples, k2 with 600 or more).
    loss_px : float
        Scale of the robust (soft L1) loss [px].
    outlier_px : float, optional
        After a first fit, drop observations with a residual above this and refit.

    Returns
    -------
    CameraFit

    Raises
    ------
    CalibrationError
        Too few observations, the camera below the floor (a mirrored fit), or a fit
        that does not converge.
    """
    w, h = int(image_size[0]), int(image_size[1])
    warnings = []
    pp = np.array([(w - 1) / 2.0, (h - 1) / 2.0])
    pts_px = pts_fl = None
    if points is not None:
        pts_px = np.asarray(points[0], float).reshape(-1, 2)
        pts_fl = np.asarray(points[1], float).reshape(-1, 2)
    seam_px = seam_axis = seam_val = None
    if seams is not None and len(seams[0]):
        seam_px = np.asarray(seams[0], float).reshape(-1, 2)
        seam_axis = np.asarray(seams[1], int)
        seam_val = np.asarray(seams[2], float)
    n_pts = 0 if pts_px is None else len(pts_px)
    n_seam = 0 if seam_px is None else len(seam_px)
    if camera is not None:
        k0, d0 = camera.matrix, camera.dist_coeffs
        if (camera.width_px, camera.height_px) != (w, h):
            raise InputError(
                f"camera profile {camera.path or ''}: made for {camera.width_px}x"
                f"{camera.height_px}, the video is {w}x{h}; calibrate in this mode")
        fit_focal = bool(fit_focal) if fit_focal is not None else False
        fit_k1 = bool(fit_k1) if fit_k1 is not None else False
        fit_k2 = bool(fit_k2) if fit_k2 is not None else False
    else:
        k0, d0 = None, np.zeros(5)
        fit_focal = True if fit_focal is None else bool(fit_focal)
        fit_k1 = (n_seam >= 200) if fit_k1 is None else bool(fit_k1)
        fit_k2 = (fit_k1 and n_seam >= 600) if fit_k2 is None else bool(fit_k2)
    if init is not None:
        k0, d0, rvec0, tvec0 = (np.array(v, float) for v in init)
    else:
        if n_pts < 4:
            raise CalibrationError(f"{n_pts} floor point(s) to start from, need 4")
        und = pts_px if k0 is None else cv2.undistortPoints(
            pts_px.reshape(-1, 1, 2), k0, d0, P=k0).reshape(-1, 2)
        hmg, _ = cv2.findHomography(pts_fl, und, 0)
        if hmg is None:
            raise CalibrationError("points: no homography fits them; check for "
                                   "swapped or duplicated rows")
        if k0 is None:
            f = focal_from_homography(hmg, pp)
            if f is None or not (0.2 * max(w, h) < f < 20 * max(w, h)):
                f = 1.2 * max(w, h)
                fit_focal = False
                warnings.append("focal length not observable from this view (camera "
                                "looks nearly straight at the floor); assumed "
                                f"{f:.0f} px - give a camera profile for height correction")
            k0 = np.array([[f, 0, pp[0]], [0, f, pp[1]], [0, 0, 1.0]])
        rvec0, tvec0 = pose_from_homography(hmg, k0)
    d0 = np.asarray(d0, float).ravel()
    if len(d0) < 5:
        d0 = np.concatenate([d0, np.zeros(5 - len(d0))])
    fit_k2 = bool(fit_k2) and fit_k1
    n_free = 6 + int(fit_focal) + int(fit_k1) + int(fit_k2)
    if 2 * n_pts + n_seam < n_free + 2:
        raise CalibrationError(f"{n_pts} points and {n_seam} seam samples are too few to "
                               "fit the camera; add points")
    if camera is None and not fit_k1:
        warnings.append("no lens distortion modelled (no camera profile, too few seam "
                        "samples to estimate it); give a camera profile from 'vidodo lens'")

    def unpack(x):
        k = k0.copy()
        d = d0.copy()
        i = 6
        if fit_focal:
            f = k0[0, 0] * math.exp(x[i])
            k[0, 0] = k[1, 1] = f
            i += 1
        if fit_k1:
            d[0] = x[i]
            i += 1
        if fit_k2:
            d[1] = x[i]
        return k, d, x[:3], x[3:6]

    keep_pts = np.ones(n_pts, bool)
    keep_seam = np.ones(n_seam, bool)

    def residuals(x, with_floor=False):
        k, d, rv, tv = unpack(x)
        out = []
        floor_res = []
        if n_pts and keep_pts.any():
            obj = np.column_stack([pts_fl[keep_pts], np.zeros(keep_pts.sum())])
            proj, _ = cv2.projectPoints(obj, rv, tv, k, d)
            out.append((proj.reshape(-1, 2) - pts_px[keep_pts]).ravel())
        if n_seam and keep_seam.any():
            r = cv2.Rodrigues(rv)[0]
            q = seam_px[keep_seam]
            fl = _ray_floor(_undistort(q, k, d), r, tv)
            ax = seam_axis[keep_seam]
            snapped = fl.copy()
            snapped[np.arange(len(fl)), ax] = seam_val[keep_seam]
            proj, _ = cv2.projectPoints(np.column_stack([snapped, np.zeros(len(fl))]),
                                        rv, tv, k, d)
            out.append((proj.reshape(-1, 2) - q).ravel())
            floor_res.append(fl[np.arange(len(fl)), ax] - seam_val[keep_seam])
        res = np.concatenate(out) if out else np.zeros(0)
        if with_floor:
            return res, floor_res
        return res

    x0 = np.concatenate([np.ravel(rvec0), np.ravel(tvec0)]
                        + ([[0.0]] if fit_focal else []) + ([[d0[0]]] if fit_k1 else [])
                        + ([[d0[1]]] if fit_k2 else []))
    x = x0
    for _round in range(2 if outlier_px else 1):
        try:
            sol = least_squares(residuals, x, loss="soft_l1", f_scale=loss_px,
                                x_scale="jac", max_nfev=200)
        except (ValueError, cv2.error) as exc:
            raise CalibrationError(f"camera fit failed ({exc}); check the points") from None
        x = sol.x
        if outlier_px and _round == 0:
            res = residuals(x)
            i = 0
            if n_pts:
                e = np.hypot(*res[: 2 * n_pts].reshape(-1, 2).T)
                keep_pts = e < outlier_px
                i = 2 * n_pts
            if n_seam:
                e = np.hypot(*res[i:].reshape(-1, 2).T)
                keep_seam = e < outlier_px
    k, d, rv, tv = unpack(x)
    res, floor_res = residuals(x, with_floor=True)
    e_px = np.hypot(*res.reshape(-1, 2).T) if len(res) else np.zeros(0)
    rms_px = float(np.sqrt(np.mean(e_px ** 2))) if len(e_px) else math.nan
    # Floor residuals: seam samples directly; points by back-projection.
    fres = list(floor_res)
    if n_pts and keep_pts.any():
        r = cv2.Rodrigues(rv)[0]
        fl = _ray_floor(_undistort(pts_px[keep_pts], k, d), r, tv)
        fres.append(np.linalg.norm(fl - pts_fl[keep_pts], axis=1))
    fres = np.concatenate(fres) if fres else np.zeros(0)
    rms_fl = float(np.sqrt(np.mean(fres ** 2))) if len(fres) else math.nan
    r = cv2.Rodrigues(rv)[0]
    centre = -r.T @ tv
    if not np.all(np.isfinite(centre)):
        raise CalibrationError("camera fit did not converge; check the points")
    if centre[2] <= 0:
        raise CalibrationError(
            "the fit puts the camera below the floor: the floor coordinates are mirrored "
            "(x and y swapped, or one axis reversed); fix the points or the origin")
    return CameraFit(k, d, np.asarray(rv, float).copy(), np.asarray(tv, float).copy(),
                     rms_px, rms_fl, int(keep_pts.sum() + keep_seam.sum()),
                     np.concatenate([keep_pts, keep_seam]), tuple(warnings))


def pose_fit_points(px, fl, camera_matrix, dist_coeffs, rvec0, tvec0, *, outlier_px=3.0,
                    min_outlier_px=0.3, rounds=3):
    """Camera pose only, from floor points, by OpenCV's Levenberg-Marquardt.

    ``cv2.solvePnP`` (iterative, started from ``rvec0, tvec0``) on all points, then again
    without the outliers. The outlier limit follows the residuals themselves: for
    isotropic Gaussian pixel noise of deviation sigma the residual length is Rayleigh
    distributed, median ``1.177 sigma``, and fewer than 0.1 % exceed ``3.72 sigma``
    (``exp(-3.72^2 / 2)``), so the limit is ``3.16 x`` the median residual, held between
    ``min_outlier_px`` and ``outlier_px``. Points on something that is not the floor (a
    robot starting to move, its shadow) go once they are off by a few tenths of a pixel,
    not only past ``outlier_px``. Fast enough for every frame.

    Returns
    -------
    CameraFit
    """
    obj = np.column_stack([fl, np.zeros(len(fl))])
    keep = np.ones(len(fl), bool)
    rv = np.asarray(rvec0, float).reshape(3, 1).copy()
    tv = np.asarray(tvec0, float).reshape(3, 1).copy()
    for _round in range(rounds):
        if keep.sum() < 4:
            raise CalibrationError(f"only {int(keep.sum())} floor points fit the pose")
        ok, rv, tv = cv2.solvePnP(obj[keep], px[keep], camera_matrix, dist_coeffs, rv, tv,
                                  useExtrinsicGuess=True, flags=cv2.SOLVEPNP_ITERATIVE)
        if not ok:
            raise CalibrationError("pose fit did not converge")
        proj = cv2.projectPoints(obj, rv, tv, camera_matrix, dist_coeffs)[0].reshape(-1, 2)
        err = np.linalg.norm(proj - px, axis=1)
        limit = float(np.clip(RAYLEIGH_LIMIT * np.median(err[keep]), min_outlier_px,
                              outlier_px))
        keep = err < limit
    rv, tv = rv.ravel(), tv.ravel()
    r = cv2.Rodrigues(rv)[0]
    if (-r.T @ tv)[2] <= 0:
        raise CalibrationError("the pose fit puts the camera below the floor (mirrored)")
    back = _ray_floor(_undistort(px[keep], camera_matrix, dist_coeffs), r, tv)
    rms_fl = float(np.sqrt(np.mean(np.sum((back - fl[keep]) ** 2, axis=1))))
    return CameraFit(np.asarray(camera_matrix, float), np.asarray(dist_coeffs, float), rv, tv,
                     float(np.sqrt(np.mean(err[keep] ** 2))), rms_fl, int(keep.sum()), keep)


def _fit_to_registration(t_s, fit: CameraFit, method, extra_warnings=()):
    return FrameRegistration(float(t_s), True, fit.camera_matrix, fit.dist_coeffs,
                             fit.rvec, fit.tvec, fit.rms_px, fit.rms_floor_m, fit.n_points,
                             method, "", tuple(fit.warnings) + tuple(extra_warnings))


# ---------------------------------------------------------------------- fiducials
def _detector_for(family):
    if not hasattr(cv2.aruco, family):
        raise InputError(f"floor marker family {family!r} is not a cv2.aruco dictionary "
                         "name; use e.g. DICT_4X4_50 or DICT_APRILTAG_36h11")
    params = cv2.aruco.DetectorParameters()
    params.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_SUBPIX
    return cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(
        getattr(cv2.aruco, family)), params)


def detect_floor_markers(grey, field_profile: FieldProfile, *, detectors=None, ignore=None):
    """Find the field profile's floor fiducials in a frame.

    Returns
    -------
    (ndarray (N, 2), ndarray (N, 2), list of int)
        Corner pixels [px], their floor positions [m], and the marker ids seen.
    """
    detectors = detectors if detectors is not None else {}
    px, fl, seen = [], [], []
    by_family = {}
    for m in field_profile.floor_markers:
        by_family.setdefault(m.family, {})[m.id] = m
    for family, markers in by_family.items():
        det = detectors.get(family)
        if det is None:
            det = detectors[family] = _detector_for(family)
        corners, ids, _rej = det.detectMarkers(grey)
        if ids is None:
            continue
        for c, i in zip(corners, ids.ravel(), strict=True):
            m = markers.get(int(i))
            if m is None:
                continue
            c = c.reshape(4, 2).astype(float)
            if ignore is not None:
                ui = np.clip(c[:, 0].round().astype(int), 0, grey.shape[1] - 1)
                vi = np.clip(c[:, 1].round().astype(int), 0, grey.shape[0] - 1)
                if np.asarray(ignore, bool)[vi, ui].any():
                    continue
            px.append(c)
            fl.append(m.corners_floor_m())
            seen.append(int(i))
    if not px:
        return np.zeros((0, 2)), np.zeros((0, 2)), []
    return np.vstack(px), np.vstack(fl), seen


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


def _floor_usable(reg, field_profile, shape, ignore=None, margin_m=0.0):
    """Bool image: pixels on the field (grown by margin_m) and not ignored."""
    poly = field_polygon_px(reg, field_profile, margin_m=margin_m)
    usable = np.zeros(shape[:2], np.uint8)
    if np.all(np.isfinite(poly)):
        cv2.fillPoly(usable, [np.round(poly).astype(np.int32)], 1)
    usable = usable.astype(bool)
    if ignore is not None:
        usable &= ~np.asarray(ignore, bool)
    return usable


# ---------------------------------------------------------------------- registrar
class FloorRegistrar:
    """Register the frames of one video to the floor.

    Parameters
    ----------
    field : FieldProfile
        Tile grid and floor fiducials.
    camera : CameraProfile, optional
        Lens intrinsics and distortion; without one they are estimated.
    method : {'auto', 'markers', 'points', 'grid'}
        How the reference frame is registered ('auto': markers if visible, else grid).
    points_csv : path-like, optional
        Correspondences for the reference frame (method 'points').
    refine_on_seams : bool
        Sharpen marker or point fits on the tile seams when seams are visible.
    max_rms_px : float
        A frame whose residual is above this is refused [px].
    static_tolerance_px : float
        Median patch shift below which the view counts as unchanged [px].
    reference_retry_s : float
        After a frame fails to become the reference, frames in the next this many
        seconds are flagged without a new (costly) attempt [s].
    readout_s : float, optional
        Rolling-shutter readout time [s] (default: the camera profile's, else 0). When
        non-zero, a moving camera's pose is modelled as changing linearly while the
        rows are read, at the rate seen between consecutive frames.
    seam_every_frame : bool
        Re-fit on the tile seams in every moved frame as well (slower; on the
        rendered hand-held run it was not more accurate than the tracked corners).
    anchor_every_s : float or None
        A moving camera: every this many seconds (and in the first few moving frames)
        the tile seams of the frame are fitted too, and the floor positions of the
        tracked corners become the mean over these fits and the reference's, so the
        reference frame's own error is averaged down [s]. None: never.

    Notes
    -----
    The first frame given to :meth:`register` that can be registered becomes the
    reference. Call :meth:`register_reference` to get a :class:`CalibrationError`
    instead of an ``ok=False`` result when it cannot.
    """

    def __init__(self, field: FieldProfile, camera: CameraProfile | None = None, *,
                 method="auto", points_csv=None, refine_on_seams=True, max_rms_px=3.0,
                 static_tolerance_px=0.1, seam_every_frame=False, min_tracked=12,
                 readout_s=None, reference_retry_s=0.5, anchor_every_s=0.25):
        if method not in METHODS:
            raise InputError(f"registration method {method!r}: use one of {METHODS}")
        if method == "points" and points_csv is None:
            raise InputError("method 'points' needs a points CSV (columns u_px, v_px, "
                             "x_m, y_m)")
        if method == "markers" and not field.floor_markers:
            raise InputError(f"{field.path or 'field profile'}: method 'markers' needs "
                             "[[floor_marker]] entries in the field profile")
        self.field = field
        self.camera = camera
        self.method = method
        self.points = None
        if points_csv is not None:
            px, fl = read_points_csv(points_csv)
            check_correspondences(px, fl, where=str(points_csv))
            self.points = (px, fl)
            if method == "auto":
                self.method = "points"
        self.refine_on_seams = refine_on_seams
        self.max_rms_px = float(max_rms_px)
        self.static_tolerance_px = float(static_tolerance_px)
        self.seam_every_frame = seam_every_frame
        self.min_tracked = int(min_tracked)
        if readout_s is None:
            readout_s = camera.readout_s if camera is not None else 0.0
        self.readout_s = float(readout_s)
        self.reference_retry_s = float(reference_retry_s)
        self.anchor_every_s = None if anchor_every_s is None else float(anchor_every_s)
        self._anchor_sum = self._anchor_n = None
        self._anchor_t = -math.inf
        self._anchor_tries = 0
        self._retry = None  # (t_s, reason) of the next reference attempt after a failure
        self._rate = None  # (rvec_rate, tvec_rate) of the last moving frame
        self._global_prev = None  # (t_s, rvec, tvec) one-pose fit of the last frame
        self._global_hist = []  # the same for the last few moving frames
        self._global_now = None  # (rvec, tvec) one-pose fit of this frame
        self._rate_used = False  # whether this frame's fit used self._rate
        self._rs_reference_done = False
        self.reference: FrameRegistration | None = None
        self.reference_grey = None
        self._tracker = None
        self._floor_ref = None
        self._last_found = None
        self._last: FrameRegistration | None = None
        self._detectors: dict = {}
        self.grid_result = None

    # -- reference -----------------------------------------------------------
    def register_reference(self, frame_bgr, t_s=0.0, mask=None) -> FrameRegistration:
        """Register one frame from scratch and make it the reference.

        Raises
        ------
        CalibrationError
            Naming the cause (too few or degenerate points, mirrored fit, no grid
            found, error above the threshold).
        """
        from . import grid  # local import: grid imports this module

        grey = floor_features.to_grey(frame_bgr)
        size = (grey.shape[1], grey.shape[0])
        ignore = None if mask is None else np.asarray(mask, bool)
        method = self.method
        init_fit = None
        used = method
        extra = []
        if method in ("auto", "markers") and self.field.floor_markers:
            px, fl, seen = detect_floor_markers(grey, self.field, detectors=self._detectors,
                                                ignore=ignore)
            if len(px) >= 4:
                try:
                    check_correspondences(px, fl, where=f"floor markers {seen}",
                                          min_spread=MARKER_MIN_SPREAD)
                    init_fit = fit_camera(size, points=(px, fl), camera=self.camera,
                                          outlier_px=5.0)
                    used = "markers"
                except CalibrationError as exc:
                    if method == "markers":
                        raise
                    extra.append(f"floor markers not used for the fit: {exc}")
            elif method == "markers":
                raise CalibrationError("no floor marker of the field profile is visible in "
                                       "the reference frame; check ids and family")
        if method == "points":
            px, fl = self.points
            init_fit = fit_camera(size, points=(px, fl), camera=self.camera)
            used = "points"
        if init_fit is None:  # the automatic grid
            g = grid.find_grid(grey, self.field, camera=self.camera, ignore=ignore,
                               detectors=self._detectors)
            self.grid_result = g
            fit = g.fit
            used = "grid"
            extra += list(g.warnings)
        else:
            fit = init_fit
            if self.refine_on_seams:
                try:
                    fit2 = grid.refine_fit(grey, self.field, fit, camera=self.camera,
                                           ignore=ignore)
                except CalibrationError as exc:
                    extra.append(f"tile seams not used: {exc}")
                else:
                    if fit2 is not None:
                        fit = fit2
                        used += "+seams"
        if fit.rms_px > self.max_rms_px:
            raise CalibrationError(
                f"{used}: residual {fit.rms_px:.2f} px RMS is above the {self.max_rms_px} px "
                "limit; the observations do not fit one floor plane - check them")
        reg = _fit_to_registration(t_s, fit, used, extra)
        self._set_reference(grey, reg, ignore)
        return reg

    def _set_reference(self, grey, reg, ignore):
        self.reference = reg
        self.reference_grey = grey
        self._last = reg
        usable = _floor_usable(reg, self.field, grey.shape, ignore, margin_m=0.0)
        self._tracker = floor_features.FloorPatchTracker(grey, usable)
        self._floor_ref = reg.image_to_floor(self._tracker.ref_px)
        self._anchor_start(reg.t_s)
        self._last_found = self._tracker.ref_px.copy()
        self._global_prev = (reg.t_s, np.asarray(reg.rvec, float), np.asarray(reg.tvec, float))
        self._global_hist = [self._global_prev]

    # -- per frame -----------------------------------------------------------
    def register(self, frame_bgr, t_s, mask=None) -> FrameRegistration:
        """Register one frame; never raises for a frame that cannot be registered.

        Parameters
        ----------
        frame_bgr : ndarray of shape (H, W, 3) or (H, W)
        t_s : float
            Frame time [s].
        mask : ndarray of bool, shape (H, W), optional
            Pixels to ignore (the robot).

        Returns
        -------
        FrameRegistration
            ``ok=False`` with a reason when the frame could not be registered.
        """
        try:
            if self.reference is None:
                if self._retry is not None and t_s < self._retry[0]:
                    return failed(t_s, f"no reference yet: {self._retry[1]}")
                return self.register_reference(frame_bgr, t_s, mask)
            return self._register_follow(frame_bgr, t_s, mask)
        except (CalibrationError, cv2.error, np.linalg.LinAlgError, ValueError) as exc:
            k = None if self.reference is None else self.reference.camera_matrix
            d = None if self.reference is None else self.reference.dist_coeffs
            reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            if self.reference is None:  # a full attempt is costly: wait a little
                self._retry = (float(t_s) + self.reference_retry_s, reason)
            return failed(t_s, reason, k, d)

    def _register_follow(self, frame_bgr, t_s, mask):
        from . import grid

        grey = floor_features.to_grey(frame_bgr)
        ignore = None if mask is None else np.asarray(mask, bool)
        ref = self.reference
        if grey.shape != self.reference_grey.shape:
            return failed(t_s, f"frame size {grey.shape[::-1]} differs from the reference "
                          f"{self.reference_grey.shape[::-1]}", ref.camera_matrix,
                          ref.dist_coeffs)
        last = self._last if self._last is not None and self._last.ok else ref
        tr = self._tracker
        # Cheap check first: the view has not moved since the last registered frame.
        prev_px = tr.ref_px if last is ref else self._last_found
        if prev_px is not None and tr.is_unmoved(grey, prev_px,
                                                 tolerance_px=self.static_tolerance_px):
            reg = replace(last, t_s=float(t_s), method="static", rvec_rate=None,
                          tvec_rate=None)
            self._last = reg
            self._rate = None
            self._global_prev = (float(t_s), np.asarray(last.rvec, float),
                                 np.asarray(last.tvec, float))
            self._global_hist = [self._global_prev]
            return reg
        # Predicted map reference pixels -> this frame, from the last registration.
        pred = last.floor_to_image(self._floor_ref)
        ok_pred = np.all(np.isfinite(pred), axis=1)
        h_guess = None
        if last is not ref and ok_pred.sum() >= 8:
            h_guess, _ = cv2.findHomography(tr.ref_px[ok_pred], pred[ok_pred], 0)
        found, ok = tr.locate(grey, h_guess, ignore=ignore)
        ok &= np.all(np.isfinite(self._floor_ref), axis=1)
        source = "tracked"
        if ok.sum() < self.min_tracked:
            # Lost: try the floor fiducials, then feature matching.
            reg = self._reacquire(grey, t_s, ignore)
            if reg is not None:
                self._last = reg
                self._last_found = np.full_like(tr.ref_px, np.nan)
                return reg
            return failed(t_s, f"only {int(ok.sum())} floor corners found again and no "
                          "floor marker or feature match; view moved too far",
                          ref.camera_matrix, ref.dist_coeffs)
        fl = self._floor_ref[ok]
        px = found[ok]
        try:
            fit = self._pose_fit(grey.shape, px, fl, last, t_s=float(t_s))
        except CalibrationError as exc:
            return failed(t_s, f"{source}: {exc}", ref.camera_matrix, ref.dist_coeffs)
        if self._seams_each_frame():
            try:
                fit2 = grid.refine_fit(grey, self.field, fit, camera=self._fixed_camera(),
                                       ignore=ignore)
                if fit2 is not None:
                    fit = fit2
                    source += "+seams"
            except CalibrationError:
                pass
        reg = _fit_to_registration(t_s, fit, source, ())
        if reg.rms_px > self.max_rms_px:
            return failed(t_s, f"{source}: residual {reg.rms_px:.2f} px RMS above the "
                          f"{self.max_rms_px} px limit", ref.camera_matrix, ref.dist_coeffs)
        reg = self._with_rates(reg, last)
        self._last = reg
        self._last_found = found
        if self.anchor_every_s is not None and (
                float(t_s) - self._anchor_t >= self.anchor_every_s
                or self._anchor_tries < ANCHOR_EAGER):
            self._anchor_tries += 1
            self._anchor_t = float(t_s)
            self._anchor_on_seams(grey, reg, ignore)
        return reg

    def _anchor_start(self, t_s):
        """Start the running mean of the tracked corners' floor positions."""
        ok = np.all(np.isfinite(self._floor_ref), axis=1)
        self._anchor_sum = np.where(ok[:, None], self._floor_ref, 0.0)
        self._anchor_n = ok.astype(float)
        self._anchor_t = float(t_s)
        self._anchor_tries = 0

    def _anchor_on_seams(self, grey, reg, ignore):
        """Average the tracked corners' floor positions over seam fits of later frames.

        The floor positions of the tracked corners come from the reference frame's
        registration, so its error is carried into every tracked frame. Each later
        frame's tile seams give an independent registration: a pose fitted on the seams
        (started from the tracked pose, one narrow search) maps the pixels where the
        tracked pose puts the corners back to the floor, and these positions are averaged
        with the reference's. With a rolling shutter the seam samples are moved to where
        the top-row pose would see them, at the tracked frame's rate (the same rate for
        both poses, so an error in it largely cancels). A seam fit that fails, or that
        disagrees with the tracked pose by more than ``max_rms_px``, is not used.
        """
        from . import grid

        h, w = grey.shape
        k, d = reg.camera_matrix, reg.dist_coeffs
        half_width_px = 4.0 * float(np.clip(math.hypot(w, h) / 1469.0, 0.5, 1.5))
        q, ax, val = grid.seam_samples(grey, self.field, reg, half_width_px=half_width_px,
                                       ignore=ignore)
        if len(q) < ANCHOR_MIN_SAMPLES:
            return
        if reg.rolling:
            fl = reg.image_to_floor(q)
            good = np.all(np.isfinite(fl), axis=1)
            q, ax, val, fl = q[good], ax[good], val[good], fl[good]
            fl[np.arange(len(fl)), ax] = val
            obj = np.column_stack([fl, np.zeros(len(fl))])
            top = cv2.projectPoints(obj, reg.rvec, reg.tvec, k, d)[0].reshape(-1, 2)
            rowed = project_rows(obj, reg.rvec, reg.tvec, reg.rvec_rate, reg.tvec_rate,
                                 reg._row_dt(q[:, 1]), k, d)
            q = q - (rowed - top)
        try:
            fit = fit_camera((w, h), seams=(q, ax, val), camera=self._fixed_camera(),
                             init=(k, d, reg.rvec, reg.tvec), outlier_px=1.5, loss_px=0.5)
        except (CalibrationError, cv2.error, np.linalg.LinAlgError, ValueError):
            return
        if not fit.rms_px <= self.max_rms_px:
            return
        seam_reg = replace(reg, rvec=fit.rvec, tvec=fit.tvec)
        px = reg.floor_to_image(self._floor_ref)
        shift = seam_reg.floor_to_image(self._floor_ref) - px
        if not np.sqrt(np.nanmean(np.sum(shift ** 2, axis=1))) <= self.max_rms_px:
            return
        moved = seam_reg.image_to_floor(px)
        ok = np.all(np.isfinite(moved), axis=1)
        self._anchor_sum[ok] += moved[ok]
        self._anchor_n += ok
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = self._anchor_sum / self._anchor_n[:, None]
        self._floor_ref = np.where((self._anchor_n > 0)[:, None], mean, np.nan)

    def _with_rates(self, reg, last):
        """Attach the pose rate of this frame (rolling shutter).

        The rate is the one :meth:`_pose_fit` used: from the one-pose-per-frame fits of
        this frame and the previous one (they do not depend on any assumed rate, so
        errors cannot feed back).
        """
        now = getattr(self, "_global_now", None)
        if self.readout_s <= 0 or now is None:
            return reg
        self._global_prev = (reg.t_s, now[0], now[1])
        self._global_hist = (self._global_hist + [self._global_prev])[-RATE_FRAMES:]
        rate = self._rate
        if rate is None:
            return reg
        if not self._rs_reference_done:
            self._rs_reference_done = True
            self._rolling_reference(rate)
        if not self._rate_used:  # fitted without a rate: top pose from mid pose
            half = 0.5 * self.readout_s
            reg = replace(reg, rvec=np.asarray(reg.rvec) - half * rate[0],
                          tvec=np.asarray(reg.tvec) - half * rate[1])
        return replace(reg, readout_s=self.readout_s, rvec_rate=rate[0], tvec_rate=rate[1])

    def _rate_since_previous(self, t_s, rvec, tvec):
        """Pose rate from the one-pose fits of the last few frames and this one, or None.

        The slope of a least-squares line through the one-pose fits of up to
        ``RATE_FRAMES`` frames (this one included) within ``RATE_WINDOW_S``: two frames
        give the plain difference; more average out the fits' noise, which a difference
        divided by one frame interval would otherwise carry into every row's pose.
        """
        if t_s is None:
            return None
        hist = [h for h in self._global_hist if 0 < t_s - h[0] <= RATE_WINDOW_S]
        if not hist:
            return None
        t = np.array([h[0] for h in hist] + [t_s])
        rv = np.vstack([h[1] for h in hist] + [np.asarray(rvec, float)])
        tv = np.vstack([h[2] for h in hist] + [np.asarray(tvec, float)])
        dt = t - t.mean()
        den = float(dt @ dt)
        return (dt @ (rv - rv.mean(axis=0))) / den, (dt @ (tv - tv.mean(axis=0))) / den

    def _rolling_reference(self, rate):
        """Re-read the reference frame as a rolling-shutter frame once a rate is known.

        The reference was fitted as if every row saw one pose; that pose is close to the
        one at mid-readout. It becomes the top-row pose minus half a readout of motion,
        and the floor positions of the tracked corners are recomputed row by row.
        """
        ref = self.reference
        half = 0.5 * self.readout_s
        rolled = replace(ref, rvec=np.asarray(ref.rvec) - half * rate[0],
                         tvec=np.asarray(ref.tvec) - half * rate[1],
                         readout_s=self.readout_s, rvec_rate=rate[0], tvec_rate=rate[1])
        self.reference = rolled
        self._floor_ref = rolled.image_to_floor(self._tracker.ref_px)
        self._anchor_start(ref.t_s)

    def _seams_each_frame(self):
        return bool(self.seam_every_frame)

    def _fixed_camera(self):
        """The reference intrinsics as a profile, held fixed in later frames."""
        ref = self.reference
        h, w = self.reference_grey.shape
        k = ref.camera_matrix
        return CameraProfile(w, h, float(k[0, 0]), float(k[1, 1]), float(k[0, 2]),
                             float(k[1, 2]), tuple(float(v) for v in ref.dist_coeffs))

    def _pose_fit(self, shape, px, fl, last, t_s=None):
        """Pose with the reference intrinsics, RANSAC on the floor plane, then LM."""
        ref = self.reference
        k, d = ref.camera_matrix, ref.dist_coeffs
        und = cv2.undistortPoints(px.reshape(-1, 1, 2), k, d, P=k).reshape(-1, 2)
        hmg, inl = cv2.findHomography(fl, und, cv2.RANSAC, 1.5, maxIters=2000)
        if hmg is None:
            raise CalibrationError("tracked corners do not agree on one floor plane")
        inl = inl.ravel().astype(bool)
        if inl.sum() < self.min_tracked:
            raise CalibrationError(f"only {int(inl.sum())} tracked corners agree on the "
                                   "floor plane")
        rv, tv = (last.rvec, last.tvec) if last.ok else pose_from_homography(hmg, k)
        px, fl = px[inl], fl[inl]
        fit = pose_fit_points(px, fl, k, d, rv, tv)
        self._global_now = (fit.rvec.copy(), fit.tvec.copy())
        self._rate_used = False
        if self.readout_s > 0:
            self._rate = self._rate_since_previous(t_s, fit.rvec, fit.tvec)
        if self.readout_s > 0 and self._rate is not None:
            self._rate_used = True
            # Rolling shutter: move each observation to where the top-row pose would have
            # seen it, using the rate of the previous frames, and fit again (twice).
            obj = np.column_stack([fl, np.zeros(len(fl))])
            dt = np.clip(px[:, 1] / shape[0], 0, 1) * self.readout_s
            for _ in range(2):
                top = cv2.projectPoints(obj, fit.rvec, fit.tvec, k, d)[0].reshape(-1, 2)
                rowed = project_rows(obj, fit.rvec, fit.tvec, self._rate[0], self._rate[1],
                                     dt, k, d)
                fit = pose_fit_points(px - (rowed - top), fl, k, d, fit.rvec, fit.tvec)
        return fit

    def _reacquire(self, grey, t_s, ignore):
        ref = self.reference
        if self.field.floor_markers:
            px, fl, seen = detect_floor_markers(grey, self.field, detectors=self._detectors,
                                                ignore=ignore)
            if len(px) >= 4:
                try:
                    check_correspondences(px, fl, where="floor markers",
                                          min_spread=MARKER_MIN_SPREAD)
                    fit = fit_camera((grey.shape[1], grey.shape[0]), points=(px, fl),
                                     camera=self._fixed_camera(), outlier_px=5.0)
                    return _fit_to_registration(t_s, fit, "markers")
                except CalibrationError:
                    pass
        usable_ref = _floor_usable(ref, self.field, grey.shape)
        m = floor_features.match_homography(self.reference_grey, grey, ignore_a=~usable_ref,
                                            ignore_b=ignore, detector="orb")
        if m.H is None:
            return None
        m = floor_features.refine_homography(self.reference_grey, grey, m.H,
                                             ignore_b=ignore, tracker=self._tracker)
        if m.H is None:
            return None
        pred = cv2.perspectiveTransform(self._tracker.ref_px.reshape(-1, 1, 2),
                                        m.H).reshape(-1, 2)
        good = np.all(np.isfinite(self._floor_ref), axis=1)
        try:
            fit = self._pose_fit(grey.shape, pred[good], self._floor_ref[good], ref)
        except CalibrationError:
            return None
        return _fit_to_registration(t_s, fit, "features")


@dataclass(frozen=True)
class RegistrationQuality:
    """Summary of the per-frame registrations of one video."""

    n_frames: int
    n_ok: int
    rms_px_median: float
    rms_px_max: float
    rms_floor_mm_median: float
    rms_floor_mm_max: float
    methods: dict = field(default_factory=dict)
    failed: tuple[tuple[float, str], ...] = ()
    """(t_s, reason) of every frame that could not be registered."""


def summarise(regs) -> RegistrationQuality:
    """Quality numbers over a list of :class:`FrameRegistration`."""
    regs = list(regs)
    ok = [r for r in regs if r.ok]
    px = np.array([r.rms_px for r in ok]) if ok else np.array([math.nan])
    mm = np.array([r.rms_floor_m * 1e3 for r in ok]) if ok else np.array([math.nan])
    if not ok:
        return RegistrationQuality(len(regs), 0, math.nan, math.nan, math.nan, math.nan,
                                   {"failed": len(regs)},
                                   tuple((r.t_s, r.reason) for r in regs))
    methods: dict = {}
    for r in regs:
        methods[r.method or "failed"] = methods.get(r.method or "failed", 0) + 1
    return RegistrationQuality(len(regs), len(ok), float(np.nanmedian(px)),
                               float(np.nanmax(px)), float(np.nanmedian(mm)),
                               float(np.nanmax(mm)), methods,
                               tuple((r.t_s, r.reason) for r in regs if not r.ok))
