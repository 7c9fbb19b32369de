"""The tiling as a periodic lattice: spacing and phase of each seam family from the
periodicity of its evidence, and the field's window placed where the tiling ends.

Works when only part of the field is in view. In the affinely rectified floor the
lines of one family are equally spaced (Hartley & Zisserman, *Multiple View Geometry*,
2nd ed., section 2.7), so their evidence across the family, ``cover(rho)``, is periodic.
The spacing and phase are those of the comb whose teeth carry the most evidence *more*
than the points half a spacing between them (a matched filter of the lattice's
fundamental, normalised by the root of the tooth count): half the true spacing puts
half its teeth on tile interiors, twice the true spacing puts its midpoints on seams,
so both score lower than the true spacing.

The field's ``n + 1`` lines are then placed among the visible lattice lines: at an end
where the tiling visibly ends (the next line position is in view and carries no
evidence) the field's edge lies on the last line; where the lines run out of the
picture the field may continue. When neither end of a family is seen to end, the
placement is a guess by whole tiles and the self-check decides whether the view fixes
it (:func:`vidodo.registration.selfcheck.field_position_known`).
"""

from __future__ import annotations

import math

import cv2
import numpy as np

__all__ = ["family_period", "lattice_lines", "line_rho", "tiling_continues", "window_starts"]

#: Fewest image pixels between neighbouring lattice lines for a tooth to count (near
#: the horizon lines crowd together and cannot be told apart) [px].
MIN_GAP_PX = 6.0
#: A lattice line carries the seam when its evidence is at least this share of the
#: median evidence of the lines in view (the rest are hidden, off the floor or beyond
#: the tiling).
ON_SHARE = 0.35
#: The best spacing's score must exceed this share of the best other spacing that is
#: not a multiple or an integer fraction of it (those score high on any lattice).
CLEAR_WIN = 0.9
#: Spacings within this ratio of one another (or of 2, 3, 1/2, 1/3 times it) are the
#: same score peak: with the vanishing points a degree or two off the line spacing
#: varies across the rectified floor, and the peak of the score over the spacing
#: widens (the best and a second spacing 9-10 % apart scored within 1 % on scenes
#: whose registration was right, ``benchmarks/registration_diagnosis.py``).
SAME_PEAK = 0.15


def _usable(f, period):
    """Per rho sample: the line there is in view and far enough from its neighbours."""
    return f["seen"] & (f["speed"] * period >= MIN_GAP_PX)


def family_period(f, n_periods=400, n_phases=64):
    """Spacing and phase of one family's lattice lines (rectified rho units).

    Parameters
    ----------
    f : dict
        The family's ``rhos``, ``cover``, ``speed``, ``seen`` (:mod:`.lattice`).

    Returns
    -------
    list of (period, phase, score)
        The best few distinct spacings, best first; ``score`` is the evidence on the
        teeth minus that half a spacing off, summed over the teeth in view and divided
        by the root of their count. Empty when a spacing that is neither a multiple
        nor an integer fraction of the best scores within :data:`CLEAR_WIN` of it (the
        evidence is not one lattice: curved seams, print, a second pattern).
    """
    rhos, cover = f["rhos"], f["cover"]
    seen_rho = rhos[f["seen"]]
    if len(seen_rho) < 4:
        return []
    span = float(seen_rho[-1] - seen_rho[0])
    step = float(rhos[1] - rhos[0])
    periods = np.geomspace(max(4 * step, span / 80.0), span / 2.0, n_periods)
    out = []
    for period in periods:
        # A tooth takes the strongest evidence within 7 % of a spacing (the lines are
        # equally spaced only as far as the lens model and the rectification are right).
        width = max(int(round(0.14 * period / step)) | 1, 3)
        c = cv2.dilate(cover.astype(np.float32).reshape(1, -1),
                       np.ones((1, width), np.uint8)).ravel()
        phases = np.arange(n_phases) / n_phases * period
        k = np.arange(math.floor((rhos[0] - period) / period), math.ceil(rhos[-1] / period) + 1)
        teeth = phases[:, None] + period * k[None, :]
        mids = teeth + period / 2
        ok = (np.interp(teeth, rhos, _usable(f, period).astype(float), left=0, right=0) > 0.5)
        ok &= np.interp(mids, rhos, f["seen"].astype(float), left=0, right=0) > 0.5
        n_ok = ok.sum(axis=1)
        on = (np.interp(teeth, rhos, c, left=0, right=0) * ok).sum(axis=1)
        off = (np.interp(mids, rhos, c, left=0, right=0) * ok).sum(axis=1)
        # Summed over the teeth and divided by the root of their count (a matched
        # filter's signal to noise): more teeth on seams win, teeth on interiors cost.
        score = np.where(n_ok >= 3, (on - off) / np.sqrt(np.maximum(n_ok, 1)), -1.0)
        best = int(np.argmax(score))
        out.append((float(period), float(phases[best]), float(score[best])))
    out.sort(key=lambda x: -x[2])
    kept = []
    for cand in out:
        if cand[2] <= 0:
            break
        if any(abs(cand[0] / p - 1) < SAME_PEAK for p, _ph, _s in kept):
            continue
        kept.append(cand)
        if len(kept) >= 3:
            break
    best = kept[0][0] if kept else 0.0
    rival = [c for c in out[1:] if c[2] > CLEAR_WIN * kept[0][2]
             and not _harmonic(c[0] / best)] if kept else []
    return [] if rival else kept


