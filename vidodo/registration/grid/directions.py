"""The seam directions: vanishing points of the floor's straight edges, and which two of
them can be the tile seams' (perpendicular on the floor, the floor on one side of the
line through both)."""

from __future__ import annotations

import math

import numpy as np

from ...errors import CalibrationError
from .segments import (
    find_vp,
    hom_lines,
    refine_vp,
    same_direction,
    vp_consistent,
)

__all__ = ["FOCAL_RANGE", "PERPENDICULAR_DEG", "BELOW_HORIZON_SHARE", "MAX_PAIRS",
           "candidate_pairs", "perpendicular_partner"]


#: Most seam directions (vanishing points) looked for in a frame.
MAX_DIRECTIONS = 5
#: A long segment agrees with a vanishing point when its end points lie within this
#: distance of the line from its midpoint to the point [px at the lattice search's
#: scale]: the end points of straight-edge detectors are good to about a pixel.
END_TOL_PX = 2.0
#: Most pairs of directions whose lattice is evaluated.
MAX_PAIRS = 4
#: Largest deviation from perpendicular of a pair of seam directions on the floor [deg]:
#: the first vanishing points are a degree or two off (registrations within 2 mm came
#: from pairs 1-2 deg off perpendicular, ``benchmarks/registration_diagnosis.py``).
PERPENDICULAR_DEG = 4.0
#: Focal lengths a lens has, over the larger image side: 0.25 is a 127 deg wide lens
#: across that side, 4 a 14 deg tele (phone and action cameras lie inside); also the
#: self-check's default :attr:`vidodo.registration.selfcheck.CheckLimits.focal_range`.
FOCAL_RANGE = (0.25, 4.0)


#: Least share of both families' segment length on one side of the line through
#: their vanishing points: the floor's horizon, which no floor seam crosses (a
#: vertical direction, perpendicular to every floor direction too, gives a line
#: through the floor instead).
BELOW_HORIZON_SHARE = 0.95


def _below_horizon(cseg, dir_a, dir_b) -> float:
    """Share of the two families' segment length on the majority side of the line
    through their vanishing points (``dir_a``, ``dir_b``: :func:`_directions` items)."""
    horizon = np.cross(dir_a[0], dir_b[0])
    inl = dir_a[1] | dir_b[1]
    seg = cseg[inl]
    if not len(seg) or np.linalg.norm(horizon[:2]) < 1e-12 * abs(horizon[2]):
        return 1.0  # both at infinity: the horizon is the line at infinity
    length = np.hypot(seg[:, 2] - seg[:, 0], seg[:, 3] - seg[:, 1])
    side = np.sign(seg[:, :2] @ horizon[:2] + horizon[2]) + np.sign(
        seg[:, 2:] @ horizon[:2] + horizon[2])
    pos, neg = length[side > 0].sum(), length[side < 0].sum()
    return float(max(pos, neg) / max(length.sum(), 1e-300))


def _directions(cseg, rng, tol, end_tol=None):
    """Up to :data:`MAX_DIRECTIONS` distinct vanishing points, strongest first
    (``tol``, ``end_tol``: :func:`.segments.find_vp`).

    Returns
    -------
    list of (vp, inlier mask over ``cseg``, total inlier length)
    """
    length = np.hypot(cseg[:, 2] - cseg[:, 0], cseg[:, 3] - cseg[:, 1])
    rest = np.ones(len(cseg), bool)
    out = []
    for _ in range(2 * MAX_DIRECTIONS):
        if rest.sum() < 4 or len(out) >= MAX_DIRECTIONS:
            break
        exclude = out[0][0] if out else None
        vp, inl_r = find_vp(cseg[rest], np.zeros(2), rng, tol, exclude=exclude,
                            end_tol=end_tol)
        if vp is None or inl_r.sum() < 3:
            break
        inl = np.zeros(len(cseg), bool)
        inl[np.nonzero(rest)[0][inl_r]] = True
        rest &= ~inl
        if any(same_direction(vp, o[0], np.zeros(2)) for o in out):
            continue
        out.append((vp, inl, float(length[inl].sum())))
    return out


