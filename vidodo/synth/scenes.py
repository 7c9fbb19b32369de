"""Randomised floor-and-camera scenes: one still picture per seed, with its truth.

:func:`render_scene` draws the scene of a seed (:func:`vidodo.synth.scene_spec.draw_scene`),
ray casts it (every pixel's ray from :func:`vidodo.synth.render.camera_rays`, 2 x 2
samples per pixel, floor shaded by :mod:`vidodo.synth.scene_floor`, objects by
:mod:`vidodo.synth.scene_objects`), applies the picture's faults (flicker bands, blur,
sensor noise, then JPEG or H.264 compression) and works out the truth:

* the camera pose and intrinsics;
* which field corners (tile corners of the field) are in view: inside the picture, in
  front of the camera and not hidden by a wall, piece or robot. Found from the rendered
  rays (the pixel quad whose floor points enclose the corner), not from a projection
  formula, so ``cv2.projectPoints`` is an independent check of it;
* whether the seams are visible to the eye (:func:`seam_contrast`);
* the view categories: origin corner out of view, a field corner or a whole field edge
  out of view, only a few rows in view, the whole field in view.

:func:`write_scene` writes a folder as a user would have it: the picture
(``scene.png``, ``scene.jpg`` or a one-frame ``scene.mp4``), ``field.toml``,
``camera.toml`` (the true lens; only a scene with ``lens_profile`` offers it to the
user) and ``truth.json``.
"""

from __future__ import annotations

import json
import math
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np

from ..profiles import camera_to_dict, dump_toml, field_to_dict
from .render import camera_rays
from .scene_floor import shade_floor
from .scene_objects import cast_objects
from .scene_spec import SceneSpec, draw_scene

__all__ = ["Scene", "render_scene", "write_scene", "corners_in_view", "seam_contrast",
           "truth_dict", "view_categories", "render_spec", "BENCHMARK_SEEDS",
           "save_scene", "floor_at_pixels", "start_tile",
           "VIEW_CATEGORIES", "SEAM_VISIBLE_CONTRAST"]

VIEW_CATEGORIES = ("full_field", "corner_out", "origin_out", "edge_out", "few_rows")
BENCHMARK_SEEDS = tuple(range(240))
"""The fixed scene list of ``benchmarks/registration_robustness.py``."""
BACKDROP_BGR = (150.0, 150.0, 145.0)
"""What rays that miss the floor and every object see (the hall's far walls)."""
MAX_FLOOR_DISTANCE_M = 60.0
BLOCK_ROWS = 96
SEAM_VISIBLE_CONTRAST = 0.03
"""A scene's seams count as visible to the eye when their median Weber contrast in
the picture exceeds that of the tile texture alone (the same measure across tile
middles) by at least this much. Threshold from memory: the eye's contrast threshold
for a thin line on a textured surface is a few percent (Weber fraction of about 1-2 %
for large uniform patches is common practice)."""


@dataclass(frozen=True)
class Scene:
    """A rendered scene and its truth."""

    spec: SceneSpec
    image: np.ndarray
    """BGR picture as the user's file holds it (after compression), uint8."""
    file_name: str
    """``scene.png``, ``scene.jpg`` or ``scene.mp4``."""
    file_bytes: bytes
    floor_seen: np.ndarray
    """Share of each pixel's samples that see the floor (not an object), (H, W)."""
    corners: np.ndarray
    """Field corners in view: rows (i, j, u_px, v_px); floor point (i, j) * tile."""
    seam_contrast: float
    """Median Weber contrast of the seams in view minus that of tile middles."""
    seams_visible: bool
    categories: tuple[str, ...]


def _pose(spec):
    rot = cv2.Rodrigues(np.asarray(spec.setup.rvec, float))[0]
    centre = -rot.T @ np.asarray(spec.setup.tvec, float)
    return rot, centre


