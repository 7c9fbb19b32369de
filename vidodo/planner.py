"""Camera placement planner: how well would a proposed camera see the marker, everywhere?

Geometry only (no footage): a pinhole camera with OpenCV's distortion model at a given
pose projects the marker (flat, facing up, at its height) at every point of a grid over
the field. From that projection follow

* the marker's cell size in pixels (``sqrt(image area) / cells across``), against the
  smallest cell that detects reliably (README: 4-5 px);
* the expected 1-sigma position error, from the project's own error model (the one
  behind the track's 1-sigma, DEVELOPERS.md "How the 1-sigma is built"): independent
  corner noise of ``sigma_px`` on each of the four corners, propagated through the
  camera geometry by the Jacobian of the corners' pixels with respect to the marker's
  floor pose (x, y, heading), ``cov = sigma_px^2 (J^T J)^-1``; the position 1-sigma is
  ``sqrt(trace(cov_xy) / 2)`` (per axis, RMS of the two);
* the timing term of the same model: a detection timed off by ``dt`` moves the
  position by ``speed * dt``; the track's ``dt`` is the row fraction of the marker in
  the image times how far the rolling-shutter readout may be off (0 when the camera
  profile gives it, else a phone's readout of up to 30 ms); the planner takes the
  speed as an assumed typical drive speed (:attr:`PlanSettings.speed_mps`);
* the part of the field out of view.

:func:`plan_map` computes the map; :func:`suggest` searches the lowest camera height and
the smallest marker that keep every point detectable.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import cv2
import numpy as np

from .errors import InputError
from .profiles import marker_corners_local
from .tracking.detector import DEFAULT_REFINE, refine_bias_sigma_px
from .tracking.finish import UNKNOWN_READOUT_MAX_S

UNKNOWN_READOUT_SIGMA_S = UNKNOWN_READOUT_MAX_S / math.sqrt(3.0)
"""The track's readout uncertainty when none is known: a readout anywhere from 0 to
``UNKNOWN_READOUT_MAX_S`` (RMS of a uniform spread) [s]."""

__all__ = ["marker_cells_across", "marker_cell_px", "ProposedCamera", "CameraView", "view_of",
           "PlanSettings", "PlanMap", "camera_pose", "plan_map", "predict_at", "suggest",
           "registration_term_px",
           "Suggestion", "corner_jacobian"]


def marker_cells_across(family: str) -> int:
    """Cells across a marker's black square: its bits plus a one-cell border (OpenCV)."""
    code = getattr(cv2.aruco, family, None) if family.startswith("DICT_") else None
    if code is None:
        raise InputError(f"marker family {family!r} is not an OpenCV predefined dictionary; "
                         "use a name like 'DICT_4X4_50'")
    return int(cv2.aruco.getPredefinedDictionary(code).markerSize) + 2


def _marker_points(xy_m, size_m, z_m, yaw_rad=0.0):
    """(N, 4, 3) corners of a flat marker centred at each point [m]."""
    loc = marker_corners_local(size_m)
    c, s = math.cos(yaw_rad), math.sin(yaw_rad)
    loc = loc @ np.array([[c, -s], [s, c]]).T
    xy = np.asarray(xy_m, float).reshape(-1, 1, 2) + loc[None]
    return np.concatenate([xy, np.full(xy.shape[:2] + (1,), z_m)], axis=2)


def _project(pts, rvec, tvec, K, dist):
    img, _ = cv2.projectPoints(pts.reshape(-1, 3), np.asarray(rvec, float),
                               np.asarray(tvec, float), np.asarray(K, float),
                               np.zeros(5) if dist is None else np.asarray(dist, float))
    return img.reshape(pts.shape[:-1] + (2,))


def _in_front(pts, rvec, tvec):
    R, _ = cv2.Rodrigues(np.asarray(rvec, float))
    zc = pts.reshape(-1, 3) @ R[2] + float(np.asarray(tvec, float).reshape(3)[2])
    return (zc.reshape(pts.shape[:-1]) > 1e-3).all(axis=-1)


def marker_cell_px(rvec, tvec, K, dist, xy_m, marker) -> np.ndarray:
    """Marker cell size [px] if the marker lay at each floor point (at its height).

    Parameters
    ----------
    rvec, tvec : array_like
        Camera pose, floor -> camera (OpenCV).
    K : ndarray of shape (3, 3)
    dist : array_like or None
        OpenCV distortion coefficients.
    xy_m : ndarray of shape (N, 2)
        Floor points [m].
    marker : Marker
        Its ``size_m``, ``z_m`` and ``family``.

    Returns
    -------
    ndarray of shape (N,)
        ``sqrt(image area) / cells across`` [px]; NaN behind the camera.
    """
    pts = _marker_points(xy_m, marker.size_m, marker.z_m)
    img = _project(pts, rvec, tvec, K, dist)
    d1, d2 = img[:, 2] - img[:, 0], img[:, 3] - img[:, 1]
    area = 0.5 * np.abs(d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0])
    out = np.sqrt(area) / marker_cells_across(marker.family)
    return np.where(_in_front(pts, rvec, tvec), out, np.nan)


