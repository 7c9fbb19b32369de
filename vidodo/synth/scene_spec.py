"""Randomised floor-and-camera scenes: what a scene holds, drawn from one seed.

A scene is one still picture of a tiled field as a team's phone might see it: the
floor's look (tile kind, seams, colours, tape, printed art, surround, walls, pieces,
other robots, shadows, light), the camera (height, side or corner, tilt, orientation,
lens, resolution) and the picture's faults (blur, noise, flicker bands, compression).
:func:`draw_scene` draws every item from the seed; :mod:`vidodo.synth.scenes` renders
it and works out its truth. The numbers are scene data (invented ranges chosen to span
what teams film), not measurements.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..profiles import CameraProfile, FieldProfile

__all__ = ["Box", "Ball", "FloorLook", "CameraSetup", "Picture", "SceneSpec", "draw_scene",
           "look_pose", "origin_hint",
           "SPEC_CATEGORIES"]

SPEC_CATEGORIES = (
    "teeth", "gaps", "low_contrast_seams", "light_seams", "alternating_colours", "worn_tiles",
    "tape_lines", "printed_art", "tiles_beyond_field", "walls", "pieces", "robots",
    "shadows", "light_gradient", "flicker", "camera_low", "camera_high", "from_side",
    "from_corner", "tilted", "portrait", "narrow_view", "strong_distortion", "blur",
    "noise", "jpeg", "h264", "lens_profile", "res_small", "res_large",
)
"""Categories decided by the drawn parameters (the view categories, such as the origin
being out of view, come from the truth in :mod:`vidodo.synth.scenes`)."""


@dataclass(frozen=True)
class Box:
    """A box standing on the floor (wall section, cube, robot)."""

    x_m: float
    y_m: float
    yaw_rad: float
    half_m: tuple[float, float, float]
    """Half length, half width, height / 2 [m] (the box spans z 0 .. 2 * half_m[2])."""
    bgr: tuple[float, float, float]


@dataclass(frozen=True)
class Ball:
    """A ball lying on the floor."""

    x_m: float
    y_m: float
    radius_m: float
    bgr: tuple[float, float, float]


@dataclass(frozen=True)
class FloorLook:
    """How the floor looks (every length in metres, colours BGR 0-255)."""

    tile_a_bgr: tuple[float, float, float]
    tile_b_bgr: tuple[float, float, float]
    """Second colour: alternating tiles (checkerboard) when ``alternating``."""
    alternating: bool
    tile_gain_sd: float
    """Per-tile brightness spread (relative)."""
    wear: float
    """Amplitude of worn, lighter patches (relative, 0: none)."""
    seam_width_m: float
    seam_depth: float
    """Relative change of brightness in a seam: > 0 darker, < 0 lighter."""
    teeth_pitch_m: float
    """Period of interlocking teeth along a seam (0: straight seams)."""
    teeth_depth_m: float
    beyond_tiles: int
    """Tile rows continuing beyond the field on every side (0: plain surround)."""
    beyond_bgr: tuple[float, float, float]
    surround_bgr: tuple[float, float, float]
    grain: float
    """Fine surface texture amplitude [grey levels]."""
    tapes: tuple[tuple[float, float, float, float, float, float, float, float], ...]
    """Tape strips: x0, y0, x1, y1, width [m], then BGR."""
    arts: tuple[tuple[float, ...], ...]
    """Printed art: x0, y0, x1, y1 [m], kind (0 stripes, 1 rings, 2 discs), period [m],
    angle [rad], then two BGR colours."""
    shadows: tuple[tuple[float, float, float, float, float, float], ...]
    """Soft shadows: centre x, y, half axes a, b [m], angle [rad], depth (0-1)."""
    gradient: tuple[float, float, float]
    """Light gain across the floor: gx, gy [1/m] around the field centre, and overall
    gain."""


@dataclass(frozen=True)
class CameraSetup:
    """Where the camera stands and how it looks."""

    camera: CameraProfile
    rvec: tuple[float, float, float]
    tvec: tuple[float, float, float]
    height_m: float
    placement: str
    """'side' or 'corner'."""
    roll_deg: float


@dataclass(frozen=True)
class Picture:
    """Faults of the picture."""

    blur_px: float
    """Gaussian blur sigma [px]."""
    noise_sigma: float
    """Sensor noise [grey levels]."""
    flicker: tuple[float, float, float]
    """Relative amplitude, period [rows], phase [rad] of mains flicker bands."""
    compression: str
    """'png', 'jpeg' or 'h264'."""
    quality: int
    """JPEG quality (1-100) or H.264 constant rate factor."""


@dataclass(frozen=True)
class SceneSpec:
    """Everything drawn for one scene."""

    seed: int
    field: FieldProfile
    look: FloorLook
    setup: CameraSetup
    picture: Picture
    boxes: tuple[Box, ...]
    balls: tuple[Ball, ...]
    lens_profile: bool
    """Whether the user has a lens profile (the true lens) for this scene."""
    categories: tuple[str, ...]
    origin_hint_margin_px: float
    """How much lower in the image the near edge is than the next lowest field edge
    (mean row of its points in front of the camera) [px]: small means a user could
    have named either edge near."""


def _colour(rng, dark=40.0, bright=200.0):
    """A tile or object colour: a grey or a saturated tint, BGR."""
    level = rng.uniform(dark, bright)
    if rng.random() < 0.45:
        return (level, level * rng.uniform(0.97, 1.03), level * rng.uniform(0.97, 1.05))
    tint = rng.dirichlet([1.0, 1.0, 1.0]) * 3.0
    return tuple(float(np.clip(level * (0.35 + 0.65 * t), 8, 250)) for t in tint)


def _tiles(rng):
    """Tile grid, colours, seams and teeth."""
    tiles_x, tiles_y = int(rng.integers(3, 9)), int(rng.integers(3, 9))
    tile = float(rng.choice([0.3048, 0.5, 0.6, 0.6096, rng.uniform(0.3, 0.65)]))
    a = _colour(rng)
    alternating = rng.random() < 0.3
    b = _colour(rng) if alternating else a
    kind = rng.choice(["plain", "teeth", "gaps"], p=[0.4, 0.35, 0.25])
    width = rng.uniform(0.0015, 0.004) if kind != "gaps" else rng.uniform(0.004, 0.009)
    depth = rng.uniform(0.15, 0.5) if rng.random() < 0.7 else rng.uniform(0.02, 0.08)
    if rng.random() < 0.15:
        depth = -0.6 * depth
    pitch = rng.uniform(0.04, 0.09) if kind == "teeth" else 0.0
    teeth_depth = rng.uniform(0.006, 0.018) if kind == "teeth" else 0.0
    return dict(tiles=(tiles_x, tiles_y, tile), a=a, b=b, alternating=bool(alternating),
                width=float(width), depth=float(depth), pitch=float(pitch),
                teeth_depth=float(teeth_depth))


def _decor(rng, size, tile):
    """Tape strips, printed art and shadows on the floor."""
    sx, sy = size
    tapes = []
    if rng.random() < 0.35:
        for _ in range(int(rng.integers(1, 5))):
            if rng.random() < 0.5:  # parallel to the tiles, off the seams
                along_x = rng.random() < 0.5
                c = (rng.integers(0, 6) + rng.uniform(0.15, 0.85)) * tile
                p0, p1 = ((0.0, c), (sx, c)) if along_x else ((c, 0.0), (c, sy))
            else:
                p0 = (rng.uniform(0, sx), rng.uniform(0, sy))
                p1 = (rng.uniform(0, sx), rng.uniform(0, sy))
            tapes.append((*p0, *p1, rng.uniform(0.02, 0.05), *_colour(rng, 120, 250)))
    arts = []
    if rng.random() < 0.3:
        for _ in range(int(rng.integers(1, 4))):
            nx, ny = int(rng.integers(1, 3)), int(rng.integers(1, 3))
            ix, iy = int(rng.integers(0, 6)), int(rng.integers(0, 6))
            arts.append((ix * tile, iy * tile, (ix + nx) * tile, (iy + ny) * tile,
                         float(rng.integers(0, 3)), rng.uniform(0.03, 0.2),
                         rng.uniform(0, math.pi), *_colour(rng, 20, 250),
                         *_colour(rng, 20, 250)))
    shadows = []
    if rng.random() < 0.35:
        for _ in range(int(rng.integers(1, 4))):
            shadows.append((rng.uniform(-0.3, sx + 0.3), rng.uniform(-0.3, sy + 0.3),
                            rng.uniform(0.15, 0.8), rng.uniform(0.1, 0.5),
                            rng.uniform(0, math.pi), rng.uniform(0.2, 0.6)))
    gradient = (0.0, 0.0, rng.uniform(0.8, 1.15))
    if rng.random() < 0.4:
        g = rng.uniform(0.1, 0.35) / max(sx, sy) * 2.0
        ang = rng.uniform(0, 2 * math.pi)
        gradient = (g * math.cos(ang), g * math.sin(ang), gradient[2])
    return tuple(tapes), tuple(arts), tuple(shadows), gradient


def _objects(rng, size, walls):
    """Wall sections, game pieces and other robots."""
    sx, sy = size
    boxes = []
    if walls:
        h = rng.uniform(0.08, 0.3)
        th = rng.uniform(0.02, 0.05)
        col = _colour(rng)
        hz = 0.5 * h
        boxes += [Box(0.5 * sx, -0.5 * th, 0.0, (0.5 * sx + th, 0.5 * th, hz), col),
                  Box(0.5 * sx, sy + 0.5 * th, 0.0, (0.5 * sx + th, 0.5 * th, hz), col),
                  Box(-0.5 * th, 0.5 * sy, 0.0, (0.5 * th, 0.5 * sy, hz), col),
                  Box(sx + 0.5 * th, 0.5 * sy, 0.0, (0.5 * th, 0.5 * sy, hz), col)]
    balls = []
    if rng.random() < 0.4:
        for _ in range(int(rng.integers(1, 13))):
            x, y = rng.uniform(0, sx), rng.uniform(0, sy)
            if rng.random() < 0.5:
                balls.append(Ball(x, y, rng.uniform(0.035, 0.09), _colour(rng, 60, 250)))
            else:
                s = rng.uniform(0.025, 0.08)
                boxes.append(Box(x, y, rng.uniform(0, math.pi), (s, s, s),
                                 _colour(rng, 60, 250)))
    n_robots = int(rng.integers(1, 4)) if rng.random() < 0.3 else 0
    for _ in range(n_robots):
        boxes.append(Box(rng.uniform(0.2, sx - 0.2), rng.uniform(0.2, sy - 0.2),
                         rng.uniform(0, 2 * math.pi),
                         (rng.uniform(0.15, 0.23), rng.uniform(0.15, 0.23),
                          rng.uniform(0.07, 0.22)), _colour(rng, 20, 220)))
    return tuple(boxes), tuple(balls), n_robots


def look_pose(centre_m, aim_m, roll_rad):
    """Floor -> camera pose of a camera at ``centre_m`` looking at ``aim_m``.

    The image x axis is horizontal before the roll (about the viewing axis) is applied.

    Returns
    -------
    rvec, tvec : ndarray of shape (3,)
        OpenCV convention, ``X_cam = R X_floor + t``.
    """
    import cv2

    c = np.asarray(centre_m, float)
    f = np.asarray(aim_m, float) - c
    f /= np.linalg.norm(f)
    right = np.cross(f, [0.0, 0.0, 1.0])
    right /= np.linalg.norm(right)
    down = np.cross(f, right)
    cr, sr = math.cos(roll_rad), math.sin(roll_rad)
    x_axis = cr * right + sr * down
    y_axis = -sr * right + cr * down
    rot = np.array([x_axis, y_axis, f])
    return cv2.Rodrigues(rot)[0].ravel(), -rot @ c


def _radial_invertible(k1, k2, corner_radius):
    """Whether r (1 + k1 r^2 + k2 r^4) grows with r until it passes the picture corner's
    normalised radius (a lens a renderer's ray table can invert)."""
    r = np.linspace(0.0, 3.0 * corner_radius, 3001)
    rd = r * (1 + k1 * r**2 + k2 * r**4)
    beyond = np.nonzero(rd > 1.02 * corner_radius)[0]
    if len(beyond) == 0:
        return False
    return bool(np.all(np.diff(rd[: beyond[0] + 1]) > 0))


def _camera(rng, size, narrow):
    """Camera placement (side or corner, 0.8-3 m up), lens and resolution."""
    sx, sy = size
    long_side, short_side = [(640, 360), (960, 540), (1280, 720), (1920, 1080),
                             (1440, 1080), (800, 600)][int(rng.integers(0, 6))]
    portrait = rng.random() < 0.25
    w, h = (short_side, long_side) if portrait else (long_side, short_side)
    hfov = rng.uniform(18.0, 30.0) if narrow else rng.uniform(45.0, 80.0)
    f = 0.5 * long_side / math.tan(math.radians(0.5 * hfov))
    k1 = rng.uniform(-0.25, 0.08) if rng.random() < 0.3 else rng.uniform(-0.06, 0.03)
    k2 = rng.uniform(-0.02, 0.04) * (abs(k1) > 0.1)
    while not _radial_invertible(k1, k2, math.hypot(w, h) / (2 * f)):
        k1, k2 = 0.5 * k1, 0.5 * k2
    dist = (k1, k2, 0.0, 0.0, 0.0)
    cam = CameraProfile(w, h, f, f * rng.uniform(0.998, 1.002), 0.5 * (w - 1) +
                        rng.uniform(-0.02, 0.02) * w, 0.5 * (h - 1) + rng.uniform(-0.02, 0.02)
                        * h, tuple(float(d) for d in dist))
    height = rng.uniform(0.8, 3.0)
    centre_xy = np.array([0.5 * sx, 0.5 * sy])
    placement = "corner" if rng.random() < 0.35 else "side"
    back = rng.uniform(-0.2, 1.5)
    if placement == "side":
        side = int(rng.integers(0, 4))
        normal = np.array([[0, -1], [0, 1], [-1, 0], [1, 0]][side], float)
        along = np.array([normal[1], -normal[0]])
        half = 0.5 * (sx if side < 2 else sy)
        edge_dist = 0.5 * (sy if side < 2 else sx)
        pos = centre_xy + normal * (edge_dist + back) + along * rng.uniform(-half, half)
    else:
        corner = np.array([[0, 0], [sx, 0], [sx, sy], [0, sy]][int(rng.integers(0, 4))], float)
        out = (corner - centre_xy) / np.linalg.norm(corner - centre_xy)
        pos = corner + out * back
    framed = not narrow and rng.random() < 0.4
    aim = centre_xy + rng.uniform(-0.45, 0.45, 2) * [sx, sy]
    if framed:
        aim = centre_xy + rng.uniform(-0.05, 0.05, 2) * [sx, sy]
    elif narrow or rng.random() < 0.15:  # look closer in: few rows in view
        aim = pos + rng.uniform(0.25, 0.6) * (aim - pos)
    roll = rng.uniform(-20, 20) if rng.random() < 0.3 else rng.uniform(-2, 2)
    if portrait:
        roll += 90.0 if rng.random() < 0.5 else -90.0
    away = (pos - centre_xy) / np.linalg.norm(pos - centre_xy)
    for _ in range(30):  # a framed view steps back until the whole field is in the picture
        rvec, tvec = look_pose([pos[0], pos[1], height], [aim[0], aim[1], 0.0],
                               math.radians(roll))
        if not framed or _field_in_picture(cam, rvec, tvec, size):
            break
        pos = pos + 0.25 * away
    return CameraSetup(cam, tuple(rvec), tuple(tvec), height, placement, roll), portrait


def origin_hint(size_m, setup: CameraSetup):
    """The field profile's ``origin_hint`` a user would write for this view.

    The near edge is the field edge lowest in the image (mean row of its points in
    front of the camera, pinhole projection); with right-handed floor axes and a
    camera above the floor, the edge it is fixes the hint (DEVELOPERS.md,
    ``origin_hint``).

    Returns
    -------
    hint : str
    margin_px : float
        Row difference to the second lowest edge [px].
    """
    import cv2

    sx, sy = size_m
    a = np.linspace(0.0, 1.0, 41)
    edges = {"near-left": (a * sx, 0 * a), "near-right": (0 * a, a * sy),
             "far-right": (a * sx, 0 * a + sy), "far-left": (0 * a + sx, a * sy)}
    rot = cv2.Rodrigues(np.asarray(setup.rvec, float))[0]
    low = {}
    for hint, (x, y) in edges.items():
        pts = np.column_stack([x, y, 0 * x])
        z = (pts @ rot.T + setup.tvec)[:, 2]
        front = pts[z > 0.05]
        if len(front) == 0:
            low[hint] = -np.inf
            continue
        uv = cv2.projectPoints(front, np.asarray(setup.rvec, float),
                               np.asarray(setup.tvec, float), setup.camera.matrix,
                               None)[0][:, 0]
        low[hint] = float(uv[:, 1].mean())
    order = sorted(low, key=low.get, reverse=True)
    return order[0], float(low[order[0]] - low[order[1]])


def _field_in_picture(cam: CameraProfile, rvec, tvec, size_m, margin=0.04):
    """Whether the four field corners project inside the picture (with a margin)."""
    import cv2

    sx, sy = size_m
    pts = np.array([[0, 0, 0], [sx, 0, 0], [sx, sy, 0], [0, sy, 0]], float)
    z = (pts @ cv2.Rodrigues(rvec)[0].T + tvec)[:, 2]
    if np.any(z < 0.1):
        return False
    uv = cv2.projectPoints(pts, rvec, tvec, cam.matrix, cam.dist_coeffs)[0][:, 0]
    mu, mv = margin * cam.width_px, margin * cam.height_px
    return bool(np.all((uv[:, 0] > mu) & (uv[:, 0] < cam.width_px - mu) & (uv[:, 1] > mv)
                       & (uv[:, 1] < cam.height_px - mv)))


def _picture(rng):
    blur = rng.uniform(0.9, 2.2) if rng.random() < 0.3 else rng.uniform(0.0, 0.6)
    noise = rng.uniform(5.0, 12.0) if rng.random() < 0.3 else rng.uniform(0.5, 3.0)
    flicker = (0.0, 100.0, 0.0)
    if rng.random() < 0.25:
        flicker = (rng.uniform(0.03, 0.12), rng.uniform(40, 300), rng.uniform(0, 2 * math.pi))
    kind = str(rng.choice(["png", "jpeg", "h264"], p=[0.3, 0.4, 0.3]))
    quality = int(rng.integers(30, 96)) if kind == "jpeg" else int(rng.integers(18, 36))
    return Picture(float(blur), float(noise), flicker, kind, quality)


def draw_scene(seed: int) -> SceneSpec:
    """Draw every item of one scene from ``seed`` (cheap: nothing is rendered).

    Parameters
    ----------
    seed : int
        Non-negative scene seed.
    """
    rng = np.random.default_rng([int(seed), 20260312])
    t = _tiles(rng)
    tiles_x, tiles_y, tile = t["tiles"]
    size = (tiles_x * tile, tiles_y * tile)
    tapes, arts, shadows, gradient = _decor(rng, size, tile)
    beyond = int(rng.integers(2, 5)) if rng.random() < 0.35 else 0
    wear = rng.uniform(0.05, 0.18) if rng.random() < 0.3 else 0.0
    look = FloorLook(t["a"], t["b"], t["alternating"], rng.uniform(0.0, 0.06), wear,
                     t["width"], t["depth"], t["pitch"], t["teeth_depth"], beyond,
                     _colour(rng) if rng.random() < 0.5 else t["a"], _colour(rng),
                     rng.uniform(1.0, 8.0), tapes, arts, shadows, gradient)
    walls = rng.random() < 0.35
    boxes, balls, n_robots = _objects(rng, size, walls)
    narrow = rng.random() < 0.12
    setup, portrait = _camera(rng, size, narrow)
    picture = _picture(rng)
    lens_profile = bool(rng.random() < 0.6)
    hint, margin = origin_hint(size, setup)
    field = FieldProfile(tiles_x, tiles_y, tile, origin_hint=hint)
    k1 = setup.camera.distortion[0]
    flags = {
        "teeth": look.teeth_pitch_m > 0, "gaps": look.seam_width_m >= 0.004,
        "low_contrast_seams": abs(look.seam_depth) < 0.1, "light_seams": look.seam_depth < 0,
        "alternating_colours": look.alternating, "worn_tiles": look.wear > 0,
        "tape_lines": bool(tapes), "printed_art": bool(arts),
        "tiles_beyond_field": beyond > 0, "walls": walls, "pieces": bool(balls) or
        len(boxes) > 4 * walls + n_robots, "robots": n_robots > 0, "shadows": bool(shadows),
        "light_gradient": gradient[0] != 0.0, "flicker": picture.flicker[0] > 0,
        "camera_low": setup.height_m < 1.2, "camera_high": setup.height_m > 2.2,
        "from_side": setup.placement == "side", "from_corner": setup.placement == "corner",
        "tilted": abs(((setup.roll_deg + 45) % 90) - 45) > 5, "portrait": portrait,
        "narrow_view": narrow, "strong_distortion": abs(k1) > 0.1, "blur": picture.blur_px
        > 0.8, "noise": picture.noise_sigma > 4, "jpeg": picture.compression == "jpeg",
        "h264": picture.compression == "h264", "lens_profile": lens_profile,
        "res_small": setup.camera.width_px * setup.camera.height_px < 400_000,
        "res_large": setup.camera.width_px * setup.camera.height_px > 1_500_000,
    }
    cats = tuple(c for c in SPEC_CATEGORIES if flags[c])
    return SceneSpec(int(seed), field, look, setup, picture, boxes, balls, lens_profile, cats,
                     margin)
