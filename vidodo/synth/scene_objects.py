"""Things standing on the floor of a randomised scene: wall sections, game pieces,
other robots (boxes) and balls, ray cast in the floor frame."""

from __future__ import annotations

import math

import numpy as np

from .scene_spec import Ball, Box

__all__ = ["cast_objects"]

LIGHT_DIR = np.array([0.35, 0.25, 1.0]) / math.sqrt(0.35**2 + 0.25**2 + 1.0)
"""Direction towards the scene light (mostly from above)."""


def _box_hit(origin, d, box: Box):
    """Ray parameter of the first hit on a box and the lighting of the face hit."""
    c, s = math.cos(box.yaw_rad), math.sin(box.yaw_rad)
    ox, oy = origin[0] - box.x_m, origin[1] - box.y_m
    lo = (c * ox + s * oy, -s * ox + c * oy, origin[2])
    ld = (c * d[0] + s * d[1], -s * d[0] + c * d[1], d[2])
    hx, hy, hz = box.half_m
    bounds = ((-hx, hx), (-hy, hy), (0.0, 2 * hz))
    near = []
    far = []
    with np.errstate(divide="ignore", invalid="ignore"):
        for k in range(3):
            inv = 1.0 / ld[k]
            t1 = (bounds[k][0] - lo[k]) * inv
            t2 = (bounds[k][1] - lo[k]) * inv
            near.append(np.minimum(t1, t2))
            far.append(np.maximum(t1, t2))
    near = np.stack(near)
    near = np.nan_to_num(near, nan=-np.inf)
    tmin = near.max(axis=0)
    tmax = np.nan_to_num(np.minimum(np.minimum(far[0], far[1]), far[2]), nan=np.inf)
    hit = (tmax >= tmin) & (tmin > 0)
    axis = near.argmax(axis=0)
    # face normal in the floor frame: the axis whose slab was entered last
    sign = -np.sign(np.choose(axis, ld))
    nx = np.where(axis == 0, c * sign, np.where(axis == 1, -s * sign, 0.0))
    ny = np.where(axis == 0, s * sign, np.where(axis == 1, c * sign, 0.0))
    nz = np.where(axis == 2, sign, 0.0)
    light = 0.45 + 0.55 * np.maximum(nx * LIGHT_DIR[0] + ny * LIGHT_DIR[1] + nz * LIGHT_DIR[2],
                                     0)
    return np.where(hit, tmin, np.inf), light


def _ball_hit(origin, d, ball: Ball):
    oc = (origin[0] - ball.x_m, origin[1] - ball.y_m, origin[2] - ball.radius_m)
    a = d[0] * d[0] + d[1] * d[1] + d[2] * d[2]
    b = 2 * (d[0] * oc[0] + d[1] * oc[1] + d[2] * oc[2])
    cc = oc[0] ** 2 + oc[1] ** 2 + oc[2] ** 2 - ball.radius_m**2
    disc = b * b - 4 * a * cc
    with np.errstate(invalid="ignore"):
        t = (-b - np.sqrt(disc)) / (2 * a)
    hit = (disc >= 0) & (t > 0)
    n = [(oc[k] + t * d[k]) / ball.radius_m for k in range(3)]
    light = 0.4 + 0.6 * np.maximum(n[0] * LIGHT_DIR[0] + n[1] * LIGHT_DIR[1]
                                   + n[2] * LIGHT_DIR[2], 0)
    return np.where(hit, t, np.inf), light


def cast_objects(origin, d, boxes, balls):
    """Nearest object along rays ``origin + t * d``.

    Parameters
    ----------
    origin : sequence of 3 float
        Camera centre in the floor frame [m].
    d : tuple of 3 ndarray
        Ray directions (any length; ``t`` is in units of it).
    boxes, balls : sequence of Box, Ball

    Returns
    -------
    t : ndarray
        Ray parameter of the nearest hit, inf where none.
    bgr : ndarray of shape t.shape + (3,), float32
        Lit colour of the hit (undefined where none).
    """
    t_best = np.full(np.shape(d[0]), np.inf)
    bgr = np.zeros(np.shape(d[0]) + (3,), np.float32)
    for obj in list(boxes) + list(balls):
        t, light = (_box_hit if isinstance(obj, Box) else _ball_hit)(origin, d, obj)
        closer = t < t_best
        if not closer.any():
            continue
        t_best = np.where(closer, t, t_best)
        col = np.asarray(obj.bgr, np.float32) * light[..., None].astype(np.float32)
        bgr = np.where(closer[..., None], col, bgr)
    return t_best, bgr