def _floor_block(spec, rays, rot, centre, rows, offset):
    """Colour of rows ``rows`` for one sub-pixel offset; also whether the floor is seen."""
    du, dv = offset
    xs = rays.xn[rows] + du * rays.dxn[0][rows] + dv * rays.dxn[1][rows]
    ys = rays.yn[rows] + du * rays.dyn[0][rows] + dv * rays.dyn[1][rows]
    rt = rot.T
    d = [rt[i, 0] * xs + rt[i, 1] * ys + rt[i, 2] for i in range(3)]
    with np.errstate(divide="ignore", invalid="ignore"):
        s = -centre[2] / d[2]
        fx = centre[0] + s * d[0]
        fy = centre[1] + s * d[1]
        ok = (d[2] < 0) & (s * np.sqrt(d[0] ** 2 + d[1] ** 2 + d[2] ** 2) < MAX_FLOOR_DISTANCE_M)
        # footprint of one sample on the floor: dP/du and dP/dv of the floor point
        foot = np.zeros_like(xs)
        for k in range(2):
            dd = [rt[i, 0] * rays.dxn[k][rows] + rt[i, 1] * rays.dyn[k][rows] for i in range(3)]
            gx = s * (dd[0] - d[0] * dd[2] / d[2])
            gy = s * (dd[1] - d[1] * dd[2] / d[2])
            foot = np.maximum(foot, np.hypot(gx, gy))
    fx = np.where(ok, fx, 0.0)
    fy = np.where(ok, fy, 0.0)
    col = shade_floor(fx, fy, 0.5 * np.where(ok, foot, 1.0), spec.look, spec.field.size_m,
                      spec.field.tile_size_m)
    col = np.where(ok[..., None], col, np.asarray(BACKDROP_BGR, np.float32))
    t_obj, obj = cast_objects(centre, d, spec.boxes, spec.balls)
    hit = t_obj < np.where(ok, s, np.inf)
    return np.where(hit[..., None], obj, col), ok & ~hit


def _shade(spec: SceneSpec):
    """Ray cast the scene: mean colour of 2 x 2 samples per pixel, floor share."""
    cam = spec.setup.camera
    rays = camera_rays(cam)
    rot, centre = _pose(spec)
    img = np.zeros((cam.height_px, cam.width_px, 3), np.float32)
    seen = np.zeros((cam.height_px, cam.width_px), np.float32)
    offsets = [(-0.25, -0.25), (0.25, -0.25), (-0.25, 0.25), (0.25, 0.25)]
    for r0 in range(0, cam.height_px, BLOCK_ROWS):
        rows = slice(r0, min(r0 + BLOCK_ROWS, cam.height_px))
        for off in offsets:
            col, ok = _floor_block(spec, rays, rot, centre, rows, off)
            img[rows] += 0.25 * col
            seen[rows] += 0.25 * ok
    return img, seen


def _faults(spec: SceneSpec, img):
    """Flicker bands, blur and sensor noise (before compression)."""
    pic = spec.picture
    amp, period, phase = pic.flicker
    if amp > 0:
        v = np.arange(img.shape[0], dtype=np.float32)
        img = img * (1 + amp * np.sin(2 * np.pi * v / period + phase))[:, None, None]
    if pic.blur_px > 0.05:
        img = cv2.GaussianBlur(img, (0, 0), pic.blur_px)
    rng = np.random.default_rng([spec.seed, 4242])
    img = img + rng.standard_normal(img.shape, dtype=np.float32) * np.float32(pic.noise_sigma)
    return np.clip(np.rint(img), 0, 255).astype(np.uint8)


def _h264_roundtrip(img, crf, out_path):
    """Encode one frame with H.264 (yuv420p, constant rate factor), decode it back."""
    h, w = img.shape[:2]
    cmd = ["ffmpeg", "-loglevel", "error", "-y", "-f", "rawvideo", "-pix_fmt", "bgr24",
           "-s", f"{w}x{h}", "-r", "30", "-i", "-", "-c:v", "libx264", "-preset", "medium",
           "-crf", str(crf), "-pix_fmt", "yuv420p", str(out_path)]
    subprocess.run(cmd, input=img.tobytes(), check=True, capture_output=True)
    dec = subprocess.run(["ffmpeg", "-loglevel", "error", "-i", str(out_path), "-f", "rawvideo",
                          "-pix_fmt", "bgr24", "-"], check=True, capture_output=True).stdout
    return np.frombuffer(dec, np.uint8)[: h * w * 3].reshape(h, w, 3).copy()


