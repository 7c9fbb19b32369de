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
* the floor is looked up in a mip-mapped texture at the pixel's footprint (trilinear).
  A tripod's floor is drawn once, with 3 x 3 rays per pixel, and only the robot's
  region of interest is redrawn per frame. A hand-held camera's floor is redrawn every
  frame from rays on a 4-pixel grid (interpolated; < 0.1 px), per-row camera poses
  (rolling shutter), and averaged over sub-exposure times when the camera moves more
  than 0.5 px during the exposure (the robot itself is cast with the mid-exposure
  camera pose);
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

from ..errors import InputError
from ..profiles import CameraProfile, FieldProfile, RobotProfile
from .render_floor import (
    FloorTexture,
    floor_texture,
    footprint_level,
    sample_floor,
    texel_coords,
)
from .render_robot import (
    SHADOW_DEPTH,
    cast,
    face_brightness,
    floor_light,
    part_corners,
    resolve,
    robot_parts,
    shadow_corners,
)

__all__ = ["RenderSettings", "render_frames", "camera_rays", "floor_points"]

MAX_BLOCK_SAMPLES = 1_500_000
"""Ray samples cast at once (bounds memory when the robot fills the picture)."""
MIN_SAMPLES = 8
"""Least samples per pixel in the robot's region: with 8, a static marker's corners come
out within 0.15 px of cv2.projectPoints (0.35 px with 4; measured with cv2.aruco's
AprilTag refinement)."""
COARSE_STEP_PX = 4
"""Grid spacing of the floor map for a moving camera [px]."""
FLOOR_SUPERSAMPLE = 3
"""Samples per pixel side for the floor of a static camera (drawn once)."""
CAMERA_BLUR_STEP_PX = 0.5
"""A moving camera's floor is averaged over one exposure at sub-times this many pixels
of image motion apart (none when it moves less during the exposure) [px]."""
MIN_TEXEL_M = 0.001
"""Finest floor texture resolution chosen automatically [m]: the surface texture's
grain is 1.5 mm, and 1 mm texels keep a 6 x 6 tile field's mip atlas under 200 MB."""
RAY_TOLERANCE_PX = 0.01
"""Largest allowed reprojection error of an undistorted pixel ray [px]."""
MAX_FLOOR_DISTANCE_M = 80.0
"""Rays that meet the floor farther than this see the plain surround colour [m]."""


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
    # the inverse must hold: rays projected by OpenCV land back on their pixels (in
    # chunks: projectPoints also returns a Jacobian of 30 numbers per point)
    err = np.empty(len(und))
    for a in range(0, len(und), 65536):
        chunk = und[a:a + 65536, 0]
        back = cv2.projectPoints(np.column_stack([chunk, np.ones(len(chunk))]), np.zeros(3),
                                 np.zeros(3), camera.matrix, camera.dist_coeffs)[0][:, 0]
        err[a:a + len(chunk)] = np.hypot(*(back - pts[a:a + len(chunk), 0]).T)
    if not np.all(err < RAY_TOLERANCE_PX):
        i = int(np.nanargmax(np.where(np.isfinite(err), err, np.inf)))
        raise InputError(
            f"{camera.path or 'camera profile'}: the lens distortion cannot be inverted at "
            f"pixel ({i % w}, {i // w}) (error {err[i]:.3g} px); check the distortion "
            "coefficients"
        )
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


# ---------------------------------------------------------------- robot per frame
def sample_pattern(k: int):
    """Sub-pixel offsets (k, 2) [px] and exposure fractions (k,) in [-0.5, 0.5].

    The samples come in pairs mirrored through the pixel centre and the row's
    mid-exposure, ``(o, t)`` and ``(-o, -t)`` (an odd k adds the centre at
    mid-exposure), so the time-averaged picture of a moving edge is symmetric about its
    mid-exposure place: the box blur of a step moving at constant speed crosses 50 %
    where the edge was at mid-exposure (closed form). Pairing each offset with one time
    of a permuted stratum instead tied the sub-pixel place to the time, and a moving
    marker came out about 1 ms early at 8 ms exposure.
    """
    if k == 1:
        return np.zeros((1, 2)), np.zeros(1)
    m = k // 2
    if m == 2:  # rotated grid (common practice for 4x anti-aliasing), mirrored pairs
        offs = np.array([[-0.125, -0.375], [0.375, -0.125]])
    else:  # R2 low-discrepancy sequence (plastic-number constants), centred
        g = 1.32471795724474602596
        i = np.arange(m)[:, None]
        offs = np.mod(0.5 + i * np.array([1 / g, 1 / g**2]), 1.0) - 0.5
        offs = offs - offs.mean(axis=0)
    step = max(1, int(round(m * 0.618)))
    while math.gcd(step, m) != 1:
        step += 1
    half = ((np.arange(m) * step) % m + 0.5) / (2 * m)  # strata of (0, 0.5)
    offs = np.vstack([offs, -offs])
    frac = np.concatenate([half, -half])
    if k % 2:
        offs = np.vstack([offs, np.zeros((1, 2))])
        frac = np.append(frac, 0.0)
    return offs, frac


