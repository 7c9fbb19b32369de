"""Tile-corner candidates for the corner picker: seam crossings located to a fraction of a pixel.

A tile corner in footage is where two thin seams cross (or where a seam meets the field
edge). Generic corner detectors place such a crossing poorly when the seams are faint
and a pixel or two wide, so each candidate is located from the seams themselves:

1. Thin-line strength from the Hessian of the blurred frame (a line curves the
   intensity strongly across and little along; after the vesselness idea of Frangi et
   al., MICCAI 1998). Long straight segments of the strongest responses
   (``cv2.HoughLinesP``) are seams; grain makes short scattered ones. Where two such
   segments at a clear angle cross, a candidate is tried.
2. Around each, the two dominant line directions come from a histogram of the Hessian's
   line directions, weighted by line strength.
3. Each line is sampled across every pixel along +-``half_px`` (the crossing itself
   left out), the cross-sections averaged in a few groups per arm, the seam centre
   located in each group's mean profile, and a straight line fitted to the centres
   (total least squares). Lens distortion bends a seam by far less than a pixel over
   so short a span. The last pass models the profile as a line plus a brightness step
   on the same centre (neighbouring tiles differ in brightness, which would otherwise
   pull the centre towards the darker tile).
4. The candidate is the intersection of the two lines; candidates whose lines are too
   short, too noisy or meet far from the start are dropped.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

__all__ = ["CornerSettings", "line_strength", "refine_crossing", "corner_candidates"]


@dataclass(frozen=True)
class CornerSettings:
    """How candidates are found and located."""

    max_candidates: int = 1500
    """Most candidates kept (strongest first)."""
    max_seeds: int = 1500
    """Starting points tried (strongest line crossings first)."""
    seed_distance_px: float = 5.0
    """Smallest distance between starting points [px]."""
    min_segment_frac: float = 0.02
    """Shortest straight line used for starting points, as a fraction of the frame's
    larger side."""
    min_distance_px: float = 8.0
    """Candidates closer than this are merged [px]."""
    half_px: float = 45.0
    """Half length of each seam sampled around a crossing [px]."""
    gap_px: float = 4.0
    """Half length left out around the crossing itself [px]."""
    across_px: float = 6.0
    """Half width of each cross-section [px]."""
    sigma_px: float = 0.45
    """Blur before sampling [px]."""
    max_rms_px: float = 0.35
    """Largest RMS of the group centres about a fitted line [px]."""
    chunks: int = 3
    """Groups of cross-sections averaged on each arm of a seam."""
    max_shift_px: float = 6.0
    """Largest distance between the start and the located crossing [px]."""
    min_angle_deg: float = 20.0
    """Smallest angle between the two lines [deg]."""


def _hessian(grey, sigma_px):
    g = cv2.GaussianBlur(grey.astype(np.float32), (0, 0), sigma_px)
    dxx = cv2.Sobel(g, cv2.CV_32F, 2, 0, ksize=3)
    dyy = cv2.Sobel(g, cv2.CV_32F, 0, 2, ksize=3)
    dxy = cv2.Sobel(g, cv2.CV_32F, 1, 1, ksize=3)
    return dxx, dyy, dxy


def line_strength(grey, sigma_px=1.5):
    """Thin-line strength and line direction per pixel.

    Returns
    -------
    (ndarray (H, W) float32, ndarray (H, W) float32)
        ``|l_big| - 2 |l_small|`` clipped at 0 (Hessian eigenvalues), and the angle of
        the line (the eigenvector of the smaller curvature) [rad], in [0, pi).
    """
    dxx, dyy, dxy = _hessian(grey, sigma_px)
    half_tr = (dxx + dyy) / 2
    root = np.sqrt(((dxx - dyy) / 2) ** 2 + dxy ** 2)
    l_big = np.abs(half_tr) + root
    l_small = np.abs(np.abs(half_tr) - root)
    strength = np.maximum(l_big - 2 * l_small, 0)
    # direction of largest curvature (across the line), then turned by 90 degrees
    across = 0.5 * np.arctan2(2 * dxy, dxx - dyy)
    # the eigenvector angle above belongs to the larger signed eigenvalue; for a dark
    # line (positive curvature across) that is the across direction, for a bright one
    # the along direction
    along = np.where(half_tr >= 0, across + np.pi / 2, across)
    return strength, np.mod(along, np.pi).astype(np.float32)


def _directions(strength, angle, p, half, min_angle_rad):
    h, w = strength.shape
    u0, v0 = int(round(p[0])), int(round(p[1]))
    r = int(half)
    a, b = max(v0 - r, 0), min(v0 + r + 1, h)
    c, d = max(u0 - r, 0), min(u0 + r + 1, w)
    s = strength[a:b, c:d].ravel()
    ang = angle[a:b, c:d].ravel()
    if s.size == 0 or not np.any(s > 0):
        return None
    bins = 36
    hist = np.bincount((ang / np.pi * bins).astype(int) % bins, weights=s, minlength=bins)
    hist = hist + 0.5 * (np.roll(hist, 1) + np.roll(hist, -1))
    i1 = int(np.argmax(hist))
    sep = np.abs((np.arange(bins) - i1 + bins / 2) % bins - bins / 2) * (np.pi / bins)
    masked = np.where(sep >= min_angle_rad, hist, -1.0)
    i2 = int(np.argmax(masked))
    if masked[i2] <= 0.2 * hist[i1]:
        return None
    return [(i + 0.5) * np.pi / bins for i in (i1, i2)]


def _fit_line(img, p, theta, cfg: CornerSettings, precise=False):
    """Fit one seam through about ``p`` at angle ``theta``: (point, direction, rms) or None.

    The cross-sections of each arm are averaged in ``cfg.chunks`` groups (a faint seam
    on a grainy floor is located by its mean profile, not by single sections). While the
    line is found, each group's centre is the vertex of the parabola through the
    extreme of the mean profile and its neighbours 0.5 px either side; with ``precise``
    a last pass models the seam and the brightness step across it
    (:func:`_line_centres`).
    """
    d = np.array([math.cos(theta), math.sin(theta)])
    centre = np.asarray(p, float)
    along = np.arange(-cfg.half_px, cfg.half_px + 1e-9, 1.0)
    along = along[np.abs(along) >= cfg.gap_px]
    groups = np.array_split(np.arange(along.size), 2 * cfg.chunks)
    at = np.array([along[g].mean() for g in groups])
    starts = np.array([g[0] for g in groups])
    sizes = np.array([g.size for g in groups], float)
    across = np.arange(-cfg.across_px, cfg.across_px + 1e-9, 0.25)
    fit = None
    passes = 3 if precise else 2
    for k in range(passes):
        n = np.array([-d[1], d[0]])
        pts = centre + along[:, None] * d
        grid = pts[:, None, :] + across[None, :, None] * n
        prof = cv2.remap(img, grid[..., 0].astype(np.float32), grid[..., 1].astype(np.float32),
                         cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT, borderValue=np.nan)
        mean = np.add.reduceat(prof, starts, axis=0) / sizes[:, None]
        if not np.all(np.isfinite(mean)):
            return None
        off = _line_centres(across, mean) if k == 2 else _quick_centres(across, mean)
        if off is None:
            return None
        samples = centre + at[:, None] * d + off[:, None] * n
        fit = _line_through(samples)
        q, d_new, _ = fit
        if d_new @ d < 0:
            d_new = -d_new
        centre = q + ((centre - q) @ d_new) * d_new
        d = d_new
    return fit


def _quick_centres(across, mean):
    """Line centre per profile: parabola vertex at the extreme, (G,) [px] or None."""
    # the tiles either side may differ in brightness: remove the straight line
    # through the profile's ends before looking for the seam
    ramp = np.linspace(0.0, 1.0, across.size)[None, :]
    contrast = mean - (mean[:, :1] + ramp * (mean[:, -1:] - mean[:, :1]))
    sign = -1.0 if np.sum(np.min(contrast, axis=1)) < -np.sum(np.max(contrast, axis=1)) \
        else 1.0
    val = sign * contrast
    k = np.argmax(val, axis=1)
    if np.any(k < 2) or np.any(k > across.size - 3):
        return None
    rows = np.arange(len(mean))
    y0, y1, y2 = val[rows, k - 2], val[rows, k], val[rows, k + 2]
    den = y0 - 2 * y1 + y2
    if np.any(den >= -1e-9):
        return None
    return across[k] + 0.25 * (y0 - y2) / den


def _line_centres(across, profiles, widths_px=(0.5, 0.7, 1.0, 1.4, 2.0), reach_px=2.5,
                  step_px=0.05):
    """Centre of a thin line in each cross-section profile, (G,) [px] or None.

    The tiles on the two sides of a seam often differ in brightness, and that step
    pulls the darkest point of the blurred profile towards the darker tile. So each
    profile is modelled as ``a + b x + c step(x - m) + d line(x - m)`` (a Gaussian line
    of width ``w`` and an error-function step of the same width, both centred on the
    seam ``m``), linear in ``a..d`` for fixed ``m, w``: the centre is the ``m`` (on a
    ``step_px`` grid near the profile's extreme, refined by a parabola through the
    residuals) and ``w`` with the smallest residual.
    """
    from scipy.special import erf

    prof = np.asarray(profiles, float)
    g = prof.shape[0]
    detr = prof - (prof[:, :1] + (prof[:, -1:] - prof[:, :1])
                   * np.linspace(0.0, 1.0, across.size)[None, :])
    sign = -1.0 if np.sum(np.min(detr, axis=1)) < -np.sum(np.max(detr, axis=1)) else 1.0
    m0 = across[np.argmax(sign * detr, axis=1)]
    grid = np.arange(-reach_px, reach_px + 1e-9, step_px)
    best = np.full(g, np.inf)
    centre = np.full(g, np.nan)
    for w in widths_px:
        m = m0[:, None] + grid[None, :]  # (G, M)
        x = across[None, None, :] - m[..., None]  # (G, M, S)
        cols = [np.ones_like(x), np.broadcast_to(across, x.shape), erf(x / (w * math.sqrt(2))),
                np.exp(-0.5 * (x / w) ** 2)]
        a = np.stack(cols, axis=-1)  # (G, M, S, 4)
        ata = np.einsum("gmsi,gmsj->gmij", a, a) + 1e-9 * np.eye(4)
        atb = np.einsum("gmsi,gs->gmi", a, prof)
        coef = np.linalg.solve(ata, atb[..., None])[..., 0]
        sse = np.sum((np.einsum("gmsi,gmi->gms", a, coef) - prof[:, None, :]) ** 2, axis=2)
        # the line must have the polarity found above
        sse = np.where(sign * coef[..., 3] > 0, sse, 1e30)
        k = np.argmin(sse, axis=1)
        rows = np.arange(g)
        kk = np.clip(k, 1, grid.size - 2)
        y0, y1, y2 = sse[rows, kk - 1], sse[rows, kk], sse[rows, kk + 1]
        den = y0 - 2 * y1 + y2
        ok = (y1 < 1e29) & (den > 0) & (k == kk)
        frac = np.where(ok, 0.5 * (y0 - y2) / np.where(ok, den, 1.0), 0.0)
        m_best = m0 + grid[kk] + np.clip(frac, -1, 1) * step_px
        better = ok & (y1 < best)
        best = np.where(better, y1, best)
        centre = np.where(better, m_best, centre)
    return None if not np.all(np.isfinite(centre)) else centre


def _line_through(samples):
    """Total-least-squares line: (point, unit direction, RMS distance)."""
    q = samples.mean(axis=0)
    _, _, vt = np.linalg.svd(samples - q)
    d = vt[0]
    resid = (samples - q) @ vt[1]
    return q, d, float(np.sqrt(np.mean(resid ** 2)))


def _intersect(q1, d1, q2, d2):
    a = np.column_stack([d1, -d2])
    if abs(np.linalg.det(a)) < 1e-6:
        return None
    s = np.linalg.solve(a, q2 - q1)
    return q1 + s[0] * d1


def refine_crossing(img, strength, angle, p, cfg: CornerSettings | None = None, dirs=None):
    """Locate the seam crossing nearest ``p`` to a fraction of a pixel.

    Parameters
    ----------
    img : ndarray (H, W) float32
        The frame in grey, blurred by ``cfg.sigma_px``.
    strength, angle : ndarray (H, W)
        From :func:`line_strength`.
    p : array_like (2,)
        Starting point [px].
    dirs : (float, float), optional
        Directions of the two seams [rad]; default from the line directions around
        ``p``.

    Returns
    -------
    ndarray (2,) or None
        The crossing [px], or None when two straight seams are not found there.
    """
    cfg = cfg or CornerSettings()
    if dirs is None:
        dirs = _directions(strength, angle, p, cfg.half_px * 0.6,
                           math.radians(cfg.min_angle_deg))
    if dirs is None:
        return None
    lines = []
    for theta in dirs:
        fit = _fit_line(img, p, theta, cfg)
        if fit is None or fit[2] > cfg.max_rms_px:
            return None
        lines.append(fit)
    if _intersect(lines[0][0], lines[0][1], lines[1][0], lines[1][1]) is None:
        return None
    precise = []
    for q, d, _ in lines:
        fit = _fit_line(img, q, math.atan2(d[1], d[0]), cfg, precise=True)
        if fit is None or fit[2] > cfg.max_rms_px:
            return None
        precise.append(fit)
    lines = precise
    (q1, d1, _), (q2, d2, _) = lines
    if abs(float(d1[0] * d2[1] - d1[1] * d2[0])) < math.sin(math.radians(cfg.min_angle_deg)):
        return None
    x = _intersect(q1, d1, q2, d2)
    if x is None or np.linalg.norm(x - np.asarray(p, float)) > cfg.max_shift_px:
        return None
    return x


def _crossing_seeds(strength, cfg: CornerSettings):
    """Starting points where two long straight lines cross, or None.

    Returns rows ``(u_px, v_px, theta1_rad, theta2_rad)``: the crossing and the
    directions of the two segments.

    The strongest 10 % of the line-strength map, probabilistic Hough segments of at least
    ``cfg.min_segment_frac`` of the frame's larger side (grain and pebbles make short,
    scattered responses; seams long straight ones), and the crossing of every pair of
    segments at least ``min_angle_deg`` apart that lies on both (each extended by a
    quarter of its length).
    """
    h, w = strength.shape
    binary = (strength > max(float(np.percentile(strength, 90)), 1e-3)).astype(np.uint8) * 255
    seg = cv2.HoughLinesP(binary, 1, np.pi / 360, 30,
                          minLineLength=cfg.min_segment_frac * max(h, w), maxLineGap=6)
    if seg is None or len(seg) < 2:
        return None
    seg = seg.reshape(-1, 4).astype(float)
    p0, p1 = seg[:, :2], seg[:, 2:]
    length = np.linalg.norm(p1 - p0, axis=1)
    d = (p1 - p0) / length[:, None]
    i, j = np.triu_indices(len(seg), 1)
    cross = d[i, 0] * d[j, 1] - d[i, 1] * d[j, 0]
    keep = np.abs(cross) >= math.sin(math.radians(cfg.min_angle_deg))
    i, j, cross = i[keep], j[keep], cross[keep]
    r = p0[j] - p0[i]
    t = (r[:, 0] * d[j, 1] - r[:, 1] * d[j, 0]) / cross
    u = (r[:, 0] * d[i, 1] - r[:, 1] * d[i, 0]) / cross
    ext_i, ext_j = 0.25 * length[i] + 6, 0.25 * length[j] + 6
    on = (t > -ext_i) & (t < length[i] + ext_i) & (u > -ext_j) & (u < length[j] + ext_j)
    i, j = i[on], j[on]
    x = p0[i] + t[on, None] * d[i]
    inside = (x[:, 0] >= 0) & (x[:, 0] < w) & (x[:, 1] >= 0) & (x[:, 1] < h)
    x, i, j = x[inside], i[inside], j[inside]
    if len(x) == 0:
        return None
    # one seed per 4 px cell, the order of the longest segments first
    _, first = np.unique(np.floor(x / 4.0).astype(np.int64), axis=0, return_index=True)
    keep = np.sort(first)[:cfg.max_seeds]
    theta = np.arctan2(d[:, 1], d[:, 0])
    return np.column_stack([x[keep], theta[i[keep]], theta[j[keep]]])


def corner_candidates(grey, cfg: CornerSettings | None = None):
    """Tile-corner candidates of one frame, located on the seams.

    Parameters
    ----------
    grey : ndarray (H, W) uint8
    cfg : CornerSettings, optional

    Returns
    -------
    ndarray of shape (N, 2)
        Candidate corners [px] (OpenCV pixels, centres at integers), strongest first.
    """
    cfg = cfg or CornerSettings()
    grey = np.asarray(grey)
    if grey.ndim == 3:
        grey = cv2.cvtColor(grey, cv2.COLOR_BGR2GRAY)
    strength, angle = line_strength(grey)
    img = cv2.GaussianBlur(grey.astype(np.float32), (0, 0), cfg.sigma_px)
    start = _crossing_seeds(strength, cfg)
    if start is None:
        return np.zeros((0, 2))
    out = np.zeros((0, 2))
    for row in start:
        p = row[:2]
        if len(out) and np.min(np.sum((out - p) ** 2, axis=1)) < cfg.min_distance_px ** 2:
            continue  # a crossing already found here
        x = refine_crossing(img, strength, angle, p, cfg, dirs=(row[2], row[3]))
        if x is None:
            continue
        if len(out) and np.min(np.sum((out - x) ** 2, axis=1)) < (cfg.min_distance_px / 2) ** 2:
            continue
        out = np.vstack([out, x])
        if len(out) >= cfg.max_candidates:
            break
    return out