def _compress(spec: SceneSpec, img):
    """The picture as stored: file name, file bytes and the decoded picture."""
    pic = spec.picture
    if pic.compression == "jpeg":
        buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, pic.quality])[1]
        return "scene.jpg", buf.tobytes(), cv2.imdecode(buf, cv2.IMREAD_COLOR)
    if pic.compression == "h264":
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / "scene.mp4"
            dec = _h264_roundtrip(img, pic.quality, path)
            return "scene.mp4", path.read_bytes(), dec
    return "scene.png", cv2.imencode(".png", img)[1].tobytes(), img


def _floor_map(spec: SceneSpec, step: int = 1):
    """Floor point of the rays of every ``step``-th pixel centre, NaN where a ray misses
    the floor [m]. Step 1 uses the renderer's own rays."""
    cam = spec.setup.camera
    if step == 1:
        rays = camera_rays(cam)
        xn, yn = rays.xn.astype(np.float64), rays.yn.astype(np.float64)
    else:
        u, v = np.meshgrid(np.arange(0, cam.width_px, step, dtype=np.float64),
                           np.arange(0, cam.height_px, step, dtype=np.float64))
        crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-12)
        und = cv2.undistortPoints(np.stack([u, v], -1).reshape(-1, 1, 2), cam.matrix,
                                  cam.dist_coeffs, None, np.eye(3), np.eye(3), crit)
        xn, yn = und[:, 0, 0].reshape(u.shape), und[:, 0, 1].reshape(u.shape)
    rot, centre = _pose(spec)
    rt = rot.T
    d = [rt[i, 0] * xn + rt[i, 1] * yn + rt[i, 2] for i in range(3)]
    with np.errstate(divide="ignore", invalid="ignore"):
        s = -centre[2] / d[2]
        ok = (d[2] < 0) & (s * np.sqrt(d[0] ** 2 + d[1] ** 2 + d[2] ** 2) < MAX_FLOOR_DISTANCE_M)
    fx = np.where(ok, centre[0] + s * d[0], np.nan)
    fy = np.where(ok, centre[1] + s * d[1], np.nan)
    return fx, fy


def _invert_quads(quads, target):
    """Solve bilinear interpolation in pixel quads for (a, b) in [0, 1]^2 (Newton).

    quads: (N, 4, 2) corner values in the order (0,0), (1,0), (0,1), (1,1); target (N, 2).
    """
    p00, p10, p01, p11 = (quads[:, k] for k in range(4))
    ab = np.full((len(quads), 2), 0.5)
    for _ in range(12):
        a, b = ab[:, :1], ab[:, 1:]
        f = (1 - a) * (1 - b) * p00 + a * (1 - b) * p10 + (1 - a) * b * p01 + a * b * p11
        da = (1 - b) * (p10 - p00) + b * (p11 - p01)
        db = (1 - a) * (p01 - p00) + a * (p11 - p10)
        jac = np.stack([da, db], axis=2)
        with np.errstate(all="ignore"):
            step = np.linalg.solve(jac, (target - f)[..., None])[..., 0]
        ab = ab + np.nan_to_num(step)
    return ab


