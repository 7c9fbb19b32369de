"""Image synthesis for synthetic runs: a tiled floor, a box robot and its fiducials.

Geometry is ray casting, so it agrees with OpenCV's projection by construction and by
test:

* every pixel's viewing ray comes from undistorting the pixel grid with
  ``cv2.undistortPoints`` (iterated to 1e-12), computed once per camera profile;
* rays meet the floor plane (z = 0) and, in the robot's body frame, the faces of the
  chassis box, the masts and the horizontal marker plates; the nearest hit wins;
* rolling shutter: sensor row ``v`` is read at ``t_frame + (v / height_px) * readout_s``,
  so the robot pose (and the camera pose, for a hand-held camera) is evaluated per row;
* motion blur: each row integrates over ``exposure_s`` centred on its read time; every
  pixel averages ``K`` samples spread over the pixel area and the exposure (stratified
  sub-pixel offsets and times), which also anti-aliases the robot's edges;
* the floor is looked up in a mip-mapped texture at the pixel's footprint (trilinear),
  once per camera pose: for a tripod it is drawn once and only the robot's region of
  interest is redrawn per frame;
* sensor noise: Gaussian with ``noise_sigma`` grey levels, from a seeded generator
  (inverse-CDF table of 256 equiprobable levels, rounded to whole grey levels);
  compression comes later from the encoder.

Frame time ``t_frame`` is the middle of the top row's exposure (the container time of
the frame, see DEVELOPERS.md).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import cv2
import numpy as np
from scipy.special import ndtri

from .errors import InputError
from .profiles import CameraProfile, FieldProfile, RobotProfile
from .render_floor import (
    FloorTexture,
    floor_texture,
    footprint_level,
    plate_lookup,
    plate_modules,
    sample_floor,
)

__all__ = ["render_frames", "camera_rays", "floor_points", "robot_parts", "CHASSIS_BGR"]

CHASSIS_BGR = (150.0, 96.0, 52.0)
"""Albedo of the robot's chassis (a blue plastic), as seen lit from straight above."""
MAST_BGR = (45.0, 45.0, 48.0)
"""Albedo of a marker mast (dark metal)."""
MAST_SIDE_M = 0.02
"""Side of a square marker mast [m]."""
LIGHT_DIR = np.array([0.35, 0.50, 0.79]) / np.linalg.norm([0.35, 0.50, 0.79])
"""Direction towards the main light in the floor frame (above, from +x +y)."""
AMBIENT = 0.45
"""Share of light that reaches every face regardless of its direction."""
MAX_FLOOR_DISTANCE_M = 80.0
"""Rays that meet the floor farther than this see the backdrop [m]."""


# ---------------------------------------------------------------- camera rays
@dataclass(frozen=True)
class CameraRays:
    """Normalised undistorted ray of every pixel centre, and its per-pixel slope."""

    xn: np.ndarray
    """x/z of each pixel's ray in the camera frame, shape (H, W), float32."""
    yn: np.ndarray
    """y/z of each pixel's ray, shape (H, W), float32."""
    dxn: np.ndarray
    """d(xn)/du and d(xn)/dv, shape (2, H, W), float32 [1/px]."""
    dyn: np.ndarray
    """d(yn)/du and d(yn)/dv, shape (2, H, W), float32 [1/px]."""


@functools.lru_cache(maxsize=4)
def camera_rays(camera: CameraProfile) -> CameraRays:
    """Undistort the whole pixel grid once: the viewing ray of every pixel centre.

    Uses ``cv2.undistortPoints`` with 100 iterations and a 1e-12 tolerance, so that
    ``cv2.projectPoints`` of the rays returns the pixel centres (checked in the tests).
    """
    w, h = camera.width_px, camera.height_px
    u, v = np.meshgrid(np.arange(w, dtype=np.float64), np.arange(h, dtype=np.float64))
    pts = np.stack([u.ravel(), v.ravel()], axis=1)[:, None, :]
    crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-12)
    und = cv2.undistortPoints(pts, camera.matrix, camera.dist_coeffs, None, np.eye(3),
                              np.eye(3), crit)
    xn = und[:, 0, 0].reshape(h, w)
    yn = und[:, 0, 1].reshape(h, w)
    dxn = np.stack([np.gradient(xn, axis=1), np.gradient(xn, axis=0)]).astype(np.float32)
    dyn = np.stack([np.gradient(yn, axis=1), np.gradient(yn, axis=0)]).astype(np.float32)
    return CameraRays(xn.astype(np.float32), yn.astype(np.float32), dxn, dyn)


