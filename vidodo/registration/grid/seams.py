"""Tile seams located across their predicted positions, and the camera refitted on them."""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from ...profiles import CameraProfile, FieldProfile
from ...robust import median_abs_deviation
from ..camera_fit import FitOptions, fit_camera
from ..frame import FrameRegistration

__all__ = ["seam_samples", "locate_seams", "SeamSearch", "refine_fit", "MAX_MM_PER_PX"]


def _zero_centre(values, axis):
    """Centre of :func:`median_abs_deviation` for residuals already taken about a median."""
    return np.zeros(np.delete(values.shape, axis))


#: Seams seen coarser than this across (floor millimetres per pixel) are not used.
MAX_MM_PER_PX = math.inf


def _erf(x):
    """Error function, vectorised (Abramowitz & Stegun 7.1.26, |error| < 1.5e-7)."""
    sign = np.sign(x)
    x = np.abs(x)
    t = 1.0 / (1.0 + 0.3275911 * x)
    y = 1.0 - (((((1.061405429 * t - 1.453152027) * t) + 1.421413741) * t - 0.284496736) * t
               + 0.254829592) * t * np.exp(-x * x)
    return sign * y


def _seam_lines(field: FieldProfile, step_frac=1 / 10, gap_frac=0.12, border=False):
    """Floor sample points on the seams, away from seam crossings.

    The field's outer border is left out unless ``border``: where the tiles end the
    edge is often a gap, a half seam or a different surround, so its image position is
    a less faithful mark of the tile boundary than an interior seam.

    Returns (points (N, 2) [m], axis (N,), value (N,) [m], normal (N, 2)).
    """
    s = field.tile_size_m
    t = np.arange(gap_frac, 1 - gap_frac + 1e-9, step_frac)
    pts, axis, val, nrm = [], [], [], []
    lo = 0 if border else 1
    for i in range(lo, field.tiles_x + 1 - lo):
        for j in range(field.tiles_y):
            y = (j + t) * s
            pts.append(np.column_stack([np.full_like(y, i * s), y]))
            axis.append(np.zeros(len(y), int))
            val.append(np.full(len(y), i * s))
            nrm.append(np.tile([1.0, 0.0], (len(y), 1)))
    for j in range(lo, field.tiles_y + 1 - lo):
        for i in range(field.tiles_x):
            x = (i + t) * s
            pts.append(np.column_stack([x, np.full_like(x, j * s)]))
            axis.append(np.ones(len(x), int))
            val.append(np.full(len(x), j * s))
            nrm.append(np.tile([0.0, 1.0], (len(x), 1)))
    if not pts:
        return np.zeros((0, 2)), np.zeros(0, int), np.zeros(0), np.zeros((0, 2))
    return np.vstack(pts), np.concatenate(axis), np.concatenate(val), np.vstack(nrm)


@dataclass(frozen=True)
class SeamSearch:
    """How :func:`seam_samples` looks for the seams."""

    half_width_px: float = 8.0
    """How far from the predicted position the seam is looked for [px]."""
    step_frac: float = 1 / 20
    """Spacing of the samples along a seam, as a fraction of the tile side."""
    min_contrast: float = 4.0
    """Least dip or step, in grey levels, for a sample to count."""
    border: bool | None = None
    """Use the field's outer border too (default: only when the field has fewer than
    3 tiles in a direction)."""
    max_mm_per_px: float | None = None
    """Leave out seams coarser than this across (floor mm per image pixel); default
    :data:`MAX_MM_PER_PX`."""


EMPTY = (np.zeros((0, 2)), np.zeros(0, int), np.zeros(0))