def corners_in_view(spec: SceneSpec, floor_map=None, step: int = 1):
    """Field corners seen in the picture, from the rendered rays.

    A corner is in view when the floor points of a 2 x 2 pixel quad's rays enclose it
    (its pixel position by inverting the bilinear interpolation within the quad), and
    no wall, piece or robot lies on the ray from the camera to it. ``floor_map`` from
    :func:`_floor_map` with the same ``step`` (computed when not given; a coarse step
    is enough for the view categories, not for pixel positions).

    Returns
    -------
    ndarray of shape (N, 4)
        Rows (i, j, u_px, v_px): the corner at floor (i, j) * tile seen at pixel (u, v).
    """
    fx, fy = floor_map if floor_map is not None else _floor_map(spec, step)
    tile = spec.field.tile_size_m
    g = np.stack([fx / tile, fy / tile], axis=-1)
    quads = np.stack([g[:-1, :-1], g[:-1, 1:], g[1:, :-1], g[1:, 1:]], axis=2)
    with np.errstate(invalid="ignore"):
        lo = np.ceil(quads.min(axis=2))
        hi = np.floor(quads.max(axis=2))
    cand = np.all(np.isfinite(quads), axis=(2, 3)) & np.all(lo <= hi, axis=-1)
    cand &= (lo[..., 0] >= 0) & (lo[..., 0] <= spec.field.tiles_x)
    cand &= (lo[..., 1] >= 0) & (lo[..., 1] <= spec.field.tiles_y)
    r, c = np.nonzero(cand)
    target = lo[r, c]
    ab = _invert_quads(quads[r, c], target)
    inside = np.all((ab > -1e-6) & (ab < 1 + 1e-6), axis=1)
    rows = np.column_stack([target, (c + ab[:, 0]) * step, (r + ab[:, 1]) * step])[inside]
    _, first = np.unique(rows[:, :2], axis=0, return_index=True)
    rows = rows[np.sort(first)]
    if len(rows):
        _, centre = _pose(spec)
        pts = np.column_stack([rows[:, :2] * tile, np.zeros(len(rows))])
        d = tuple((pts - centre).T)
        t, _ = cast_objects(centre, d, spec.boxes, spec.balls)
        rows = rows[~(t < 1 - 1e-6)]
    order = np.lexsort((rows[:, 0], rows[:, 1]))
    return rows[order]