def _harmonic(ratio, tol=SAME_PEAK):
    """Whether two spacings are the same or one is 2 or 3 times the other."""
    return any(abs(ratio / m - 1) < tol for m in (1, 2, 3, 1 / 2, 1 / 3))


def lattice_lines(f, period, phase):
    """The family's lattice lines in view, refined, and where the tiling ends.

    The line of index ``k`` lies at ``rho = (a + b k) / (1 + c k)``: equally spaced
    (``c = 0``) in a perfect affine rectification, and a 1-D projective map of the index
    when the vanishing points are slightly off (a line's cross ratios are kept under
    any homography; Hartley & Zisserman, section 2.5). ``a, b, c`` are fitted by linear
    least squares to the evidence centroids near the teeth.

    Returns
    -------
    dict or None
        ``model``: (a, b, c); ``k_lo``, ``k_hi``: outermost lines with seam evidence;
        ``ends_lo``, ``ends_hi``: whether the tiling visibly ends there; None with
        fewer than 3 lines carrying evidence.
    """
    model = (phase, period, 0.0)
    for _ in range(4):  # refine the model on the evidence centroids, then judge
        teeth = _teeth(f, model)
        if teeth is None:
            return None
        k_all, found, in_view, on = teeth
        good = on & np.isfinite(found)
        if good.sum() < 3:
            return None
        k, r = k_all[good].astype(float), found[good]
        a_mat = np.column_stack([np.ones(len(k)), k, -k * r])
        if good.sum() < 5:  # too few lines to fit the projective term
            a_mat = a_mat[:, :2]
        sol = np.linalg.lstsq(a_mat, r, rcond=None)[0]
        model = (float(sol[0]), float(sol[1]), float(sol[2]) if len(sol) > 2 else 0.0)
        if model[1] <= 0:
            return None
    teeth = _teeth(f, model)
    if teeth is None:
        return None
    k_all, _found, in_view, on = teeth
    idx = np.nonzero(on)[0]
    if len(idx) < 3:
        return None
    lo, hi = idx[0], idx[-1]
    ends_lo = bool(lo > 0 and in_view[lo - 1] and not on[lo - 1])
    ends_hi = bool(hi < len(k_all) - 1 and in_view[hi + 1] and not on[hi + 1])
    return {"model": model, "k_lo": int(k_all[lo]), "k_hi": int(k_all[hi]),
            "ends_lo": ends_lo, "ends_hi": ends_hi}


def line_rho(lines, k):
    """Position (rectified rho) of lattice line(s) ``k`` of :func:`lattice_lines`."""
    a, b, c = lines["model"]
    k = np.asarray(k, float)
    return (a + b * k) / (1 + c * k)


def _teeth(f, model):
    """Per lattice line over the evidence range: index, evidence centroid near it, in
    view, carries a seam."""
    rhos, cover = f["rhos"], f["cover"]
    a, b, c = model
    n = int(math.ceil((rhos[-1] - rhos[0]) / b)) + 2
    k_all = np.arange(int(math.floor((rhos[0] - a) / b)) - 2,
                      int(math.ceil((rhos[-1] - a) / b)) + 3)
    if len(k_all) > 4 * n:
        return None
    den = 1 + c * k_all
    k_all = k_all[den > 0.2]
    r_all = (a + b * k_all) / (1 + c * k_all)
    keep = (r_all >= rhos[0]) & (r_all <= rhos[-1])
    k_all, r_all = k_all[keep], r_all[keep]
    if len(r_all) < 3 or np.any(np.diff(r_all) <= 0):
        return None
    gap = np.gradient(r_all) if len(r_all) > 1 else np.array([b])
    in_view = np.interp(r_all, rhos, f["seen"].astype(float)) > 0.5
    in_view &= np.interp(r_all, rhos, f["speed"]) * gap >= MIN_GAP_PX
    if in_view.sum() < 3:
        return None
    found = np.full(len(r_all), np.nan)
    ev = np.zeros(len(r_all))
    for i, (r, g) in enumerate(zip(r_all, gap, strict=True)):
        near = np.abs(rhos - r) < 0.08 * g
        w = cover[near]
        if w.sum() > 0:
            found[i] = float(np.average(rhos[near], weights=w))
        ev[i] = float(cover[np.abs(rhos - r) < 0.05 * g].max(initial=0.0))
    level = float(np.median(ev[in_view]))
    on = in_view & (ev >= ON_SHARE * max(level, 1e-6)) & (ev > 0.05)
    return k_all, found, in_view, on


def window_starts(lines, n_tiles):
    """Index of the field's first line among the lattice lines, for each placement
    the evidence allows (a single one when a field edge is seen where the tiling ends).

    Returns
    -------
    list of int
        Empty when the tiling is seen to end on both sides with another tile count than
        the field's (a wrong count, or the edge tiles hidden: no placement is safe).
    """
    lo, hi = lines["k_lo"], lines["k_hi"]
    if lines["ends_lo"] and lines["ends_hi"]:
        return [lo] if hi - lo == n_tiles else []
    if lines["ends_lo"]:
        return [lo]
    if lines["ends_hi"]:
        return [hi - n_tiles]
    # Neither end seen: centred on the lines in view (a guess by whole tiles).
    return [int(round((lo + hi - n_tiles) / 2))]


def tiling_continues(lines, n_tiles) -> bool:
    """More tiles carry seams in view than the field has: the tiling continues beyond
    the field, and where it ends says nothing about where the field ends."""
    return lines["k_hi"] - lines["k_lo"] > n_tiles
