"""The automatic tile grid: find the floor's tile seams and fit the field's N x M grid.

Steps (no markers, no clicks):

1. Line segments (LSD, von Gioi et al., IEEE PAMI 32(4), 2010) are grouped by the two
   vanishing points of the seam families, each found by RANSAC over segment pairs and
   refined by least squares.
2. The line through both vanishing points (the floor's horizon) is sent to infinity;
   in that affinely rectified frame each family is a set of parallel, equally spaced
   lines (an affine map keeps ratios along parallel lines; Hartley & Zisserman,
   *Multiple View Geometry*, 2nd ed., section 2.7). The spacing and phase of each
   family come from the strongest periodic component of the segment positions.
3. The field is the window of ``tiles_x + 1`` by ``tiles_y + 1`` lattice lines with the
   most seam evidence; its corner named by ``origin_hint`` (as seen from the camera) or
   the one that puts a visible floor fiducial where the profile says becomes the
   origin, with x and y right-handed (z up).
4. The lattice corners give a first camera fit; :func:`refine_fit` then samples the
   image across every seam, locates the seam to a fraction of a pixel, and fits pose,
   focal length and radial distortion to all seam samples (a seam must be straight on
   the floor, so its bending in the image measures the lens distortion).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import cv2
import numpy as np

from .errors import CalibrationError
from .profiles import CameraProfile, FieldProfile

__all__ = ["GridResult", "find_grid", "refine_fit", "seam_samples", "draw_registration",
           "CORNER_NAMES"]

CORNER_NAMES = ("near-left", "near-right", "far-right", "far-left")

#: Seams seen coarser than this across (floor millimetres per pixel) are not used.
MAX_MM_PER_PX = math.inf

#: The lattice search (segments, vanishing points, combs) runs on a copy of the frame
#: shrunk to about this diagonal [px] (1280 x 720, where its thresholds were set); the
#: seam refinement that follows always works on the full-resolution frame.
LATTICE_DIAG_PX = 1469.0


@dataclass(frozen=True)
class GridResult:
    """The fitted tile grid of one frame."""

    fit: object
    """:class:`vidodo.register.CameraFit` after seam refinement."""
    origin: str
    """Which field corner (as seen from the camera) is the floor origin."""
    origin_from: str
    """'hint' or 'floor marker'."""
    n_segments: int
    """Line segments on the two seam families."""
    warnings: tuple[str, ...] = ()


# ----------------------------------------------------------------- segments & VPs
def _ridge_strength(grey, sigma_px=1.5):
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


def _segments(grey, ignore=None, min_len_px=None):
    """Straight segments: thin seams (Hough on ridge strength) and strong edges (LSD)."""
    h, w = grey.shape
    min_len = min_len_px or max(12.0, 0.012 * math.hypot(w, h))
    ridge = _ridge_strength(grey)
    binary = (ridge > max(np.percentile(ridge, 96), 1e-3)).astype(np.uint8) * 255
    if ignore is not None:
        binary[np.asarray(ignore, bool)] = 0
    g = cv2.GaussianBlur(grey, (0, 0), 1.0)
    grad = cv2.magnitude(cv2.Sobel(g, cv2.CV_32F, 1, 0), cv2.Sobel(g, cv2.CV_32F, 0, 1))
    evidence = (binary > 0) | (grad > np.percentile(grad, 96))
    evidence = cv2.dilate(evidence.astype(np.uint8), np.ones((5, 5), np.uint8)) > 0
    # Local line direction from the structure tensor (Bigun & Granlund, 1987): the
    # dominant gradient direction is across a line or an edge; the line runs across it.
    gx = cv2.Sobel(g, cv2.CV_32F, 1, 0)
    gy = cv2.Sobel(g, cv2.CV_32F, 0, 1)
    jxx = cv2.GaussianBlur(gx * gx, (0, 0), 2.5)
    jyy = cv2.GaussianBlur(gy * gy, (0, 0), 2.5)
    jxy = cv2.GaussianBlur(gx * gy, (0, 0), 2.5)
    line_angle = 0.5 * np.arctan2(2 * jxy, jxx - jyy) + np.pi / 2
    hp = cv2.HoughLinesP(binary, 1, np.pi / 360, 40, minLineLength=0.04 * max(h, w),
                         maxLineGap=6)
    parts = [np.zeros((0, 4))] if hp is None else [hp.reshape(-1, 4).astype(np.float64)]
    lsd = cv2.createLineSegmentDetector(cv2.LSD_REFINE_STD)
    lines = lsd.detect(grey)[0]
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


def _hom_lines(seg):
    p = np.column_stack([seg[:, :2], np.ones(len(seg))])
    q = np.column_stack([seg[:, 2:], np.ones(len(seg))])
    ln = np.cross(p, q)
    return ln / np.linalg.norm(ln[:, :2], axis=1, keepdims=True)


def _vp_consistent(seg, vp, tol_rad):
    """Angle between each segment and the direction from its midpoint to ``vp``."""
    mid = (seg[:, :2] + seg[:, 2:]) / 2
    d = seg[:, 2:] - seg[:, :2]
    if abs(vp[2]) > 1e-12:
        to = vp[:2] / vp[2] - mid
    else:
        to = np.broadcast_to(vp[:2], mid.shape)
    cross = d[:, 0] * to[:, 1] - d[:, 1] * to[:, 0]
    dot = d[:, 0] * to[:, 0] + d[:, 1] * to[:, 1]
    ang = np.abs(np.arctan2(cross, dot))
    ang = np.minimum(ang, math.pi - ang)
    return ang < tol_rad


def _fit_vp(lines, weights):
    """Least-squares vanishing point of homogeneous lines (smallest eigenvector)."""
    m = (lines * weights[:, None]).T @ lines
    _w, v = np.linalg.eigh(m)
    return v[:, 0]


def _vp_consistent_many(seg, vps, tol_rad):
    """:func:`_vp_consistent` for many vanishing points at once: (M, N) bool."""
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
    return ang < tol_rad


def _find_vp(seg, cond, rng, tol_rad, iters=600, exclude=None):
    """RANSAC vanishing point over segments (conditioned coordinates).

    All ``iters`` hypotheses (two length-weighted segments each) are drawn and scored at
    once; the one whose consistent segments are longest in total wins.
    """
    n = len(seg)
    if n < 4:
        return None, np.zeros(n, bool)
    length = np.hypot(seg[:, 2] - seg[:, 0], seg[:, 3] - seg[:, 1])
    lines = _hom_lines(seg)
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
    score = np.concatenate([_vp_consistent_many(seg, vps[c:c + 100], tol_rad) @ length
                            for c in range(0, len(vps), 100)])
    best = vps[int(np.argmax(score))]
    inl = _vp_consistent(seg, best, tol_rad)
    for _ in range(3):
        if inl.sum() < 2:
            break
        vp = _fit_vp(lines[inl], length[inl])
        new = _vp_consistent(seg, vp, tol_rad)
        best, inl = vp, new
    return best, inl


def _same_direction(vp, other, cond):
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


# ---------------------------------------------------------------------- lattice
def _best_combs(rhos, cover, speed, n_teeth, p_min, p_max, min_gap_px=8.0, keep=6):
    """Combs of ``n_teeth`` equally spaced lines with the most evidence under their teeth.

    A tooth counts only where neighbouring teeth are at least ``min_gap_px`` apart in
    the image (``speed``: image pixels per unit of rho), so that a comb cannot crowd
    its teeth onto one strong line near the horizon.

    Returns
    -------
    list of (period, start, mean evidence under the teeth)
        The ``keep`` best distinct combs, best first.
    """
    step = rhos[1] - rhos[0]
    # Tolerate a tooth landing a bin or two off a line (curvature, rounding).
    c = cv2.dilate(cover.astype(np.float32).reshape(1, -1), np.ones((1, 5), np.uint8)).ravel()
    periods = np.arange(p_min, p_max, step / 2)
    cands = []
    for period in periods:
        span = period * (n_teeth - 1)
        starts = rhos[rhos + span <= rhos[-1]]
        if len(starts) == 0:
            continue
        teeth = starts[:, None] + period * np.arange(n_teeth)[None, :]
        gap_ok = np.interp(teeth, rhos, speed) * period >= min_gap_px
        score = (np.interp(teeth, rhos, c) * gap_ok).mean(axis=1)
        # Local maxima over the start position only.
        top = np.argsort(score)[-3:]
        cands += [(float(period), float(starts[k]), float(score[k])) for k in top]
    cands.sort(key=lambda x: -x[2])
    out = []
    for period, start, sc in cands:
        # Distinct: the teeth differ somewhere by more than a fifth of a period.
        t_new = start + period * np.arange(n_teeth)
        if any(np.max(np.abs(t_new - (s0 + p0 * np.arange(n_teeth)))) < 0.2 * period
               for p0, s0, _ in out):
            continue
        out.append((period, start, sc))
        if len(out) >= keep:
            break
    return out


def _refine_teeth(rhos, cover, teeth, period):
    """Move each tooth to the evidence centroid near it, then fit equal spacing."""
    found = []
    for r in teeth:
        near = np.abs(rhos - r) < 0.15 * period
        wgt = cover[near]
        found.append(float(np.average(rhos[near], weights=wgt)) if wgt.sum() > 0 else np.nan)
    found = np.array(found)
    good = np.isfinite(found)
    k = np.arange(len(teeth))
    if good.sum() >= 3:
        a = np.column_stack([np.ones(good.sum()), k[good]])
        phase, per = np.linalg.lstsq(a, found[good], rcond=None)[0]
        return phase + per * k
    return np.asarray(teeth, float)


def _rectifier(vp1, vp2):
    """A homography sending the line through both vanishing points to infinity."""
    horizon = np.cross(vp1, vp2)
    horizon = horizon / np.linalg.norm(horizon)
    u, _s, _vt = np.linalg.svd(np.eye(3) - np.outer(horizon, horizon))
    basis = u[:, :2]
    return np.vstack([basis.T, horizon])


def _apply(hm, pts):
    pts = np.asarray(pts, float)
    p = pts @ hm[:, :2].T + hm[:, 2]
    return p[:, :2] / p[:, 2:3]


def _distort(norm, k, dist):
    """Normalised image coordinates to distorted pixels (OpenCV's lens model: radial
    k1..k6 and tangential p1, p2; OpenCV documentation, calib3d "Camera Calibration and
    3D Reconstruction"); ``cv2.projectPoints`` for models with more terms."""
    d = np.zeros(8)
    dist = np.asarray(dist, float).ravel()
    if len(dist) > 8:
        obj = np.column_stack([norm, np.ones(len(norm))])
        return cv2.projectPoints(obj, np.zeros(3), np.zeros(3), k, dist)[0].reshape(-1, 2)
    d[:len(dist)] = dist
    k1, k2, p1, p2, k3, k4, k5, k6 = d
    x, y = norm[:, 0], norm[:, 1]
    r2 = x * x + y * y
    radial = (1 + r2 * (k1 + r2 * (k2 + r2 * k3))) / (1 + r2 * (k4 + r2 * (k5 + r2 * k6)))
    xd = x * radial + 2 * p1 * x * y + p2 * (r2 + 2 * x * x)
    yd = y * radial + p1 * (r2 + 2 * y * y) + 2 * p2 * x * y
    return np.column_stack([k[0, 0] * xd + k[0, 1] * yd + k[0, 2], k[1, 1] * yd + k[1, 2]])


def _initial_lattice(grey, field: FieldProfile, camera, ignore, rng, n_candidates=3):
    """Candidate field windows: image positions of every lattice corner (first guesses).

    Returns
    -------
    (list of (ndarray (tiles_x+1, tiles_y+1, 2), list of str), int)
        Candidates best first with their warnings, and the number of seam segments.
    """
    h, w = grey.shape
    seg, (evidence, line_angle) = _segments(grey, ignore)
    if camera is not None and len(seg):
        k, d = camera.matrix, camera.dist_coeffs
        seg = cv2.undistortPoints(seg.reshape(-1, 1, 2), k, d, P=k).reshape(-1, 4)
    if len(seg) < 8:
        raise CalibrationError(f"grid: only {len(seg)} straight edges in the frame; tile "
                               "seams not visible - use floor markers or a points file")
    # Condition: centre and scale so that homogeneous maths is well behaved.
    scale = 2.0 / math.hypot(w, h)
    centre = np.array([w / 2.0, h / 2.0])
    cseg = np.column_stack([(seg[:, :2] - centre) * scale, (seg[:, 2:] - centre) * scale])
    tol = math.radians(1.5)
    vp1, in1 = _find_vp(cseg, np.zeros(2), rng, tol)
    if vp1 is None or in1.sum() < 3:
        raise CalibrationError("grid: no family of parallel tile seams found")
    rest = ~in1
    vp2, in2r = _find_vp(cseg[rest], np.zeros(2), rng, tol, exclude=vp1)
    if vp2 is None or in2r.sum() < 3:
        raise CalibrationError("grid: only one direction of tile seams found; film the "
                               "floor at an angle that shows both")
    in2 = np.zeros(len(cseg), bool)
    in2[np.nonzero(rest)[0][in2r]] = True
    rect = _rectifier(vp1, vp2)
    fam = []
    # Floor side of the horizon: the side holding the segments.
    fam = []
    for inl in (in1, in2):
        s = cseg[inl]
        a = _apply(rect, s[:, :2])
        b = _apply(rect, s[:, 2:])
        d = _apply(rect, np.array([[0.0, 0.0]]))  # reference point only
        direc = b - a
        ang = np.arctan2(direc[:, 1], direc[:, 0])
        mean_dir = np.angle(np.sum(np.hypot(*direc.T) * np.exp(2j * ang))) / 2
        nrm = np.array([-math.sin(mean_dir), math.cos(mean_dir)])
        pos = ((a + b) / 2 - d) @ nrm
        fam.append(dict(pos=pos, weight=np.hypot(*direc.T), normal=nrm, ref=d[0],
                        dir=np.array([math.cos(mean_dir), math.sin(mean_dir)])))
    rect_inv = np.linalg.inv(rect)
    # Rectified frame -> (undistorted) image pixels in one homography.
    to_pix = np.array([[1 / scale, 0.0, centre[0]], [0.0, 1 / scale, centre[1]],
                       [0.0, 0.0, 1.0]]) @ rect_inv
    if camera is not None:
        to_pix = np.linalg.inv(camera.matrix) @ to_pix  # to normalised coordinates

    def to_image(pts_rect):
        img = _apply(to_pix, pts_rect)
        if camera is not None:  # back to distorted pixels
            img = _distort(img, camera.matrix, camera.dist_coeffs)
        return img

    # Dense seam evidence across each family: for every line position rho (in the
    # rectified frame) the fraction of its visible length lying on a thin line or a
    # strong edge in the image.
    mids = _apply(rect, (cseg[:, :2] + cseg[:, 2:]) / 2)
    n_max = max(field.tiles_x, field.tiles_y)
    n_min = min(field.tiles_x, field.tiles_y)
    for f in fam:
        t = (mids - f["ref"]) @ f["dir"]
        ts = np.linspace(np.percentile(t, 1), np.percentile(t, 99), 200)
        lo, hi = np.percentile(f["pos"], [0.5, 99.5])
        pad = 0.15 * (hi - lo)
        rhos = np.linspace(lo - pad, hi + pad, 900)
        pts = (f["ref"][None, None, :] + rhos[:, None, None] * f["normal"][None, None, :]
               + ts[None, :, None] * f["dir"][None, None, :])
        img = to_image(pts.reshape(-1, 2)).reshape(len(rhos), len(ts), 2)
        inside = ((img[..., 0] >= 0) & (img[..., 0] <= w - 1) & (img[..., 1] >= 0)
                  & (img[..., 1] <= h - 1) & np.all(np.isfinite(img), axis=-1))
        ui = np.clip(np.nan_to_num(img[..., 0]).round().astype(int), 0, w - 1)
        vi = np.clip(np.nan_to_num(img[..., 1]).round().astype(int), 0, h - 1)
        along = np.gradient(img, axis=1)
        expected = np.arctan2(along[..., 1], along[..., 0])
        diff = np.abs(np.angle(np.exp(2j * (line_angle[vi, ui] - expected)))) / 2
        hit = evidence[vi, ui] & inside & (diff < math.radians(12))
        n_in = inside.sum(axis=1)
        cover = np.where(n_in >= 0.2 * len(ts), hit.sum(axis=1) / np.maximum(n_in, 1), 0.0)
        # Image pixels per unit of rho (near the horizon many rho map to one image line).
        across = np.linalg.norm(np.gradient(img, rhos, axis=0), axis=-1)
        across = np.where(inside, across, np.nan)
        across = np.where(np.isfinite(across), across, np.inf)
        speed = np.where(inside.any(axis=1), np.sort(across, axis=1)[
            np.arange(len(rhos)), np.maximum(inside.sum(axis=1) // 2, 0)], 0.0)
        f["rhos"], f["cover"], f["speed"] = rhos, cover, np.nan_to_num(speed, posinf=0.0)
        f["extent"] = hi - lo
    # The field in each family: a comb of n+1 equally spaced lines (spacing and start
    # free) with evidence under every tooth. Fewer or more teeth than the field has lines
    # cannot match it everywhere, so sub-multiples and multiples of the spacing lose.
    combs = {}
    for fi, f in enumerate(fam):
        for n in {field.tiles_x, field.tiles_y}:
            combs[fi, n] = _best_combs(f["rhos"], f["cover"], f["speed"], n + 1,
                                       f["extent"] / (2.5 * n_max + 2),
                                       f["extent"] / max(n_min - 1, 1) * 1.3)

    def span_cover(f_a, teeth_a, f_b, teeth_b):
        """Evidence along the teeth of A, only between the first and last tooth of B."""
        nb_na = f_b["normal"] @ f_a["normal"]
        nb_da = f_b["normal"] @ f_a["dir"]
        if abs(nb_da) < 1e-9:
            return 0.0
        frac = np.linspace(0.02, 0.98, 80)
        ra = np.asarray(teeth_a, float)[:, None, None]
        t0 = (teeth_b[0] - ra * nb_na) / nb_da
        t1 = (teeth_b[-1] - ra * nb_na) / nb_da
        tt = t0 + (t1 - t0) * frac[None, :, None]
        pts = f_a["ref"] + ra * f_a["normal"] + tt * f_a["dir"]
        im = to_image(pts.reshape(-1, 2)).reshape(len(teeth_a), len(frac), 2)
        ok_ = ((im[..., 0] >= 0) & (im[..., 0] <= w - 1) & (im[..., 1] >= 0)
               & (im[..., 1] <= h - 1) & np.all(np.isfinite(im), axis=-1))
        along = np.gradient(im, axis=1)
        expected = np.arctan2(along[..., 1], along[..., 0])
        ui = np.clip(np.nan_to_num(im[..., 0]).round().astype(int), 0, w - 1)
        vi = np.clip(np.nan_to_num(im[..., 1]).round().astype(int), 0, h - 1)
        diff = np.abs(np.angle(np.exp(2j * (line_angle[vi, ui] - expected)))) / 2
        hit = evidence[vi, ui] & (diff < math.radians(12)) & ok_
        n_ok = ok_.sum(axis=1)
        vals = np.where(n_ok >= 10, hit.sum(axis=1) / np.maximum(n_ok, 1), 0.0)
        return float(np.mean(vals))

    # Joint choice: the teeth of each family must carry evidence across the span of the
    # other family's field window (the seams run from one field edge to the other).
    scored = []
    for assign in ((0, 1), (1, 0)):
        fa, fb = fam[assign[0]], fam[assign[1]]
        for ca in combs[assign[0], field.tiles_x][:4]:
            ta = ca[1] + ca[0] * np.arange(field.tiles_x + 1)
            for cb in combs[assign[1], field.tiles_y][:4]:
                tb = cb[1] + cb[0] * np.arange(field.tiles_y + 1)
                score = span_cover(fa, ta, fb, tb) + span_cover(fb, tb, fa, ta)
                scored.append((score, assign, ca, cb))
    if not scored:
        raise CalibrationError(
            f"grid: no window of {field.tiles_x} x {field.tiles_y} tiles found in the seams; "
            "show the whole field or check tiles_x/tiles_y")
    scored.sort(key=lambda x: -x[0])
    # Close runners-up are kept: the seam fit decides between them (find_grid).
    keep = [c for c in scored if c[0] >= 0.85 * scored[0][0]][:n_candidates]
    lattices, errors = [], []
    for _score, assign, comb_x, comb_y in keep:
        try:
            lat = _lattice_corners(fam, assign, comb_x, comb_y, field, to_image)
        except CalibrationError as exc:
            errors.append(exc)
            continue
        if not any(_same_lattice(lat[0], other[0]) for other in lattices):
            lattices.append(lat)
    if not lattices:
        raise errors[0]
    return lattices, int(in1.sum() + in2.sum())


def _same_lattice(a, b, tol_px=3.0):
    """True when two lattices put the same corners in the same places (either family
    order: a square field's two assignments give transposed arrays)."""
    d = [np.nanmedian(np.abs(a - b))] if a.shape == b.shape else []
    if a.shape == b.transpose(1, 0, 2).shape:
        d.append(np.nanmedian(np.abs(a - b.transpose(1, 0, 2))))
    return bool(d) and min(d) < tol_px


def _lattice_corners(fam, assign, comb_x, comb_y, field, to_image):
    """Image positions of the lattice corners of one field window, and warnings."""
    warnings = []
    out = []
    for f_i, (period, start, sc), n in ((assign[0], comb_x, field.tiles_x),
                                        (assign[1], comb_y, field.tiles_y)):
        f = fam[f_i]
        if sc < 0.25:
            raise CalibrationError(
                f"grid: the field's {n + 1} seam lines in one direction are not visible "
                f"(best match {sc:.0%}); show the whole field or check tiles_x/tiles_y")
        rho = _refine_teeth(f["rhos"], f["cover"], start + period * np.arange(n + 1),
                            period)
        # Evidence just outside the field on the same spacing: the tiling continues?
        beyond = [float(np.interp(r, f["rhos"], f["cover"], left=0, right=0))
                  for r in (rho[0] - period, rho[-1] + period)]
        inside_cov = [float(np.interp(r, f["rhos"], f["cover"])) for r in rho]
        if max(beyond) > 0.7 * float(np.median(inside_cov)):
            warnings.append("seam lines continue beyond the field's "
                            f"{n} tiles in one direction; the field's position in the "
                            "tiling may be wrong - add a floor marker or a points file")
        out.append(list(rho))
    # Lattice corners in rectified coordinates: intersect line families.
    fx, fy = fam[assign[0]], fam[assign[1]]
    corners = np.empty((field.tiles_x + 1, field.tiles_y + 1, 2))
    a_mat = np.vstack([fx["normal"], fy["normal"]])
    for i, px_ in enumerate(out[0]):
        for j, py_ in enumerate(out[1]):
            corners[i, j] = np.linalg.solve(a_mat, [px_, py_]) + fx["ref"]
    img = to_image(corners.reshape(-1, 2))
    return img.reshape(field.tiles_x + 1, field.tiles_y + 1, 2), warnings


def _orient(lat_img, field: FieldProfile, origin: str):
    """Floor coordinates of the lattice corners for a given origin corner.

    ``lat_img[i, j]`` is the image position of the corner between x-family line i and
    y-family line j of the window. The corner named ``origin`` (as seen from the
    camera: the near edge is the lowest in the image) becomes (0, 0); x and y follow
    the field edges so that the frame is right-handed with z up.
    """
    nx, ny = field.tiles_x, field.tiles_y
    idx = {(0, 0): lat_img[0, 0], (nx, 0): lat_img[nx, 0], (nx, ny): lat_img[nx, ny],
           (0, ny): lat_img[0, ny]}
    order = [(0, 0), (nx, 0), (nx, ny), (0, ny)]  # around the field
    edges = [(order[k], order[(k + 1) % 4]) for k in range(4)]
    near = max(edges, key=lambda e: idx[e[0]][1] + idx[e[1]][1])
    a, b = near
    nl, nr = (a, b) if idx[a][0] <= idx[b][0] else (b, a)
    # far-left: the neighbour of near-left that is not near-right; far-right likewise.
    def other_neighbour(c, not_this):
        for e in edges:
            if c in e:
                o = e[1] if e[0] == c else e[0]
                if o != not_this:
                    return o
        raise AssertionError
    fl = other_neighbour(nl, nr)
    fr = other_neighbour(nr, nl)
    named = {"near-left": nl, "near-right": nr, "far-right": fr, "far-left": fl}
    # Right-handed, z up: x runs from the origin towards the next corner clockwise
    # *in the image* seen from above... spelled out per corner:
    x_to = {"near-left": "near-right", "near-right": "far-right",
            "far-right": "far-left", "far-left": "near-left"}
    y_to = {"near-left": "far-left", "near-right": "near-left",
            "far-right": "near-right", "far-left": "far-right"}
    o = np.array(named[origin], float)
    xv = np.array(named[x_to[origin]], float) - o
    yv = np.array(named[y_to[origin]], float) - o
    # xv, yv are lattice-index steps; x must span nx tiles and y ny tiles.
    if abs(np.abs(xv).sum() - nx) > 0.5 or abs(np.abs(yv).sum() - ny) > 0.5:
        raise CalibrationError(
            f"grid: with origin_hint '{origin}' the x edge has {int(np.abs(xv).sum())} "
            f"tiles but tiles_x = {nx}; swap tiles_x and tiles_y or change origin_hint")
    ii, jj = np.meshgrid(np.arange(nx + 1), np.arange(ny + 1), indexing="ij")
    rel = np.stack([ii - o[0], jj - o[1]], axis=-1).astype(float)
    fx_ = (rel @ xv) / (xv @ xv) * nx
    fy_ = (rel @ yv) / (yv @ yv) * ny
    floor = np.stack([fx_, fy_], axis=-1) * field.tile_size_m
    return floor


def _homography_from_lattice(lat_img, floor):
    hmg, _ = cv2.findHomography(floor.reshape(-1, 2), lat_img.reshape(-1, 2), 0)
    return hmg


def _fit_lattice(grey, field, lat_img, camera, ignore, marker_px, marker_fl, warnings):
    """Orient one candidate lattice, fit the camera to its corners, refine on the seams."""
    from .register import check_correspondences, fit_camera

    h, w = grey.shape
    candidates = [field.origin_hint]
    origin_from = "hint"
    if marker_px is not None and len(marker_px):
        candidates = list(CORNER_NAMES)
        origin_from = "floor marker"
    best = None
    for origin in candidates:
        try:
            floor = _orient(lat_img, field, origin)
        except CalibrationError:
            if len(candidates) == 1:
                raise
            continue
        if origin_from == "floor marker":
            hmg = _homography_from_lattice(lat_img, floor)
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
    inside = ((pts_img[:, 0] > -0.5 * w) & (pts_img[:, 0] < 1.5 * w)
              & (pts_img[:, 1] > -0.5 * h) & (pts_img[:, 1] < 1.5 * h))
    check_correspondences(pts_img[inside], pts_fl[inside], where="grid corners")
    fit0 = fit_camera((w, h), points=(pts_img[inside], pts_fl[inside]), camera=camera,
                      fit_k1=False, outlier_px=None)
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


def _initial_lattice_scaled(grey, field, camera, ignore, rng):
    """:func:`_initial_lattice` on a copy shrunk to :data:`LATTICE_DIAG_PX` when the
    frame is larger (area averaging); the corners come back in full-size pixels.

    The lattice is only a first guess (the seam refinement searches several pixels
    around it at full resolution), so the coarser grid costs no accuracy; the segment
    and vanishing-point search scales with the pixel count.
    """
    h, w = grey.shape
    shrink = LATTICE_DIAG_PX / math.hypot(w, h)
    if shrink > 0.9:
        return _initial_lattice(grey, field, camera, ignore, rng)
    ws, hs = max(int(round(w * shrink)), 1), max(int(round(h * shrink)), 1)
    sx, sy = ws / w, hs / h
    small = cv2.resize(grey, (ws, hs), interpolation=cv2.INTER_AREA)
    ig_small = None
    if ignore is not None:  # a shrunk pixel is ignored when any part of it was
        ig_small = cv2.resize(np.asarray(ignore, np.uint8) * 255, (ws, hs),
                              interpolation=cv2.INTER_AREA) > 0
    cands, n_seg = _initial_lattice(small, field, _scaled_camera(camera, sx, sy), ig_small,
                                    rng)
    scale = np.array([sx, sy])
    return [((lat + 0.5) / scale - 0.5, warn) for lat, warn in cands], n_seg


def find_grid(grey, field: FieldProfile, *, camera: CameraProfile | None = None, ignore=None,
              detectors=None, seed=0) -> GridResult:
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

    Returns
    -------
    GridResult

    Raises
    ------
    CalibrationError
        No seams, one family only, too few seam lines for the field, or a fit that
        does not hold.
    """
    from .register import detect_floor_markers

    rng = np.random.default_rng(seed)
    candidates, n_seg = _initial_lattice_scaled(grey, field, camera, ignore, rng)
    marker_px = marker_fl = None
    if field.floor_markers:
        marker_px, marker_fl, _seen = detect_floor_markers(grey, field, detectors=detectors,
                                                           ignore=ignore)
    results = []
    errors = []
    for lat_img, lat_warnings in candidates:
        try:
            results.append(_fit_lattice(grey, field, lat_img, camera, ignore, marker_px,
                                        marker_fl, list(lat_warnings)))
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


# ------------------------------------------------------------------ seam refinement
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


def seam_samples(grey, field: FieldProfile, reg, *, half_width_px=8.0, ignore=None,
                 step_frac=1 / 20, min_contrast=4.0, border=None, max_mm_per_px=None):
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
    half_width_px : float
        How far from the predicted position the seam is looked for [px].
    step_frac : float
        Spacing of the samples along a seam, as a fraction of the tile side.
    min_contrast : float
        Least dip or step, in grey levels, for a sample to count.
    border : bool, optional
        Use the field's outer border too (default: only when the field has fewer than
        3 tiles in a direction).
    max_mm_per_px : float, optional
        Leave out seams coarser than this across (floor mm per image pixel); default
        :data:`MAX_MM_PER_PX`.

    Returns
    -------
    (ndarray (N, 2), ndarray (N,) int, ndarray (N,))
        Seam pixels [px], floor axis held constant by that seam, and its value [m].
    """
    h, w = grey.shape
    if max_mm_per_px is None:
        max_mm_per_px = MAX_MM_PER_PX
    if border is None:  # interior seams suffice once there are two per direction
        border = min(field.tiles_x, field.tiles_y) < 3
    fl, axis, val, nrm = _seam_lines(field, step_frac, border=border)
    if len(fl) == 0:
        return np.zeros((0, 2)), np.zeros(0, int), np.zeros(0)
    delta = 0.01 * field.tile_size_m
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
    ok &= px_per_m * field.tile_size_m > 3 * reach
    # Seams seen at a grazing angle (coarser than max_mm_per_px across) are blurred
    # below a pixel and mostly show the shade step between tiles: left out.
    ok &= px_per_m * max_mm_per_px * 1e-3 >= 1.0
    if not ok.any():
        return np.zeros((0, 2)), np.zeros(0, int), np.zeros(0)
    p0, n, tang, axis, val = p0[ok], n[ok], tang[ok], axis[ok], val[ok]
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
    sig = 0.75 / step
    kr = int(3 * sig)
    kern = np.exp(-0.5 * (np.arange(-kr, kr + 1) / sig) ** 2)
    prof = cv2.filter2D(prof, -1, (kern / kern.sum())[None, :],
                        borderType=cv2.BORDER_REPLICATE)
    nb = int(round(bg_px / step))
    left = np.median(prof[:, :nb], axis=1)
    right = np.median(prof[:, -nb:], axis=1)
    noise = 1.4826 * np.median(np.abs(np.concatenate(
        [prof[:, :nb] - left[:, None], prof[:, -nb:] - right[:, None]], axis=1)), axis=1)
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
    keep &= (line_ok | edge_ok) & np.isfinite(t_peak)
    q = p0 + t_peak[:, None] * n
    return q[keep], axis[keep], val[keep]


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
    from .register import FrameRegistration, fit_camera

    h, w = grey.shape
    cur = fit
    # Search widths scale with the image (tuned at 1280 x 720, diagonal 1469 px).
    scale = float(np.clip(math.hypot(w, h) / 1469.0, 0.5, 1.5))
    widths = tuple(v * scale for v in (12.0, 6.0, 4.0))[-rounds:]
    out = None
    for hw in widths[:rounds]:
        reg = FrameRegistration(0.0, True, cur.camera_matrix, cur.dist_coeffs, cur.rvec,
                                cur.tvec, 0.0, 0.0, 0, "")
        q, ax, val = seam_samples(grey, field, reg, half_width_px=hw, ignore=ignore)
        if len(q) < min_samples:
            return out
        free = camera is None
        cur = fit_camera((w, h), seams=(q, ax, val), camera=camera,
                         init=(cur.camera_matrix, cur.dist_coeffs, cur.rvec, cur.tvec),
                         fit_focal=free, fit_k1=free and len(q) >= 200,
                         fit_k2=free and len(q) >= 600, outlier_px=1.5,
                         loss_px=0.5)
        out = cur
    return out


def draw_registration(frame_bgr, reg, field: FieldProfile, *, seams=None, samples=40):
    """A copy of the frame with the registered tile grid drawn over it.

    Seams are drawn as curves (through the lens model), the field border thicker, the
    origin marked with the x (red) and y (green) axes one tile long; located seam
    samples, when given, as small yellow dots.

    Returns
    -------
    ndarray of shape (H, W, 3), uint8
    """
    img = frame_bgr.copy() if frame_bgr.ndim == 3 else cv2.cvtColor(frame_bgr,
                                                                     cv2.COLOR_GRAY2BGR)
    if not reg.ok:
        return img
    s = field.tile_size_m
    sx, sy = field.size_m
    t = np.linspace(0, 1, samples)
    lines = []
    for i in range(field.tiles_x + 1):
        lines.append((np.column_stack([np.full_like(t, i * s), t * sy]),
                      i in (0, field.tiles_x)))
    for j in range(field.tiles_y + 1):
        lines.append((np.column_stack([t * sx, np.full_like(t, j * s)]),
                      j in (0, field.tiles_y)))
    for pts, border in lines:
        px = reg.floor_to_image(pts)
        good = np.all(np.isfinite(px), axis=1) & (np.abs(px) < 1e5).all(axis=1)
        if good.sum() >= 2:
            cv2.polylines(img, [np.round(px[good] * 4).astype(np.int32)], False,
                          (255, 200, 0) if border else (255, 255, 0), 2 if border else 1,
                          cv2.LINE_AA, shift=2)
    if seams is not None and len(seams):
        for u, v in np.asarray(seams):
            cv2.circle(img, (int(round(u * 4)), int(round(v * 4))), 4, (0, 230, 255), -1,
                       cv2.LINE_AA, shift=2)
    o, x1, y1 = reg.floor_to_image(np.array([[0.0, 0.0], [s, 0.0], [0.0, s]]))
    if np.all(np.isfinite([o, x1, y1])):
        p = tuple(int(v) for v in np.round(o))
        cv2.arrowedLine(img, p, tuple(int(v) for v in np.round(x1)), (0, 0, 255), 3,
                        cv2.LINE_AA, tipLength=0.15)
        cv2.arrowedLine(img, p, tuple(int(v) for v in np.round(y1)), (0, 200, 0), 3,
                        cv2.LINE_AA, tipLength=0.15)
        cv2.putText(img, "x", tuple(int(v) for v in np.round(x1) + 6),
                    cv2.FONT_HERSHEY_SIMPLEX, 0.8, (0, 0, 255), 2, cv2.LINE_AA)
        cv2.putText(img, "y", tuple(int(v) for v in np.round(y1) + 6),
                    cv2.FONT_HERSHEY_SIMPLEX, 0.8, (0, 200, 0), 2, cv2.LINE_AA)
    return img