def _perpendicular_deviation(vp_a, vp_b, ctx) -> float:
    """How far from perpendicular the floor directions of two vanishing points must be
    [deg], at best over the focal lengths a lens has.

    Two vanishing points ``v1``, ``v2`` of perpendicular floor lines satisfy
    ``v1^T K^-T K^-1 v2 = 0`` (the image of the absolute conic; Hartley & Zisserman,
    *Multiple View Geometry*, 2nd ed., section 8.6). With the lens known, ``K`` is
    fixed; without it the principal point is taken at the image centre with square
    pixels and the focal length ranges over :data:`FOCAL_RANGE`.
    """
    scale, centre = ctx["scale"], ctx["centre"]
    # Conditioned coordinates -> (undistorted) pixels.
    to_px = np.array([[1 / scale, 0.0, centre[0]], [0.0, 1 / scale, centre[1]], [0, 0, 1.0]])
    a, b = to_px @ np.asarray(vp_a, float), to_px @ np.asarray(vp_b, float)
    camera = ctx["camera"]
    if camera is not None:
        kinv = np.linalg.inv(camera.matrix)
        focal_kinvs = [kinv]
    else:
        h, w = ctx["shape"]
        lo, hi = np.asarray(FOCAL_RANGE) * max(h, w)
        # The focal length making them perpendicular (if any), else the range's ends:
        # (pa . pb) + f^2 wa wb = 0 with pa, pb relative to the principal point.
        pa = a[:2] - centre * a[2]
        pb = b[:2] - centre * b[2]
        f2 = -(pa @ pb) / (a[2] * b[2]) if abs(a[2] * b[2]) > 1e-300 else -1.0
        focal = [lo, hi] + ([math.sqrt(f2)] if lo * lo <= f2 <= hi * hi else [])
        focal_kinvs = []
        for f in focal:
            focal_kinvs.append(np.array([[1 / f, 0, -centre[0] / f],
                                         [0, 1 / f, -centre[1] / f], [0, 0, 1.0]]))
    best = 90.0
    for kinv in focal_kinvs:
        ra, rb = kinv @ a, kinv @ b
        cos = abs(ra @ rb) / max(np.linalg.norm(ra) * np.linalg.norm(rb), 1e-300)
        best = min(best, 90.0 - math.degrees(math.acos(min(cos, 1.0))))
    return best


#: Largest angle between a segment and the direction to its vanishing point [rad]
#: (short segments; long ones are held to :data:`END_TOL_PX`).
ANGLE_TOL_RAD = math.radians(1.5)
#: The strongest directions for which a perpendicular partner is searched.
N_PARTNERS = 3
#: Focal lengths tried for a partner without a lens profile (geometric steps over
#: :data:`FOCAL_RANGE`, about 20 % apart).
N_FOCAL = 16
#: Two pairs of directions are the same when both of their vanishing points are within
#: this angle of one another (seen from the image centre) [deg].
SAME_PAIR_DEG = 2.0


def _ray_matrices(ctx):
    """Conditioned (undistorted) image coordinates -> camera rays, one matrix per camera
    matrix tried: the lens profile's, else square pixels, the principal point at the
    image centre and :data:`N_FOCAL` focal lengths over :data:`FOCAL_RANGE`."""
    scale, centre = ctx["scale"], ctx["centre"]
    to_px = np.array([[1 / scale, 0.0, centre[0]], [0.0, 1 / scale, centre[1]], [0, 0, 1.0]])
    camera = ctx["camera"]
    if camera is not None:
        return [np.linalg.inv(camera.matrix) @ to_px]
    h, w = ctx["shape"]
    out = []
    for f in np.geomspace(*(np.asarray(FOCAL_RANGE) * max(h, w)), N_FOCAL):
        k = np.array([[f, 0.0, centre[0]], [0.0, f, centre[1]], [0.0, 0.0, 1.0]])
        out.append(np.linalg.inv(k) @ to_px)
    return out


