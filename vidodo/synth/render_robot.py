"""The robot for the synthetic renderer: boxes and marker plates hit by viewing rays.

Everything here works in the robot's body frame (x forward, y left, z up, origin on
the floor under the reference point). The chassis is a box; a marker is a horizontal
plate facing up (the printed marker plus a white quiet zone); a marker above the
chassis stands on a thin square mast. Rays arrive already expressed in the body frame
(origin per sample and sensor row, direction per sample and pixel); :func:`cast` finds
the nearest surface per ray and its lit grey level, :func:`resolve` averages the
samples of each pixel into a colour and the share of samples that saw the floor.

Lighting: an ambient share plus one distant light (Lambert's cosine law), normalised so
that an upward face has brightness 1 (the floor texture is what an upward face looks
like under the same light).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from ..errors import InputError
from ..profiles import RobotProfile
from .render_floor import plate_modules

__all__ = ["RobotParts", "robot_parts", "part_corners", "shadow_corners", "face_brightness",
           "floor_light", "cast", "resolve", "CHASSIS_BGR", "MAST_BGR", "MAST_SIDE_M"]

CHASSIS_BGR = (150.0, 96.0, 52.0)
"""Albedo of the robot's chassis (a blue plastic) as an upward face shows it."""
MAST_BGR = (45.0, 45.0, 48.0)
"""Albedo of a marker mast (dark metal)."""
MAST_SIDE_M = 0.02
"""Side of a square marker mast [m]."""
LIGHT_DIR = np.array([0.35, 0.50, 0.79]) / np.linalg.norm([0.35, 0.50, 0.79])
"""Direction towards the main light in the floor frame (above, from +x +y)."""
AMBIENT = 0.45
"""Share of light that reaches every face whatever its direction."""
SHADOW_DEPTH = 0.35
"""Default contact-shadow darkening at the chassis edge (chosen for looks)."""
SHADOW_RADIUS_M = 0.03
"""Contact-shadow fall-off distance [m] (chosen for looks)."""


@dataclass(frozen=True)
class Box:
    """An axis-aligned box in the body frame."""

    lo: tuple
    """Lower corner (x, y, z) [m]."""
    hi: tuple
    """Upper corner (x, y, z) [m]."""
    material: int
    """Index into :attr:`RobotParts.albedos` (1-based; 0 is the floor)."""


@dataclass(frozen=True)
class Plate:
    """A horizontal marker plate facing up."""

    x_m: float
    y_m: float
    z_m: float
    yaw_rad: float
    """Marker x axis from body +x [rad]."""
    half_m: float
    """Half side of the plate including the quiet zone [m]."""
    module_m: float
    """Side of one marker module [m]."""
    modules: np.ndarray
    """Grey level per module, row 0 at the printed top, shape (m, m), float32."""


@dataclass(frozen=True)
class RobotParts:
    """The robot as boxes and marker plates in its body frame."""

    boxes: tuple
    plates: tuple
    albedos: tuple
    """BGR albedo per material 1, 2, ... (the plates use material ``len(albedos)``)."""
    half_length_m: float = 0.0
    """Half the chassis length (its footprint on the floor) [m]."""
    half_width_m: float = 0.0
    """Half the chassis width [m]."""
    shadow_depth: float = 0.0
    """Darkening of the floor right at the chassis edge (0: no contact shadow)."""
    shadow_radius_m: float = SHADOW_RADIUS_M
    """Distance over which the contact shadow fades by 1/e [m]."""


