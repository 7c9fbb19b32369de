"""Find the field's tile grid in one frame: lattice candidates, orientation, seam fit."""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import cv2
import numpy as np

from ...errors import CalibrationError
from ...profiles import CameraProfile, FieldProfile
from ..camera_fit import FitOptions, check_correspondences, fit_camera
from ..floor_markers import detect_floor_markers
from .lattice import CORNER_NAMES, homography_from_lattice, initial_lattice, orient
from .seams import refine_fit
from .segments import colour_contrast

__all__ = ["GridResult", "find_grid", "LATTICE_DIAG_PX"]


#: The lattice search (segments, vanishing points, combs) runs on a copy of the frame
#: shrunk to about this diagonal [px] (1280 x 720, where its thresholds were set); the
#: seam refinement that follows always works on the full-resolution frame.
LATTICE_DIAG_PX = 1469.0


@dataclass(frozen=True)
class GridResult:
    """The fitted tile grid of one frame."""

    fit: object
    """:class:`vidodo.registration.camera_fit.CameraFit` after seam refinement."""
    origin: str
    """Which field corner (as seen from the camera) is the floor origin."""
    origin_from: str
    """'hint' or 'floor marker'."""
    n_segments: int
    """Line segments on the two seam families."""
    warnings: tuple[str, ...] = ()



def _fit_lattice(grey, field, lattice, camera, ignore, marker_px, marker_fl):
    """Orient one candidate lattice, fit the camera to its corners, refine on the seams.

    ``lattice``: (corner pixels (tiles_x+1, tiles_y+1, 2), warnings, corners to fit to
    (bool, same shape but the last axis) or None for all in or near the frame, and
    optionally where the field edges lie in the picture, :func:`.lattice.edge_views`).
    """
    lat_img, warnings, use = lattice[0], list(lattice[1]), lattice[2]
    edge_view = lattice[3] if len(lattice) > 3 else None

    h, w = grey.shape
    candidates = [field.origin_hint]
    origin_from = "hint"
    if marker_px is not None and len(marker_px):
        candidates = list(CORNER_NAMES)
        origin_from = "floor marker"
    best = None
    for origin in candidates:
        try:
            floor = orient(lat_img, field, origin, edge_view)
        except CalibrationError:
            if len(candidates) == 1:
                raise
            continue
        if origin_from == "floor marker":
            hmg = homography_from_lattice(lat_img, floor)
            guess = cv2.perspectiveTransform(marker_px.reshape(-1, 1, 2),
                                             np.linalg.inv(hmg)).reshape(-1, 2)
            err = float(np.mean(np.linalg.norm(guess - marker_fl, axis=1)))
        else:
            err = 0.0
        if best is None or err < best[0]:
            best = (err, origin, floor)
    if best is None:
        raise CalibrationError("grid: no field corner fits the tile counts; check "
                               "tiles_x and tiles_y")
    err, origin, floor = best
    if origin_from == "floor marker" and err > 0.3 * field.tile_size_m:
        warnings.append(f"floor marker is {err:.2f} m from its profile position under every "
                        "origin choice; check its x_m, y_m")
    pts_img = lat_img.reshape(-1, 2)
    pts_fl = floor.reshape(-1, 2)
    if use is not None:
        inside = np.asarray(use, bool).reshape(-1)
    else:
        inside = ((pts_img[:, 0] > -0.5 * w) & (pts_img[:, 0] < 1.5 * w)
                  & (pts_img[:, 1] > -0.5 * h) & (pts_img[:, 1] < 1.5 * h))
    check_correspondences(pts_img[inside], pts_fl[inside], where="grid corners")
    fit0 = fit_camera((w, h), points=(pts_img[inside], pts_fl[inside]), camera=camera,
                      options=FitOptions(fit_k1=False))
    fit = refine_fit(grey, field, fit0, camera=camera, ignore=ignore)
    if fit is None:
        raise CalibrationError("grid: too few tile seams could be located precisely; "
                               "check focus, lighting and tile contrast")
    return fit, origin, origin_from, warnings