@dataclass(frozen=True)
class _CameraRows:
    """Camera pose per sensor row (linear between top-row and bottom-row read times)."""

    rt: np.ndarray
    """R transposed per row, shape (H, 3, 3) or (1, 3, 3) when static."""
    centre: np.ndarray
    """Camera centre in the floor frame per row, shape (H, 3) or (1, 3) [m]."""
    rvec: np.ndarray
    tvec: np.ndarray

    def rows(self, r0, r1):
        if self.rt.shape[0] == 1:
            return self.rt[0], self.centre[0]
        return self.rt[r0:r1], self.centre[r0:r1]


def _camera_rows(pose_top, pose_bottom, height_px) -> _CameraRows:
    def parts(pose):
        rvec = np.asarray(pose[0], float).reshape(3)
        tvec = np.asarray(pose[1], float).reshape(3)
        rot = cv2.Rodrigues(rvec)[0]
        return rvec, tvec, rot.T, -rot.T @ tvec

    rv0, tv0, rt0, c0 = parts(pose_top)
    rv1, tv1, rt1, c1 = parts(pose_bottom)
    if np.array_equal(rv0, rv1) and np.array_equal(tv0, tv1):
        return _CameraRows(rt0[None], c0[None], rv0, tv0)
    a = (np.arange(height_px) / height_px)[:, None]
    rt = rt0[None] + a[..., None] * (rt1 - rt0)[None]
    return _CameraRows(rt, c0[None] + a * (c1 - c0)[None], rv0, tv0)


def _floor_dirs(rt, xn, yn):
    """Floor-frame ray directions D = R^T (xn, yn, 1); rt (3, 3) or (rows, 3, 3)."""
    if rt.ndim == 2:
        e = [float(x) for x in rt.ravel()]
    else:
        e = [rt[:, i, j].astype(np.float32)[:, None] for i in range(3) for j in range(3)]
        if xn.ndim == 3:
            e = [x[None] for x in e]
    dx = e[0] * xn + e[1] * yn + e[2]
    dy = e[3] * xn + e[4] * yn + e[5]
    dz = e[6] * xn + e[7] * yn + e[8]
    return dx, dy, dz


def _floor_hits(cam: _CameraRows, xn, yn, r0, r1):
    rt, c = cam.rows(r0, r1)
    dx, dy, dz = _floor_dirs(rt, xn, yn)
    if c.ndim == 1:
        cx, cy, cz = (float(v) for v in c)
    else:
        cx, cy, cz = (c[:, i].astype(np.float32)[:, None] for i in range(3))
    with np.errstate(divide="ignore", invalid="ignore"):
        s = -cz / dz
        fx = cx + s * dx
        fy = cy + s * dy
        valid = (dz < 0) & (s * np.sqrt(dx * dx + dy * dy + dz * dz) < MAX_FLOOR_DISTANCE_M)
    if np.ndim(cz) == 0 and cz <= 0:
        valid[:] = False
    else:
        valid &= np.broadcast_to(np.asarray(cz) > 0, valid.shape)
    return fx, fy, valid


