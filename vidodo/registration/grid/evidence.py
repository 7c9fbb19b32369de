"""Seam evidence per tile edge: is there a seam where a registration predicts one?

Shared by the grid search (placing the field in the tiling) and the self-check.
"""

from __future__ import annotations

import math

import numpy as np

from ...profiles import FieldProfile
from .seams import SeamSearch, locate_seams

__all__ = ["edge_samples", "edge_rates", "search_half_width_px", "row_rates", "tiles_end",
           "SEARCH_PX", "HIT_PX"]

#: Half-width of the band searched for a seam across each predicted tile edge, and the
#: distance from the prediction within which a found seam counts [px at 1280 x 720,
#: scaled with the image diagonal]. A registration good to a few millimetres puts the
#: seams within a pixel; a dip on grain or print lands anywhere in the band (chance
#: about 1.2 / 6 per sample).
SEARCH_PX = 6.0
HIT_PX = 1.2

def edge_samples(field_profile: FieldProfile, offset, ring=0, per_edge=8, gap=0.15):
    """Sample points on every tile side of the field (grown by ``ring`` tiles), shifted
    across the side by ``offset`` tiles.

    Returns (points (N, 2) [m], axis (N,), value (N,) [m], normal (N, 2), edge id (N,)).
    """
    s = field_profile.tile_size_m
    nx, ny = field_profile.tiles_x, field_profile.tiles_y
    t = np.linspace(gap, 1 - gap, per_edge)
    pts, axis, val, nrm, eid = [], [], [], [], []
    k = 0
    for ax, n_lines, n_tiles in ((0, nx, ny), (1, ny, nx)):
        for i in range(-ring, n_lines + ring + 1):
            v = (i + offset) * s
            for j in range(-ring, n_tiles + ring):
                along = (j + t) * s
                p = np.column_stack([np.full_like(along, v), along])
                pts.append(p if ax == 0 else p[:, ::-1])
                axis.append(np.full(per_edge, ax))
                val.append(np.full(per_edge, v))
                nrm.append(np.tile([1.0, 0.0] if ax == 0 else [0.0, 1.0], (per_edge, 1)))
                eid.append(np.full(per_edge, k))
                k += 1
    return (np.vstack(pts), np.concatenate(axis), np.concatenate(val), np.vstack(nrm),
            np.concatenate(eid))


def edge_rates(grey, reg, samples, tile_size_m, ignore, half_width_px):
    """Per tile edge: samples examined and samples with a seam found where predicted.

    The seam is looked for over a wide band (``half_width_px`` each side) but counts
    only within :data:`HIT_PX` of the prediction: on tile grain, print or texture a dip
    turns up anywhere in the band, a true seam where the registration puts it.
    """
    fl, axis, val, nrm, eid = samples
    q, q_ax, q_val, looked, offset = locate_seams(
        grey, reg, (fl, axis, val, nrm), tile_size_m, ignore=ignore,
        search=SeamSearch(half_width_px=half_width_px))
    with np.errstate(invalid="ignore"):
        hit = np.abs(offset) <= HIT_PX * half_width_px / SEARCH_PX
    n_e = int(eid.max()) + 1 if len(eid) else 0
    n_looked = np.bincount(eid, looked, n_e)
    n_hit = np.bincount(eid, hit, n_e)
    n_any = np.bincount(eid, np.isfinite(offset), n_e)
    return n_looked, n_hit, (q, q_ax, q_val), n_any


def search_half_width_px(shape):
    """Half-width of the band searched across each tile edge for this image [px]."""
    return SEARCH_PX * float(np.clip(math.hypot(shape[1], shape[0]) / 1469.0, 0.5, 1.5))




def tiles_end(rates, ax, inside_row, outside_row) -> bool:
    """The tiling ends between two neighbouring rows: seams cross the inside row where
    predicted and not the outside one (both in view)."""
    l_in, r_in = rates.get((ax, inside_row), (0.0, 0.0))
    l_out, r_out = rates.get((ax, outside_row), (0.0, 0.0))
    return bool(min(l_in, l_out) >= 10 and r_in >= 0.4 and r_out <= 0.25 * r_in)


def row_rates(grey, field_profile: FieldProfile, reg, ring, *, ignore=None):
    """Seams found across each tile row, per direction, over the field grown by ``ring``.

    Returns
    -------
    dict
        ``(axis, row) -> (samples examined, fraction with a seam where predicted)``:
        the seams of the other family (interior lines of the grown field) crossing row
        ``row`` of direction ``axis`` (row ``r`` spans ``r`` to ``r + 1`` tiles).
    """
    s = field_profile.tile_size_m
    nx, ny = field_profile.tiles_x, field_profile.tiles_y
    lines = edge_samples(field_profile, 0.0, ring=ring, per_edge=10)
    n_looked, n_hit, _q, _any = edge_rates(grey, reg, lines, s, ignore,
                                           search_half_width_px(grey.shape))
    fl, axis, val, _nrm, eid = lines
    line = np.round(val / s).astype(int)
    row = np.floor(np.where(axis == 0, fl[:, 1], fl[:, 0]) / s).astype(int)
    out = {}
    for ax in (0, 1):
        # Seams of family 1 - ax cross the rows of direction ax; not the grown field's
        # outermost lines (the field's border can look unlike a seam).
        fam = axis == 1 - ax
        n_lines = nx if ax == 1 else ny
        inner = fam & (line > -ring) & (line < n_lines + ring)
        for r in range(-ring, (nx if ax == 0 else ny) + ring):
            sel = np.unique(eid[inner & (row == r)])
            looked = float(n_looked[sel].sum())
            out[ax, r] = (looked, float(n_hit[sel].sum()) / max(looked, 1.0))
    return out