def _to_floor(points_body, poses):
    """Body-frame points (P, 3) at poses (N, 3) -> floor points (N * P, 3)."""
    c, s = np.cos(poses[:, 2])[:, None], np.sin(poses[:, 2])[:, None]
    bx, by = points_body[:, 0][None], points_body[:, 1][None]
    wx = poses[:, 0, None] + c * bx - s * by
    wy = poses[:, 1, None] + s * bx + c * by
    return np.stack([wx.ravel(), wy.ravel(), np.tile(points_body[:, 2], len(poses))], axis=1)


def _image_boxes(parts, poses, cam_poses, camera):
    """Pixel bounding box (u0, v0, u1, v1) of every part over the poses, shape (P + 1, 4).

    Boxes, then plates, then the floor patch of the contact shadow.

    A part with a corner behind (or almost at) the camera gets the whole image.
    """
    corners = [part_corners(p) for p in parts.boxes + parts.plates] + [shadow_corners(parts)]
    body = np.concatenate(corners)
    pts = _to_floor(body, poses)
    n_pose, n_pt = len(poses), len(body)
    full = np.array([0.0, 0.0, camera.width_px, camera.height_px])
    boxes = np.tile([np.inf, np.inf, -np.inf, -np.inf], (len(corners), 1))
    owner = np.repeat(np.arange(len(corners)), [len(c) for c in corners])
    for rvec, tvec in cam_poses:
        zc = (pts @ cv2.Rodrigues(rvec)[0].T + tvec)[:, 2].reshape(n_pose, n_pt)
        uv = cv2.projectPoints(pts, rvec, tvec, camera.matrix,
                               camera.dist_coeffs)[0][:, 0].reshape(n_pose, n_pt, 2)
        for j in range(len(corners)):
            sel = owner == j
            if np.any(zc[:, sel] < 0.05) or not np.all(np.isfinite(uv[:, sel])):
                boxes[j] = full
                continue
            u, v = uv[:, sel, 0], uv[:, sel, 1]
            boxes[j] = [min(boxes[j, 0], u.min()), min(boxes[j, 1], v.min()),
                        max(boxes[j, 2], u.max()), max(boxes[j, 3], v.max())]
    return boxes


