"""Camera placement planner: how well would a proposed camera see the marker, everywhere?

Geometry only (no footage): a pinhole camera with OpenCV's distortion model at a given
pose projects the marker (flat, facing up, at its height) at every point of a grid over
the field. From that projection follow

* the marker's cell size in pixels (``sqrt(image area) / cells across``), against the
  smallest cell that detects reliably (README: 4-5 px);
* the expected 1-sigma position error per axis, the track's own model (DEVELOPERS.md
  "How the 1-sigma is built"), computed by the track's own code (:func:`error_parts`):
  the marker's projected corners are fitted by the tracker's pose fit through the
  camera taken as a registration, giving the corner-noise term ``sigma_px^2`` times the
  fit's unit covariance; the registration's parameter covariance (when a registration
  is given) carried through that fit (``registration_error.registration_pose_covs``),
  else its mean prediction error, and at least its held-out prediction error
  (``error_model.registration_sigma_m``); the common corner shift of the corner
  refinement (``corner_bias_px``, ``error_model.corner_bias_var_m2``); and the timing
  term (``error_model.timing_var_m2``): a detection timed off by the marker's row
  fraction times how far the rolling-shutter readout may be off (0 when the camera
  profile gives it, else a phone's readout of up to 30 ms), at an assumed typical drive
  speed (:attr:`PlanSettings.speed_mps`). The smoother is not modelled (one frame's
  corner term: the cautious side);
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
from .registration.frame import FrameRegistration
from .tracking.detector import DEFAULT_REFINE, Detection, refine_bias_sigma_px
from .tracking.error_model import corner_bias_var_m2, registration_sigma_m, timing_var_m2
from .tracking.finish import UNKNOWN_READOUT_MAX_S
from .tracking.pixel_lock import lock_attenuation, lock_floor_vars
from .tracking.pose_fit import fit_pose
from .tracking.registration_error import registration_pose_covs

UNKNOWN_READOUT_SIGMA_S = UNKNOWN_READOUT_MAX_S / math.sqrt(3.0)
"""The track's readout uncertainty when none is known: a readout anywhere from 0 to
``UNKNOWN_READOUT_MAX_S`` (RMS of a uniform spread) [s]."""

__all__ = ["marker_cells_across", "marker_cell_px", "ProposedCamera", "CameraView", "view_of",
           "PlanSettings", "PlanMap", "camera_pose", "plan_map", "predict_at", "suggest",
           "ErrorParts", "error_parts", "Suggestion"]


def marker_cells_across(family: str) -> int:
    """Cells across a marker's black square: its bits plus a one-cell border (OpenCV)."""
    code = getattr(cv2.aruco, family, None) if family.startswith("DICT_") else None
    if code is None:
        raise InputError(f"marker family {family!r} is not an OpenCV predefined dictionary; "
                         "use a name like 'DICT_4X4_50'")
    return int(cv2.aruco.getPredefinedDictionary(code).markerSize) + 2


def _marker_points(xy_m, size_m, z_m, yaw_rad=0.0):
    """(N, 4, 3) corners of a flat marker centred at each point [m], turned by
    ``yaw_rad`` (one angle, or one per point) [rad]."""
    loc = marker_corners_local(size_m)
    xy = np.asarray(xy_m, float).reshape(-1, 1, 2)
    yaw = np.broadcast_to(np.asarray(yaw_rad, float), (len(xy),))
    c, s = np.cos(yaw)[:, None], np.sin(yaw)[:, None]
    turned = np.stack([c * loc[None, :, 0] - s * loc[None, :, 1],
                       s * loc[None, :, 0] + c * loc[None, :, 1]], axis=2)
    xy = xy + turned
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
    registration: FrameRegistration | None = None
    """A registration of this camera (a run's reference, or ``vidodo register``'s): its
    parameter covariance is carried through the pose fit as the track carries it, with
    its residual and held-out prediction error (replaces ``registration_px`` and
    ``registration_points``); None: those two alone (the track's fallback term)."""
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
    refine: str | None = DEFAULT_REFINE
    """The tracker's corner refinement, whose pixel locking the map carries
    (:mod:`vidodo.tracking.pixel_lock`); None leaves the locking out."""
    frame_rate_hz: float = 30.0
    """Frame rate of the video [Hz] (a phone's usual, from memory): how far the marker's
    image moves between frames at ``speed_mps``, which averages the pixel locking."""


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
    return _grid_map(fld, marker, cam, settings, with_sigma=True)


def _grid_map(fld, marker, cam, settings, *, with_sigma):
    """:func:`plan_map`; without ``with_sigma`` only the view and the cells (NaN sigma)."""
    sx, sy = fld.size_m
    m = settings.margin_m
    gx = np.arange(m, sx - m + 1e-9, settings.grid_m)
    gy = np.arange(m, sy - m + 1e-9, settings.grid_m)
    xx, yy = np.meshgrid(gx, gy)
    xy = np.column_stack([xx.ravel(), yy.ravel()])
    if with_sigma:
        sigma, cell, in_view = predict_at(xy, marker, cam, settings)
    else:
        cell, in_view = _view_cells(xy, marker, _as_view(cam))
        sigma = np.full(len(xy), np.nan)
    shape = xx.shape
    det = in_view & (np.nan_to_num(cell) >= settings.min_cell_px)
    return PlanMap(gx, gy, sigma.reshape(shape), cell.reshape(shape),
                   in_view.reshape(shape), det.reshape(shape))


