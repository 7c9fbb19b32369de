"""Pixel locking: a marker whose edges run along the pixel rows or columns is found
shifted as a whole by an amount that depends on where its edges fall within a pixel.

A quad detector places each edge by fitting a line to its edge pixels. The error of
each pixel's edge position is a periodic function of the edge's sub-pixel phase (the
"peak locking" of sub-pixel estimators, Westerweel, Meas. Sci. Technol. 8:1379, 1997).
An oblique edge crosses many phases along its length and the line fit averages the error
away; an edge along a pixel row keeps one phase and keeps the whole error. All four
corners of a square marker then move together, which leaves no residual in the rigid fit
and persists while the robot stands still. Its size is a property of the detector,
measured on tags drawn by exact pixel-area coverage
(:data:`~vidodo.tracking.detector.PIXEL_LOCK_PX`, ``tests/test_corner_bias.py``).

Averaging a periodic error of period 1 px over an edge whose phase drifts by ``s`` px
along its length leaves, of the first harmonic, ``|sinc(s)|`` of its amplitude; the
envelope ``min(1, 1 / (pi s))`` (:func:`lock_attenuation`) bounds that for every ``s``.
"""

from __future__ import annotations

import math

import numpy as np

from .detector import PIXEL_LOCK_PX

__all__ = ["lock_attenuation", "lock_sigma_px", "lock_sigmas_px", "lock_floor_vars",
           "marker_floor_jacobians"]

FLOOR_STEP_PX = 0.5
"""Central-difference step of the image-to-floor mapping [px]."""


def lock_attenuation(span_px):
    """Share of the locking error left after averaging along an edge [-].

    Parameters
    ----------
    span_px : array_like
        How far the edge drifts across the pixel grid over its length [px] (its extent
        along the axis it nearly follows the other way, e.g. ``|dv|`` of a nearly
        horizontal edge).

    Returns
    -------
    ndarray
        ``min(1, 1 / (pi * span))``: the envelope of ``|sinc(span)|``.

    >>> [round(float(a), 3) for a in lock_attenuation([0.0, 0.2, 1.0, 4.0])]
    [1.0, 1.0, 0.318, 0.08]
    """
    s = np.abs(np.asarray(span_px, float))
    with np.errstate(divide="ignore"):
        return np.minimum(1.0, 1.0 / (math.pi * s))


def lock_sigma_px(corners_px, refine: str) -> np.ndarray:
    """1-sigma of the marker's common shift from pixel locking, per image axis [px].

    Parameters
    ----------
    corners_px : array_like (4, 2)
        The marker's corners in order around it [px].
    refine : str
        The corner refinement (:data:`~vidodo.tracking.detector.PIXEL_LOCK_PX`).

    Returns
    -------
    ndarray (2,)
        ``(sigma_u, sigma_v)``: the locking amplitude times the mean attenuation of the
        edges that set that coordinate (the nearly vertical ones for ``u``, the nearly
        horizontal ones for ``v``). The two edges of a pair are taken to lock alike
        (a marker an integer number of pixels across does): their errors add up, not
        average down. Zero for a refinement without a measured locking.
    """
    c = np.asarray(corners_px, float).reshape(-1, 2)
    if len(c) != 4:
        return np.zeros(2)
    return lock_sigmas_px(c[None], refine)[0]


def lock_sigmas_px(corners_px, refine: str) -> np.ndarray:
    """:func:`lock_sigma_px` of K markers at once: corners (K, 4, 2) [px] -> (K, 2) [px]."""
    amp = PIXEL_LOCK_PX.get(refine, 0.0)
    c = np.asarray(corners_px, float).reshape(-1, 4, 2)
    out = np.zeros((c.shape[0], 2))
    if amp <= 0 or c.shape[0] == 0:
        return out
    d = np.roll(c, -1, axis=1) - c  # the four edges
    du, dv = np.abs(d[:, :, 0]), np.abs(d[:, :, 1])
    horizontal = du >= dv
    for axis, sel, span in ((0, ~horizontal, du), (1, horizontal, dv)):
        n = sel.sum(axis=1)
        # the mean over the selected edges (a sum over at most four adds exact zeros)
        att = np.where(sel, lock_attenuation(span), 0.0).sum(axis=1)
        out[:, axis] = np.where(n > 0, amp * (att / np.maximum(n, 1)), 0.0)
    return out


def marker_floor_jacobians(frames):
    """How each marker's centre moves on its plane per image pixel [m/px].

    Central differences of ``reg.image_to_floor`` at the mean of the marker's corners
    (step :data:`FLOOR_STEP_PX`); pixels of frames that share a registration and a
    height are mapped in one call.

    Parameters
    ----------
    frames : list of (FrameRegistration, list of (4, 2) corners [px], list of heights [m])

    Returns
    -------
    list of ndarray (M, 2, 2)
        Per frame, per marker: floor (x, y) per image u (column 0) and per v (column 1).
    """
    out = [np.zeros((len(corners), 2, 2)) for _reg, corners, _h in frames]
    groups = {}
    h = FLOOR_STEP_PX
    steps = np.array([[h, 0.0], [-h, 0.0], [0.0, h], [0.0, -h]])
    for f, (reg, corners, heights) in enumerate(frames):
        for m, (c, z) in enumerate(zip(corners, heights, strict=True)):
            mid = np.asarray(c, float).reshape(-1, 2).mean(axis=0)
            groups.setdefault((id(reg), float(z)), (reg, []))[1].append((f, m, mid + steps))
    for (_, z), (reg, parts) in groups.items():
        fl = reg.image_to_floor(np.concatenate([p for _, _, p in parts]), z).reshape(-1, 4, 2)
        jac = np.stack([fl[:, 0] - fl[:, 1], fl[:, 2] - fl[:, 3]], axis=2) / (2 * h)
        for (f, m, _), j in zip(parts, jac, strict=True):
            out[f][m] = j
    return out


def lock_floor_vars(frames, refine: str) -> np.ndarray:
    """Floor variance of the robot's position from its markers' pixel locking [m^2].

    Each marker's ``(sigma_u, sigma_v)`` (:func:`lock_sigma_px`) is carried to its own
    plane through the frame's image-to-floor mapping at the marker's centre
    (:func:`marker_floor_jacobians`); markers lock independently and the position
    is about their mean, so the variances add and divide by the count squared.

    Parameters
    ----------
    frames : list of (FrameRegistration, list of (4, 2) corners [px], list of heights [m])
    refine : str

    Returns
    -------
    ndarray (len(frames), 2)
        Per frame, the floor variance (x plus y) [m^2] from the locking of the image's
        u coordinate (the nearly vertical edges) and from that of v; 0 without locking.
    """
    out = np.zeros((len(frames), 2))
    if PIXEL_LOCK_PX.get(refine, 0.0) <= 0:
        return out
    flat = [(f, np.asarray(c, float).reshape(-1, 2), len(corners), j)
            for f, ((_reg, corners, _h), jac) in enumerate(zip(frames, marker_floor_jacobians(
                frames), strict=True))
            for c, j in zip(corners, jac, strict=True)]
    four = [e for e in flat if len(e[1]) == 4]  # lock_sigma_px: zero for other outlines
    sigs = lock_sigmas_px(np.stack([e[1] for e in four]) if four else np.zeros((0, 4, 2)),
                          refine)
    for (f, _c, n, j), sig in zip(four, sigs, strict=True):
        out[f] += np.nan_to_num((sig / n) ** 2 * np.sum(j ** 2, axis=0))
    return out
