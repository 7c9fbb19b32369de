"""The registered tile grid drawn over a frame (the preview image)."""

from __future__ import annotations

import cv2
import numpy as np

from ...profiles import FieldProfile

__all__ = ["draw_registration"]


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