def seam_samples(grey, field: FieldProfile, reg, *, ignore=None,
                 search: SeamSearch = SeamSearch()):
    """Locate the tile seams across their predicted positions.

    For every sample point on a seam the image is read along the seam's normal
    (through the current registration ``reg``, anything with ``floor_to_image``),
    averaged over five parallel profiles 2 px apart along the seam. A thin line
    (darker or lighter than both sides) is placed at the centroid of its dip; a step
    between two shades (the field's border) at the peak of the gradient, refined by a
    parabola. Samples with too little contrast, or touching ignored pixels, are left
    out.

    Parameters
    ----------
    grey : ndarray of shape (H, W), uint8
    field : FieldProfile
    reg : FrameRegistration
        Where the seams are predicted.
    ignore : ndarray of bool, shape (H, W), optional
        Pixels to leave out (the robot).
    search : SeamSearch
        Search width, sample spacing, contrast limits.

    Returns
    -------
    (ndarray (N, 2), ndarray (N,) int, ndarray (N,))
        Seam pixels [px], floor axis held constant by that seam, and its value [m].
    """
    border = search.border
    if border is None:  # interior seams suffice once there are two per direction
        border = min(field.tiles_x, field.tiles_y) < 3
    fl, axis, val, nrm = _seam_lines(field, search.step_frac, border=border)
    return locate_seams(grey, reg, (fl, axis, val, nrm), field.tile_size_m, ignore=ignore,
                        search=search)[:3]


def locate_seams(grey, reg, lines, tile_size_m, *, ignore=None,
                 search: SeamSearch = SeamSearch()):
    """Look for a seam at each given floor sample point (see :func:`seam_samples`).

    Parameters
    ----------
    lines : (ndarray (N, 2), ndarray (N,) int, ndarray (N,), ndarray (N, 2))
        Floor sample points [m], the axis each seam holds constant, its value [m] and
        the seam's floor normal.
    tile_size_m : float
        Tile side [m]: a profile must stay well inside one tile on each side.

    Returns
    -------
    (ndarray (K, 2), ndarray (K,) int, ndarray (K,), ndarray (N,) bool, ndarray (N,))
        Located seam pixels [px], their axis and value [m] (as :func:`seam_samples`);
        then, per input point, whether it could be examined (in view, resolved, not
        ignored) and where across the predicted position a seam was found [px] (NaN
        where none was).
    """
    fl, axis, val, nrm = lines
    n_in = len(fl)
    looked = np.zeros(n_in, bool)
    offset = np.full(n_in, np.nan)
    if n_in == 0:
        return EMPTY + (looked, offset)
    prep = _predict(grey.shape, reg, lines, tile_size_m, search)
    if prep is None:
        return EMPTY + (looked, offset)
    ok, p0, n, tang, reach, bg_px = prep
    prof, keep = _profiles(grey, p0, n, tang, reach, ignore)
    t_peak, found = _locate(prof, reach, bg_px, search.min_contrast)
    looked[np.nonzero(ok)[0][keep]] = True
    keep &= found
    offset[np.nonzero(ok)[0][keep]] = t_peak[keep]
    q = p0 + t_peak[:, None] * n
    return q[keep], axis[ok][keep], val[ok][keep], looked, offset


def _predict(shape, reg, lines, tile_size_m, search):
    """Predicted seam pixels, image normals and tangents of the examinable samples."""
    fl, _axis, _val, nrm = lines
    h, w = shape
    half_width_px = search.half_width_px
    max_mm_per_px = MAX_MM_PER_PX if search.max_mm_per_px is None else search.max_mm_per_px
    delta = 0.01 * tile_size_m
    p0 = reg.floor_to_image(fl)
    along = nrm[:, ::-1]  # the seam's own direction on the floor
    tang = reg.floor_to_image(fl + delta * along) - p0
    across = reg.floor_to_image(fl + delta * nrm) - p0
    with np.errstate(invalid="ignore", divide="ignore"):
        tang = tang / np.linalg.norm(tang, axis=1, keepdims=True)
        n = np.column_stack([-tang[:, 1], tang[:, 0]])  # image normal of the seam
        # Pixels per metre across the seam, measured along the image normal.
        px_per_m = np.abs(np.sum(across * n, axis=1)) / delta
    bg_px = max(2.5, half_width_px * 0.6)
    reach = half_width_px + bg_px
    ok = np.all(np.isfinite(p0), axis=1) & np.all(np.isfinite(n), axis=1)
    margin = reach + 6
    ok &= (p0[:, 0] > margin) & (p0[:, 0] < w - 1 - margin)
    ok &= (p0[:, 1] > margin) & (p0[:, 1] < h - 1 - margin)
    # The profile must stay well inside one tile on each side of the seam.
    ok &= px_per_m * tile_size_m > 3 * reach
    # Seams seen at a grazing angle (coarser than max_mm_per_px across) are blurred
    # below a pixel and mostly show the shade step between tiles: left out.
    ok &= px_per_m * max_mm_per_px * 1e-3 >= 1.0
    if not ok.any():
        return None
    return ok, p0[ok], n[ok], tang[ok], reach, bg_px