def robot_parts(robot: RobotProfile, quiet_modules: int = 1,
                shadow_depth: float = SHADOW_DEPTH) -> RobotParts:
    """Chassis box, masts and marker plates of a robot, in its body frame.

    The chassis spans ``[-L/2, L/2] x [-W/2, W/2] x [0, H]``. Each marker is a plate
    at height ``z_m`` with a white quiet zone of ``quiet_modules`` modules; a marker
    higher than the chassis stands on a square mast from the chassis top. The floor
    around the chassis is darkened by ``shadow_depth * exp(-d / SHADOW_RADIUS_M)`` at
    distance ``d`` from its footprint (ambient occlusion under a robot).
    """
    hl, hw = 0.5 * robot.length_m, 0.5 * robot.width_m
    boxes = [Box((-hl, -hw, 0.0), (hl, hw, robot.height_m), 1)]
    plates = []
    for m in robot.markers:
        try:
            modules = plate_modules(m.family, m.id, quiet_modules)
        except (AttributeError, cv2.error):
            raise InputError(
                f"robot profile: marker id {m.id} family {m.family!r} is not a cv2.aruco "
                "dictionary or the id is out of range; use e.g. DICT_4X4_50"
            ) from None
        n = modules.shape[0]
        module = m.size_m / (n - 2 * quiet_modules)
        if m.z_m < robot.height_m - 1e-6 and abs(m.x_m) < hl and abs(m.y_m) < hw:
            raise InputError(
                f"robot profile: marker id {m.id} at z_m = {m.z_m} would be inside the "
                f"chassis (height_m = {robot.height_m}); put it at or above the top"
            )
        plates.append(Plate(m.x_m, m.y_m, m.z_m, m.yaw_rad, 0.5 * n * module, module,
                            modules))
        if m.z_m > robot.height_m + 1e-4:
            s = 0.5 * MAST_SIDE_M
            boxes.append(Box((m.x_m - s, m.y_m - s, robot.height_m),
                             (m.x_m + s, m.y_m + s, m.z_m - 1e-4), 2))
    return RobotParts(tuple(boxes), tuple(plates), (CHASSIS_BGR, MAST_BGR, (1.0, 1.0, 1.0)),
                      hl, hw, float(shadow_depth))


def shadow_corners(parts: RobotParts) -> np.ndarray:
    """Body-frame corners of the floor patch the contact shadow darkens, shape (4, 3) [m]."""
    reach = 4.0 * parts.shadow_radius_m if parts.shadow_depth > 0 else 0.0
    hl, hw = parts.half_length_m + reach, parts.half_width_m + reach
    return np.array([[-hl, -hw, 0.0], [-hl, hw, 0.0], [hl, -hw, 0.0], [hl, hw, 0.0]])


def part_corners(part) -> np.ndarray:
    """Body-frame corners bounding one box or plate, ndarray of shape (8, 3) [m]."""
    if isinstance(part, Box):
        lo, hi = part.lo, part.hi
    else:
        r = part.half_m * math.sqrt(2.0)
        lo = (part.x_m - r, part.y_m - r, part.z_m)
        hi = (part.x_m + r, part.y_m + r, part.z_m)
    return np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1])
                     for z in (lo[2], hi[2])])


def face_brightness(heading_rad):
    """Brightness of the faces -x, +x, -y, +y (side faces) for body headings.

    Parameters
    ----------
    heading_rad : ndarray
        Body heading per sample [rad].

    Returns
    -------
    ndarray of shape (4,) + heading.shape, float32
        Relative to an upward face (brightness 1).
    """
    top = AMBIENT + (1 - AMBIENT) * LIGHT_DIR[2]
    out = []
    for phi in (math.pi, 0.0, -0.5 * math.pi, 0.5 * math.pi):
        ndl = LIGHT_DIR[0] * np.cos(heading_rad + phi) + LIGHT_DIR[1] * np.sin(heading_rad + phi)
        out.append((AMBIENT + (1 - AMBIENT) * np.maximum(ndl, 0.0)) / top)
    return np.stack(out).astype(np.float32)


def cast(parts: RobotParts, origin, direction, inverse, sides, windows):
    """Nearest robot surface along each ray and its lit grey level.

    Parameters
    ----------
    parts : RobotParts
    origin : tuple of 3 ndarray of shape (K, R, 1), float32
        Ray origin (the camera centre) in the body frame per sample and row [m].
    direction : tuple of 3 ndarray of shape (K, R, C), float32
        Ray direction in the body frame per sample and pixel.
    inverse : tuple of 3 ndarray of shape (K, R, C), float32
        ``1 / direction`` (inf where a component is 0).
    sides : ndarray of shape (4, K, R, 1), float32
        Brightness of faces -x, +x, -y, +y from :func:`face_brightness`.
    windows : list of (slice, slice)
        Per part (boxes, then plates) the rows and columns where it can appear.

    Returns
    -------
    material : ndarray of shape (K, R, C), uint8
        0 where the ray meets no part (the floor), else the part's material.
    shade : ndarray of shape (K, R, C), float32
        Brightness (boxes) or lit grey level (plates) per sample.
    """
    ox, oy, oz = origin
    shape = direction[0].shape
    best = np.full(shape, np.inf, np.float32)
    shade = np.zeros(shape, np.float32)
    material = np.zeros(shape, np.uint8)
    n_box = len(parts.boxes)
    for j, part in enumerate(parts.boxes + parts.plates):
        rs, cs = windows[j]
        if rs.stop <= rs.start or cs.stop <= cs.start:
            continue
        win = (slice(None), rs, cs)
        o = (ox[:, rs], oy[:, rs], oz[:, rs])
        d = tuple(a[win] for a in direction)
        inv = tuple(a[win] for a in inverse)
        if j < n_box:
            t, value = _hit_box(part, o, inv, sides[:, :, rs])
        else:
            t, value = _hit_plate(part, o, d, inv[2])
        # a plate lying flush on a box top wins the tie (float rounding of two planes)
        if j < n_box:
            hit = t < best[win]
        else:
            hit = (t <= best[win] * np.float32(1 + 1e-5)) & (t < np.inf)
        np.copyto(best[win], t, where=hit)
        np.copyto(shade[win], value, where=hit)
        np.copyto(material[win], part.material if j < n_box else len(parts.albedos),
                  where=hit)
    return material, shade