def corner_jacobian(rvec, tvec, K, dist, xy_m, size_m, z_m, *, step_m=1e-4):
    """d(corner pixels) / d(x, y, heading) of a flat marker at each point.

    Central differences of :func:`cv2.projectPoints` (step ``step_m`` in position,
    ``step_m`` rad in heading).

    Returns
    -------
    ndarray of shape (N, 8, 3)
        Pixels per metre (columns 0, 1) and per radian (column 2).
    """
    xy = np.asarray(xy_m, float).reshape(-1, 2)
    cols = []
    for k in range(3):
        pos, neg = xy.copy(), xy.copy()
        yaw_p = yaw_n = 0.0
        if k < 2:
            pos[:, k] += step_m
            neg[:, k] -= step_m
        else:
            yaw_p, yaw_n = step_m, -step_m
        ip = _project(_marker_points(pos, size_m, z_m, yaw_p), rvec, tvec, K, dist)
        im = _project(_marker_points(neg, size_m, z_m, yaw_n), rvec, tvec, K, dist)
        cols.append(((ip - im) / (2 * step_m)).reshape(len(xy), 8))
    return np.stack(cols, axis=2)


@dataclass(frozen=True)
class ProposedCamera:
    """A camera to try: where it stands, where it looks, its lens."""

    x_m: float
    y_m: float
    z_m: float
    """Lens height above the floor [m]."""
    look_x_m: float
    look_y_m: float
    width_px: int = 1920
    height_px: int = 1080
    hfov_deg: float | None = 68.0
    """Horizontal field of view (a phone's main camera: about 65-75 deg, from memory)."""
    fx_px: float | None = None
    """Focal length from a lens profile (overrides ``hfov_deg``) [px]."""
    dist: tuple[float, ...] = (0.0, 0.0, 0.0, 0.0, 0.0)

    @property
    def matrix(self):
        """Camera matrix K [px]."""
        fx = self.fx_px if self.fx_px else (self.width_px / 2) / math.tan(
            math.radians(self.hfov_deg) / 2)
        return np.array([[fx, 0, (self.width_px - 1) / 2], [0, fx, (self.height_px - 1) / 2],
                         [0, 0, 1.0]])


@dataclass(frozen=True)
class CameraView:
    """A camera as the planner needs it: lens and pose (OpenCV conventions)."""

    camera_matrix: np.ndarray
    dist_coeffs: np.ndarray
    rvec: np.ndarray
    """Floor -> camera rotation (Rodrigues)."""
    tvec: np.ndarray
    """Floor -> camera translation [m]."""
    width_px: int
    height_px: int


def view_of(cam: ProposedCamera) -> CameraView:
    """The :class:`CameraView` of a proposed camera."""
    rvec, tvec = camera_pose(cam)
    return CameraView(cam.matrix, np.asarray(cam.dist, float), rvec, tvec, cam.width_px,
                      cam.height_px)


def camera_pose(cam: ProposedCamera):
    """``rvec, tvec`` (floor -> camera, OpenCV) of a camera looking at a floor point.

    Camera z along the line of sight, x to the image's right (level horizon), y down.
    """
    c = np.array([cam.x_m, cam.y_m, cam.z_m])
    fwd = np.array([cam.look_x_m, cam.look_y_m, 0.0]) - c
    if np.linalg.norm(fwd[:2]) < 1e-9 and abs(fwd[2]) < 1e-9:
        raise InputError("the camera looks at its own position; give a look-at point")
    z = fwd / np.linalg.norm(fwd)
    up = np.array([0.0, 0.0, 1.0])
    x = np.cross(z, up)
    if np.linalg.norm(x) < 1e-9:  # straight down: image top towards +y
        x = np.array([1.0, 0.0, 0.0])
    x /= np.linalg.norm(x)
    y = np.cross(z, x)
    R = np.vstack([x, y, z])
    rvec, _ = cv2.Rodrigues(R)
    return rvec.ravel(), -R @ c