def _profiles(grey, p0, n, tang, reach, ignore):
    """Grey profiles across the seams (mean of five parallel ones), and which are clear
    of ignored pixels."""
    h, w = grey.shape
    step = 0.5
    ts = np.arange(-reach, reach + 1e-9, step)
    img = grey.astype(np.float32)
    prof = 0.0
    ig = None if ignore is None else np.asarray(ignore, bool)
    keep = np.ones(len(p0), bool)
    offsets = (-4.0, -2.0, 0.0, 2.0, 4.0)
    for o in offsets:
        cx = p0[:, 0:1] + o * tang[:, 0:1]
        cy = p0[:, 1:2] + o * tang[:, 1:2]
        mx = (cx + ts[None, :] * n[:, 0:1]).astype(np.float32)
        my = (cy + ts[None, :] * n[:, 1:2]).astype(np.float32)
        prof = prof + cv2.remap(img, mx, my, cv2.INTER_LINEAR,
                                borderMode=cv2.BORDER_REPLICATE)
        if ig is not None:
            ui = np.clip(np.round(mx).astype(int), 0, w - 1)
            vi = np.clip(np.round(my).astype(int), 0, h - 1)
            keep &= ~ig[vi, ui].any(axis=1)
    prof = prof / len(offsets)
    return prof, keep


