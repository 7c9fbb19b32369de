"""The floor for the synthetic renderer: a tiled texture and how a camera sees it.

The floor is a texture in floor metres: square tiles with slight per-tile colour
variation, a fine pebbled surface, darker seams, a plain surround outside the field,
and fiducials lying flat where the field profile puts them. A camera sees it through
per-pixel viewing rays (see :mod:`vidodo.synth.render`); each pixel's floor point is looked
up in a mip-map pyramid at the level that matches the pixel's footprint on the floor
(trilinear filtering), so distant tiles are area-averaged instead of aliased.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import cv2
import numpy as np

from ..profiles import FieldProfile, marker_corners_local

__all__ = ["FloorTexture", "floor_texture", "plate_modules", "sample_floor", "texel_coords",
           "footprint_level", "SURROUND_BGR"]

SURROUND_BGR = (128.0, 134.0, 138.0)
"""Mean colour of the floor around the field; also what rays that miss the floor see
(a plain backdrop, so the horizon draws no artificial edge)."""
TILE_BGR = (96.0, 98.0, 102.0)
"""Mean colour of a foam tile (grey)."""
PRINT_BLACK = 28.0
"""Grey level of a printed marker's black under the scene light."""
PRINT_WHITE = 226.0
"""Grey level of a printed marker's white paper."""
SEAM_WIDTH_M = 0.003
"""Width of a tile seam [m] (from memory: foam tile joints are a few millimetres)."""
MARGIN_M = 0.8
"""Surround floor kept in the texture on each side of the field [m]."""


@dataclass(frozen=True)
class FloorTexture:
    """A floor texture pyramid in floor metres."""

    atlas: np.ndarray
    """Every mip level side by side in one BGR uint8 image: level ``l`` (texels
    ``texel_m * 2**l`` wide, ``width / 2**l`` by ``height / 2**l`` of them) starts at
    column ``width * (2 - 2**(1 - l))``, row 0. Level ``l`` texel ``c`` sits on level-0
    texel ``c * 2**l`` (``cv2.pyrDown`` centres output pixel ``i`` on input ``2 i``)."""
    width: int
    """Level-0 width [texels]."""
    height: int
    """Level-0 height [texels]."""
    n_levels: int
    """Number of mip levels."""
    x0_m: float
    """Floor x of the texture's left edge [m]."""
    y0_m: float
    """Floor y of the texture's top edge (row 0) [m]."""
    texel_m: float
    """Side of one level-0 texel [m]."""


def plate_modules(family: str, marker_id: int, quiet_modules: int = 1) -> np.ndarray:
    """The printed plate of a marker, one array cell per module (row 0 = printed top).

    The marker image comes from ``cv2.aruco.generateImageMarker`` with one pixel per
    module (black border included); ``quiet_modules`` rows of white paper surround it.

    Returns
    -------
    ndarray of shape (n + 2q, n + 2q), float32
        Grey levels (``PRINT_BLACK`` or ``PRINT_WHITE``).
    """
    dictionary = cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, family))
    n = dictionary.markerSize + 2
    img = cv2.aruco.generateImageMarker(dictionary, marker_id, n, borderBits=1)
    plate = np.pad(img, quiet_modules, constant_values=255)
    return np.where(plate > 127, PRINT_WHITE, PRINT_BLACK).astype(np.float32)


def plate_lookup(modules, size_m, local_x, local_y, quiet_modules=1):
    """Grey level of a marker plate at points in the marker's own frame.

    Parameters
    ----------
    modules : ndarray of shape (m, m)
        From :func:`plate_modules`.
    size_m : float
        Side of the marker's black square [m].
    local_x, local_y : ndarray
        Points in the marker frame (x right, y towards the printed top) [m].
    quiet_modules : int
        Quiet-zone width the plate was made with [modules].

    Returns
    -------
    value : ndarray, float32
        Grey level, NaN outside the plate.
    """
    m = modules.shape[0]
    module_m = size_m / (m - 2 * quiet_modules)
    half = 0.5 * m * module_m
    col = np.floor((local_x + half) / module_m)
    row = np.floor((half - local_y) / module_m)
    inside = (col >= 0) & (col < m) & (row >= 0) & (row < m)
    out = np.full(np.shape(local_x), np.nan, np.float32)
    out[inside] = modules[row[inside].astype(int), col[inside].astype(int)]
    return out