@dataclass(frozen=True)
class PlanSettings:
    """Grid and thresholds of the planner."""

    grid_m: float = 0.05
    """Spacing of the map's grid [m]."""
    sigma_corner_px: float = 0.3
    """1-sigma corner noise per image axis [px]; a measured run's value is in
    ``track.quality.json`` (``corner_noise_px``)."""
    min_cell_px: float = 4.0
    """Smallest marker cell that detects reliably (README: 4-5 px) [px]."""
    registration_px: float = 0.0
    """RMS residual of the floor registration [px] (``vidodo register``'s ``rms_px``);
    0 leaves the registration's error out."""
    registration_points: int = 0
    """Points the registration was fitted to (``n_points``)."""
    margin_m: float = 0.0
    """Keep the marker this far inside the field edges [m] (half the robot)."""
    corner_bias_px: float = refine_bias_sigma_px(DEFAULT_REFINE)
    """1-sigma of a shift common to all corners of the marker [px], the track's
    ``corner_bias_px`` (fit residuals cannot show it): by default the default corner
    refinement's own, as in the track."""
    speed_mps: float = 0.5
    """Typical drive speed the timing term assumes [m/s] (an assumption, set it to the
    robot's usual speed; the map's title states it)."""
    readout_sigma_s: float = UNKNOWN_READOUT_SIGMA_S
    """How far the rolling-shutter readout the track uses may be off [s] (1-sigma): 0
    when the camera profile gives ``readout_s``; the default is the track's for an
    unknown readout."""


@dataclass(frozen=True)
class PlanMap:
    """The planner's map over the field."""

    x_m: np.ndarray
    """(nx,) grid x [m]."""
    y_m: np.ndarray
    """(ny,) grid y [m]."""
    sigma_xy_m: np.ndarray
    """(ny, nx) expected 1-sigma position error per axis [m]; NaN where not seen."""
    cell_px: np.ndarray
    """(ny, nx) marker cell size [px]."""
    in_view: np.ndarray
    """(ny, nx) bool: the whole marker is inside the image, in front of the camera."""
    detectable: np.ndarray
    """(ny, nx) bool: in view and cells at least ``min_cell_px``."""

    @property
    def all_detectable(self) -> bool:
        """Every grid point is detectable."""
        return bool(self.detectable.all())


def plan_map(fld, marker, cam, settings: PlanSettings = PlanSettings()) -> PlanMap:
    """Expected error, cell size and visibility at every grid point of the field.

    Parameters
    ----------
    fld : FieldProfile
    marker : Marker
        Its size, height and family.
    cam : ProposedCamera or CameraView
    settings : PlanSettings

    Returns
    -------
    PlanMap
    """
    sx, sy = fld.size_m
    m = settings.margin_m
    gx = np.arange(m, sx - m + 1e-9, settings.grid_m)
    gy = np.arange(m, sy - m + 1e-9, settings.grid_m)
    xx, yy = np.meshgrid(gx, gy)
    xy = np.column_stack([xx.ravel(), yy.ravel()])
    reg_px = math.hypot(registration_term_px(settings), settings.corner_bias_px)
    sigma, cell, in_view = predict_at(xy, marker, cam, settings.sigma_corner_px, reg_px,
                                      speed_mps=settings.speed_mps,
                                      readout_sigma_s=settings.readout_sigma_s)
    shape = xx.shape
    det = in_view & (np.nan_to_num(cell) >= settings.min_cell_px)
    return PlanMap(gx, gy, sigma.reshape(shape), cell.reshape(shape),
                   in_view.reshape(shape), det.reshape(shape))


REGISTRATION_PARAMS = 8
"""Parameters of a floor registration (a homography's 8), as in the track's model."""


def registration_term_px(settings: PlanSettings) -> float:
    """The registration's mean prediction error in image px: ``rms * sqrt(p / n)``.

    A least-squares fit of p parameters to n observations with residual sigma predicts
    with mean variance sigma^2 p / n (trace of the hat matrix; Draper & Smith, *Applied
    Regression Analysis*, 3rd ed., section 8.1): the term the track's 1-sigma adds.
    """
    if settings.registration_px <= 0 or settings.registration_points <= 0:
        return 0.0
    n = max(settings.registration_points, REGISTRATION_PARAMS)
    return settings.registration_px * math.sqrt(REGISTRATION_PARAMS / n)


def _floor_jacobian(xy, z_m, v):
    """d(image px) / d(floor x, y) of a point at height ``z_m`` [px/m], (N, 2, 2)."""
    step = 1e-4
    pts = []
    for d in ((step, 0.0), (-step, 0.0), (0.0, step), (0.0, -step)):
        q = np.column_stack([xy + d, np.full(len(xy), z_m)])
        pts.append(_project(q[:, None, :], v.rvec, v.tvec, v.camera_matrix,
                            v.dist_coeffs)[:, 0])
    return np.stack([(pts[0] - pts[1]) / (2 * step), (pts[2] - pts[3]) / (2 * step)], axis=2)


def _metres_per_px(xy, z_m, v):
    """Floor metres per image px at each point (RMS over the two axes) [m/px]."""
    inv = np.linalg.pinv(_floor_jacobian(xy, z_m, v))  # d floor / d px, (N, 2, 2)
    return np.sqrt(np.einsum("nij,nij->n", inv, inv) / 2)