def _locate(prof, reach, bg_px, min_contrast):
    """Seam position along each profile [px from the prediction] and whether found."""
    step = 0.5
    ts = np.arange(-reach, reach + 1e-9, step)
    sig = 0.75 / step
    kr = int(3 * sig)
    kern = np.exp(-0.5 * (np.arange(-kr, kr + 1) / sig) ** 2)
    prof = cv2.filter2D(prof, -1, (kern / kern.sum())[None, :],
                        borderType=cv2.BORDER_REPLICATE)
    nb = int(round(bg_px / step))
    left = np.median(prof[:, :nb], axis=1)
    right = np.median(prof[:, -nb:], axis=1)
    # Robust sigma of the background about each side's own median (MAD about zero).
    noise = median_abs_deviation(np.concatenate(
        [prof[:, :nb] - left[:, None], prof[:, -nb:] - right[:, None]], axis=1),
        axis=1, center=_zero_centre, scale="normal")
    search = prof[:, nb:-nb]
    t_s = ts[nb:-nb]
    rows = np.arange(len(prof))
    edge_strength = np.abs(left - right)
    # Thin line: a dip (or bump) on top of a possible step between two tile shades.
    # The step is removed as a blurred step centred on the current estimate, so that the
    # dip becomes symmetric and its centroid unbiased (two passes).
    raw_dark = np.minimum(left, right)[:, None] - search
    raw_bright = search - np.maximum(left, right)[:, None]
    use_bright = raw_bright.max(axis=1) > raw_dark.max(axis=1)
    t_line = t_s[np.argmax(np.where(use_bright[:, None], raw_bright, raw_dark), axis=1)]
    blur_px = 1.0
    win = int(round(3.0 / step))
    for _pass in range(2):
        z = (t_s[None, :] - t_line[:, None]) / (blur_px * math.sqrt(2))
        step_model = left[:, None] + (right - left)[:, None] * 0.5 * (1 + _erf(z))
        dip = step_model - search
        dip = np.where(use_bright[:, None], -dip, dip)
        line_strength = dip.max(axis=1)
        k = np.argmax(dip, axis=1)
        idx = k[:, None] + np.arange(-win, win + 1)[None, :]
        valid_idx = (idx >= 0) & (idx < dip.shape[1])
        idx_c = np.clip(idx, 0, dip.shape[1] - 1)
        wgt = np.maximum(dip[rows[:, None], idx_c] - 0.5 * line_strength[:, None], 0)
        wgt = wgt * valid_idx
        with np.errstate(invalid="ignore", divide="ignore"):
            t_new = (wgt * t_s[idx_c]).sum(axis=1) / wgt.sum(axis=1)
        t_line = np.where(np.isfinite(t_new), t_new, t_line)
    line_ok = ((k > 0) & (k < dip.shape[1] - 1) & (line_strength > min_contrast)
               & (line_strength > 4 * noise) & (line_strength > 0.7 * edge_strength))
    # Step edge: gradient peak with a parabola.
    grad = np.abs(np.diff(search, axis=1))
    kg = np.argmax(grad, axis=1)
    kgc = np.clip(kg, 1, grad.shape[1] - 2)
    a, b, c = grad[rows, kgc - 1], grad[rows, kgc], grad[rows, kgc + 1]
    den = a - 2 * b + c
    with np.errstate(invalid="ignore", divide="ignore"):
        off = np.clip(np.where(den < 0, 0.5 * (a - c) / den, 0.0), -0.5, 0.5)
    t_edge = t_s[0] + (kgc + 0.5 + off) * step
    # A step is only located where no seam line shows: next to a dark (or light) line the
    # gradient peak sits on the line's flank, off the boundary.
    has_line = (line_strength > min_contrast) & (line_strength > 4 * noise)
    edge_ok = (~line_ok & ~has_line & (edge_strength > min_contrast)
               & (edge_strength > 4 * noise) & (kg > 0) & (kg < grad.shape[1] - 1))
    t_peak = np.where(line_ok, t_line, t_edge)
    return t_peak, (line_ok | edge_ok) & np.isfinite(t_peak)


def refine_fit(grey, field: FieldProfile, fit, *, camera: CameraProfile | None = None,
               ignore=None, rounds=3, min_samples=40):
    """Refit a camera model on the tile seams, starting from ``fit``.

    Parameters
    ----------
    fit : CameraFit
        The starting model (from markers, points or the lattice corners); it must
        place every seam within a few pixels.
    camera : CameraProfile, optional
        Known lens (held fixed); without it focal length and k1 are fitted too.

    Returns
    -------
    CameraFit or None
        None when fewer than ``min_samples`` seam samples were found.
    """

    h, w = grey.shape
    cur = fit
    # Search widths scale with the image (tuned at 1280 x 720, diagonal 1469 px).
    scale = float(np.clip(math.hypot(w, h) / 1469.0, 0.5, 1.5))
    widths = tuple(v * scale for v in (12.0, 6.0, 4.0))[-rounds:]
    out = None
    for hw in widths[:rounds]:
        reg = FrameRegistration(0.0, True, cur.camera_matrix, cur.dist_coeffs, cur.rvec,
                                cur.tvec, 0.0, 0.0, 0, "")
        q, ax, val = seam_samples(grey, field, reg, ignore=ignore,
                                   search=SeamSearch(half_width_px=hw))
        if len(q) < min_samples:
            return out
        free = camera is None
        cur = fit_camera((w, h), seams=(q, ax, val), camera=camera,
                         init=(cur.camera_matrix, cur.dist_coeffs, cur.rvec, cur.tvec),
                         options=FitOptions(fit_focal=free, fit_k1=free and len(q) >= 200,
                                            fit_k2=free and len(q) >= 600, outlier_px=1.5,
                                            loss_px=0.5))
        out = cur
    return out