def floor_light(parts: RobotParts, o, d):
    """Brightness of the floor where each ray meets it: 1, less in the contact shadow.

    Parameters
    ----------
    parts : RobotParts
    o : tuple of 3 ndarray
        Ray origin in the body frame [m].
    d : tuple of 3 ndarray
        Ray direction in the body frame (pointing down).
    """
    t = -o[2] / d[2]
    ex = np.maximum(np.abs(o[0] + t * d[0]) - np.float32(parts.half_length_m), np.float32(0))
    ey = np.maximum(np.abs(o[1] + t * d[1]) - np.float32(parts.half_width_m), np.float32(0))
    dist = np.sqrt(ex * ex + ey * ey)
    return np.float32(1) - np.float32(parts.shadow_depth) * np.exp(
        dist * np.float32(-1.0 / parts.shadow_radius_m))


def _hit_box(box: Box, o, inv, sides):
    """Slab test (Kay and Kajiya 1986): entry distance (inf on a miss) and brightness."""
    nears = []
    tn = tf = None
    for a in range(3):
        t1 = (box.lo[a] - o[a]) * inv[a]
        t2 = (box.hi[a] - o[a]) * inv[a]
        near = np.minimum(t1, t2)
        far = np.maximum(t1, t2)
        nears.append(near)
        tn = near if tn is None else np.maximum(tn, near)
        tf = far if tf is None else np.minimum(tf, far)
    miss = (tn > tf) | (tn <= 0)
    tn[miss] = np.inf
    # the entry face faces the camera: which one depends only on the camera position
    value = np.ones(tn.shape, np.float32)
    side_x = np.where(o[0] > box.hi[0], sides[1], sides[0])
    side_y = np.where(o[1] > box.hi[1], sides[3], sides[2])
    np.copyto(value, side_y, where=tn == nears[1])
    np.copyto(value, side_x, where=tn == nears[0])
    return tn, value


def _hit_plate(plate: Plate, o, d, inv_z):
    """Ray meets the plate's plane inside its square: distance and grey level."""
    t = (plate.z_m - o[2]) * inv_z
    px = (o[0] - plate.x_m) + t * d[0]
    py = (o[1] - plate.y_m) + t * d[1]
    if plate.yaw_rad:
        c, s = math.cos(plate.yaw_rad), math.sin(plate.yaw_rad)
        px, py = c * px + s * py, c * py - s * px
    m = plate.modules.shape[0]
    col = (px + plate.half_m) * (1.0 / plate.module_m)
    row = (plate.half_m - py) * (1.0 / plate.module_m)
    inside = (col >= 0) & (col < m) & (row >= 0) & (row < m) & (t > 0)
    top = np.float32(m - 1)
    idx = (np.minimum(np.maximum(row, 0), top).astype(np.int32) * m
           + np.minimum(np.maximum(col, 0), top).astype(np.int32))
    value = np.take(plate.modules.ravel(), idx)
    t = np.where(inside, t, np.float32(np.inf))
    return t, value


def resolve(parts: RobotParts, material, shade):
    """Average the samples of each pixel.

    Returns
    -------
    floor_share : ndarray of shape (R, C, 1), float32
        Share of samples that saw the floor.
    colour : ndarray of shape (R, C, 3), float32
        Sum over the robot's samples of their colour, divided by the sample count.
    """
    k = material.shape[0]
    floor_share = (material == 0).mean(axis=0, dtype=np.float32)[..., None]
    colour = np.zeros(material.shape[1:] + (3,), np.float32)
    for m, albedo in enumerate(parts.albedos, start=1):
        sel = material == m
        if not sel.any():
            continue
        s = (shade * sel).sum(axis=0) / k
        colour += s[..., None] * np.asarray(albedo, np.float32)
    return floor_share, colour