def _draw_robot(frame, parts, rays, cam, camera, t_frame, pose_at, exposure_s, k_samples):
    """Ray cast the robot over its region of interest and blend it into ``frame``."""
    h, w = camera.height_px, camera.width_px
    readout = camera.readout_s
    span = np.linspace(t_frame - 0.5 * exposure_s, t_frame + readout + 0.5 * exposure_s, 9)
    cam_poses = [(cam.rvec, cam.tvec)]
    if cam.rt.shape[0] > 1:
        rot = cam.rt[-1].T
        cam_poses.append((cv2.Rodrigues(rot)[0].ravel(), -rot @ cam.centre[-1]))
    boxes = _image_boxes(parts, _checked_poses(pose_at, span), cam_poses, camera)
    pad = 2
    boxes = np.column_stack([np.floor(boxes[:, :2]) - pad, np.ceil(boxes[:, 2:]) + pad + 1])
    boxes = np.clip(boxes, 0, [w, h, w, h]).astype(int)
    if parts.shadow_depth > 0:
        _shade_floor(frame, parts, rays, cam, camera, t_frame, pose_at, boxes[-1])
    boxes = boxes[:-1]
    c0, r0 = boxes[:, 0].min(), boxes[:, 1].min()
    c1, r1 = boxes[:, 2].max(), boxes[:, 3].max()
    if c1 <= c0 or r1 <= r0:
        return False
    if k_samples is None:
        blur_px = _blur_px(parts, pose_at, t_frame, exposure_s, cam_poses[0], camera)
        k_samples = int(np.clip(4 * math.ceil(blur_px / 3.0), MIN_SAMPLES, 32))
    offs, frac = sample_pattern(k_samples)
    # bounded memory: blocks of rows with at most MAX_BLOCK_SAMPLES ray samples each
    step = max(1, MAX_BLOCK_SAMPLES // (len(frac) * (c1 - c0)))
    drawn = False
    for a in range(r0, r1, step):
        b = min(a + step, r1)
        windows = [(slice(max(bx[1], a) - a, max(min(bx[3], b), bx[1], a) - a),
                    slice(bx[0] - c0, max(bx[2], bx[0]) - c0)) for bx in boxes]
        drawn |= _cast_rows(frame, parts, rays, cam, camera, t_frame, pose_at, exposure_s,
                            offs, frac, (a, b, c0, c1), windows)
    return drawn


def _shade_floor(frame, parts, rays, cam, camera, t_frame, pose_at, box):
    """Darken the floor around the chassis (contact shadow), one ray per pixel centre.

    The shadow is soft (centimetres), so the robot pose at each row's mid-exposure
    read time stands in for the exposure and the pixel area.
    """
    c0, r0, c1, r1 = (int(v) for v in box)
    if c1 <= c0 or r1 <= r0:
        return
    win = (slice(r0, r1), slice(c0, c1))
    rt, centre = cam.rows(r0, r1)
    dfx, dfy, dfz = _floor_dirs(rt, rays.xn[win], rays.yn[win])
    t_rows = t_frame + np.arange(r0, r1) / camera.height_px * camera.readout_s
    pose = _checked_poses(pose_at, t_rows)
    cth, sth = np.cos(pose[:, 2])[:, None], np.sin(pose[:, 2])[:, None]
    cen = np.broadcast_to(centre, (r1 - r0, 3))
    rel_x = cen[:, 0, None] - pose[:, 0, None]
    rel_y = cen[:, 1, None] - pose[:, 1, None]
    origin = ((cth * rel_x + sth * rel_y).astype(np.float32),
              (cth * rel_y - sth * rel_x).astype(np.float32),
              cen[:, 2, None].astype(np.float32))
    cth, sth = cth.astype(np.float32), sth.astype(np.float32)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        light = floor_light(parts, origin, (cth * dfx + sth * dfy, cth * dfy - sth * dfx, dfz))
    light = np.where(dfz < 0, light, np.float32(1))
    frame[win] = np.minimum(frame[win] * light[..., None] + np.float32(0.5), 255).astype(
        np.uint8)


def _cast_rows(frame, parts, rays, cam, camera, t_frame, pose_at, exposure_s, offs, frac,
               block, windows):
    """Ray cast the robot in rows r0:r1, columns c0:c1 and blend it into ``frame``."""
    r0, r1, c0, c1 = block
    h = camera.height_px
    k = len(frac)
    # rays of every sample: first-order Taylor step from the pixel centre
    du = offs[:, 0, None, None].astype(np.float32)
    dv = offs[:, 1, None, None].astype(np.float32)
    win = (slice(r0, r1), slice(c0, c1))
    xs = rays.xn[win] + du * rays.dxn[0][win] + dv * rays.dxn[1][win]
    ys = rays.yn[win] + du * rays.dyn[0][win] + dv * rays.dyn[1][win]
    rt, centre = cam.rows(r0, r1)
    dfx, dfy, dfz = _floor_dirs(rt, xs, ys)
    # robot pose per (sample, row): rolling shutter plus exposure
    t_rows = t_frame + np.arange(r0, r1) / h * camera.readout_s
    t = (t_rows[None, :] + frac[:, None] * exposure_s).ravel()
    pose = _checked_poses(pose_at, t).reshape(k, r1 - r0, 3)
    cth, sth = np.cos(pose[..., 2]), np.sin(pose[..., 2])
    cen = np.broadcast_to(centre, (r1 - r0, 3))
    rel_x = cen[None, :, 0] - pose[..., 0]
    rel_y = cen[None, :, 1] - pose[..., 1]
    origin = ((cth * rel_x + sth * rel_y).astype(np.float32)[..., None],
              (cth * rel_y - sth * rel_x).astype(np.float32)[..., None],
              np.broadcast_to(cen[None, :, 2], (k, r1 - r0)).astype(np.float32)[..., None])
    cth = cth.astype(np.float32)[..., None]
    sth = sth.astype(np.float32)[..., None]
    direction = (cth * dfx + sth * dfy, cth * dfy - sth * dfx,
                 np.broadcast_to(dfz, (k,) + dfz.shape[-2:]))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        inverse = tuple(np.float32(1.0) / a for a in direction)
        sides = face_brightness(pose[..., 2])[..., None]
        material, shade = cast(parts, origin, direction, inverse, sides, windows)
    floor_share, colour = resolve(parts, material, shade)
    if floor_share.min() >= 1.0:
        return False
    out = frame[win].astype(np.float32) * floor_share + colour
    frame[win] = np.minimum(out + 0.5, 255.0).astype(np.uint8)
    return True


def _blur_px(parts, pose_at, t_frame, exposure_s, cam_pose, camera):
    """Largest image motion of the robot's part corners during one exposure [px]."""
    if exposure_s <= 0:
        return 0.0
    ends = _checked_poses(pose_at, np.array([t_frame - 0.5 * exposure_s,
                                             t_frame + 0.5 * exposure_s]))
    body = np.concatenate([part_corners(p) for p in parts.boxes + parts.plates])
    pts = _to_floor(body, ends)
    uv = cv2.projectPoints(pts, cam_pose[0], cam_pose[1], camera.matrix,
                           camera.dist_coeffs)[0][:, 0].reshape(2, len(body), 2)
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
    if cam.rt.shape[0] > 1:  # per-row poses: the top row's pose is enough here
        cam = _CameraRows(cam.rt[:1], cam.centre[:1], cam.rvec, cam.tvec)
    fx, fy, valid = _floor_hits(cam, rays.xn[::step, ::step], rays.yn[::step, ::step], 0, 1)
    level = footprint_level(np.where(valid, fx, np.nan), np.where(valid, fy, np.nan),
                            1.0, step)
    foot = 2.0 ** level[valid & (level != 0)]
    if foot.size == 0:
        return 0.004
    texel = 1.25 * float(np.percentile(foot, 1))
    return float(np.clip(round(texel * 1e4) / 1e4, MIN_TEXEL_M, 0.004))


def _render_floor(tex: FloorTexture, cam: _CameraRows, rays: CameraRays, camera,
                  exact: bool):
    """The floor as the camera sees it in one pose (per-row poses for a moving camera).

    ``exact``: floor point of every pixel from its own ray (a static camera, drawn
    once). Otherwise the floor points and mip levels come from the rays of a grid every
    ``COARSE_STEP_PX`` pixels, interpolated bilinearly (error below 0.1 px of floor
    position for the lenses and poses in benchmarks/render_speed.py).
    """
    h = camera.height_px
    step = COARSE_STEP_PX
    grid = _coarse_grid(camera)
    sub = cam
    if cam.rt.shape[0] > 1:
        rows = np.minimum(np.arange(grid.xn.shape[0]) * step, h - 1)
        sub = _CameraRows(cam.rt[rows], cam.centre[rows], cam.rvec, cam.tvec)
    cx, cy, cvalid = _floor_hits(sub, grid.xn, grid.yn, 0, grid.xn.shape[0])
    level = footprint_level(np.where(cvalid, cx, np.nan), np.where(cvalid, cy, np.nan),
                            tex.texel_m, step)
    if exact:
        # S x S samples per pixel, each filtered at 1/S of the pixel footprint: area
        # filtering that also holds at grazing views (anisotropic footprints)
        n = FLOOR_SUPERSAMPLE
        level = cv2.remap(level, grid.map_u, grid.map_v, cv2.INTER_LINEAR) - np.float32(
            math.log2(n))
        acc = np.zeros((h, camera.width_px, 3), np.float32)
        for dv in (np.arange(n) + 0.5) / n - 0.5:
            for du in (np.arange(n) + 0.5) / n - 0.5:
                xs = rays.xn + np.float32(du) * rays.dxn[0] + np.float32(dv) * rays.dxn[1]
                ys = rays.yn + np.float32(du) * rays.dyn[0] + np.float32(dv) * rays.dyn[1]
                fx, fy, valid = _floor_hits(cam, xs, ys, 0, h)
                acc += sample_floor(tex, *texel_coords(tex, fx, fy, valid), level)
        return np.minimum(acc * np.float32(1.0 / n**2) + np.float32(0.5), 255).astype(np.uint8)
    else:
        # texel coordinates interpolated; missed rays stand far beyond the texture edge
        mx, my = texel_coords(tex, cx, cy, cvalid)
        fine = cv2.remap(np.dstack([mx, my, level]), grid.map_u, grid.map_v, cv2.INTER_LINEAR)
        return sample_floor(tex, np.ascontiguousarray(fine[..., 0]),
                            np.ascontiguousarray(fine[..., 1]), np.ascontiguousarray(fine[..., 2]))


@dataclass(frozen=True)
class _CoarseGrid:
    xn: np.ndarray
    """Ray x/z on grid nodes every COARSE_STEP_PX pixels (covering the image)."""
    yn: np.ndarray
    map_u: np.ndarray
    """Grid column of each pixel (u / step), shape (H, W), float32."""
    map_v: np.ndarray


@functools.lru_cache(maxsize=4)
def _coarse_grid(camera: CameraProfile) -> _CoarseGrid:
    step = COARSE_STEP_PX
    nu = (camera.width_px - 1) // step + 2
    nv = (camera.height_px - 1) // step + 2
    u, v = np.meshgrid(np.arange(nu) * float(step), np.arange(nv) * float(step))
    pts = np.stack([u.ravel(), v.ravel()], axis=1)[:, None, :]
    crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-12)
    und = cv2.undistortPoints(pts, camera.matrix, camera.dist_coeffs, None, np.eye(3),
                              np.eye(3), crit)
    mu, mv = np.meshgrid(np.arange(camera.width_px, dtype=np.float32) / step,
                         np.arange(camera.height_px, dtype=np.float32) / step)
    return _CoarseGrid(und[:, 0, 0].reshape(nv, nu), und[:, 0, 1].reshape(nv, nu), mu, mv)