def predict_at(xy_m, marker, cam, sigma_corner_px, registration_px=0.0, *, speed_mps=0.0,
               readout_sigma_s=0.0):
    """Expected 1-sigma position error per axis, cell size and visibility at points.

    Parameters
    ----------
    xy_m : ndarray of shape (N, 2)
        Marker centres on the floor [m].
    marker : Marker
    cam : ProposedCamera or CameraView
    sigma_corner_px : float
        1-sigma corner noise per image coordinate [px].
    registration_px : float
        The registration's prediction error [px] (:func:`registration_term_px`; with a
        common corner shift, its hypot with ``corner_bias_px``), added in quadrature
        through the floor metres per px at the point.
    speed_mps : float or ndarray of shape (N,)
        The robot's speed at the points [m/s].
    readout_sigma_s : float
        How far the readout time may be off [s]: adds the track's timing term, ``speed
        x row fraction x readout_sigma_s`` along the motion (per axis: / sqrt(2), the
        direction of travel taken as random).

    Returns
    -------
    sigma_xy_m : ndarray of shape (N,)
        ``sqrt(trace(cov_xy) / 2)`` with ``cov = sigma^2 (J^T J)^-1`` [m], plus the
        registration term; NaN out of view.
    cell_px : ndarray of shape (N,)
        NaN out of view.
    in_view : ndarray of bool, shape (N,)
    """
    v = cam if isinstance(cam, CameraView) else view_of(cam)
    xy = np.asarray(xy_m, float).reshape(-1, 2)
    K, dist, rvec, tvec = v.camera_matrix, v.dist_coeffs, v.rvec, v.tvec
    pts = _marker_points(xy, marker.size_m, marker.z_m)
    img = _project(pts, rvec, tvec, K, dist)
    inside = ((img[..., 0] >= 0) & (img[..., 0] <= v.width_px - 1)
              & (img[..., 1] >= 0) & (img[..., 1] <= v.height_px - 1)).all(axis=1)
    in_view = inside & _in_front(pts, rvec, tvec)
    cell = marker_cell_px(rvec, tvec, K, dist, xy, marker)
    J = corner_jacobian(rvec, tvec, K, dist, xy, marker.size_m, marker.z_m)
    info = np.einsum("nki,nkj->nij", J, J)
    cov = sigma_corner_px**2 * np.linalg.pinv(info)
    var = np.maximum((cov[:, 0, 0] + cov[:, 1, 1]) / 2, 0.0)
    if registration_px > 0:
        var = var + (registration_px * _metres_per_px(xy, marker.z_m, v)) ** 2
    if readout_sigma_s > 0:
        centre = img.mean(axis=1)
        frac = np.clip(centre[:, 1] / v.height_px, 0.0, 1.0)
        var = var + (np.asarray(speed_mps, float) * frac * readout_sigma_s) ** 2 / 2
    sigma = np.sqrt(var)
    return np.where(in_view, sigma, np.nan), np.where(in_view, cell, np.nan), in_view


@dataclass(frozen=True)
class Suggestion:
    """What would keep every point detectable (None: nothing in the range tried)."""

    lowest_height_m: float | None
    smallest_marker_m: float | None


HEIGHTS_M = tuple(np.round(np.arange(0.5, 4.001, 0.1), 3))
"""Camera heights :func:`suggest` tries, lowest first [m]."""
SIZES_M = (0.02, 0.6)
"""Range of marker sizes :func:`suggest` searches [m]."""


def suggest(fld, marker, cam: ProposedCamera, settings: PlanSettings = PlanSettings(), *,
            heights_m=HEIGHTS_M, sizes_m=SIZES_M) -> Suggestion:
    """The lowest camera height that keeps every point in view and detectable (same
    spot and aim), and the smallest marker that keeps every point in view detectable
    (same camera; to 1 mm, by bisection: cells grow with the marker).

    Returns
    -------
    Suggestion
        None where nothing in the range works.
    """
    coarse = replace(settings, grid_m=max(settings.grid_m, 0.1))
    height = next((float(h) for h in heights_m
                   if plan_map(fld, marker, replace(cam, z_m=float(h)), coarse).all_detectable),
                  None)

    def fine(size_m):
        m = plan_map(fld, replace(marker, size_m=float(size_m)), cam, coarse)
        return bool(np.all(m.detectable[m.in_view])) and m.in_view.any()

    lo, hi = sizes_m
    if not fine(hi):
        return Suggestion(height, None)
    while hi - lo > 0.001:
        mid = (lo + hi) / 2
        lo, hi = (lo, mid) if fine(mid) else (mid, hi)
    return Suggestion(height, round(hi, 3))
