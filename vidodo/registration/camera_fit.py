"""Camera model and pose fitted to floor observations (points and tile-seam samples).

The pose comes from the homography ``H ~ K [r1 r2 t]`` (Zhang, IEEE PAMI 22(11), 2000,
section 3.1) and is refined by Levenberg-Marquardt on all observations. Without a
camera profile the focal length is estimated from the homography (square pixels,
principal point at the image centre; Hartley & Zisserman, *Multiple View Geometry*,
2nd ed., section 8.8), and radial distortion from the straightness of the tile seams.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
from scipy.optimize import least_squares

from ..errors import CalibrationError, InputError
from ..profiles import CameraProfile
from .frame import FrameRegistration
from .uncertainty import cluster_covariance, pose_covariance, soft_l1_weights

__all__ = ["read_points_csv", "check_correspondences", "focal_from_homography",
           "pose_from_homography", "CameraFit", "FitOptions", "fit_camera", "pose_fit_points",
           "fit_to_registration", "RAYLEIGH_LIMIT"]

#: Outlier limit over the median residual length for 2-D Gaussian noise: 0.1 % of
#: Rayleigh residuals exceed 3.72 sigma, and the median is sqrt(2 ln 2) = 1.177 sigma.
RAYLEIGH_LIMIT = 3.72 / math.sqrt(2.0 * math.log(2.0))


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
class FitOptions:
    """Which camera terms :func:`fit_camera` frees, and how it treats outliers."""

    fit_focal: bool | None = None
    """Free the focal length (default: only without a camera profile)."""
    fit_k1: bool | None = None
    """Free the first radial term (default: without a profile, 200+ seam samples)."""
    fit_k2: bool | None = None
    """Free the second radial term (default: with k1 and 600+ seam samples)."""
    loss_px: float = 1.0
    """Scale of the robust (soft L1) loss [px]."""
    outlier_px: float | None = None
    """After a first fit, drop observations with a residual above this and refit [px]."""


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
    covariance: np.ndarray | None = None
    """Covariance of the fitted parameters ``(rvec, tvec[, log focal][, k1][, k2])`` from
    the Gauss-Newton normal matrix scaled by the residual variance, ndarray (P, P)."""
    free: tuple[str, ...] = ("rvec", "tvec")
    """Which parameters the covariance covers, in order ('rvec', 'tvec', 'focal',
    'k1', 'k2'; 'focal' as the logarithm of the focal length)."""


def _undistort(px, k, dist):
    return cv2.undistortPoints(px.reshape(-1, 1, 2), k, dist).reshape(-1, 2)


def _ray_floor(norm, r, t):
    """Floor (x, y) where normalised image rays meet z = 0."""
    rays = np.column_stack([norm, np.ones(len(norm))]) @ r
    c = -r.T @ t
    s = -c[2] / rays[:, 2]
    return c[:2] + s[:, None] * rays[:, :2]


@dataclass
class _Observations:
    """Floor points and seam samples of one fit, with the kept subsets."""

    pts_px: np.ndarray
    pts_fl: np.ndarray
    seam_px: np.ndarray
    seam_axis: np.ndarray
    seam_val: np.ndarray
    keep_pts: np.ndarray
    keep_seam: np.ndarray
    _rays: tuple | None = None

    @classmethod
    def of(cls, points, seams):
        pts_px = np.zeros((0, 2)) if points is None else np.asarray(points[0], float)
        pts_fl = np.zeros((0, 2)) if points is None else np.asarray(points[1], float)
        have = seams is not None and len(seams[0])
        seam_px = np.asarray(seams[0], float).reshape(-1, 2) if have else np.zeros((0, 2))
        seam_axis = np.asarray(seams[1], int) if have else np.zeros(0, int)
        seam_val = np.asarray(seams[2], float) if have else np.zeros(0)
        pts_px, pts_fl = pts_px.reshape(-1, 2), pts_fl.reshape(-1, 2)
        return cls(pts_px, pts_fl, seam_px, seam_axis, seam_val, np.ones(len(pts_px), bool),
                   np.ones(len(seam_px), bool))

    def residuals(self, k, d, rv, tv):
        """Pixel residuals (flattened u, v pairs) and floor residuals of the seams [m]."""
        out, floor_res = [], np.zeros(0)
        if self.keep_pts.any():
            obj = np.column_stack([self.pts_fl[self.keep_pts], np.zeros(self.keep_pts.sum())])
            proj, _ = cv2.projectPoints(obj, rv, tv, k, d)
            out.append((proj.reshape(-1, 2) - self.pts_px[self.keep_pts]).ravel())
        if self.keep_seam.any():
            r = cv2.Rodrigues(rv)[0]
            q = self.seam_px[self.keep_seam]
            fl = _ray_floor(self._seam_rays(k, d)[self.keep_seam], r, tv)
            ax = self.seam_axis[self.keep_seam]
            snapped = fl.copy()
            snapped[np.arange(len(fl)), ax] = self.seam_val[self.keep_seam]
            proj, _ = cv2.projectPoints(np.column_stack([snapped, np.zeros(len(fl))]),
                                        rv, tv, k, d)
            out.append((proj.reshape(-1, 2) - q).ravel())
            floor_res = fl[np.arange(len(fl)), ax] - self.seam_val[self.keep_seam]
        return (np.concatenate(out) if out else np.zeros(0)), floor_res

    def _seam_rays(self, k, d):
        """Undistorted rays of all seam samples for this lens; the last lens's are kept,
        as a fit with the lens held fixed asks for the same ones at every step."""
        key = (np.asarray(k, float).tobytes(), np.asarray(d, float).tobytes())
        if self._rays is None or self._rays[0] != key:
            self._rays = (key, _undistort(self.seam_px, k, d))
        return self._rays[1]

    def groups(self):
        """Group of each kept observation: every point its own, the samples of one
        seam line (axis and value) one group (see ``uncertainty.cluster_covariance``)."""
        n_pts = int(self.keep_pts.sum())
        seam = self.seam_axis[self.keep_seam] * 1e6 + np.round(
            self.seam_val[self.keep_seam], 6)
        _, seam_id = np.unique(seam, return_inverse=True)
        return np.concatenate([np.arange(n_pts), n_pts + seam_id.ravel()]).astype(int)

    def n_independent(self):
        """Independent observations kept: two per point (u and v), one per seam sample
        (its residual only moves across the seam: a 2-D residual of rank one)."""
        return int(2 * self.keep_pts.sum() + self.keep_seam.sum())

    def drop_outliers(self, res, limit_px):
        n_pts = len(self.pts_px)
        e = np.hypot(*res.reshape(-1, 2).T)
        self.keep_pts = e[:n_pts] < limit_px
        self.keep_seam = e[n_pts:] < limit_px


def _start_model(size, obs, camera, init, warnings):
    """Starting intrinsics, distortion, pose; and whether the focal length is observable."""
    w, h = size
    if init is not None:
        k0, d0, rvec0, tvec0 = (np.array(v, float) for v in init)
        return k0, d0, rvec0, tvec0, True
    k0, d0 = (None, np.zeros(5)) if camera is None else (camera.matrix, camera.dist_coeffs)
    if len(obs.pts_px) < 4:
        raise CalibrationError(f"{len(obs.pts_px)} floor point(s) to start from, need 4")
    und = obs.pts_px if k0 is None else cv2.undistortPoints(
        obs.pts_px.reshape(-1, 1, 2), k0, d0, P=k0).reshape(-1, 2)
    hmg, _ = cv2.findHomography(obs.pts_fl, und, 0)
    if hmg is None:
        raise CalibrationError("points: no homography fits them; check for "
                               "swapped or duplicated rows")
    focal_ok = True
    if k0 is None:
        pp = np.array([(w - 1) / 2.0, (h - 1) / 2.0])
        f = focal_from_homography(hmg, pp)
        if f is None or not (0.2 * max(w, h) < f < 20 * max(w, h)):
            f = 1.2 * max(w, h)
            focal_ok = False
            warnings.append("focal length not observable from this view (camera "
                            "looks nearly straight at the floor); assumed "
                            f"{f:.0f} px - give a camera profile for height correction")
        k0 = np.array([[f, 0, pp[0]], [0, f, pp[1]], [0, 0, 1.0]])
    rvec0, tvec0 = pose_from_homography(hmg, k0)
    return k0, d0, rvec0, tvec0, focal_ok


def _free_terms(camera, options: FitOptions, n_seam, focal_ok):
    """Names of the freed parameters beyond the pose, in parameter order."""
    if camera is not None:
        focal, k1, k2 = (bool(options.fit_focal), bool(options.fit_k1),
                         bool(options.fit_k2))
    else:
        focal = True if options.fit_focal is None else bool(options.fit_focal)
        k1 = (n_seam >= 200) if options.fit_k1 is None else bool(options.fit_k1)
        k2 = (k1 and n_seam >= 600) if options.fit_k2 is None else bool(options.fit_k2)
    focal = focal and focal_ok
    k2 = k2 and k1
    return tuple(n for n, on in (("focal", focal), ("k1", k1), ("k2", k2)) if on)




def fit_camera(image_size, *, points=None, seams=None, camera: CameraProfile | None = None,
               init=None, options: FitOptions = FitOptions()):
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
        Known intrinsics and distortion (held fixed unless ``options`` frees terms).
    init : (K, dist, rvec, tvec), optional
        Starting model; default from the homography of ``points``.
    options : FitOptions
        Freed terms, robust loss scale and outlier limit.

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
    obs = _Observations.of(points, seams)
    n_pts, n_seam = len(obs.pts_px), len(obs.seam_px)
    if camera is not None and (camera.width_px, camera.height_px) != (w, h):
        raise InputError(
            f"camera profile {camera.path or ''}: made for {camera.width_px}x"
            f"{camera.height_px}, the video is {w}x{h}; calibrate in this mode")
    k0, d0, rvec0, tvec0, focal_ok = _start_model((w, h), obs, camera, init, warnings)
    free = _free_terms(camera, options, n_seam, focal_ok)
    d0 = np.asarray(d0, float).ravel()
    if len(d0) < 5:
        d0 = np.concatenate([d0, np.zeros(5 - len(d0))])
    if 2 * n_pts + n_seam < 6 + len(free) + 2:
        raise CalibrationError(f"{n_pts} points and {n_seam} seam samples are too few to "
                               "fit the camera; add points")
    if camera is None and "k1" not in free:
        warnings.append("no lens distortion modelled (no camera profile, too few seam "
                        "samples to estimate it); give a camera profile from 'vidodo lens'")

    def unpack(x):
        k, d = k0.copy(), d0.copy()
        for name, v in zip(free, x[6:], strict=True):
            if name == "focal":
                k[0, 0] = k[1, 1] = k0[0, 0] * math.exp(v)
            else:
                d[0 if name == "k1" else 1] = v
        return k, d, x[:3], x[3:6]

    def residuals(x):
        return obs.residuals(*unpack(x))[0]

    start = {"focal": 0.0, "k1": d0[0], "k2": d0[1]}
    x = np.concatenate([np.ravel(rvec0), np.ravel(tvec0), [start[n] for n in free]])
    for _round in range(2 if options.outlier_px else 1):
        try:
            sol = least_squares(residuals, x, loss="soft_l1", f_scale=options.loss_px,
                                x_scale="jac", max_nfev=200)
        except (ValueError, cv2.error) as exc:
            raise CalibrationError(f"camera fit failed ({exc}); check the points") from None
        x = sol.x
        if options.outlier_px and _round == 0:
            obs.drop_outliers(residuals(x), options.outlier_px)
    return _finish_fit(obs, unpack(x), sol, (free, options.loss_px), warnings)


def _finish_fit(obs, model, sol, free_loss, warnings):
    """Residual statistics, the mirror check and the covariance of a converged fit
    (``free_loss``: the freed terms and the soft-L1 loss scale the fit used [px])."""
    free, loss_px = free_loss
    k, d, rv, tv = model
    res, floor_res = obs.residuals(k, d, rv, tv)
    e_px = np.hypot(*res.reshape(-1, 2).T) if len(res) else np.zeros(0)
    rms_px = float(np.sqrt(np.mean(e_px ** 2))) if len(e_px) else math.nan
    r = cv2.Rodrigues(rv)[0]
    fres = [floor_res]
    if obs.keep_pts.any():  # points: floor residual by back-projection
        fl = _ray_floor(_undistort(obs.pts_px[obs.keep_pts], k, d), r, tv)
        fres.append(np.linalg.norm(fl - obs.pts_fl[obs.keep_pts], axis=1))
    fres = np.concatenate(fres)
    rms_fl = float(np.sqrt(np.mean(fres ** 2))) if len(fres) else math.nan
    centre = -r.T @ tv
    if not np.all(np.isfinite(centre)):
        raise CalibrationError("camera fit did not converge; check the points")
    if centre[2] <= 0:
        raise CalibrationError(
            "the fit puts the camera below the floor: the floor coordinates are mirrored "
            "(x and y swapped, or one axis reversed); fix the points or the origin")
    cov = None
    if len(res) == sol.jac.shape[0]:
        # SciPy returns the Jacobian scaled by sqrt(psi') of the loss; the covariance
        # takes the plain one and the loss's own weights.
        plain = sol.jac / np.sqrt(soft_l1_weights(res, loss_px)[1])[:, None]
        cov = cluster_covariance(plain, res, np.repeat(obs.groups(), 2), len(sol.x),
                                 n_obs=obs.n_independent(), loss_scale=loss_px)
    return CameraFit(k, d, np.asarray(rv, float).copy(), np.asarray(tv, float).copy(),
                     rms_px, rms_fl, int(obs.keep_pts.sum() + obs.keep_seam.sum()),
                     np.concatenate([obs.keep_pts, obs.keep_seam]), tuple(warnings), cov,
                     ("rvec", "tvec") + free)


def pose_fit_points(px, fl, camera_matrix, dist_coeffs, pose0, *, outlier_px=3.0,
                    min_outlier_px=0.3, rounds=3):
    """Camera pose only, from floor points, by OpenCV's Levenberg-Marquardt.

    ``cv2.solvePnP`` (iterative, started from ``pose0 = (rvec0, tvec0)``) on all points, then again
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
    rvec0, tvec0 = pose0
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
    # The pose's covariance from the kept points' residuals (OpenCV's derivatives of the
    # projection with respect to rvec and tvec, its first six columns).
    proj, dproj = cv2.projectPoints(obj[keep], rv, tv, camera_matrix, dist_coeffs)
    cov = pose_covariance(dproj[:, :6], (proj.reshape(-1, 2) - px[keep]).ravel(), 6)
    return CameraFit(np.asarray(camera_matrix, float), np.asarray(dist_coeffs, float), rv, tv,
                     float(np.sqrt(np.mean(err[keep] ** 2))), rms_fl, int(keep.sum()), keep,
                     covariance=cov)


def fit_to_registration(t_s, fit: CameraFit, method, extra_warnings=()):
    return FrameRegistration(float(t_s), True, fit.camera_matrix, fit.dist_coeffs,
                             fit.rvec, fit.tvec, fit.rms_px, fit.rms_floor_m, fit.n_points,
                             method, "", tuple(fit.warnings) + tuple(extra_warnings),
                             param_cov=fit.covariance,
                             param_names=fit.free if fit.covariance is not None else ())