def _profiles(spec, floor_map, seen, grey, offset_tiles):
    """Weber contrast of a seam-like dip across lattice lines shifted by ``offset_tiles``
    (0: the seams; 0.5: tile middles, the texture's own contrast), one value per sample
    point that is in view and not hidden."""
    f = spec.field
    tile, look, cam = f.tile_size_m, spec.look, spec.setup.camera
    rvec, tvec = np.asarray(spec.setup.rvec, float), np.asarray(spec.setup.tvec, float)
    out = []
    along = (np.arange(10) + 0.5) / 10 * 0.8 + 0.1
    for axis, (n_lines, n_along) in enumerate(((f.tiles_x, f.tiles_y), (f.tiles_y, f.tiles_x))):
        lines = np.arange(1, n_lines) if offset_tiles == 0 else np.arange(n_lines) + offset_tiles
        s = (np.arange(n_along)[:, None] + along[None]).ravel()
        q, w = np.meshgrid(lines, s)
        base = np.column_stack([q.ravel(), w.ravel()])[:, ::1 if axis == 0 else -1] * tile
        across = np.eye(2)[axis]
        pts = np.column_stack([base, np.zeros(len(base))])
        uv0 = cv2.projectPoints(pts, rvec, tvec, cam.matrix, cam.dist_coeffs)[0][:, 0]
        uv1 = cv2.projectPoints(pts + np.r_[across, 0] * 1e-3, rvec, tvec, cam.matrix,
                                cam.dist_coeffs)[0][:, 0]
        m_per_px = 1e-3 / np.maximum(np.hypot(*(uv1 - uv0).T), 1e-9)
        half = look.teeth_depth_m + 0.5 * look.seam_width_m + 1.5 * m_per_px
        taus = np.concatenate([np.linspace(-1, 1, 21)[None] * half[:, None],
                               np.sign(np.arange(6) - 2.5)[None] * (
                                   half[:, None] + (np.arange(6) % 3 + 1)[None] * m_per_px[:,
                                                                                          None])],
                              axis=1)
        prof = base[:, None, :] + taus[..., None] * across
        flat = np.column_stack([prof.reshape(-1, 2), np.zeros(prof.size // 2)])
        uv = cv2.projectPoints(flat, rvec, tvec, cam.matrix, cam.dist_coeffs)[0][:, 0]
        uv = uv.reshape(len(base), -1, 2)
        ok = _profile_ok(spec, uv, prof, floor_map, seen, m_per_px)
        if not ok.any():
            continue
        vals = cv2.remap(grey, uv[ok][..., 0].astype(np.float32),
                         uv[ok][..., 1].astype(np.float32), cv2.INTER_LINEAR)
        side = np.maximum(vals[:, 21:].mean(axis=1), 1.0)
        centre = vals[:, :21].min(axis=1) if look.seam_depth >= 0 else vals[:, :21].max(axis=1)
        step = np.abs(vals[:, 21:24].mean(axis=1) - vals[:, 24:].mean(axis=1))
        out.append(np.maximum(np.abs(side - centre), step) / side)
    return np.concatenate(out) if out else np.zeros(0)


def _profile_ok(spec, uv, prof, floor_map, seen, m_per_px):
    """Profiles inside the picture, on seen floor, where the projection is the ray's."""
    cam = spec.setup.camera
    inside = np.all((uv[..., 0] >= 2) & (uv[..., 0] <= cam.width_px - 3)
                    & (uv[..., 1] >= 2) & (uv[..., 1] <= cam.height_px - 3), axis=1)
    ok = inside.copy()
    idx = np.nonzero(inside)[0]
    pix = np.rint(uv[idx]).astype(int)
    seen_all = np.all(seen[pix[..., 1], pix[..., 0]] > 0.999, axis=1)
    fx, fy = floor_map
    mid = pix[:, 0]
    err = np.hypot(fx[mid[:, 1], mid[:, 0]] - prof[idx, 0, 0], fy[mid[:, 1], mid[:, 0]]
                   - prof[idx, 0, 1])
    ok[idx] = seen_all & (err < 0.005 + 3 * m_per_px[idx])
    return ok


def seam_contrast(spec: SceneSpec, image, floor_seen, floor_map=None):
    """How visible the field's seams are in the picture.

    Across each interior seam, at ten points per tile edge, the grey profile is read
    where ``cv2.projectPoints`` puts it: the darkest (for light seams: brightest) value
    within the seam's band (its width and teeth plus 1.5 px) against the mean just
    beside it, as Weber contrast ``|side - seam| / side``, or the step between the two
    sides' means (tiles of different shades) over the same mean, whichever is larger.
    The same is measured across the middles of the tiles, where only the texture,
    noise and print make a dip or a step.

    Returns
    -------
    contrast : float
        Median seam contrast minus median tile-middle contrast (NaN with fewer than 10
        usable seam points).
    n_points : int
        Seam points used.
    """
    grey = cv2.cvtColor(image, cv2.COLOR_BGR2GRAY).astype(np.float32)
    fmap = floor_map if floor_map is not None else _floor_map(spec)
    seam = _profiles(spec, fmap, floor_seen, grey, 0.0)
    null = _profiles(spec, fmap, floor_seen, grey, 0.5)
    if len(seam) < 10:
        return math.nan, len(seam)
    return float(np.median(seam) - (np.median(null) if len(null) else 0.0)), len(seam)


def view_categories(spec: SceneSpec, corners):
    """Categories of what part of the field is in view."""
    tx, ty = spec.field.tiles_x, spec.field.tiles_y
    seen = {(int(i), int(j)) for i, j in corners[:, :2]}
    outer = {(0, 0), (tx, 0), (0, ty), (tx, ty)}
    edges = [{(i, 0) for i in range(tx + 1)}, {(i, ty) for i in range(tx + 1)},
             {(0, j) for j in range(ty + 1)}, {(tx, j) for j in range(ty + 1)}]
    flags = {"full_field": outer <= seen, "corner_out": not outer <= seen,
             "origin_out": (0, 0) not in seen, "edge_out": any(not (e & seen) for e in edges),
             "few_rows": bool(seen) and (
                 (np.ptp(corners[:, 0]) <= 2 and tx > 2) or (np.ptp(corners[:, 1]) <= 2
                                                              and ty > 2))}
    return tuple(c for c in VIEW_CATEGORIES if flags[c])


def render_scene(seed: int) -> Scene:
    """Render the scene of ``seed`` and work out its truth (deterministic per seed)."""
    return render_spec(draw_scene(seed))


def render_spec(spec: SceneSpec) -> Scene:
    """Render a drawn (or edited) scene and work out its truth."""
    img, seen = _shade(spec)
    name, data, image = _compress(spec, _faults(spec, img))
    fmap = _floor_map(spec)
    corners = corners_in_view(spec, fmap)
    contrast, _ = seam_contrast(spec, image, seen, fmap)
    visible = bool(np.isfinite(contrast) and contrast >= SEAM_VISIBLE_CONTRAST)
    cats = spec.categories + view_categories(spec, corners)
    return Scene(spec, image, name, data, seen, corners, contrast, visible, cats)


def start_tile(scene: Scene):
    """A field tile whose four corners are in view, nearest the picture's centre (where
    a robot could start: for a start-tile option), or None."""
    seen = {(int(i), int(j)): (u, v) for i, j, u, v in scene.corners}
    cam = scene.spec.setup.camera
    best = None
    for (i, j) in seen:
        quad = [(i, j), (i + 1, j), (i, j + 1), (i + 1, j + 1)]
        if all(q in seen for q in quad):
            uv = np.mean([seen[q] for q in quad], axis=0)
            d = math.hypot(uv[0] - 0.5 * cam.width_px, uv[1] - 0.5 * cam.height_px)
            if best is None or d < best[0]:
                best = (d, [i, j])
    return None if best is None else best[1]


def truth_dict(scene: Scene) -> dict:
    """The truth of a scene as written to ``truth.json`` (metres, pixels, radians)."""
    sp = scene.spec
    cam = sp.setup.camera
    return {
        "seed": sp.seed, "picture": scene.file_name, "categories": list(scene.categories),
        "lens_profile": sp.lens_profile,
        "camera": {"rvec": list(sp.setup.rvec), "tvec_m": list(sp.setup.tvec),
                   "camera_matrix": cam.matrix.tolist(), "dist_coeffs": list(cam.distortion),
                   "width_px": cam.width_px, "height_px": cam.height_px,
                   "height_m": sp.setup.height_m, "roll_deg": sp.setup.roll_deg,
                   "placement": sp.setup.placement},
        "field": {"tiles_x": sp.field.tiles_x, "tiles_y": sp.field.tiles_y,
                  "tile_size_m": sp.field.tile_size_m, "origin_hint": sp.field.origin_hint,
                  "origin_hint_margin_px": sp.origin_hint_margin_px},
        "corners_in_view": scene.corners.tolist(),
        "n_corners_in_view": len(scene.corners),
        "seam_contrast": scene.seam_contrast, "seams_visible": scene.seams_visible,
        "start_tile": start_tile(scene),
    }


def save_scene(scene: Scene, folder) -> Path:
    """Write a rendered scene into ``folder``: picture, field.toml, camera.toml, truth.json.

    Returns
    -------
    Path
        The picture file.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / scene.file_name).write_bytes(scene.file_bytes)
    header = f"randomised scene {scene.spec.seed} (vidodo.synth.scenes)"
    (folder / "field.toml").write_text(dump_toml(field_to_dict(scene.spec.field), header))
    (folder / "camera.toml").write_text(dump_toml(camera_to_dict(scene.spec.setup.camera),
                                                  header + ": the true lens"))
    (folder / "truth.json").write_text(json.dumps(truth_dict(scene), indent=1))
    return folder / scene.file_name


def write_scene(seed: int, folder) -> Path:
    """Render scene ``seed`` and write it into ``folder`` (see :func:`save_scene`)."""
    return save_scene(render_scene(seed), folder)


def floor_at_pixels(spec: SceneSpec, points_px):
    """True floor point seen at pixels (the renderer's rays), NaN where the ray misses.

    Parameters
    ----------
    points_px : array_like of shape (N, 2)

    Returns
    -------
    ndarray of shape (N, 2) [m]
    """
    cam = spec.setup.camera
    crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-12)
    und = cv2.undistortPoints(np.asarray(points_px, float).reshape(-1, 1, 2), cam.matrix,
                              cam.dist_coeffs, None, np.eye(3), np.eye(3), crit)[:, 0]
    rot, centre = _pose(spec)
    d = np.column_stack([und, np.ones(len(und))]) @ rot
    with np.errstate(divide="ignore", invalid="ignore"):
        s = -centre[2] / d[:, 2]
    out = centre[:2] + s[:, None] * d[:, :2]
    out[~(d[:, 2] < 0)] = np.nan
    return out