def floor_points(camera: CameraProfile, rvec, tvec):
    """Floor point seen by every pixel centre of a static camera.

    Parameters
    ----------
    camera : CameraProfile
    rvec, tvec : array_like of shape (3,)
        Floor -> camera pose (OpenCV: ``X_cam = R X_floor + t``).

    Returns
    -------
    floor_xy_m : ndarray of shape (H, W, 2), float64
        Floor x, y of each pixel's ray on the floor plane, NaN where it misses [m].
    """
    rays = camera_rays(camera)
    cam = _camera_rows((rvec, tvec), (rvec, tvec), camera.height_px)
    fx, fy, valid = _floor_hits(cam, rays.xn.astype(np.float64), rays.yn.astype(np.float64),
                                0, camera.height_px)
    out = np.stack([fx, fy], axis=-1)
    out[~valid] = np.nan
    return out


# ---------------------------------------------------------------- robot model
@dataclass(frozen=True)
class _Box:
    lo: tuple
    hi: tuple
    albedo: tuple


@dataclass(frozen=True)
class _Plate:
    x_m: float
    y_m: float
    z_m: float
    yaw_rad: float
    size_m: float
    half_m: float
    modules: np.ndarray


@dataclass(frozen=True)
class RobotParts:
    """The robot as boxes and marker plates in its body frame."""

    boxes: tuple
    plates: tuple
    bbox_lo: np.ndarray
    """Corner of the body-frame bounding box, shape (3,) [m]."""
    bbox_hi: np.ndarray


def robot_parts(robot: RobotProfile, quiet_modules: int = 1) -> RobotParts:
    """Chassis box, masts and marker plates of a robot, in its body frame.

    The chassis spans ``[-L/2, L/2] x [-W/2, W/2] x [0, H]``. Every marker is a
    horizontal plate facing up (the printed marker with a white quiet zone of
    ``quiet_modules`` modules); a marker above the chassis top stands on a square mast.
    """
    hl, hw = 0.5 * robot.length_m, 0.5 * robot.width_m
    boxes = [_Box((-hl, -hw, 0.0), (hl, hw, robot.height_m), CHASSIS_BGR)]
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
        half = 0.5 * m.size_m * n / (n - 2 * quiet_modules)
        plates.append(_Plate(m.x_m, m.y_m, m.z_m, m.yaw_rad, m.size_m, half, modules))
        if m.z_m > robot.height_m + 1e-4:
            s = 0.5 * MAST_SIDE_M
            boxes.append(_Box((m.x_m - s, m.y_m - s, robot.height_m),
                              (m.x_m + s, m.y_m + s, m.z_m - 1e-4), MAST_BGR))
    lo = np.min([b.lo for b in boxes], axis=0)
    hi = np.max([b.hi for b in boxes], axis=0)
    for p in plates:
        r = p.half_m * math.sqrt(2.0)
        lo = np.minimum(lo, [p.x_m - r, p.y_m - r, p.z_m])
        hi = np.maximum(hi, [p.x_m + r, p.y_m + r, p.z_m])
    return RobotParts(tuple(boxes), tuple(plates), lo, hi)


def _face_brightness(heading):
    """Relative brightness of faces -x, +x, -y, +y, -z, +z for body headings, (6, ...)."""
    top = AMBIENT + (1 - AMBIENT) * LIGHT_DIR[2]
    out = []
    for phi in (math.pi, 0.0, -0.5 * math.pi, 0.5 * math.pi):
        ndl = LIGHT_DIR[0] * np.cos(heading + phi) + LIGHT_DIR[1] * np.sin(heading + phi)
        out.append((AMBIENT + (1 - AMBIENT) * np.maximum(ndl, 0.0)) / top)
    out.append(np.full_like(heading, AMBIENT / top))
    out.append(np.ones_like(heading))
    return np.stack(out).astype(np.float32)


def _ray_box(o, inv, d, box: _Box):
    """Slab test: entry distance (inf on a miss) and entry face index (0..5)."""
    tn = tf = None
    nears = []
    for a in range(3):
        t1 = (box.lo[a] - o[a]) * inv[a]
        t2 = (box.hi[a] - o[a]) * inv[a]
        near = np.minimum(t1, t2)
        far = np.maximum(t1, t2)
        nears.append(near)
        tn = near if tn is None else np.maximum(tn, near)
        tf = far if tf is None else np.minimum(tf, far)
    hit = (tn <= tf) & (tn > 0)
    axis = np.where(tn == nears[0], 0, np.where(tn == nears[1], 1, 2))
    dir_axis = np.choose(axis, d)
    face = 2 * axis + (dir_axis < 0)
    return np.where(hit, tn, np.inf), face


