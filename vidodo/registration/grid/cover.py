"""Dense seam evidence across one seam family, accumulated over the image's pixels.

In the affinely rectified floor the lines of a family are ``rho = const``; every image
pixel has its ``rho`` (a projective function of the pixel). Binning the pixels by
``rho`` gives, per line position, the visible length of that line in image pixels and
the part of it lying on seam evidence that runs along the line (a Hough accumulation
over one pencil of lines; Hartley & Zisserman, *Multiple View Geometry*, 2nd ed.,
section 2.7 for the rectification). The pixels are visited uniformly in the image, so
lines near the camera and lines near the horizon are sampled alike, whatever the
rectified frame's stretch.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

__all__ = ["PixelGrid", "pixel_grid", "family_rho", "family_cover", "MIN_LINE_PX", "ANGLE_TOL_RAD"]

#: A line position counts as in view when at least this much of it is in the picture
#: [px at the lattice search's scale, diagonal about 1469 px]: the share of it on seams
#: is then a mean over a few dozen samples of the (5 px wide) evidence.
MIN_LINE_PX = 60.0
#: Seam evidence counts for a line when its local direction is within this angle of
#: the line's (the structure tensor's direction on a straight seam is good to a few
#: degrees; teeth and noise scatter it) [rad].
ANGLE_TOL_RAD = math.radians(12.0)
#: Pixels visited: every ``STRIDE``-th in each direction (the evidence is dilated to
#: 5 px, so a seam is never stepped over).
STRIDE = 2


@dataclass(frozen=True)
class PixelGrid:
    """The pixels visited, in the conditioned undistorted frame of the lattice search."""

    cond: np.ndarray
    """Conditioned undistorted coordinates, (h', w', 2)."""
    rows: np.ndarray
    """Image row of each visited pixel, (h',)."""
    cols: np.ndarray
    """Image column of each visited pixel, (w',)."""
    usable: np.ndarray
    """Not ignored (the robot), bool (h', w')."""


def pixel_grid(shape, camera, centre, scale, ignore=None) -> PixelGrid:
    """Visited pixels of an image of ``shape`` in conditioned coordinates
    (``(undistorted pixel - centre) * scale``; undistorted by ``camera`` when given)."""
    h, w = shape
    rows = np.arange(0, h, STRIDE)
    cols = np.arange(0, w, STRIDE)
    uu, vv = np.meshgrid(cols.astype(np.float64), rows.astype(np.float64))
    pts = np.stack([uu, vv], axis=-1)
    if camera is not None:
        k, d = camera.matrix, camera.dist_coeffs
        pts = cv2.undistortPoints(pts.reshape(-1, 1, 2), k, d, P=k).reshape(pts.shape)
    cond = (pts - np.asarray(centre, float)) * scale
    usable = np.ones(uu.shape, bool)
    if ignore is not None:
        usable = ~np.asarray(ignore, bool)[np.ix_(rows, cols)]
    return PixelGrid(cond, rows, cols, usable & np.all(np.isfinite(cond), axis=-1))


def family_rho(grid: PixelGrid, rect, f, evidence, line_angle, floor_sign):
    """Every visited pixel's line position ``rho`` in family ``f``, image pixels per unit
    of rho there, and whether the pixel is usable floor and on seam evidence running
    along the family's line through it.

    Parameters
    ----------
    grid : PixelGrid
    rect : ndarray (3, 3)
        Conditioned image -> affinely rectified floor.
    f : dict
        The family's ``normal`` and ``ref`` (rectified frame).
    evidence, line_angle : ndarray (H, W)
        Seam evidence (bool) and local line direction [rad] of the image.
    floor_sign : float
        Sign of the rectification's third coordinate on the floor side of the horizon
        (pixels on the other side are not floor).

    Returns
    -------
    rho, grad, ok, hit : ndarray (h', w')
        ``grad``: |d rho / d pixel|.
    """
    c = grid.cond
    hx = c[..., 0] * rect[0, 0] + c[..., 1] * rect[0, 1] + rect[0, 2]
    hy = c[..., 0] * rect[1, 0] + c[..., 1] * rect[1, 1] + rect[1, 2]
    hw = c[..., 0] * rect[2, 0] + c[..., 1] * rect[2, 1] + rect[2, 2]
    ok = grid.usable & (hw * floor_sign > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = ((hx / hw - f["ref"][0]) * f["normal"][0] + (hy / hw - f["ref"][1])
               * f["normal"][1])
    ok &= np.isfinite(rho)
    rho = np.where(ok, rho, 0.0)
    # The line's direction in the image is perpendicular to the gradient of rho.
    gy, gx = np.gradient(rho, STRIDE)
    grad = np.hypot(gx, gy)
    ok &= np.isfinite(grad) & (grad > 0)
    ok[1:-1, 1:-1] &= ok[:-2, 1:-1] & ok[2:, 1:-1] & ok[1:-1, :-2] & ok[1:-1, 2:]
    expected = np.arctan2(gy, gx) + math.pi / 2
    seen_angle = line_angle[np.ix_(grid.rows, grid.cols)]
    agree = np.abs(np.angle(np.exp(2j * (seen_angle - expected)))) / 2 < ANGLE_TOL_RAD
    hit = ok & agree & evidence[np.ix_(grid.rows, grid.cols)]
    return rho, grad, ok, hit


def family_cover(per_pixel, rhos):
    """Per line position ``rhos`` (equally spaced): share of the visible line on seam
    evidence running along it, visible length [px] and image pixels per unit of rho.

    ``per_pixel``: :func:`family_rho`'s result.

    Returns
    -------
    cover, length_px, speed : ndarray (N,)
    """
    rho, grad, ok, hit = per_pixel
    step = float(rhos[1] - rhos[0])
    ok = ok & (rho >= rhos[0] - step / 2) & (rho < rhos[-1] + step / 2)
    idx = np.clip(np.round((rho[ok] - rhos[0]) / step).astype(int), 0, len(rhos) - 1)
    # Each visited pixel stands for STRIDE^2 image pixels; a line's length in pixels is
    # the area of its bin divided by the bin's width in pixels (step / grad).
    per_len = STRIDE ** 2 * grad[ok] / step
    length = np.bincount(idx, per_len, len(rhos))
    on = np.bincount(idx, per_len * hit[ok], len(rhos))
    n_pix = np.bincount(idx, None, len(rhos))
    speed = np.where(n_pix > 0, np.bincount(idx, 1.0 / grad[ok], len(rhos))
                     / np.maximum(n_pix, 1), 0.0)
    cover = np.where(length >= MIN_LINE_PX, on / np.maximum(length, 1e-9), 0.0)
    return np.clip(cover, 0.0, 1.0), length, speed