def _as_view(cam) -> CameraView:
    return cam if isinstance(cam, CameraView) else view_of(cam)


def _view_cells(xy, marker, v):
    """Cell size [px] (NaN out of view) and whether the whole marker is in view."""
    pts = _marker_points(xy, marker.size_m, marker.z_m)
    img = _project(pts, v.rvec, v.tvec, v.camera_matrix, v.dist_coeffs)
    inside = ((img[..., 0] >= 0) & (img[..., 0] <= v.width_px - 1)
              & (img[..., 1] >= 0) & (img[..., 1] <= v.height_px - 1)).all(axis=1)
    in_view = inside & _in_front(pts, v.rvec, v.tvec)
    cell = marker_cell_px(v.rvec, v.tvec, v.camera_matrix, v.dist_coeffs, xy, marker)
    return np.where(in_view, cell, np.nan), in_view


def _registration_of(v: CameraView, settings) -> FrameRegistration:
    """The camera as the tracker's registration of it: its lens and pose, with the
    parameter covariance, residual and prediction error of ``settings.registration``
    (or only ``registration_px`` over ``registration_points``, no covariance)."""
    given = settings.registration
    if given is not None:
        return FrameRegistration(
            0.0, True, np.asarray(v.camera_matrix, float), np.asarray(v.dist_coeffs, float),
            np.asarray(v.rvec, float), np.asarray(v.tvec, float), float(given.rms_px),
            float(given.rms_floor_m), int(given.n_points), "plan",
            prediction_px=float(given.prediction_px), param_cov=given.param_cov,
            param_names=tuple(given.param_names))
    counted = settings.registration_points > 0
    return FrameRegistration(
        0.0, True, np.asarray(v.camera_matrix, float), np.asarray(v.dist_coeffs, float),
        np.asarray(v.rvec, float), np.asarray(v.tvec, float),
        float(settings.registration_px) if counted else 0.0, float("nan"),
        int(settings.registration_points), "plan")


@dataclass(frozen=True)
class ErrorParts:
    """The track's 1-sigma at points, per axis, term by term [m] (NaN out of view)."""

    corners_m: np.ndarray
    """Corner noise through the pose fit (``sigma^2 x`` the fit's unit covariance)."""
    registration_m: np.ndarray
    """The registration's error through the pose fit."""
    bias_m: np.ndarray
    """A shift common to the marker's corners (``corner_bias_px``)."""
    timing_m: np.ndarray
    """The rolling-shutter timing term at the given speed."""
    cell_px: np.ndarray
    in_view: np.ndarray
    lock_m: np.ndarray | None = None
    """The pixel locking of the marker's edges (:func:`_lock_kept_var`); None: 0."""

    @property
    def sigma_xy_m(self) -> np.ndarray:
        """All terms in quadrature [m]."""
        lock = 0.0 if self.lock_m is None else self.lock_m**2
        return np.sqrt(self.corners_m**2 + self.registration_m**2 + self.bias_m**2
                       + self.timing_m**2 + lock)


def _lock_kept_var(var_uv, speed_mps, m_per_px, frame_rate_hz):
    """Radial floor variance of the pixel locking a sample keeps [m^2], (N,).

    ``var_uv`` (N, 2) is the locking of u and of v at rest
    (:func:`~vidodo.tracking.pixel_lock.lock_floor_vars`). A marker whose image moves
    along an axis averages that axis's locking over the phases it crosses; the track
    keeps ``lock_attenuation`` of the motion squared (``finish._lock_share``). The
    planner knows neither the direction of travel nor the smoother's window: it takes
    one frame's image motion (``speed / frame rate / m_per_px``) along the axis that
    leaves the most (the cautious side): at rest all of both axes.
    """
    step = np.nan_to_num(np.asarray(speed_mps, float) / float(frame_rate_hz)
                         / np.asarray(m_per_px, float))
    kept = np.nan_to_num(lock_attenuation(step), nan=1.0) ** 2
    vu, vv = var_uv[:, 0], var_uv[:, 1]
    return np.maximum(vu + vv * kept, vv + vu * kept)


