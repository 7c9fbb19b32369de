"""The registered tile grid and field outline drawn over a frame.

Every seam of the field profile is sampled along its length on the floor and projected
through the frame's registration (``FrameRegistration.floor_to_image`` of
:mod:`vidodo.registration.frame`, so lens distortion and a rolling shutter bend it as in
the footage). A wrong floor
mapping is then visible at a glance: the drawn lines leave the seams.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

__all__ = ["GRID_BGR", "OUTLINE_BGR", "grid_polylines_px", "draw_grid_overlay",
           "draw_grid_lines", "GridLayer", "grid_layer"]

GRID_BGR = (255, 0, 255)
"""Colour of the tile seams drawn (magenta: rare on floors and robots)."""
OUTLINE_BGR = (255, 0, 255)
"""Colour of the field outline (drawn thicker)."""


def grid_polylines_px(reg, field, samples: int = 48):
    """The seams of ``field`` in the image of ``reg``.

    Returns
    -------
    list of (ndarray (K, 2), bool)
        Pixel polylines [px] (points that do not project are left out) and whether the
        line is on the field outline.
    """
    if reg is None or not getattr(reg, "ok", False):
        return []
    sx, sy = field.size_m
    xs = np.arange(field.tiles_x + 1) * field.tile_size_m
    ys = np.arange(field.tiles_y + 1) * field.tile_size_m
    # each seam from end to end on the floor, and whether it is on the outline
    ends = [((x, 0.0), (x, sy), k in (0, field.tiles_x)) for k, x in enumerate(xs)]
    ends += [((0.0, y), (sx, y), k in (0, field.tiles_y)) for k, y in enumerate(ys)]
    t = np.linspace(0.0, 1.0, samples)[:, None]
    out = [(np.asarray(a) + t * (np.asarray(b) - np.asarray(a)), border)
           for a, b, border in ends]
    # every seam in one projection, then cut back into lines
    px_all = np.asarray(reg.floor_to_image(np.vstack([pts for pts, _ in out])),
                        float).reshape(-1, 2)
    lines = []
    for k, (_pts, border) in enumerate(out):
        px = px_all[k * samples:(k + 1) * samples]
        good = np.all(np.isfinite(px), axis=1) & np.all(np.abs(px) < 1e5, axis=1)
        if good.sum() >= 2:
            lines.append((px[good], border))
    return lines


def draw_grid_overlay(img, reg, field, *, alpha: float = 0.35, thickness: int = 1,
                      colour=GRID_BGR, outline_colour=OUTLINE_BGR, scale: float = 1.0):
    """Draw the registered grid on ``img`` in place (blended by ``alpha``); returns it.

    ``scale`` is the size of ``img`` relative to the frame ``reg`` belongs to (for a
    shrunken copy); pixel centres stay at integers.
    """
    return draw_grid_lines(img, grid_polylines_px(reg, field), alpha=alpha,
                           thickness=thickness, colour=colour,
                           outline_colour=outline_colour, scale=scale)


def draw_grid_lines(img, lines, *, alpha: float = 0.35, thickness: int = 1,
                    colour=GRID_BGR, outline_colour=OUTLINE_BGR, scale: float = 1.0):
    """:func:`draw_grid_overlay` with the polylines of :func:`grid_polylines_px` given
    (a replay draws the same registration's grid on many frames)."""
    lines = [((px + 0.5) * scale - 0.5, border) for px, border in lines]
    if not lines:
        return img
    layer = img.copy() if alpha < 1.0 else img
    for px, border in lines:
        arr = np.round(px * 16).astype(np.int32).reshape(-1, 1, 2)
        cv2.polylines(layer, [arr], False, outline_colour if border else colour,
                      thickness + (1 if border else 0), cv2.LINE_AA, shift=4)
    if alpha < 1.0:
        cv2.addWeighted(layer, alpha, img, 1.0 - alpha, 0.0, dst=img)
    return img


@dataclass(frozen=True)
class GridLayer:
    """A grid blend of :func:`draw_grid_lines` prepared once for many frames of one size
    (a replay draws one registration's grid on many frames): only the pixels the lines
    touch are blended, ``frame * keep + add`` there."""

    index: np.ndarray
    """Flat indices of the bytes (pixel x 3 + channel) the lines touch, (K,)."""
    keep: np.ndarray
    """Weight of the frame's own value, ``1 - alpha * coverage``, in 1/256, (K,)."""
    add: np.ndarray
    """Line colour times ``alpha * coverage`` in 1/256, plus 1/2 for rounding, (K,)."""

    def draw(self, img):
        """Blend the grid into the BGR image ``img`` of the layer's size, in place."""
        flat = img.reshape(-1)
        flat[self.index] = (flat[self.index] * self.keep + self.add) >> 8
        return img


def grid_layer(lines, shape, *, alpha: float = 0.35, thickness: int = 1,
               colour=GRID_BGR, outline_colour=OUTLINE_BGR) -> GridLayer:
    """:func:`draw_grid_lines`'s blend of ``lines`` for images of ``shape``, prepared.

    The anti-aliased lines are drawn once on black (their colour times their coverage)
    and once as coverage alone; blending over a frame is then ``frame (1 - alpha a) +
    alpha c a`` on the touched pixels, which is what drawing over the frame and
    blending gives (lines drawn over lines may differ by a level where they cross).
    """
    h, w = shape[:2]
    paint = np.zeros((h, w, 3), np.uint8)
    cover = np.zeros((h, w), np.uint8)
    for px, border in lines:
        arr = np.round(px * 16).astype(np.int32).reshape(-1, 1, 2)
        width = thickness + (1 if border else 0)
        cv2.polylines(paint, [arr], False, outline_colour if border else colour, width,
                      cv2.LINE_AA, shift=4)
        cv2.polylines(cover, [arr], False, 255, width, cv2.LINE_AA, shift=4)
    index = (3 * np.flatnonzero(cover)[:, None] + np.arange(3)).ravel()
    a = np.repeat(cover.ravel()[index[::3] // 3] / 255.0, 3)
    keep = np.round(256.0 * (1.0 - alpha * a)).astype(np.uint16)
    add = np.round(256.0 * alpha * paint.reshape(-1)[index] + 128.0).astype(np.uint16)
    return GridLayer(index, keep, add)