def perpendicular_partner(cseg, family, ctx, rng, iters=800):
    """The best supported vanishing point of floor lines perpendicular to ``family``'s.

    Lines perpendicular on the floor to those of vanishing point ``v`` vanish on the
    polar line of ``v`` with respect to the image of the absolute conic, ``l = w v``
    with ``w = K^-T K^-1`` (Hartley & Zisserman, *Multiple View Geometry*, 2nd ed.,
    section 8.6; ``K`` from the lens profile, else tried over the focal lengths a lens
    has). Each hypothesis is one segment's line meeting that polar line, so a weak
    seam family (few or short seams beside strong tape, print or wall edges) is found
    as long as a few of its segments are; the best is refined over its consistent
    segments (:func:`.segments.refine_vp`).

    Parameters
    ----------
    cseg : ndarray (N, 4)
        Segments in conditioned coordinates.
    family : tuple
        (vanishing point (3,), inlier mask (N,), ...) of the first family.

    Returns
    -------
    (vp, inlier mask over ``cseg``, total inlier length) or None
    """
    vp, inl = family[0], family[1]
    others = np.flatnonzero(~np.asarray(inl, bool))
    if len(others) < 3:
        return None
    seg = cseg[others]
    length = np.hypot(seg[:, 2] - seg[:, 0], seg[:, 3] - seg[:, 1])
    if length.sum() <= 0:
        return None
    polars = np.array([r.T @ r @ np.asarray(vp, float) for r in _ray_matrices(ctx)])
    k_seg = rng.choice(len(seg), iters, p=length / length.sum())
    k_pol = rng.integers(0, len(polars), iters)
    hyp = np.cross(hom_lines(seg)[k_seg], polars[k_pol])
    hyp = hyp[np.all(np.isfinite(hyp), axis=1) & (np.linalg.norm(hyp, axis=1) > 0)]
    if not len(hyp):
        return None
    end_tol = END_TOL_PX * ctx["scale"]
    score = np.concatenate([vp_consistent(seg, hyp[c:c + 100], ANGLE_TOL_RAD, end_tol) @ length
                            for c in range(0, len(hyp), 100)])
    best, inl_o = refine_vp(seg, hyp[int(np.argmax(score))], ANGLE_TOL_RAD, end_tol)
    if inl_o.sum() < 3:
        return None
    mask = np.zeros(len(cseg), bool)
    mask[others[inl_o]] = True
    return best, mask, float(length[inl_o].sum())


def _same_pair(a, b):
    """Whether two pairs of directions ((vp, ...), (vp, ...)) are the same, either order."""
    def close(u, v):
        du, dv = _direction_seen(u[0]), _direction_seen(v[0])
        return abs(du[0] * dv[1] - du[1] * dv[0]) < math.sin(math.radians(SAME_PAIR_DEG))
    return (close(a[0], b[0]) and close(a[1], b[1])) or (close(a[0], b[1])
                                                       and close(a[1], b[0]))


def _direction_seen(vp):
    """Unit direction from the image centre (conditioned origin) to a vanishing point."""
    vp = np.asarray(vp, float)
    d = vp[:2] / vp[2] if abs(vp[2]) > 1e-12 else vp[:2]
    n = np.linalg.norm(d)
    return d / n if n > 0 else d


def candidate_pairs(cseg, ctx, rng):
    """Pairs of directions that can be the two seam families, most convincing first.

    The pairs among the vanishing points of the frame's straight edges
    (:func:`_directions`; at most :data:`MAX_PAIRS`), then, for the :data:`N_PARTNERS`
    strongest, the pairs with their perpendicular partners
    (:func:`perpendicular_partner`): kept are the pairs whose floor directions can be
    perpendicular (:func:`_perpendicular_deviation`) and whose segments lie on one side
    of the line through both (:func:`_below_horizon`), each group ordered by the
    weaker family's total segment length. The partners come last: they are tried only
    when no pair of strong directions shows a lattice on both families.

    Returns
    -------
    (list of ((vp, mask), (vp, mask)), ((vp, mask), (vp, mask)) or None)
        The pairs, and the two strongest directions (the fallback when no pair fits).

    Raises
    ------
    CalibrationError
        Fewer than two directions.
    """
    vps = _directions(cseg, rng, ANGLE_TOL_RAD)
    if not vps:
        raise CalibrationError("grid: no family of parallel tile seams found")
    pairs = [(vps[i], vps[j]) for i in range(len(vps)) for j in range(i + 1, len(vps))]
    pairs.sort(key=lambda ab: -min(ab[0][2], ab[1][2]))
    partners = []
    for fam in vps[:N_PARTNERS]:
        partner = perpendicular_partner(cseg, fam, ctx, rng)
        if partner is not None:
            partners.append((fam, partner))
    partners.sort(key=lambda ab: -min(ab[0][2], ab[1][2]))
    if not pairs and not partners:
        raise CalibrationError("grid: only one direction of tile seams found; film the "
                               "floor at an angle that shows both")
    fits = []
    for group, most in ((pairs, MAX_PAIRS), (partners, N_PARTNERS)):
        kept = 0
        for a, b in group:
            if kept < most and (
                    _perpendicular_deviation(a[0], b[0], ctx) <= PERPENDICULAR_DEG
                    and _below_horizon(cseg, a, b) >= BELOW_HORIZON_SHARE
                    and not any(_same_pair((a, b), o) for o in fits)):
                fits.append((a, b))
                kept += 1
    first = pairs[0] if pairs else partners[0]
    fallback = (first[0][:2], first[1][:2])
    return [(a[:2], b[:2]) for a, b in fits], fallback