def error_parts(xy_m, marker, cam, settings: PlanSettings = PlanSettings(), *,
                speed_mps=None, heading_rad=0.0) -> ErrorParts:
    """The track's 1-sigma model at marker positions, term by term, per axis.

    The marker (at ``heading_rad``, at its height) is projected into the camera at each point
    and its corners are fitted by the tracker's own pose fit
    (:func:`~vidodo.tracking.pose_fit.fit_pose`) through the camera taken as a
    registration (:func:`_registration_of`); the terms are then the track's
    (:mod:`vidodo.tracking.error_model`, :func:`~vidodo.tracking.registration_error.
    registration_pose_covs`), each divided by sqrt(2) for one axis (the track's
    ``sigma_xy_m`` is radial), with the pixel locking of the marker's edges
    (:func:`~vidodo.tracking.pixel_lock.lock_floor_vars`, kept as
    :func:`_lock_kept_var`). The smoother is not modelled: the corner term is one
    frame's, the cautious side.

    Parameters
    ----------
    xy_m : ndarray of shape (N, 2)
        Marker centres on the floor [m].
    marker : Marker
    cam : ProposedCamera or CameraView
    settings : PlanSettings
        ``sigma_corner_px``, the registration, ``corner_bias_px``, ``readout_sigma_s``.
    speed_mps : float or ndarray of shape (N,), optional
        The robot's speed at the points [m/s]; default ``settings.speed_mps``.
    heading_rad : float or ndarray of shape (N,)
        Which way the marker's edges point on the floor [rad] (0: along the field's
        axes, a robot standing square to the field); the pixel locking depends on it.

    Returns
    -------
    ErrorParts
    """
    v = _as_view(cam)
    xy = np.asarray(xy_m, float).reshape(-1, 2)
    cell, in_view = _view_cells(xy, marker, v)
    reg = _registration_of(v, settings)
    flat = replace(marker, x_m=0.0, y_m=0.0, yaw_rad=0.0)
    img = _project(_marker_points(xy, marker.size_m, marker.z_m, heading_rad), v.rvec,
                   v.tvec, v.camera_matrix, v.dist_coeffs)
    nan = np.full(len(xy), np.nan)
    corner_var, mpp, reg_var = nan.copy(), nan.copy(), nan.copy()
    frames, at = [], []
    for k in np.flatnonzero(in_view):
        fix = fit_pose([Detection(0, img[k])], [flat], reg)
        if fix is None:
            continue
        corner_var[k] = settings.sigma_corner_px**2 * (fix.cov_unit[0, 0] + fix.cov_unit[1, 1])
        mpp[k] = fix.m_per_px
        frames.append((fix, [img[k]], [marker.z_m], reg))
        at.append(k)
    lock_uv = np.zeros((len(xy), 2))
    if frames:
        covs = np.array(registration_pose_covs(frames))
        reg_var[at] = covs[:, 0, 0] + covs[:, 1, 1]
        if settings.refine is not None:
            lock_uv[at] = lock_floor_vars([(r, c, h) for _f, c, h, r in frames],
                                          settings.refine)
    reg_sigma = registration_sigma_m(reg_var, mpp, reg.rms_px, reg.n_points,
                                     rms_m=reg.rms_floor_m, prediction_px=reg.prediction_px)
    speed = settings.speed_mps if speed_mps is None else speed_mps
    frac = np.clip(img.mean(axis=1)[:, 1] / v.height_px, 0.0, 1.0)
    timing = timing_var_m2(np.broadcast_to(np.asarray(speed, float), (len(xy),)), frac,
                           settings.readout_sigma_s)
    lock = _lock_kept_var(lock_uv, np.broadcast_to(np.asarray(speed, float), (len(xy),)),
                          mpp, settings.frame_rate_hz)
    half = np.sqrt(0.5)
    return ErrorParts(np.sqrt(corner_var) * half, np.nan_to_num(reg_sigma) * half,
                      np.sqrt(corner_bias_var_m2(settings.corner_bias_px, mpp)) * half,
                      np.where(in_view, np.sqrt(timing) * half, np.nan), cell, in_view,
                      np.sqrt(lock) * half)


def predict_at(xy_m, marker, cam, settings: PlanSettings = PlanSettings(), *,
               speed_mps=None):
    """Expected 1-sigma position error per axis, cell size and visibility at points
    (parameters as :func:`error_parts`).

    Returns
    -------
    sigma_xy_m : ndarray of shape (N,)
        The track's 1-sigma per axis (:func:`error_parts`) [m]; NaN out of view.
    cell_px : ndarray of shape (N,)
        NaN out of view.
    in_view : ndarray of bool, shape (N,)
    """
    parts = error_parts(xy_m, marker, cam, settings, speed_mps=speed_mps)
    return np.where(parts.in_view, parts.sigma_xy_m, np.nan), parts.cell_px, parts.in_view


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
                   if _grid_map(fld, marker, replace(cam, z_m=float(h)), coarse,
                                with_sigma=False).all_detectable),
                  None)

    def fine(size_m):
        m = _grid_map(fld, replace(marker, size_m=float(size_m)), cam, coarse,
                      with_sigma=False)
        return bool(np.all(m.detectable[m.in_view])) and m.in_view.any()

    lo, hi = sizes_m
    if not fine(hi):
        return Suggestion(height, None)
    while hi - lo > 0.001:
        mid = (lo + hi) / 2
        lo, hi = (lo, mid) if fine(mid) else (mid, hi)
    return Suggestion(height, round(hi, 3))