def _paint_floor_marker(grey_bgr, x0, y0, texel, fm, supersample=4):
    """Paint a flat fiducial into the texture with ``supersample**2`` samples per texel."""
    modules = plate_modules(fm.family, fm.id)
    n_total = modules.shape[0]
    plate_half = 0.5 * fm.size_m * n_total / (n_total - 2)
    corners = marker_corners_local(2 * plate_half)
    c, s = math.cos(fm.yaw_rad), math.sin(fm.yaw_rad)
    world = corners @ np.array([[c, s], [-s, c]]) + [fm.x_m, fm.y_m]
    i0 = max(int(math.floor((world[:, 0].min() - x0) / texel)) - 1, 0)
    i1 = min(int(math.ceil((world[:, 0].max() - x0) / texel)) + 1, grey_bgr.shape[1])
    j0 = max(int(math.floor((world[:, 1].min() - y0) / texel)) - 1, 0)
    j1 = min(int(math.ceil((world[:, 1].max() - y0) / texel)) + 1, grey_bgr.shape[0])
    if i1 <= i0 or j1 <= j0:
        return
    sub = (np.arange(supersample) + 0.5) / supersample
    xs = x0 + (np.arange(i0, i1)[:, None] + sub[None, :]).ravel() * texel
    ys = y0 + (np.arange(j0, j1)[:, None] + sub[None, :]).ravel() * texel
    gx, gy = np.meshgrid(xs - fm.x_m, ys - fm.y_m)
    lx, ly = c * gx + s * gy, -s * gx + c * gy
    value = plate_lookup(modules, fm.size_m, lx, ly)
    inside = np.isfinite(value)
    shape = (j1 - j0, supersample, i1 - i0, supersample)
    cover = inside.reshape(shape).mean(axis=(1, 3))[..., None]
    grey = np.where(inside, value, 0.0).reshape(shape).sum(axis=(1, 3))[..., None]
    grey = grey / np.maximum(cover * supersample**2, 1e-9)
    patch = grey_bgr[j0:j1, i0:i1]
    patch[:] = patch * (1.0 - cover) + grey * cover


def _smooth_noise(rng, shape, scale_px):
    """Unit-variance Gaussian noise with correlation length ``scale_px`` texels."""
    if scale_px <= 1.5:
        noise = rng.standard_normal(shape, dtype=np.float32)
        if scale_px > 0.5:
            noise = cv2.GaussianBlur(noise, (0, 0), scale_px)
    else:
        small = (max(int(shape[1] / scale_px), 2), max(int(shape[0] / scale_px), 2))
        coarse = rng.standard_normal((small[1], small[0]), dtype=np.float32)
        noise = cv2.resize(coarse, (shape[1], shape[0]), interpolation=cv2.INTER_CUBIC)
    std = float(noise.std())
    return noise / std if std > 0 else noise