def _scaled_camera(camera: CameraProfile | None, sx, sy):
    """The same lens for an image resized by ``sx``, ``sy`` (pixel centres kept)."""
    if camera is None:
        return None
    return dataclasses.replace(
        camera, width_px=max(int(round(camera.width_px * sx)), 1),
        height_px=max(int(round(camera.height_px * sy)), 1),
        fx_px=camera.fx_px * sx, fy_px=camera.fy_px * sy,
        cx_px=(camera.cx_px + 0.5) * sx - 0.5, cy_px=(camera.cy_px + 0.5) * sy - 0.5)


def _initial_lattice_scaled(grey, field, camera, ignore, rng, colour=None):
    """:func:`initial_lattice` on a copy shrunk to :data:`LATTICE_DIAG_PX` when the
    frame is larger (area averaging); the corners come back in full-size pixels.

    The lattice is only a first guess (the seam refinement searches several pixels
    around it at full resolution), so the coarser grid costs no accuracy; the segment
    and vanishing-point search scales with the pixel count.
    """
    h, w = grey.shape
    shrink = LATTICE_DIAG_PX / math.hypot(w, h)
    if shrink > 0.9:
        return initial_lattice(grey, field, camera, ignore, rng, colour=colour)
    ws, hs = max(int(round(w * shrink)), 1), max(int(round(h * shrink)), 1)
    sx, sy = ws / w, hs / h
    small = cv2.resize(grey, (ws, hs), interpolation=cv2.INTER_AREA)
    ig_small = None
    if ignore is not None:  # a shrunk pixel is ignored when any part of it was
        ig_small = cv2.resize(np.asarray(ignore, np.uint8) * 255, (ws, hs),
                              interpolation=cv2.INTER_AREA) > 0
    if colour is not None:
        colour = cv2.resize(colour, (ws, hs), interpolation=cv2.INTER_AREA)
    cands, n_seg = initial_lattice(small, field, _scaled_camera(camera, sx, sy), ig_small,
                                    rng, colour=colour)
    scale = np.array([sx, sy])
    # Edge rows and column changes scale with the picture: their order and signs hold.
    return [((c[0] + 0.5) / scale - 0.5, *c[1:]) for c in cands], n_seg


def find_grid(grey, field: FieldProfile, *, camera: CameraProfile | None = None, ignore=None,
              detectors=None, seed=0, frame_bgr=None) -> GridResult:
    """Register a frame from the tile grid alone.

    Parameters
    ----------
    grey : ndarray of shape (H, W), uint8
    field : FieldProfile
        ``tiles_x``, ``tiles_y``, ``tile_size_m``, ``origin_hint``; floor fiducials,
        when listed and visible, decide the origin instead of the hint.
    camera : CameraProfile, optional
        Known lens; without it focal length and k1 are fitted to the seams.
    ignore : ndarray of bool, optional
        Pixels to ignore (the robot).
    seed : int
        RANSAC seed (vanishing points).
    frame_bgr : ndarray of shape (H, W, 3), uint8, optional
        The colour frame: edges between tiles of different colour but equal brightness
        count as seams in the lattice search (:func:`.segments.colour_contrast`).

    Returns
    -------
    GridResult

    Raises
    ------
    CalibrationError
        No seams, one family only, too few seam lines for the field, or a fit that
        does not hold.
    """

    rng = np.random.default_rng(seed)
    colour = colour_contrast(frame_bgr)
    candidates, n_seg = _initial_lattice_scaled(grey, field, camera, ignore, rng, colour)
    marker_px = marker_fl = None
    if field.floor_markers:
        marker_px, marker_fl, _seen = detect_floor_markers(grey, field, detectors=detectors,
                                                           ignore=ignore)
    results = []
    errors = []
    for lattice in candidates:
        try:
            results.append(_fit_lattice(grey, field, lattice, camera, ignore, marker_px,
                                        marker_fl))
        except CalibrationError as exc:
            errors.append(exc)
    if not results:
        raise errors[0]
    # The window whose seams were found most completely (seam samples kept by the fit);
    # among those within 2 % of the most, the one that fits best.
    most = max(r[0].n_points for r in results)
    close = [r for r in results if r[0].n_points >= 0.98 * most]
    fit, origin, origin_from, warnings = min(close, key=lambda r: r[0].rms_px)
    return GridResult(fit, origin, origin_from, n_seg, tuple(warnings) + tuple(fit.warnings))