# ---------------------------------------------------------------- public API
@dataclass(frozen=True)
class RenderSettings:
    """Exposure, noise, seeds and sampling of the synthetic camera."""

    exposure_s: float = 0.0
    """Exposure time of each row [s] (0: no motion blur)."""
    noise_sigma: float = 0.0
    """Standard deviation of the sensor noise [grey levels]."""
    seed: int = 0
    """Seed of the sensor noise (frame ``i`` uses the generator seeded ``[seed, i]``)."""
    floor_seed: int = 0
    """Seed of the floor's tile colours and surface texture."""
    samples_per_px: int | None = None
    """Samples per pixel in the robot's region (space and exposure time). Default: 8,
    raised with the motion blur length (one sample per ~0.75 px, at most 32)."""
    floor_texel_m: float | None = None
    """Floor texture resolution [m]; default from the finest floor footprint in view."""
    quiet_modules: int = 1
    """White border around each printed marker [modules]."""
    contact_shadow: float = SHADOW_DEPTH
    """Darkening of the floor at the chassis edge, fading over a few centimetres
    (ambient occlusion under the robot); 0 for none."""


def render_frames(field: FieldProfile, robot: RobotProfile, camera: CameraProfile, *,
                  frame_times_s, pose_at: Callable, camera_pose_at: Callable,
                  settings: RenderSettings | None = None) -> Iterator[np.ndarray]:
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
    settings : RenderSettings, optional
        Exposure [s], noise [grey levels], seeds, sampling (default: no blur, no noise).

    Yields
    ------
    ndarray of shape (height_px, width_px, 3), uint8
        BGR frame.
    """
    st = settings or RenderSettings()
    times = np.asarray(frame_times_s, dtype=float).ravel()
    if not np.all(np.isfinite(times)):
        raise InputError("render: frame_times_s must be finite")
    if st.exposure_s < 0 or st.noise_sigma < 0:
        raise InputError("render: exposure_s and noise_sigma must not be negative")
    if st.samples_per_px is not None and st.samples_per_px < 1:
        raise InputError("render: samples_per_px must be at least 1")
    if st.seed < 0 or st.floor_seed < 0:
        raise InputError("render: seed and floor_seed must not be negative")
    return _frames(field, robot, camera, times, pose_at, camera_pose_at,
                   float(st.exposure_s), float(st.noise_sigma), int(st.seed),
                   int(st.floor_seed), st.samples_per_px, st.floor_texel_m, st.quiet_modules,
                   st.contact_shadow)


def _checked_camera_pose(camera_pose_at, t):
    rvec, tvec = camera_pose_at(t)
    rvec = np.asarray(rvec, float).reshape(-1)
    tvec = np.asarray(tvec, float).reshape(-1)
    if rvec.size != 3 or tvec.size != 3 or not np.all(np.isfinite(np.r_[rvec, tvec])):
        raise InputError(f"render: camera_pose_at({t:.4f}) must return finite rvec, tvec "
                         "of 3 numbers each (floor -> camera, OpenCV convention)")
    return rvec, tvec


def _blurred_floor(floor_img, tex, rays, camera, t, exposure_s, pose_key):
    """Average the floor over the exposure when the camera moves enough during it."""
    h, w = camera.height_px, camera.width_px
    (rv0, tv0), _, _ = pose_key(t - 0.5 * exposure_s)
    (rv1, tv1), _, _ = pose_key(t + 0.5 * exposure_s)
    # image motion of the floor points seen at 9 spots of the image
    spots_v, spots_u = np.meshgrid([h // 4, h // 2, 3 * h // 4], [w // 4, w // 2, 3 * w // 4])
    cam0 = _camera_rows((rv0, tv0), (rv0, tv0), h)
    fx, fy, ok = _floor_hits(cam0, rays.xn[spots_v, spots_u], rays.yn[spots_v, spots_u], 0, 1)
    if not ok.any():
        return floor_img
    pts = np.column_stack([fx[ok], fy[ok], np.zeros(ok.sum())])
    uv0 = cv2.projectPoints(pts, rv0, tv0, camera.matrix, camera.dist_coeffs)[0][:, 0]
    uv1 = cv2.projectPoints(pts, rv1, tv1, camera.matrix, camera.dist_coeffs)[0][:, 0]
    blur_px = float(np.max(np.hypot(*(uv1 - uv0).T)))
    n = min(int(math.ceil(blur_px / CAMERA_BLUR_STEP_PX)), 8)
    if n <= 1:
        return floor_img
    acc = np.zeros(floor_img.shape, np.float32)
    for frac in (np.arange(n) + 0.5) / n - 0.5:
        top, bottom, _ = pose_key(t + frac * exposure_s)
        acc += _render_floor(tex, _camera_rows(top, bottom, h), rays, camera, False)
    return np.minimum(acc * np.float32(1.0 / n) + np.float32(0.5), 255).astype(np.uint8)


def _noise_table(sigma):
    """Grey-level noise of 256 equiprobable levels: round(sigma * Phi^-1((i + 0.5) / 256))."""
    return np.round(sigma * ndtri((np.arange(256) + 0.5) / 256.0)).astype(np.int16)


def _frames(field, robot, camera, times, pose_at, camera_pose_at, exposure_s, noise_sigma,
            seed, floor_seed, samples_per_px, floor_texel_m, quiet_modules, contact_shadow):
    rays = camera_rays(camera)
    parts = robot_parts(robot, quiet_modules, contact_shadow)
    lut = _noise_table(noise_sigma) if noise_sigma > 0 else None
    shape = (camera.height_px, camera.width_px, 3)
    tex = None
    key = None
    floor_img = None

    def pose_key(t):
        top = _checked_camera_pose(camera_pose_at, float(t))
        bottom = (_checked_camera_pose(camera_pose_at, float(t) + camera.readout_s)
                  if camera.readout_s > 0 else top)
        return top, bottom, tuple(a.tobytes() for a in (*top, *bottom))

    # a camera that is still at the first and last frame is taken as a tripod: floor
    # drawn exactly; otherwise (hand-held) the fast interpolated floor every frame
    exact = times.size == 0 or pose_key(times[0])[2] == pose_key(times[-1])[2]
    for i, t in enumerate(times):
        top, bottom, new_key = pose_key(t)
        if new_key != key:
            cam = _camera_rows(top, bottom, camera.height_px)
            if tex is None:
                texel = floor_texel_m or _choose_texel(camera, cam, rays)
                tex = floor_texture(field, floor_seed, float(texel))
            exact = exact and key is None
            floor_img = _render_floor(tex, cam, rays, camera, exact)
            key = new_key
            if not exact and exposure_s > 0:
                floor_img = _blurred_floor(floor_img, tex, rays, camera, float(t), exposure_s,
                                           pose_key)
        frame = floor_img.copy()
        _draw_robot(frame, parts, rays, cam, camera, float(t), pose_at, exposure_s,
                    samples_per_px)
        if lut is not None:
            rng = np.random.default_rng([seed, i])
            idx = np.frombuffer(rng.bytes(frame.size), np.uint8).reshape(shape)
            frame = cv2.add(frame, cv2.LUT(idx, lut), dtype=cv2.CV_8U)
        yield frame