@functools.lru_cache(maxsize=2)
def floor_texture(field: FieldProfile, floor_seed: int, texel_m: float) -> FloorTexture:
    """Build (and cache) the floor texture pyramid of a field.

    Parameters
    ----------
    field : FieldProfile
        Tile grid and floor fiducials.
    floor_seed : int
        Seed of the tile colours and surface texture.
    texel_m : float
        Side of one level-0 texel [m].
    """
    rng = np.random.default_rng([int(floor_seed), 7919])
    sx, sy = field.size_m
    n_levels = 6
    block = 2 ** (n_levels - 1)
    nx = int(math.ceil((sx + 2 * MARGIN_M) / texel_m / block)) * block
    ny = int(math.ceil((sy + 2 * MARGIN_M) / texel_m / block)) * block
    x0 = -0.5 * (nx * texel_m - sx)
    y0 = -0.5 * (ny * texel_m - sy)
    xc = x0 + (np.arange(nx) + 0.5) * texel_m
    yc = y0 + (np.arange(ny) + 0.5) * texel_m
    ts = field.tile_size_m
    # texel column / row ranges of each tile (tiles are rectangles of texels)
    edges_x = np.searchsorted(xc, np.arange(field.tiles_x + 1) * ts)
    edges_y = np.searchsorted(yc, np.arange(field.tiles_y + 1) * ts)
    field_rows = slice(edges_y[0], edges_y[-1])
    field_cols = slice(edges_x[0], edges_x[-1])
    # per-tile colour: brightness +-4 %, slight hue shift per channel (+-1.5 %)
    tile_gain = 1.0 + 0.04 * rng.standard_normal((field.tiles_y, field.tiles_x, 1))
    tile_tint = 1.0 + 0.015 * rng.standard_normal((field.tiles_y, field.tiles_x, 3))
    tile_bgr = (np.array(TILE_BGR) * tile_gain * tile_tint).astype(np.float32)
    img = np.empty((ny, nx, 3), np.float32)
    img[:] = np.array(SURROUND_BGR, np.float32)
    for iy in range(field.tiles_y):
        for ix in range(field.tiles_x):
            img[edges_y[iy]:edges_y[iy + 1], edges_x[ix]:edges_x[ix + 1]] = tile_bgr[iy, ix]
    # surface: fine pebbles (about 1.5 mm) and mottling (about 4 cm), stronger on foam
    # (amplitudes 9 and 3 grey levels on the tiles, 4 and 5 on the surround); the
    # surround's texture fades out from 0.7 m to 0.3 m before the texture edge, where
    # the coarse mip levels would smear it into streaks when far-away floor clamps to
    # the edge texels (beyond the edge: flat colour)
    surface = _smooth_noise(rng, (ny, nx), 0.0015 / texel_m)
    surface *= np.float32(4.0)
    surface[field_rows, field_cols] *= np.float32(9.0 / 4.0)
    mottle = _smooth_noise(rng, (ny, nx), 0.04 / texel_m)
    mottle *= np.float32(5.0)
    mottle[field_rows, field_cols] *= np.float32(3.0 / 5.0)
    surface += mottle
    del mottle
    dx = np.minimum(xc - x0, x0 + nx * texel_m - xc)
    dy = np.minimum(yc - y0, y0 + ny * texel_m - yc)
    fx = np.clip((dx - 0.3) / (MARGIN_M - 0.4), 0, 1).astype(np.float32)
    fy = np.clip((dy - 0.3) / (MARGIN_M - 0.4), 0, 1).astype(np.float32)
    surface *= np.minimum(fy[:, None], fx[None, :])
    img += surface[..., None]
    del surface
    # seams: anti-aliased dark lines on every tile boundary (coverage of a texel)
    def seam_cover(c, n_tiles):
        d = np.abs(c - np.clip(np.round(c / ts), 0, n_tiles) * ts)
        return np.clip((0.5 * SEAM_WIDTH_M - d) / texel_m + 0.5, 0.0, 1.0).astype(np.float32)

    # light kept = 1 - 0.45 * coverage of the seams along x and along y
    keep_x = 1 - 0.45 * seam_cover(xc, field.tiles_x)[None, :] * (
        (yc >= -SEAM_WIDTH_M) & (yc <= sy + SEAM_WIDTH_M))[:, None].astype(np.float32)
    keep_y = 1 - 0.45 * seam_cover(yc, field.tiles_y)[:, None] * (
        (xc >= -SEAM_WIDTH_M) & (xc <= sx + SEAM_WIDTH_M))[None, :].astype(np.float32)
    img *= keep_x[..., None]
    del keep_x
    img *= keep_y[..., None]
    del keep_y
    for fm in field.floor_markers:
        _paint_floor_marker(img, x0, y0, texel_m, fm)
    np.rint(img, out=img)
    np.clip(img, 0, 255, out=img)
    base = img.astype(np.uint8)
    del img
    atlas = np.empty((ny, 2 * nx, 3), np.uint8)
    atlas[:] = np.array(SURROUND_BGR, np.uint8)
    level = base
    for lv in range(n_levels):
        if lv:
            level = cv2.pyrDown(level)
        off = 2 * nx - (2 * nx >> lv)
        atlas[:level.shape[0], off:off + level.shape[1]] = level
    return FloorTexture(atlas=atlas, width=nx, height=ny, n_levels=n_levels, x0_m=x0,
                        y0_m=y0, texel_m=texel_m)


