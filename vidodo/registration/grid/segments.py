"""Straight segments of the frame and the vanishing points of the two seam families."""

from __future__ import annotations

import math

import cv2
import numpy as np

__all__ = ["ridge_strength", "colour_contrast", "find_segments", "hom_lines", "find_vp",
           "refine_vp", "same_direction", "vp_consistent"]


def ridge_strength(grey, sigma_px=1.5):
    """Thin-line strength: Hessian eigenvalue contrast at scale ``sigma_px``.

    A line (dark or bright) curves the intensity strongly across and little along,
    so ``|l_big| - 2 |l_small|`` is large on it and near zero on isotropic grain
    (after the vesselness idea of Frangi et al., MICCAI 1998).
    """
    g = cv2.GaussianBlur(grey.astype(np.float32), (0, 0), sigma_px)
    dxx = cv2.Sobel(g, cv2.CV_32F, 2, 0, ksize=3)
    dyy = cv2.Sobel(g, cv2.CV_32F, 0, 2, ksize=3)
    dxy = cv2.Sobel(g, cv2.CV_32F, 1, 1, ksize=3)
    half_tr = (dxx + dyy) / 2
    root = np.sqrt(((dxx - dyy) / 2) ** 2 + dxy ** 2)
    l_big = np.abs(half_tr) + root
    l_small = np.abs(np.abs(half_tr) - root)
    return np.maximum(l_big - 2 * l_small, 0)


