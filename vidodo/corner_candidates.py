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
   located in each group's mean profile (parabola vertex), and a straight line fitted
   to the centres (total least squares); the two lines give a rough crossing.
4. Last, each seam is followed along whole tile edges, up to the next rough crossing on
   it (or ``long_half_px``), in groups of ``group_px``: each group's centre comes from a
   model of the profile as a line plus a brightness step on the same centre
   (neighbouring tiles differ in brightness, which would otherwise pull the centre
   towards the darker tile); the fit grows outwards from the crossing while the groups
   agree and is a quadratic where the seam measurably bends (lens distortion), so no
   camera profile is needed. The candidate is where the two curves cross; candidates
   whose seams are too short, too noisy or meet far from the start are dropped.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import cv2
import numpy as np

__all__ = ["CornerSettings", "line_strength", "refine_crossing", "polish_crossing",
           "corner_candidates"]


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
    long_half_px: float = 110.0
    """Longest arm of each seam sampled in the last pass, when no other candidate on
    the seam stops it sooner [px]."""
    group_px: float = 10.0
    """Length of seam averaged into one cross-section in the last pass [px]."""
    min_groups: int = 6
    """Fewest groups (both arms together) the last pass fits a seam to."""


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


def _fit_line(img, p, theta, cfg: CornerSettings):
    """Fit one seam through about ``p`` at angle ``theta``: (point, direction, rms) or None.

    The cross-sections of each arm are averaged in ``cfg.chunks`` groups (a faint seam
    on a grainy floor is located by its mean profile, not by single sections); each
    group's centre is the vertex of the parabola through the extreme of the mean
    profile and its neighbours 0.5 px either side (:func:`polish_crossing` then locates
    the seam precisely).
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
    for _ in range(2):
        n = np.array([-d[1], d[0]])
        pts = centre + along[:, None] * d
        grid = pts[:, None, :] + across[None, :, None] * n
        prof = cv2.remap(img, grid[..., 0].astype(np.float32), grid[..., 1].astype(np.float32),
                         cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT, borderValue=np.nan)
        mean = np.add.reduceat(prof, starts, axis=0) / sizes[:, None]
        if not np.all(np.isfinite(mean)):
            return None
        off = _quick_centres(across, mean)
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


@functools.lru_cache(maxsize=8)
def _seam_tables(first_px, spacing_px, n_s, step_px, widths_px):
    """What :func:`_line_centres` needs for every centre and width, independent of the
    profiles: the centres ``ms`` (M,), an orthonormal basis ``q0`` (S, 2) of the constant
    and the slope, and per width the step and line columns with ``q0`` projected out,
    as (S, 2 M), and their 2 x 2 normal matrices (M, 2, 2)."""
    from scipy.special import erf

    across = first_px + spacing_px * np.arange(n_s)
    ms = np.arange(across[0] + 1.0, across[-1] - 1.0 + 1e-9, step_px)
    q0 = np.linalg.qr(np.column_stack([np.ones(n_s), across]))[0]
    tables = []
    for w in widths_px:
        x = across[None, :] - ms[:, None]  # (M, S)
        cols = np.stack([erf(x / (w * math.sqrt(2))), np.exp(-0.5 * (x / w) ** 2)], axis=-1)
        cols = cols - np.einsum("sk,mkj->msj", q0, np.einsum("sk,msj->mkj", q0, cols))
        ata = np.einsum("msi,msj->mij", cols, cols) + 1e-9 * np.eye(2)
        tables.append((np.ascontiguousarray(cols.transpose(1, 0, 2).reshape(n_s, -1)), ata))
    return ms, q0, tables


def _line_centres(across, profiles, widths_px=(0.5, 0.7, 1.0, 1.4, 2.0), reach_px=1.0,
                  step_px=0.05):
    """Centre of a thin line in each cross-section profile, (G,) [px] (NaN where none).

    The tiles on the two sides of a seam often differ in brightness, and that step
    pulls the darkest point of the blurred profile towards the darker tile. So each
    profile is modelled as ``a + b x + c step(x - m) + d line(x - m)`` (a Gaussian line
    of width ``w`` and an error-function step of the same width, both centred on the
    seam ``m``), linear in ``a..d`` for fixed ``m, w``. The line must have the
    profile's polarity; where the best fit's has not, the best with it has no line at
    all (``d = 0``: a plain edge between two tiles). The centre is the ``m`` (on a
    ``step_px`` grid within ``reach_px`` of the profile's extreme or of its steepest
    slope, refined by a parabola through the residuals) and ``w`` with the smallest
    residual.

    The residual for every ``m`` at once: with ``a, b`` projected out (their columns do
    not depend on ``m``), what is left is a 2 x 2 least-squares problem per ``m``.
    """

    prof = np.asarray(profiles, float)
    g, n_s = prof.shape
    rows = np.arange(g)
    detr = prof - (prof[:, :1] + (prof[:, -1:] - prof[:, :1])
                   * np.linspace(0.0, 1.0, n_s)[None, :])
    sign = -1.0 if np.sum(np.min(detr, axis=1)) < -np.sum(np.max(detr, axis=1)) else 1.0
    # starts: the extreme (a thin line) and the steepest slope (a plain edge)
    starts = np.column_stack([across[np.argmax(sign * detr, axis=1)],
                              across[np.argmax(np.abs(np.gradient(prof, axis=1)), axis=1)]])
    ms, q0, tables = _seam_tables(float(across[0]), float(across[1] - across[0]), n_s,
                                  float(step_px), tuple(widths_px))
    allowed = np.any(np.abs(ms[None, None, :] - starts[:, :, None]) <= reach_px + 1e-9,
                     axis=1)  # (G, M)
    resid = prof - (prof @ q0) @ q0.T
    rr = np.sum(resid ** 2, axis=1)[:, None]
    best = np.full(g, np.inf)
    centre = np.full(g, np.nan)
    for cols, ata in tables:
        atb = (resid @ cols).reshape(g, ms.size, 2)  # (G, M, 2)
        coef = np.linalg.solve(ata[None], atb[..., None])[..., 0]
        sse = np.where(sign * coef[..., 1] > 0, rr - np.sum(atb * coef, axis=2),
                       rr - atb[..., 0] ** 2 / ata[None, :, 0, 0])
        sse = np.where(allowed, sse, np.inf)
        k = np.argmin(sse, axis=1)
        kk = np.clip(k, 1, ms.size - 2)
        y0, y1, y2 = sse[rows, kk - 1], sse[rows, kk], sse[rows, kk + 1]
        with np.errstate(invalid="ignore"):  # inf at the edges of the allowed range
            den = y0 - 2 * y1 + y2
        ok = np.isfinite(y0) & np.isfinite(y2) & (den > 0) & (k == kk)
        frac = np.where(ok, 0.5 * (y0 - y2) / np.where(ok, den, 1.0), 0.0)
        m_best = ms[kk] + np.clip(frac, -1, 1) * step_px
        better = ok & (y1 < best)
        best = np.where(better, y1, best)
        centre = np.where(better, m_best, centre)
    return centre


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


def _seam_lines(img, strength, angle, p, cfg: CornerSettings, dirs=None):
    """The two seams through about ``p`` on short arms: (crossing, d1, d2) or None."""
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
    (q1, d1, _), (q2, d2, _) = lines
    if abs(float(d1[0] * d2[1] - d1[1] * d2[0])) < math.sin(math.radians(cfg.min_angle_deg)):
        return None
    x = _intersect(q1, d1, q2, d2)
    if x is None or np.linalg.norm(x - np.asarray(p, float)) > cfg.max_shift_px:
        return None
    return x, d1, d2


def refine_crossing(img, strength, angle, p, cfg: CornerSettings | None = None, dirs=None,
                    others=None):
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
    others : ndarray (M, 2), optional
        Other crossings [px]: a seam is followed up to the next one on it (default: up
        to ``cfg.long_half_px``).

    Returns
    -------
    ndarray (2,) or None
        The crossing [px], or None when two straight seams are not found there.
    """
    cfg = cfg or CornerSettings()
    found = _seam_lines(img, strength, angle, p, cfg, dirs)
    if found is None:
        return None
    x = polish_crossing(img, *found, others=others, cfg=cfg)
    if x is None or np.linalg.norm(x - np.asarray(p, float)) > cfg.max_shift_px:
        return None
    return x