# ---------------------------------------------------------------- samples
def _sample_pattern(k: int):
    """Sub-pixel offsets (k, 2) [px] and exposure fractions (k,) in [-0.5, 0.5]."""
    if k == 1:
        return np.zeros((1, 2)), np.zeros(1)
    if k == 4:  # rotated grid (common practice for 4x anti-aliasing)
        offs = np.array([[-0.125, -0.375], [0.375, -0.125], [0.125, 0.375], [-0.375, 0.125]])
    else:  # R2 low-discrepancy sequence (plastic-number constants)
        g = 1.32471795724474602596
        i = np.arange(k)[:, None]
        offs = np.mod(0.5 + i * np.array([1 / g, 1 / g**2]), 1.0) - 0.5
    step = max(1, int(round(k * 0.618)))
    while math.gcd(step, k) != 1:
        step += 1
    order = (np.arange(k) * step) % k
    return offs, (order + 0.5) / k - 0.5


def _project_bbox(parts: RobotParts, poses, cam_poses, camera):
    """Image bounding box (u0, v0, u1, v1) of the robot over the given poses, or None."""
    lo, hi = parts.bbox_lo, parts.bbox_hi
    corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1])
                        for z in (lo[2], hi[2])])
    c, s = np.cos(poses[:, 2]), np.sin(poses[:, 2])
    wx = poses[:, 0, None] + c[:, None] * corners[:, 0] - s[:, None] * corners[:, 1]
    wy = poses[:, 1, None] + s[:, None] * corners[:, 0] + c[:, None] * corners[:, 1]
    pts = np.stack([wx.ravel(), wy.ravel(), np.tile(corners[:, 2], len(poses))], axis=1)
    us, vs = [], []
    for rvec, tvec in cam_poses:
        zc = (pts @ cv2.Rodrigues(rvec)[0].T + tvec)[:, 2]
        if np.any(zc < 0.05):
            return (0, 0, camera.width_px, camera.height_px)
        uv = cv2.projectPoints(pts, rvec, tvec, camera.matrix, camera.dist_coeffs)[0]
        us.append(uv[:, 0, 0])
        vs.append(uv[:, 0, 1])
    u, v = np.concatenate(us), np.concatenate(vs)
    if not (np.all(np.isfinite(u)) and np.all(np.isfinite(v))):
        return (0, 0, camera.width_px, camera.height_px)
    return u.min(), v.min(), u.max(), v.max()