def colour_contrast(frame_bgr, max_luma_weight=0.9):
    """The frame projected on its strongest colour axis, when that is not brightness.

    Tiles of alternating colours can have nearly the same brightness (red and green):
    their edges vanish in a grey image but not along the main axis of the frame's
    colour spread (first principal component of the CIE L*a*b* pixels, the idea of
    PCA decolourisation; Gonzalez & Woods, *Digital Image Processing*, 3rd ed.,
    section 11.4). Returns None for a grey frame or when that axis is mostly L*
    (the grey image shows the same edges).

    Returns
    -------
    ndarray of shape (H, W), uint8, or None
    """
    if frame_bgr is None or frame_bgr.ndim != 3:
        return None
    lab = cv2.cvtColor(frame_bgr, cv2.COLOR_BGR2LAB).astype(np.float32)
    flat = lab.reshape(-1, 3)
    sample = flat[:: max(len(flat) // 50000, 1)]
    mean = sample.mean(axis=0)
    _val, vec = np.linalg.eigh(np.cov((sample - mean).T))
    axis = vec[:, -1]
    if abs(axis[0]) >= max_luma_weight:
        return None
    proj = (lab - mean) @ axis
    lo, hi = np.percentile(proj[:: 7, :: 7], [0.5, 99.5])
    if hi - lo < 1e-6:
        return None
    return np.clip((proj - lo) / (hi - lo) * 255.0, 0, 255).astype(np.uint8)


def _gradient(img):
    g = cv2.GaussianBlur(img, (0, 0), 1.0)
    return cv2.magnitude(cv2.Sobel(g, cv2.CV_32F, 1, 0), cv2.Sobel(g, cv2.CV_32F, 0, 1))


def find_segments(grey, ignore=None, min_len_px=None, colour=None):
    """Straight segments: thin seams (Hough on ridge strength) and strong edges (LSD),
    the edges also in ``colour`` (:func:`colour_contrast`) when given."""
    h, w = grey.shape
    min_len = min_len_px or max(12.0, 0.012 * math.hypot(w, h))
    ridge = ridge_strength(grey)
    binary = (ridge > max(np.percentile(ridge, 96), 1e-3)).astype(np.uint8) * 255
    if ignore is not None:
        binary[np.asarray(ignore, bool)] = 0
    grad = _gradient(grey)
    evidence = (binary > 0) | (grad > np.percentile(grad, 96))
    if colour is not None:
        grad_c = _gradient(colour)
        evidence |= grad_c > np.percentile(grad_c, 96)
    evidence = cv2.dilate(evidence.astype(np.uint8), np.ones((5, 5), np.uint8)) > 0
    # Local line direction from the structure tensor (Bigun & Granlund, 1987): the
    # dominant gradient direction is across a line or an edge; the line runs across it.
    # With a colour channel its tensor is added (each normalised by its gradient level).
    jxx = jyy = jxy = 0.0
    for img, level in ((grey, 1.0), (colour, None)):
        if img is None:
            continue
        gi = cv2.GaussianBlur(img, (0, 0), 1.0)
        gx = cv2.Sobel(gi, cv2.CV_32F, 1, 0)
        gy = cv2.Sobel(gi, cv2.CV_32F, 0, 1)
        if level is None:  # the colour channel weighs as much as the grey one
            level = float(np.percentile(grad, 96) / max(np.percentile(grad_c, 96), 1e-6))
        jxx = jxx + cv2.GaussianBlur(gx * gx, (0, 0), 2.5) * level ** 2
        jyy = jyy + cv2.GaussianBlur(gy * gy, (0, 0), 2.5) * level ** 2
        jxy = jxy + cv2.GaussianBlur(gx * gy, (0, 0), 2.5) * level ** 2
    line_angle = 0.5 * np.arctan2(2 * jxy, jxx - jyy) + np.pi / 2
    hp = cv2.HoughLinesP(binary, 1, np.pi / 360, 40, minLineLength=0.04 * max(h, w),
                         maxLineGap=6)
    parts = [np.zeros((0, 4))] if hp is None else [hp.reshape(-1, 4).astype(np.float64)]
    lsd = cv2.createLineSegmentDetector(cv2.LSD_REFINE_STD)
    for img in (grey,) if colour is None else (grey, colour):
        lines = lsd.detect(img)[0]
        if lines is not None:
            seg = lines.reshape(-1, 4).astype(np.float64)
            length = np.hypot(seg[:, 2] - seg[:, 0], seg[:, 3] - seg[:, 1])
            parts.append(seg[length >= 2 * min_len])
    seg = np.vstack(parts)
    if ignore is not None and len(seg):
        mid = (seg[:, :2] + seg[:, 2:]) / 2
        ui = np.clip(mid[:, 0].round().astype(int), 0, w - 1)
        vi = np.clip(mid[:, 1].round().astype(int), 0, h - 1)
        seg = seg[~np.asarray(ignore, bool)[vi, ui]]
    return seg, (evidence, line_angle)


def hom_lines(seg):
    p = np.column_stack([seg[:, :2], np.ones(len(seg))])
    q = np.column_stack([seg[:, 2:], np.ones(len(seg))])
    ln = np.cross(p, q)
    return ln / np.linalg.norm(ln[:, :2], axis=1, keepdims=True)


def _fit_vp(lines, weights):
    """Least-squares vanishing point of homogeneous lines (smallest eigenvector)."""
    m = (lines * weights[:, None]).T @ lines
    _w, v = np.linalg.eigh(m)
    return v[:, 0]


def _segment_tolerance(seg, tol_rad, end_tol):
    """Per segment, the largest angle [rad] between it and the direction from its
    midpoint to a vanishing point that it is consistent with: ``tol_rad``, but for long
    segments no more than puts their end points ``end_tol`` (conditioned units) off
    that direction (a long straight seam fixes its direction better than a short one;
    the usual end-point residual of vanishing-point estimation, Hartley & Zisserman,
    *Multiple View Geometry*, 2nd ed., section 8.6.1)."""
    half = np.hypot(seg[:, 2] - seg[:, 0], seg[:, 3] - seg[:, 1]) / 2
    if end_tol is None:
        return np.full(len(seg), tol_rad)
    return np.minimum(tol_rad, np.arctan2(end_tol, np.maximum(half, 1e-12)))


def vp_consistent(seg, vps, tol_rad, end_tol=None):
    """Whether each segment points at each vanishing point: (M, N) bool over ``vps``
    (M, 3) and ``seg`` (N, 4); see :func:`_segment_tolerance`."""
    mid = (seg[:, :2] + seg[:, 2:]) / 2
    d = seg[:, 2:] - seg[:, :2]
    finite = np.abs(vps[:, 2]) > 1e-12
    with np.errstate(invalid="ignore", divide="ignore"):
        pt = vps[:, :2] / np.where(finite, vps[:, 2], 1.0)[:, None]
    to_x = np.where(finite[:, None], pt[:, 0:1] - mid[None, :, 0], vps[:, 0:1])
    to_y = np.where(finite[:, None], pt[:, 1:2] - mid[None, :, 1], vps[:, 1:2])
    cross = d[None, :, 0] * to_y - d[None, :, 1] * to_x
    dot = d[None, :, 0] * to_x + d[None, :, 1] * to_y
    ang = np.abs(np.arctan2(cross, dot))
    ang = np.minimum(ang, math.pi - ang)
    return ang < _segment_tolerance(seg, tol_rad, end_tol)[None, :]


def find_vp(seg, cond, rng, tol_rad, iters=600, exclude=None, end_tol=None):
    """RANSAC vanishing point over segments (conditioned coordinates).

    All ``iters`` hypotheses (two length-weighted segments each) are drawn and scored at
    once; the one whose consistent segments (:func:`_segment_tolerance`) are longest in
    total wins; it is then refined (:func:`refine_vp`).
    """
    n = len(seg)
    if n < 4:
        return None, np.zeros(n, bool)
    length = np.hypot(seg[:, 2] - seg[:, 0], seg[:, 3] - seg[:, 1])
    lines = hom_lines(seg)
    prob = length / length.sum()
    i = rng.choice(n, iters, p=prob)
    j = rng.choice(n, iters, p=prob)
    vps = np.cross(lines[i], lines[j])
    good = (i != j) & np.all(np.isfinite(vps), axis=1) & (np.linalg.norm(vps, axis=1) > 0)
    if exclude is not None:
        b = _vp_dir(exclude, cond)
        for k in np.nonzero(good)[0]:
            a = _vp_dir(vps[k], cond)
            if abs(a[0] * b[1] - a[1] * b[0]) < math.sin(math.radians(8)):
                good[k] = False
    vps = vps[good]
    if len(vps) == 0:
        return None, np.zeros(n, bool)
    score = np.concatenate([vp_consistent(seg, vps[c:c + 100], tol_rad, end_tol)
                            @ length for c in range(0, len(vps), 100)])
    k = int(np.argmax(score))
    return refine_vp(seg, vps[k], tol_rad, end_tol, guard=False)


def refine_vp(seg, vp, tol_rad, end_tol=None, guard=True):
    """A vanishing point refined by least squares over its consistent segments (length
    weighted); with ``guard``, each step kept only while their total length does not
    drop (a refinement pulled between two nearby families would drift off both).

    Returns
    -------
    (ndarray (3,), ndarray bool (N,))
        The point and which segments of ``seg`` are consistent with it.
    """
    length = np.hypot(seg[:, 2] - seg[:, 0], seg[:, 3] - seg[:, 1])
    lines = hom_lines(seg)
    best = np.asarray(vp, float)
    inl = vp_consistent(seg, best[None, :], tol_rad, end_tol)[0]
    best_score = float(length[inl].sum())
    for _ in range(3):
        if inl.sum() < 2:
            break
        if length[inl].sum() <= 0:
            break
        cand = _fit_vp(lines[inl], length[inl])
        new = vp_consistent(seg, cand[None, :], tol_rad, end_tol)[0]
        if guard and float(length[new].sum()) < best_score:
            break
        best, inl, best_score = cand, new, float(length[new].sum())
    return best, inl


def same_direction(vp, other, cond):
    """True when two vanishing points are nearly the same (as seen from the image centre)."""
    a = _vp_dir(vp, cond)
    b = _vp_dir(other, cond)
    return abs(a[0] * b[1] - a[1] * b[0]) < math.sin(math.radians(8))


def _vp_dir(vp, cond):
    c = cond
    if abs(vp[2]) > 1e-12:
        d = vp[:2] / vp[2] - c
    else:
        d = vp[:2].copy()
    n = np.linalg.norm(d)
    return d / n if n > 0 else d

