"""The floor of a randomised scene, shaded point by point in floor metres.

Unlike :mod:`vidodo.synth.render_floor` (one texture for the shipped scenarios), the
floor here is a function of the floor point and of the footprint of the sample on the
floor: every thin feature (seams, teeth, tape edges, print) is box-filtered analytically
over the footprint, and fine texture fades out where the footprint is larger than its
grain, so far floor is area-averaged instead of aliased.
"""

from __future__ import annotations

import numpy as np

from .scene_spec import FloorLook

__all__ = ["shade_floor", "value_noise"]


def _hash01(ix, iy, salt):
    """Deterministic pseudo-random numbers in [0, 1) per integer lattice point."""
    h = (ix.astype(np.int64) * 73856093) ^ (iy.astype(np.int64) * 19349663) ^ (salt * 83492791)
    h = (h ^ (h >> 13)) * 1274126177
    h = h ^ (h >> 16)
    return ((h & 0xFFFFFF).astype(np.float32)) / np.float32(0x1000000)


def value_noise(x_m, y_m, scale_m, salt, foot_m):
    """Smooth value noise of unit amplitude (about -1..1) and grain ``scale_m``.

    Faded out where the sample footprint ``foot_m`` exceeds the grain (prefiltering).
    """
    gx = x_m / scale_m
    gy = y_m / scale_m
    ix = np.floor(gx)
    iy = np.floor(gy)
    fx = gx - ix
    fy = gy - iy
    fx = fx * fx * (3 - 2 * fx)
    fy = fy * fy * (3 - 2 * fy)
    ix = ix.astype(np.int64)
    iy = iy.astype(np.int64)
    v00, v10 = _hash01(ix, iy, salt), _hash01(ix + 1, iy, salt)
    v01, v11 = _hash01(ix, iy + 1, salt), _hash01(ix + 1, iy + 1, salt)
    v = (v00 * (1 - fx) + v10 * fx) * (1 - fy) + (v01 * (1 - fx) + v11 * fx) * fy
    fade = np.exp(-(foot_m / scale_m) ** 2 * 2.0)
    return (2 * v - 1) * fade


def _cover(dist_m, half_width_m, foot_m):
    """Share of a sample footprint covered by a band of half width ``half_width_m``
    around a line at distance ``dist_m`` (box filter, linear ramp)."""
    return np.clip((half_width_m - dist_m) / foot_m + 0.5, 0.0, 1.0) * np.minimum(
        1.0, 2 * half_width_m / foot_m)


def _teeth_offset(s_m, look: FloorLook, line, foot_m):
    """Boundary offset of an interlocking seam at positions ``s_m`` along it [m].

    A square wave of the teeth pitch, its corners smoothed over the footprint (far away
    the teeth average out into a straight seam)."""
    if look.teeth_pitch_m <= 0:
        return np.zeros_like(s_m)
    phase = 2 * np.pi * (s_m / look.teeth_pitch_m + 0.37 * line)
    sharp = np.maximum(look.teeth_pitch_m / (4 * np.maximum(foot_m, 1e-6)), 1.0)
    return look.teeth_depth_m * np.clip(np.sin(phase) * sharp, -1, 1) * np.minimum(
        1.0, look.teeth_pitch_m / (4 * np.maximum(foot_m, 1e-6)))


def _seam_axis(g, s_m, look, tile, lo, hi, foot_m):
    """Along one axis: tile index of each point and its distance to the seam [m].

    ``g`` is the coordinate across the seams in tiles, ``s_m`` the coordinate along
    them; seams are the lattice lines ``lo .. hi`` (the lattice's outer edges are
    straight)."""
    line = np.clip(np.round(g), lo, hi)
    n_m = (g - line) * tile
    inner = (line > lo) & (line < hi)
    b = np.where(inner, _teeth_offset(s_m, look, line, foot_m), 0.0)
    dist = np.abs(n_m - b)
    if look.teeth_pitch_m > 0:
        half = 0.5 * look.teeth_pitch_m
        q = s_m / half + 2 * 0.37 * line
        flank = np.abs(q - np.round(q)) * half
        dist = np.where(inner & (np.abs(n_m) <= look.teeth_depth_m), np.minimum(dist, flank),
                        dist)
    index = np.where(n_m < b, line - 1, line)
    return index.astype(np.int64), dist


def _tile_colours(ix, iy, look: FloorLook, in_field, x_m, y_m, foot_m):
    a = np.asarray(look.tile_a_bgr, np.float32)
    b = np.asarray(look.tile_b_bgr, np.float32)
    beyond = np.asarray(look.beyond_bgr, np.float32)
    pick = ((ix + iy) % 2 == 1) if look.alternating else np.zeros(ix.shape, bool)
    col = np.where(pick[..., None], b, a)
    col = np.where(in_field[..., None], col, beyond)
    gain = 1 + look.tile_gain_sd * (2 * _hash01(ix, iy, 5) - 1) * 1.7
    if look.wear > 0:
        worn = np.maximum(value_noise(x_m, y_m, 0.12, 9, foot_m), 0) * look.wear * 2
        gain = gain + worn * (_hash01(ix, iy, 11) > 0.4)
    return col * gain[..., None]