def _draw_robot(frame, parts, rays, cam, camera, t_frame, pose_at, exposure_s, k_samples):
    h, w = camera.height_px, camera.width_px
    readout = camera.readout_s
    span = np.linspace(t_frame - 0.5 * exposure_s, t_frame + readout + 0.5 * exposure_s, 9)
    poses = _checked_poses(pose_at, span)
    cam_poses = [(cam.rvec, cam.tvec)]
    if cam.rt.shape[0] > 1:
        rot = cam.rt[-1].T
        cam_poses.append((cv2.Rodrigues(rot)[0].ravel(), -rot @ cam.centre[-1]))
    box = _project_bbox(parts, poses, cam_poses, camera)
    pad = 3
    c0 = max(int(math.floor(box[0])) - pad, 0)
    r0 = max(int(math.floor(box[1])) - pad, 0)
    c1 = min(int(math.ceil(box[2])) + pad + 1, w)
    r1 = min(int(math.ceil(box[3])) + pad + 1, h)
    if c1 <= c0 or r1 <= r0:
        return False
    if k_samples is None:
        blur_px = _blur_px(parts, pose_at, t_frame, exposure_s, cam_poses[0], camera)
        k_samples = int(np.clip(4 * math.ceil(blur_px / 3.0), 4, 32))
    offs, frac = _sample_pattern(k_samples)
    k = len(frac)
    # rays of every sample: first-order Taylor step from the pixel centre
    xn = rays.xn[r0:r1, c0:c1][None]
    yn = rays.yn[r0:r1, c0:c1][None]
    du = offs[:, 0, None, None].astype(np.float32)
    dv = offs[:, 1, None, None].astype(np.float32)
    xs = xn + du * rays.dxn[0, r0:r1, c0:c1] + dv * rays.dxn[1, r0:r1, c0:c1]
    ys = yn + du * rays.dyn[0, r0:r1, c0:c1] + dv * rays.dyn[1, r0:r1, c0:c1]
    rt, centre = cam.rows(r0, r1)
    dfx, dfy, dfz = _floor_dirs(rt, xs, ys)
    # robot pose per (sample, row)
    rows = np.arange(r0, r1)
    t_rows = t_frame + rows / h * readout
    t = (t_rows[None, :] + frac[:, None] * exposure_s).ravel()
    pose = _checked_poses(pose_at, t).reshape(k, r1 - r0, 3)
    th = pose[..., 2]
    cth, sth = np.cos(th), np.sin(th)
    cen = np.broadcast_to(centre, (r1 - r0, 3)) if centre.ndim == 2 else centre[None]
    rel_x = cen[None, :, 0] - pose[..., 0]
    rel_y = cen[None, :, 1] - pose[..., 1]
    ox = (cth * rel_x + sth * rel_y).astype(np.float32)[..., None]
    oy = (-sth * rel_x + cth * rel_y).astype(np.float32)[..., None]
    oz = np.broadcast_to(cen[None, :, 2], (k, r1 - r0)).astype(np.float32)[..., None]
    cth = cth.astype(np.float32)[..., None]
    sth = sth.astype(np.float32)[..., None]
    dx = cth * dfx + sth * dfy
    dy = -sth * dfx + cth * dfy
    dz = np.broadcast_to(dfz, dx.shape)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        inv = (1.0 / dx, 1.0 / dy, 1.0 / dz)
        best = np.full(dx.shape, np.inf, np.float32)
        colour = np.zeros(dx.shape + (3,), np.float32)
        bright = _face_brightness(th)[..., None]  # (6, k, rows, 1)
        for part in parts.boxes:
            tn, face = _ray_box((ox, oy, oz), inv, (dx, dy, dz), part)
            upd = tn < best
            if not upd.any():
                continue
            best = np.where(upd, tn, best)
            ki, ri, _ = np.nonzero(upd)
            shade = bright[face[upd], ki, ri, 0]
            colour[upd] = shade[:, None] * np.asarray(part.albedo, np.float32)
        top = float(bright[5].ravel()[0])
        for p in parts.plates:
            tp = (p.z_m - oz) * inv[2]
            px = ox + tp * dx - p.x_m
            py = oy + tp * dy - p.y_m
            cy, sy = math.cos(p.yaw_rad), math.sin(p.yaw_rad)
            lx = cy * px + sy * py
            ly = -sy * px + cy * py
            near = (tp > 0) & (np.abs(lx) < p.half_m) & (np.abs(ly) < p.half_m) & (
                tp <= best * (1 + 1e-5))
            if not near.any():
                continue
            value = plate_lookup(p.modules, p.size_m, lx[near], ly[near])
            best[near] = tp[near]
            colour[near] = (top * value)[:, None]
    hit = np.isfinite(best)
    frac_hit = hit.mean(axis=0)[..., None]
    if not frac_hit.any():
        return False
    floor = frame[r0:r1, c0:c1].astype(np.float32)
    out = floor * (1.0 - frac_hit) + colour.sum(axis=0) / k
    frame[r0:r1, c0:c1] = np.clip(out + 0.5, 0, 255).astype(np.uint8)
    return True


