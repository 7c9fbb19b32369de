"""Tile lattice in the affinely rectified floor: combs of equally spaced seam lines,
the field window with the most seam evidence, its corners and their floor positions."""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from ...errors import CalibrationError
from ...profiles import FieldProfile
from .cover import MIN_LINE_PX, family_cover, family_rho, pixel_grid
from .directions import candidate_pairs
from .periodic import family_period, lattice_lines, line_rho, tiling_continues, window_starts
from .segments import find_segments

__all__ = ["CORNER_NAMES", "TILING_CONTINUES", "initial_lattice", "orient",
           "homography_from_lattice", "distort"]


#: Most line positions sampled across one family (bins of about one image pixel).
MAX_BINS = 20000
#: The line positions searched are those of seam evidence where the lines are at least
#: this share as far apart in the image as where they are farthest apart (nearest the
#: camera): farther off, the tiles shrink below a few pixels, and a misplaced horizon
#: (vanishing points a little off) stretches the rectified floor without bound.
NEAR_SHARE = 0.05

CORNER_NAMES = ("near-left", "near-right", "far-right", "far-left")
TILING_CONTINUES = ("more tile seams are in view than the field has tiles: the tiles continue "
                    "beyond the field, and the field's place in them cannot be told from the "
                    "seams")


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
    factor = -(-len(rhos) // 1200)
    if factor > 1:  # the combs' search needs no finer bins than 1200 across
        n = len(rhos) // factor * factor
        rhos = rhos[:n].reshape(-1, factor).mean(axis=1)
        cover = cover[:n].reshape(-1, factor).max(axis=1)
        speed = speed[:n].reshape(-1, factor).mean(axis=1)
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


def distort(norm, k, dist):
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


@dataclass
class _Families:
    """The two seam families of a frame in the affinely rectified floor."""

    fam: list
    """Per family: line positions, normal, direction, reference point; later the dense
    seam evidence across it (``rhos``, ``cover``, ``speed``, ``extent``)."""
    to_image: object
    """Rectified points (N, 2) -> distorted image pixels (N, 2)."""
    evidence: np.ndarray
    """Pixels on a thin line or a strong edge, bool (H, W)."""
    line_angle: np.ndarray
    """Local line direction [rad], (H, W)."""
    n_segments: int
    to_pinhole: np.ndarray = None
    """Rectified points -> homogeneous undistorted pixels (3 x 3), the third coordinate
    positive for floor points in front of the camera."""


def _families(grey, camera, ignore, rng, colour=None) -> _Families:
    """Segments, the two vanishing points, each family's lines after rectification, and
    the dense seam evidence across each family."""
    h, w = grey.shape
    seg, (evidence, line_angle) = find_segments(grey, ignore, colour=colour)
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
    ctx = dict(cseg=cseg, scale=scale, centre=centre, camera=camera, evidence=evidence,
               line_angle=line_angle, shape=(h, w),
               grid=pixel_grid((h, w), camera, centre, scale, ignore))
    # The two strongest directions need not be the tiles' (wall tops, tape, print,
    # teeth): of the pairs that can be the seams' (:func:`.directions.candidate_pairs`,
    # most convincing first) the first whose both families show a periodic lattice wins.
    fits, fallback = candidate_pairs(cseg, ctx, rng)
    best, score = None, -math.inf
    for fam_a, fam_b in fits:
        fams = _rectified(ctx, fam_a, fam_b)
        sc = _lattice_score(fams)
        if sc > score:
            best, score = fams, sc
        if sc > 0:
            break
    if best is None:  # no pair can be perpendicular: the strongest (the checks refuse)
        best = _rectified(ctx, *fallback)
    return best


def _lattice_score(fams: _Families) -> float:
    """The weaker family's periodicity score (0 when one shows no lattice)."""
    scores = []
    for f in fams.fam:
        per = family_period(f)
        scores.append(per[0][2] if per else 0.0)
    return float(min(scores))


def _rectified(ctx, fam1, fam2) -> _Families:
    """The two families of vanishing points ``fam1``, ``fam2`` ((vp, inlier mask) each)
    in the affinely rectified floor, with their dense seam evidence."""
    cseg, scale, centre, camera = ctx["cseg"], ctx["scale"], ctx["centre"], ctx["camera"]
    (vp1, in1), (vp2, in2) = fam1, fam2
    rect = _rectifier(vp1, vp2)
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
            img = distort(img, camera.matrix, camera.dist_coeffs)
        return img

    # The floor's side of the horizon: where the two families' segments lie. A floor
    # point's homogeneous image coordinate w = 1 / (horizon . point) has its sign.
    mids = (cseg[in1 | in2, :2] + cseg[in1 | in2, 2:]) / 2
    side = mids @ rect[2, :2] + rect[2, 2]
    floor_sign = 1.0 if np.sum(np.sign(side)) >= 0 else -1.0
    pinhole = floor_sign * np.array([[1 / scale, 0.0, centre[0]], [0.0, 1 / scale, centre[1]],
                                     [0.0, 0.0, 1.0]]) @ rect_inv
    fams = _Families(fam, to_image, ctx["evidence"], ctx["line_angle"],
                     int(in1.sum() + in2.sum()), pinhole)
    for f in fam:
        _family_cover(fams, f, ctx, rect, floor_sign)
    return fams




def _family_cover(fams: _Families, f, ctx, rect, floor_sign):
    """Dense seam evidence across one family (into ``f``): for every line position rho
    (in the rectified frame) the fraction of its visible length lying on a thin line or
    a strong edge running along it, and image pixels per unit of rho
    (:func:`.cover.family_cover`)."""
    per_pixel = family_rho(ctx["grid"], rect, f, fams.evidence, fams.line_angle,
                           floor_sign)
    rho, grad, ok, hit = per_pixel
    # The range of line positions: where this family's seam evidence lies, counted per
    # image pixel (a few segments near the horizon, where rho runs away, do not set it).
    px_per_rho = float(np.percentile(1.0 / grad[ok], 99)) if ok.any() else 1.0
    near = hit & (1.0 / np.where(grad > 0, grad, np.inf) >= NEAR_SHARE * px_per_rho)
    lo, hi = np.percentile(rho[near], [1, 99]) if near.sum() >= 50 else np.percentile(
        f["pos"], [0.5, 99.5])
    # Sampled 35 % beyond (where the tiling may be seen to end); the whole-field combs
    # look only 15 % beyond. Bins about one image pixel wide where the lines are
    # farthest apart in the image (near the camera); near the horizon a bin spans
    # several lines, which are too close there to be told apart anyway.
    pad = 0.35 * (hi - lo)
    n_bins = int(np.clip((hi - lo + 2 * pad) * px_per_rho, 1200, MAX_BINS))
    rhos = np.linspace(lo - pad, hi + pad, n_bins)
    cover, length, speed = family_cover(per_pixel, rhos)
    f["rhos"], f["cover"], f["speed"] = rhos, cover, speed
    f["seen"] = length >= MIN_LINE_PX
    f["extent"] = hi - lo
    f["comb"] = np.abs(rhos - (lo + hi) / 2) <= (hi - lo) * 0.65


def _hits(fams: _Families, img, shape):
    """Which image points (..., 2) along lines (last axis but one runs along each line)
    are in the frame, and which of those lie on seam evidence running the same way."""
    h, w = shape
    inside = ((img[..., 0] >= 0) & (img[..., 0] <= w - 1) & (img[..., 1] >= 0)
              & (img[..., 1] <= h - 1) & np.all(np.isfinite(img), axis=-1))
    # Clipped before the cast: points near the horizon map far outside the frame.
    ui = np.clip(np.nan_to_num(img[..., 0], nan=0.0), 0, w - 1).round().astype(int)
    vi = np.clip(np.nan_to_num(img[..., 1], nan=0.0), 0, h - 1).round().astype(int)
    along = np.gradient(img, axis=-2)
    expected = np.arctan2(along[..., 1], along[..., 0])
    diff = np.abs(np.angle(np.exp(2j * (fams.line_angle[vi, ui] - expected)))) / 2
    return inside, fams.evidence[vi, ui] & inside & (diff < math.radians(12))


def _span_cover(fams: _Families, shape, f_a, teeth_a, f_b, teeth_b):
    """Evidence along the teeth of A, only between the first and last tooth of B."""
    to_image = fams.to_image
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
    ok_, hit = _hits(fams, im, shape)
    n_ok = ok_.sum(axis=1)
    vals = np.where(n_ok >= 10, hit.sum(axis=1) / np.maximum(n_ok, 1), 0.0)
    return float(np.mean(vals))


def edge_views(to_pinhole, corners_rect, n_samples=41):
    """Where each field edge lies in the picture, from its points in front of the
    camera, and the handedness of the window's index frame on the floor.

    Parameters
    ----------
    to_pinhole : ndarray (3, 3)
        Rectified floor -> homogeneous undistorted pixels, third coordinate positive in
        front of the camera (:class:`_Families`).
    corners_rect : ndarray (4, 2)
        The field corners (0, 0), (nx, 0), (nx, ny), (0, ny) in the rectified floor.

    Returns
    -------
    ndarray (5,)
        Per edge (corner k to corner k + 1) the mean image row of its points in front
        of the camera (pinhole projection; -inf when none is); last, +1 when the index
        frame (i, j) is right-handed on the floor seen from above, else -1. A
        homography keeps or reverses orientation with the sign of det(H) / w^3 (the
        Jacobian determinant of a plane projective map), and a right-handed floor
        frame seen from above comes out clockwise in the picture (rows run down), so
        with w > 0 in front the index frame is right-handed when det(H) < 0. Corners
        behind the camera have no meaningful image position, so the near edge (the
        lowest in the picture) and its left end are told from these, not from them.
    """
    out = np.full(5, -np.inf)
    t = np.linspace(0.0, 1.0, n_samples)[:, None]
    for k in range(4):
        a, b = corners_rect[k], corners_rect[(k + 1) % 4]
        pts = a + t * (b - a)
        hom = pts @ to_pinhole[:, :2].T + to_pinhole[:, 2]
        front = hom[:, 2] > 1e-12 * np.max(np.abs(hom[:, 2]))
        if front.any():
            out[k] = float(np.mean(hom[front, 1] / hom[front, 2]))
    e_i, e_j = corners_rect[1] - corners_rect[0], corners_rect[3] - corners_rect[0]
    index_to_rect = e_i[0] * e_j[1] - e_i[1] * e_j[0]
    out[4] = -np.sign(np.linalg.det(to_pinhole) * index_to_rect) or 1.0
    return out


def _field_corners(grid_rect):
    """The four field corners (0, 0), (nx, 0), (nx, ny), (0, ny) of a window's corner
    array (nx + 1, ny + 1, 2)."""
    return np.array([grid_rect[0, 0], grid_rect[-1, 0], grid_rect[-1, -1], grid_rect[0, -1]])


def _periodic_lattices(fams: _Families, field: FieldProfile, shape):
    """Candidate field windows from each family's spacing and phase (:mod:`.periodic`):
    also when only part of the field is in view.

    Returns
    -------
    list of (ndarray (tiles_x+1, tiles_y+1, 2), list of str, ndarray bool, ndarray (4, 2))
        Image positions of the window's corners, warnings, which corners are on
        lattice lines with seam evidence in view (the ones to fit to), and where the
        field edges lie in the picture (:func:`edge_views`).
    """
    lines = []
    for f in fams.fam:
        per_f = []
        for period, phase, _score in family_period(f)[:2]:
            ln = lattice_lines(f, period, phase)
            if ln is not None:
                per_f.append(ln)
        lines.append(per_f)
    h, w = shape
    out = []
    for assign in ((0, 1), (1, 0)):
        fx, fy = fams.fam[assign[0]], fams.fam[assign[1]]
        a_mat = np.vstack([fx["normal"], fy["normal"]])
        for lx in lines[assign[0]][:1]:
            for ly in lines[assign[1]][:1]:
                for kx in window_starts(lx, field.tiles_x):
                    for ky in window_starts(ly, field.tiles_y):
                        ii = kx + np.arange(field.tiles_x + 1)
                        jj = ky + np.arange(field.tiles_y + 1)
                        rx, ry = line_rho(lx, ii), line_rho(ly, jj)
                        rr = np.stack(np.meshgrid(rx, ry, indexing="ij"), axis=-1)
                        rect = np.linalg.solve(a_mat, rr.reshape(-1, 2).T).T + fx["ref"]
                        img = fams.to_image(rect).reshape(len(ii), len(jj), 2)
                        vis = ((ii >= lx["k_lo"]) & (ii <= lx["k_hi"]))[:, None] & (
                            (jj >= ly["k_lo"]) & (jj <= ly["k_hi"]))[None, :]
                        # Only corners in front of the camera (a point behind it
                        # projects onto the picture too, mirrored through the centre).
                        w_front = rect @ fams.to_pinhole[2, :2] + fams.to_pinhole[2, 2]
                        vis &= w_front.reshape(len(ii), len(jj)) > 0
                        vis &= np.all(np.isfinite(img), axis=-1) & (img[..., 0] >= 0) & (
                            img[..., 0] <= w - 1) & (img[..., 1] >= 0) & (img[..., 1] <= h - 1)
                        warn = []
                        if (tiling_continues(lx, field.tiles_x)
                                or tiling_continues(ly, field.tiles_y)):
                            warn.append(TILING_CONTINUES)
                        if vis.sum() >= 4:
                            grid_rect = rect.reshape(len(ii), len(jj), 2)
                            out.append((img, warn, vis, edge_views(
                                fams.to_pinhole, _field_corners(grid_rect))))
    return out


def initial_lattice(grey, field: FieldProfile, camera, ignore, rng, n_candidates=3,
                    colour=None):
    """Candidate field windows: image positions of every lattice corner (first guesses).

    Returns
    -------
    (list of (ndarray (tiles_x+1, tiles_y+1, 2), list of str, ndarray bool or None,
    ndarray (4, 2)), int)
        Candidates with their warnings, the corners to fit to (None: all) and where the
        field edges lie in the picture (:func:`edge_views`), and the number of seam
        segments. The periodic lattice's windows come first, then the
        windows of whole-field combs. ``colour``: the frame on its main colour axis
        (:func:`.segments.colour_contrast`), whose edges count as seam evidence too.
    """
    fams = _families(grey, camera, ignore, rng, colour)
    cands = _periodic_lattices(fams, field, grey.shape)
    try:
        combs = _comb_lattices(fams, field, grey.shape, n_candidates)
    except CalibrationError:
        if not cands:
            raise
        combs = []
    for lat, warn, edges in combs:
        if not any(_same_lattice(lat, other[0]) for other in cands):
            cands.append((lat, warn, None, edges))
    return cands, fams.n_segments


def _comb_lattices(fams: _Families, field: FieldProfile, shape, n_candidates):
    """Candidate field windows from combs of the field's line count (whole field in view)."""
    fam = fams.fam
    n_max = max(field.tiles_x, field.tiles_y)
    n_min = min(field.tiles_x, field.tiles_y)
    # The field in each family: a comb of n+1 equally spaced lines (spacing and start
    # free) with evidence under every tooth. Fewer or more teeth than the field has lines
    # cannot match it everywhere, so sub-multiples and multiples of the spacing lose.
    combs = {}
    for fi, f in enumerate(fam):
        for n in {field.tiles_x, field.tiles_y}:
            sel = f["comb"]
            combs[fi, n] = _best_combs(f["rhos"][sel], f["cover"][sel], f["speed"][sel], n + 1,
                                       f["extent"] / (2.5 * n_max + 2),
                                       f["extent"] / max(n_min - 1, 1) * 1.3)

    # Joint choice: the teeth of each family must carry evidence across the span of the
    # other family's field window (the seams run from one field edge to the other).
    scored = []
    for assign in ((0, 1), (1, 0)):
        fa, fb = fam[assign[0]], fam[assign[1]]
        for ca in combs[assign[0], field.tiles_x][:4]:
            ta = ca[1] + ca[0] * np.arange(field.tiles_x + 1)
            for cb in combs[assign[1], field.tiles_y][:4]:
                tb = cb[1] + cb[0] * np.arange(field.tiles_y + 1)
                score = (_span_cover(fams, shape, fa, ta, fb, tb)
                         + _span_cover(fams, shape, fb, tb, fa, ta))
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
            lat = _lattice_corners(fam, assign, comb_x, comb_y, field, fams)
        except CalibrationError as exc:
            errors.append(exc)
            continue
        if not any(_same_lattice(lat[0], other[0]) for other in lattices):
            lattices.append(lat)
    if not lattices:
        raise errors[0]
    return lattices


def _same_lattice(a, b, tol_px=3.0):
    """True when two lattices put the same corners in the same places (either family
    order: a square field's two assignments give transposed arrays)."""
    d = [np.nanmedian(np.abs(a - b))] if a.shape == b.shape else []
    if a.shape == b.transpose(1, 0, 2).shape:
        d.append(np.nanmedian(np.abs(a - b.transpose(1, 0, 2))))
    return bool(d) and min(d) < tol_px


def _lattice_corners(fam, assign, comb_x, comb_y, field, fams: _Families):
    """Image positions of the lattice corners of one field window, warnings, and where
    the field edges lie in the picture (:func:`edge_views`)."""
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
    img = fams.to_image(corners.reshape(-1, 2))
    return (img.reshape(field.tiles_x + 1, field.tiles_y + 1, 2), warnings,
            edge_views(fams.to_pinhole, _field_corners(corners)))


def orient(lat_img, field: FieldProfile, origin: str, edge_view=None):
    """Floor coordinates of the lattice corners for a given origin corner.

    ``lat_img[i, j]`` is the image position of the corner between x-family line i and
    y-family line j of the window. The corner named ``origin`` (as seen from the
    camera: the near edge is the lowest in the image) becomes (0, 0); x and y follow
    the field edges so that the frame is right-handed with z up. ``edge_view``
    (:func:`edge_views`): where the edges lie in the picture, from their points in
    front of the camera, so that a field whose near corners lie out of the picture (or
    behind the camera) is oriented too; without it, from the corners' image positions.
    """
    nx, ny = field.tiles_x, field.tiles_y
    idx = {(0, 0): lat_img[0, 0], (nx, 0): lat_img[nx, 0], (nx, ny): lat_img[nx, ny],
           (0, ny): lat_img[0, ny]}
    order = [(0, 0), (nx, 0), (nx, ny), (0, ny)]  # around the field
    edges = [(order[k], order[(k + 1) % 4]) for k in range(4)]
    if edge_view is not None and np.isfinite(np.max(edge_view[:4])):
        k = int(np.argmax(edge_view[:4]))
        a, b = edges[k]
        # near-left: the end from which x (along the near edge) and y (into the field)
        # make a right-handed floor frame.
        f = order[(k + 3) % 4]
        turn = (b[0] - a[0]) * (f[1] - a[1]) - (b[1] - a[1]) * (f[0] - a[0])
        nl, nr = (a, b) if turn * edge_view[4] > 0 else (b, a)
    else:
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


def homography_from_lattice(lat_img, floor):
    hmg, _ = cv2.findHomography(floor.reshape(-1, 2), lat_img.reshape(-1, 2), 0)
    return hmg