def _segment_dist(x, y, seg):
    x0, y0, x1, y1 = seg
    dx, dy = x1 - x0, y1 - y0
    ln2 = max(dx * dx + dy * dy, 1e-12)
    t = np.clip(((x - x0) * dx + (y - y0) * dy) / ln2, 0, 1)
    return np.hypot(x - x0 - t * dx, y - y0 - t * dy)


def _art(col, x, y, foot, art):
    x0, y0, x1, y1, kind, period, angle = art[:7]
    c1 = np.asarray(art[7:10], np.float32)
    c2 = np.asarray(art[10:13], np.float32)
    inside = (x >= x0) & (x < x1) & (y >= y0) & (y < y1)
    if not inside.any():
        return col
    if kind == 2:  # discs on a square grid of twice the period
        cell = 2.0 * period
        d = np.hypot(x - (np.floor(x / cell) + 0.5) * cell, y - (np.floor(y / cell) + 0.5) * cell)
        band = _cover(d, 0.6 * period, foot)
    else:  # stripes (0) or rings (1)
        q = ((x * np.cos(angle) + y * np.sin(angle)) if kind == 0 else
             np.hypot(x - 0.5 * (x0 + x1), y - 0.5 * (y0 + y1))) / period
        d = np.abs(q - np.floor(q) - 0.5) * period
        band = _cover(d, 0.25 * period, foot)
    paint = c1 * band[..., None] + c2 * (1 - band[..., None])
    return np.where(inside[..., None], paint, col)


def _light(x, y, look: FloorLook, centre):
    gx, gy, g0 = look.gradient
    gain = g0 * (1 + gx * (x - centre[0]) + gy * (y - centre[1]))
    for cx, cy, a, b, ang, depth in look.shadows:
        c, s = np.cos(ang), np.sin(ang)
        u = ((x - cx) * c + (y - cy) * s) / a
        v = (-(x - cx) * s + (y - cy) * c) / b
        r = np.sqrt(u * u + v * v)
        gain = gain * (1 - depth * np.clip((1.15 - r) / 0.3, 0, 1))
    return np.maximum(gain, 0.05)


def shade_floor(x_m, y_m, foot_m, look: FloorLook, field_size_m, tile_m):
    """Colour of the floor at points, box-filtered over each sample's footprint.

    Parameters
    ----------
    x_m, y_m : ndarray
        Floor points [m].
    foot_m : ndarray
        Footprint of each sample on the floor [m].
    look : FloorLook
    field_size_m : tuple of float
        Field extent along x and y [m].
    tile_m : float
        Tile side [m].

    Returns
    -------
    ndarray of shape x_m.shape + (3,), float32
        BGR, not clipped.
    """
    x = np.asarray(x_m, np.float32)
    y = np.asarray(y_m, np.float32)
    foot = np.maximum(np.asarray(foot_m, np.float32), 1e-5)
    sx, sy = field_size_m
    nx, ny = round(sx / tile_m), round(sy / tile_m)
    k = look.beyond_tiles
    ix, dist_x = _seam_axis(x / tile_m, y, look, tile_m, -k, nx + k, foot)
    iy, dist_y = _seam_axis(y / tile_m, x, look, tile_m, -k, ny + k, foot)
    lattice = (ix >= -k) & (ix < nx + k) & (iy >= -k) & (iy < ny + k)
    in_field = (ix >= 0) & (ix < nx) & (iy >= 0) & (iy < ny)
    col = _tile_colours(ix, iy, look, in_field, x, y, foot)
    col = np.where(lattice[..., None], col, np.asarray(look.surround_bgr, np.float32))
    grain = look.grain * value_noise(x, y, 0.002, 1, foot) + 4.0 * value_noise(
        x, y, 0.05, 2, foot)
    col = col + grain[..., None]
    for art in look.arts:
        col = _art(col, x, y, foot, art)
    half = 0.5 * look.seam_width_m
    seam = np.maximum(_cover(dist_x, half, foot), _cover(dist_y, half, foot))
    seam = seam * lattice
    col = col * (1 - look.seam_depth * seam)[..., None]
    for tape in look.tapes:
        cov = _cover(_segment_dist(x, y, tape[:4]), 0.5 * tape[4], foot)
        col = col * (1 - cov[..., None]) + np.asarray(tape[5:8], np.float32) * cov[..., None]
    return col * _light(x, y, look, (0.5 * sx, 0.5 * sy))[..., None]