def _blur_px(parts, pose_at, t_frame, exposure_s, cam_pose, camera):
    """Largest image motion of the robot's bounding-box corners during one exposure [px]."""
    if exposure_s <= 0:
        return 0.0
    ends = _checked_poses(pose_at, np.array([t_frame - 0.5 * exposure_s,
                                             t_frame + 0.5 * exposure_s]))
    lo, hi = parts.bbox_lo, parts.bbox_hi
    corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1])
                        for z in (lo[2], hi[2])])
    uv = []
    for pose in ends:
        c, s = math.cos(pose[2]), math.sin(pose[2])
        pts = np.column_stack([pose[0] + c * corners[:, 0] - s * corners[:, 1],
                               pose[1] + s * corners[:, 0] + c * corners[:, 1],
                               corners[:, 2]])
        uv.append(cv2.projectPoints(pts, cam_pose[0], cam_pose[1], camera.matrix,
                                    camera.dist_coeffs)[0][:, 0])
    d = np.hypot(*(uv[1] - uv[0]).T)
    return float(np.nanmax(d)) if np.isfinite(d).any() else 0.0


def _checked_poses(pose_at, t):
    pose = np.asarray(pose_at(np.asarray(t, float)), dtype=float)
    if pose.shape != (np.size(t), 3) or not np.all(np.isfinite(pose)):
        raise InputError(
            f"render: pose_at returned shape {pose.shape} or non-finite values for "
            f"{np.size(t)} times; it must return (N, 3) finite x_m, y_m, heading_rad"
        )
    return pose


# ---------------------------------------------------------------- floor per pose
def _choose_texel(camera, cam, rays, step=8):
    fx, fy, valid = _floor_hits(cam, rays.xn[::step, ::step], rays.yn[::step, ::step],
                                0, camera.height_px)
    if cam.rt.shape[0] > 1:  # per-row poses: use the top row's for this estimate
        cam = _CameraRows(cam.rt[:1], cam.centre[:1], cam.rvec, cam.tvec)
        fx, fy, valid = _floor_hits(cam, rays.xn[::step, ::step], rays.yn[::step, ::step], 0, 1)
    level = footprint_level(np.where(valid, fx, np.nan), np.where(valid, fy, np.nan),
                            1.0, step)
    foot = 2.0 ** level[valid & (level != 0)]
    if foot.size == 0:
        return 0.004
    texel = 1.25 * float(np.percentile(foot, 1))
    return float(np.clip(round(texel * 1e4) / 1e4, 0.0005, 0.004))


def _render_floor(tex: FloorTexture, cam: _CameraRows, rays: CameraRays, camera, step=4):
    h = camera.height_px
    fx, fy, valid = _floor_hits(cam, rays.xn, rays.yn, 0, h)
    if cam.rt.shape[0] > 1:
        sub = _CameraRows(cam.rt[::step], cam.centre[::step], cam.rvec, cam.tvec)
    else:
        sub = cam
    cx, cy, cvalid = _floor_hits(sub, rays.xn[::step, ::step], rays.yn[::step, ::step], 0, h)
    level = footprint_level(np.where(cvalid, cx, np.nan), np.where(cvalid, cy, np.nan),
                            tex.texel_m, step)
    level = cv2.resize(level, (camera.width_px, h), interpolation=cv2.INTER_LINEAR)
    return sample_floor(tex, fx.astype(np.float32), fy.astype(np.float32), level, valid)