def footprint_level(floor_x_m, floor_y_m, texel_m, step_px=1):
    """Mip level per pixel from the floor footprint of one pixel.

    The footprint is the longer of the two pixel edges mapped onto the floor (finite
    differences of the floor coordinates); level ``log2(footprint / texel)``.

    Parameters
    ----------
    floor_x_m, floor_y_m : ndarray of shape (H, W)
        Floor point of each pixel (NaN where the ray misses the floor) [m].
    texel_m : float
        Level-0 texel [m].
    step_px : float
        Pixel spacing of the given grid [px].
    """
    gxu = np.gradient(floor_x_m, axis=1)
    gyu = np.gradient(floor_y_m, axis=1)
    gxv = np.gradient(floor_x_m, axis=0)
    gyv = np.gradient(floor_y_m, axis=0)
    foot = np.maximum(np.hypot(gxu, gyu), np.hypot(gxv, gyv)) / step_px
    with np.errstate(divide="ignore", invalid="ignore"):
        level = np.log2(foot / texel_m)
    return np.nan_to_num(level, nan=0.0, posinf=0.0, neginf=0.0).astype(np.float32)


def texel_coords(tex: FloorTexture, floor_x_m, floor_y_m, valid):
    """Level-0 texel coordinates of floor points; far outside the texture where invalid.

    Returns
    -------
    map_x, map_y : ndarray, float32
        Column and row in ``tex.levels[0]`` [texels].
    """
    far = np.float32(FAR_TEXELS)
    mx = (np.asarray(floor_x_m, np.float32) - np.float32(tex.x0_m)) / np.float32(tex.texel_m)
    my = (np.asarray(floor_y_m, np.float32) - np.float32(tex.y0_m)) / np.float32(tex.texel_m)
    mx = np.where(valid, mx - np.float32(0.5), far).astype(np.float32)
    my = np.where(valid, my - np.float32(0.5), far).astype(np.float32)
    return mx, my


FAR_TEXELS = 1.0e6
"""Texel coordinate standing in for rays that miss the floor (beyond the texture edge,
where the floor has the flat surround colour) [texels]."""


def sample_floor(tex: FloorTexture, map_x, map_y, level):
    """Colour of the floor seen by each pixel (trilinear mip-map filtering).

    Each pixel blends the two mip levels around its level: two ``cv2.remap`` calls on
    the level atlas and one ``cv2.blendLinear``. Coordinates are clamped into each
    level, so points beyond the texture take its edge colour (the plain surround).

    Parameters
    ----------
    tex : FloorTexture
    map_x, map_y : ndarray of shape (H, W), float32
        Level-0 texel coordinates from :func:`texel_coords`.
    level : ndarray of shape (H, W), float32
        Mip level from :func:`footprint_level`.

    Returns
    -------
    ndarray of shape (H, W, 3), uint8
    """
    top = tex.n_levels - 1
    lev = np.minimum(np.maximum(level, np.float32(0)), np.float32(top - 1e-3))
    l0 = np.floor(lev)
    frac = lev - l0
    scale = np.exp2(-l0)
    w0, h0 = np.float32(tex.width), np.float32(tex.height)
    out = []
    for sc in (scale, scale * np.float32(0.5)):
        ws = w0 * sc
        mx = np.minimum(np.maximum(map_x * sc, np.float32(0)), ws - np.float32(1))
        mx += np.float32(2) * (w0 - ws)
        my = np.minimum(np.maximum(map_y * sc, np.float32(0)), h0 * sc - np.float32(1))
        out.append(cv2.remap(tex.atlas, mx, my, cv2.INTER_LINEAR,
                             borderMode=cv2.BORDER_REPLICATE))
    return cv2.blendLinear(out[0], out[1], np.float32(1) - frac, frac)