def _arm_reach(x, d, d_other, others, cfg: CornerSettings):
    """How far the seam through ``x`` along ``d`` is followed: (back_px, ahead_px).

    Up to ``cfg.long_half_px``, or short of the next crossing on the seam (where the
    other seam there enters the cross-sections).
    """
    back = ahead = cfg.long_half_px
    if others is None or len(others) == 0:
        return back, ahead
    n = np.array([-d[1], d[0]])
    rel = np.asarray(others, float) - x
    along, off = rel @ d, np.abs(rel @ n)
    on = (off < np.maximum(3.0, 0.1 * np.abs(along))) & (np.abs(along) > 2 * cfg.gap_px)
    sin_a = max(abs(float(d[0] * d_other[1] - d[1] * d_other[0])), 0.2)
    stop = cfg.gap_px + cfg.across_px * math.sqrt(1 - sin_a ** 2) / sin_a + 1.0
    if np.any(on & (along > 0)):
        ahead = min(ahead, float(np.min(along[on & (along > 0)])) - stop)
    if np.any(on & (along < 0)):
        back = min(back, float(np.min(-along[on & (along < 0)])) - stop)
    return back, ahead


def _group_centres(img, x, d, reach, cfg: CornerSettings):
    """Seam centre in groups of cross-sections along both arms from ``x``.

    Returns
    -------
    (ndarray (G,), ndarray (G,)) or None
        Position of each group along ``d`` and the seam centre across it [px]; groups
        reaching out of the frame are left out.
    """
    n = np.array([-d[1], d[0]])
    # groups of group_px, shorter on short arms (small tiles): three per arm if it can
    m = int(np.clip((min(reach) - cfg.gap_px) // 3, 2, max(2, round(cfg.group_px))))
    arms = []
    for sign, length in zip((-1.0, 1.0), reach, strict=True):
        k = int((length - cfg.gap_px) // m)
        if k > 0:
            arms.append(sign * (cfg.gap_px + np.arange(k * m, dtype=float)).reshape(k, m))
    if not arms:
        return None
    along = np.vstack(arms)  # (G, m)
    across = np.arange(-cfg.across_px, cfg.across_px + 1e-9, 0.25)
    grid = (x + along[..., None] * d)[:, :, None, :] + across[None, None, :, None] * n
    prof = cv2.remap(img, grid[..., 0].reshape(-1, across.size).astype(np.float32),
                     grid[..., 1].reshape(-1, across.size).astype(np.float32),
                     cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT, borderValue=np.nan)
    mean = prof.reshape(along.shape[0], m, across.size).mean(axis=1)
    inside = np.all(np.isfinite(mean), axis=1)
    if inside.sum() < cfg.min_groups:
        return None
    off = _line_centres(across, mean[inside])
    found = np.isfinite(off)
    if found.sum() < cfg.min_groups:
        return None
    return along[inside][found].mean(axis=1), off[found]


def _poly_fit(at, off, two_arms, f_min=9.0):
    """Least-squares ``(c2, c1, c0)``: a straight line, or a quadratic when both arms are
    there and the bend lowers the residual significantly (F statistic of the extra
    term above ``f_min``, about 3 standard deviations)."""
    ones = np.ones_like(at)
    lin = np.column_stack([np.zeros_like(at), at, ones])
    coef = np.linalg.lstsq(lin, off, rcond=None)[0]
    if not two_arms or at.size < 6:
        return coef
    quad = np.linalg.lstsq(np.vander(at, 3), off, rcond=None)[0]
    rss_lin = float(np.sum((off - lin @ coef) ** 2))
    rss_quad = float(np.sum((off - np.vander(at, 3) @ quad) ** 2))
    if (rss_lin - rss_quad) > f_min * max(rss_quad, 1e-12) / (at.size - 3):
        return quad
    return coef


def _seam_curve(at, off, cfg: CornerSettings, near_px=30.0, tol_px=0.3):
    """Seam centre across the line as a function of the position along it.

    The fit grows outwards from the crossing: first the groups within ``near_px`` (a
    straight line), then each further group in turn while it lies within ``tol_px``
    (or 3 RMS) of the curve so far; an arm ends at its first group that does not (the
    seam ends at the field edge, or something covers it). The curve is a straight line,
    or a quadratic where the seam measurably bends (a straight seam seen through a lens
    bends; over one tile edge the bend is close to a parabola), see :func:`_poly_fit`.

    Returns
    -------
    (ndarray (3,), float) or None
        Coefficients ``(c2, c1, c0)`` of ``off = c2 at^2 + c1 at + c0`` and the RMS of
        the groups used about it [px].
    """
    order = np.argsort(np.abs(at))
    keep = np.abs(at) <= near_px
    if keep.sum() < 3:
        keep = np.zeros(at.size, bool)
        keep[order[:3]] = True
    coef = _poly_fit(at[keep], off[keep], False)
    ended = set()
    for k in order:
        if keep[k] or np.sign(at[k]) in ended:
            continue
        resid = off[keep] - np.polyval(coef, at[keep])
        rms = float(np.sqrt(np.mean(resid ** 2)))
        if abs(off[k] - np.polyval(coef, at[k])) > max(tol_px, 3 * rms):
            ended.add(np.sign(at[k]))
            continue
        keep[k] = True
        both = np.sum(keep & (at < 0)) >= 3 and np.sum(keep & (at > 0)) >= 3
        coef = _poly_fit(at[keep], off[keep], both)
    if keep.sum() < cfg.min_groups:
        return None
    resid = off[keep] - np.polyval(coef, at[keep])
    return coef, float(np.sqrt(np.mean(resid ** 2)))


def _cross_curves(x, d1, c1, d2, c2):
    """Where two seams ``x + s d + off(s) n`` cross (Newton from ``x``), or None."""
    n1, n2 = np.array([-d1[1], d1[0]]), np.array([-d2[1], d2[0]])
    s = np.zeros(2)
    for _ in range(10):
        p1 = x + s[0] * d1 + np.polyval(c1, s[0]) * n1
        p2 = x + s[1] * d2 + np.polyval(c2, s[1]) * n2
        jac = np.column_stack([d1 + np.polyval(np.polyder(c1), s[0]) * n1,
                               -(d2 + np.polyval(np.polyder(c2), s[1]) * n2)])
        if abs(np.linalg.det(jac)) < 1e-6:
            return None
        step = np.linalg.solve(jac, p2 - p1)
        s += step
        if np.max(np.abs(step)) < 1e-6:
            break
    return x + s[0] * d1 + np.polyval(c1, s[0]) * n1


def polish_crossing(img, x, d1, d2, *, others=None, cfg: CornerSettings | None = None):
    """Locate a seam crossing precisely from the seams along whole tile edges.

    Each seam is followed both ways from the rough crossing ``x`` up to the next
    crossing on it (``others``) or ``cfg.long_half_px``; its cross-sections are
    averaged in groups of ``cfg.group_px``, the seam centre of each group located with
    the brightness step across it modelled (:func:`_line_centres`), and a quadratic
    (:func:`_seam_curve`) fitted to the centres. The crossing is where the two curves
    meet.

    Parameters
    ----------
    img : ndarray (H, W) float32
        The frame in grey, blurred by ``cfg.sigma_px``.
    x : array_like (2,)
        Rough crossing [px].
    d1, d2 : array_like (2,)
        Unit directions of the two seams.
    others : ndarray (M, 2), optional
        Other crossings [px].

    Returns
    -------
    ndarray (2,) or None
        The crossing [px], or None when a seam is not found or is not smooth.
    """
    cfg = cfg or CornerSettings()
    x = np.asarray(x, float)
    d1, d2 = (np.asarray(d, float) / np.linalg.norm(d) for d in (d1, d2))
    curves = []
    for d, d_other in ((d1, d2), (d2, d1)):
        groups = _group_centres(img, x, d, _arm_reach(x, d, d_other, others, cfg), cfg)
        fit = None if groups is None else _seam_curve(*groups, cfg)
        if fit is None or fit[1] > cfg.max_rms_px:
            return None
        curves.append(fit[0])
    out = _cross_curves(x, d1, curves[0], d2, curves[1])
    if out is None or np.linalg.norm(out - x) > cfg.max_shift_px:
        return None
    return out


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
    rough = []
    for row in start:
        p = row[:2]
        if rough and np.min(np.sum((np.array([r[0] for r in rough]) - p) ** 2, axis=1)) \
                < cfg.min_distance_px ** 2:
            continue  # a crossing already found here
        found = _seam_lines(img, strength, angle, p, cfg, dirs=(row[2], row[3]))
        if found is not None:
            rough.append(found)
    if not rough:
        return np.zeros((0, 2))
    xs = np.array([r[0] for r in rough])
    out = np.zeros((0, 2))
    for k, (x, d1, d2) in enumerate(rough):
        fine = polish_crossing(img, x, d1, d2, others=np.delete(xs, k, axis=0), cfg=cfg)
        if fine is None:
            continue
        if len(out) and np.min(np.sum((out - fine) ** 2, axis=1)) < (cfg.min_distance_px / 2) ** 2:
            continue
        out = np.vstack([out, fine])
        if len(out) >= cfg.max_candidates:
            break
    return out