# ---------------------------------------------------------------- public API
def render_frames(field: FieldProfile, robot: RobotProfile, camera: CameraProfile, *,
                  frame_times_s, pose_at: Callable, camera_pose_at: Callable,
                  exposure_s: float, noise_sigma: float, seed: int, floor_seed: int = 0,
                  samples_per_px: int | None = None, floor_texel_m: float | None = None,
                  quiet_modules: int = 1) -> Iterator[np.ndarray]:
    """Render the frames of a synthetic run, one at a time.

    Parameters
    ----------
    field : FieldProfile
        Tile grid and floor fiducials.
    robot : RobotProfile
        Chassis box (length, width, height) and markers.
    camera : CameraProfile
        Intrinsics, distortion (k1, k2, p1, p2, k3) and rolling-shutter readout.
    frame_times_s : array_like of shape (N,)
        Frame times: the middle of the top row's exposure [s].
    pose_at : callable
        ``pose_at(t ndarray (M,)) -> ndarray (M, 3)``: robot floor pose
        (x_m, y_m, heading_rad) at the given times (vectorised).
    camera_pose_at : callable
        ``camera_pose_at(t float) -> (rvec, tvec)``: floor -> camera pose (OpenCV
        convention, ``X_cam = R X_floor + t``). Called at the top-row and bottom-row
        read times of each frame; rows in between are interpolated linearly.
    exposure_s : float
        Exposure time of each row [s] (0: no motion blur).
    noise_sigma : float
        Standard deviation of the sensor noise [grey levels].
    seed : int
        Seed of the sensor noise (frame ``i`` uses the generator seeded ``[seed, i]``).
    floor_seed : int
        Seed of the floor's tile colours and surface texture.
    samples_per_px : int, optional
        Samples per pixel in the robot's region (space and exposure time). Default:
        4, raised with the motion blur length (one sample per ~0.75 px, at most 32).
    floor_texel_m : float, optional
        Floor texture resolution [m]; default from the finest floor footprint in view.
    quiet_modules : int
        White border around each printed marker [modules].

    Yields
    ------
    ndarray of shape (height_px, width_px, 3), uint8
        BGR frame.
    """
    times = np.asarray(frame_times_s, dtype=float).ravel()
    if not np.all(np.isfinite(times)):
        raise InputError("render: frame_times_s must be finite")
    if exposure_s < 0 or noise_sigma < 0:
        raise InputError("render: exposure_s and noise_sigma must not be negative")
    if samples_per_px is not None and samples_per_px < 1:
        raise InputError("render: samples_per_px must be at least 1")
    return _frames(field, robot, camera, times, pose_at, camera_pose_at, float(exposure_s),
                   float(noise_sigma), int(seed), int(floor_seed), samples_per_px,
                   floor_texel_m, quiet_modules)


def _noise_table(sigma):
    """Grey-level noise of 256 equiprobable levels: round(sigma * Phi^-1((i + 0.5) / 256))."""
    return np.round(sigma * ndtri((np.arange(256) + 0.5) / 256.0)).astype(np.int16)


def _frames(field, robot, camera, times, pose_at, camera_pose_at, exposure_s, noise_sigma,
            seed, floor_seed, samples_per_px, floor_texel_m, quiet_modules):
    rays = camera_rays(camera)
    parts = robot_parts(robot, quiet_modules)
    lut = _noise_table(noise_sigma) if noise_sigma > 0 else None
    shape = (camera.height_px, camera.width_px, 3)
    tex = None
    key = None
    floor_img = None
    for i, t in enumerate(times):
        top = camera_pose_at(float(t))
        bottom = camera_pose_at(float(t) + camera.readout_s) if camera.readout_s > 0 else top
        new_key = tuple(np.asarray(a, float).tobytes() for a in (*top, *bottom))
        if new_key != key:
            cam = _camera_rows(top, bottom, camera.height_px)
            if tex is None:
                texel = floor_texel_m or _choose_texel(camera, cam, rays)
                tex = floor_texture(field, floor_seed, float(texel))
            floor_img = _render_floor(tex, cam, rays, camera)
            key = new_key
        frame = floor_img.copy()
        _draw_robot(frame, parts, rays, cam, camera, float(t), pose_at, exposure_s,
                    samples_per_px)
        if lut is not None:
            rng = np.random.default_rng([seed, i])
            idx = np.frombuffer(rng.bytes(frame.size), np.uint8).reshape(shape)
            frame = cv2.add(frame, cv2.LUT(idx, lut), dtype=cv2.CV_8U)
        yield frame
