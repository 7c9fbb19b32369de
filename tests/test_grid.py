"""Automatic tile grid on synthetic floor views with a known camera.

The views are made here, independently of the project's renderer: a tile texture is
drawn in floor coordinates and every image pixel is traced back through OpenCV's lens
model (``cv2.undistortPoints``) and the known pose to the floor, so the true camera is
exactly known and the check is against OpenCV's projection, not our own.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest

from vidodo.errors import CalibrationError
from vidodo.profiles import CameraProfile, FieldProfile, FloorMarker
from vidodo.registration import grid
from vidodo.registration.grid import lattice
from vidodo.synth.motion import look_at_pose

MM_PER_TEXEL = 2.0


def look_at(camera_m, target_m):
    """OpenCV rvec, tvec (floor -> camera) of a camera at ``camera_m`` looking at target."""
    r, t = look_at_pose(camera_m, target_m)
    return cv2.Rodrigues(r)[0].ravel(), t


def tile_texture(field, *, margin_m=0.45, seam_mm=4.0, seed=1, markers=()):
    """Floor texture: grey foam tiles with fine grain, dark seams, a darker surround.

    Returns the texture (uint8) and the floor position of its texel (0, 0) [m].
    """
    rng = np.random.default_rng(seed)
    sx, sy = field.size_m
    res = MM_PER_TEXEL / 1000.0
    w = int(round((sx + 2 * margin_m) / res))
    h = int(round((sy + 2 * margin_m) / res))
    x = (np.arange(w) + 0.5) * res - margin_m
    y = (np.arange(h) + 0.5) * res - margin_m
    xx, yy = np.meshgrid(x, y)
    grain = cv2.GaussianBlur(rng.normal(0, 1, (h, w)).astype(np.float32), (0, 0), 2.5)
    grain *= 7 / grain.std()
    tex = np.full((h, w), 70.0, np.float32) + 0.6 * grain
    on = (xx >= 0) & (xx <= sx) & (yy >= 0) & (yy <= sy)
    shade = rng.uniform(-10, 10, (field.tiles_y + 1, field.tiles_x + 1))
    ti = np.clip((xx / field.tile_size_m).astype(int), 0, field.tiles_x)
    tj = np.clip((yy / field.tile_size_m).astype(int), 0, field.tiles_y)
    tex[on] = 150.0 + shade[tj[on], ti[on]] + grain[on]
    half = seam_mm / 2000.0
    fx = np.abs(xx / field.tile_size_m - np.round(xx / field.tile_size_m)) * field.tile_size_m
    fy = np.abs(yy / field.tile_size_m - np.round(yy / field.tile_size_m)) * field.tile_size_m
    seam = on & ((fx < half) | (fy < half))
    tex[seam] = 95.0 + 0.3 * grain[seam]
    tex = np.clip(tex, 0, 255).astype(np.uint8)
    for m in markers:  # floor fiducials, drawn axis-aligned (yaw 0)
        dic = cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, m.family))
        side = int(round(m.size_m / res))
        img = cv2.aruco.generateImageMarker(dic, m.id, side)
        img = np.flipud(img)  # texture rows run along +y; the printed top is +y
        border = int(side * 0.25)
        u0 = int(round((m.x_m + margin_m) / res)) - side // 2
        v0 = int(round((m.y_m + margin_m) / res)) - side // 2
        tex[v0 - border:v0 + side + border, u0 - border:u0 + side + border] = 255
        tex[v0:v0 + side, u0:u0 + side] = img
    return tex, np.array([-margin_m, -margin_m])


def render_view(texture, origin_m, camera: CameraProfile, rvec, tvec, *, noise=1.5, seed=2,
                supersample=2):
    """Image of the textured floor through OpenCV's camera model (greyscale uint8)."""
    rng = np.random.default_rng(seed)
    w, h = camera.width_px * supersample, camera.height_px * supersample
    u, v = np.meshgrid((np.arange(w) + 0.5) / supersample - 0.5,
                       (np.arange(h) + 0.5) / supersample - 0.5)
    pix = np.column_stack([u.ravel(), v.ravel()]).astype(np.float64)
    norm = cv2.undistortPoints(pix.reshape(-1, 1, 2), camera.matrix,
                               camera.dist_coeffs).reshape(-1, 2)
    r = cv2.Rodrigues(np.asarray(rvec, float))[0]
    rays = np.column_stack([norm, np.ones(len(norm))]) @ r
    c = -r.T @ np.asarray(tvec, float)
    s = -c[2] / rays[:, 2]
    fl = c[:2] + s[:, None] * rays[:, :2]
    fl[s <= 0] = -1e3
    res = MM_PER_TEXEL / 1000.0
    mx = ((fl[:, 0] - origin_m[0]) / res - 0.5).reshape(h, w).astype(np.float32)
    my = ((fl[:, 1] - origin_m[1]) / res - 0.5).reshape(h, w).astype(np.float32)
    img = cv2.remap(texture, mx, my, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                    borderValue=200)
    img = cv2.resize(img.astype(np.float32), (camera.width_px, camera.height_px),
                     interpolation=cv2.INTER_AREA)
    img += rng.normal(0, noise, img.shape)
    return np.clip(np.round(img), 0, 255).astype(np.uint8)


FIELD = FieldProfile(tiles_x=6, tiles_y=6, tile_size_m=0.6)
CAM = CameraProfile(1280, 720, 1000.0, 1000.0, 642.0, 357.0, (-0.12, 0.03, 0, 0, 0))


def tripod_pose(field=FIELD, *, back_m=2.0, height_m=2.4, side_m=0.0):
    sx, sy = field.size_m
    return look_at([sx / 2 + side_m, -back_m, height_m], [sx / 2, sy * 0.45, 0.0])


def corner_error_mm(reg, camera, rvec, tvec, field=FIELD):
    """RMS floor error at every tile corner: true pixel -> registered floor vs truth."""
    corners = field.tile_corners_m()
    px = cv2.projectPoints(np.column_stack([corners, np.zeros(len(corners))]), rvec, tvec,
                           camera.matrix, camera.dist_coeffs)[0].reshape(-1, 2)
    est = reg.image_to_floor(px)
    return float(np.sqrt(np.mean(np.sum((est - corners) ** 2, axis=1)))) * 1e3


@pytest.fixture(scope="module")
def tripod_view():
    tex, org = tile_texture(FIELD)
    rvec, tvec = tripod_pose()
    return render_view(tex, org, CAM, rvec, tvec), rvec, tvec


def test_grid_with_known_lens_meets_2mm(tripod_view):
    """Floor error at tile corners below 2 mm RMS (our target, tripod)."""
    from vidodo.registration.camera_fit import fit_to_registration

    img, rvec, tvec = tripod_view
    g = grid.find_grid(img, FIELD, camera=CAM)
    reg = fit_to_registration(0.0, g.fit, "grid")
    assert g.origin == "near-left"
    assert corner_error_mm(reg, CAM, rvec, tvec) < 2.0
    assert reg.rms_px < 0.5


def test_grid_without_lens_estimates_focal_and_distortion(tripod_view):
    from vidodo.registration.camera_fit import fit_to_registration

    img, rvec, tvec = tripod_view
    g = grid.find_grid(img, FIELD, camera=None)
    reg = fit_to_registration(0.0, g.fit, "grid")
    assert abs(reg.camera_matrix[0, 0] / CAM.fx_px - 1) < 0.03
    assert abs(reg.dist_coeffs[0] - CAM.distortion[0]) < 0.04
    assert corner_error_mm(reg, CAM, rvec, tvec) < 2.0


@pytest.mark.parametrize("hint", ["near-right", "far-right", "far-left"])
def test_origin_hint_rotates_floor_frame(tripod_view, hint):
    """The hinted corner becomes (0, 0); the frame stays right-handed (camera above)."""
    from vidodo.registration.camera_fit import fit_to_registration

    img, rvec, tvec = tripod_view
    field = FieldProfile(6, 6, 0.6, origin_hint=hint)
    reg = fit_to_registration(0.0, grid.find_grid(img, field, camera=CAM).fit, "grid")
    sx, sy = FIELD.size_m
    true_corner = {"near-right": (sx, 0), "far-right": (sx, sy), "far-left": (0, sy)}[hint]
    px = cv2.projectPoints(np.array([[*true_corner, 0.0]]), rvec, tvec, CAM.matrix,
                           CAM.dist_coeffs)[0].reshape(-1, 2)
    np.testing.assert_allclose(reg.image_to_floor(px)[0], [0, 0], atol=0.005)
    assert reg.camera_centre_m[2] > 0


def test_floor_marker_overrides_hint():
    marker = FloorMarker(id=3, family="DICT_4X4_50", size_m=0.2, x_m=2.7, y_m=0.9)
    field = FieldProfile(6, 6, 0.6, origin_hint="far-right", floor_markers=(marker,))
    tex, org = tile_texture(field, markers=(marker,))
    rvec, tvec = tripod_pose(field)
    img = render_view(tex, org, CAM, rvec, tvec)
    g = grid.find_grid(img, field, camera=CAM)
    assert g.origin == "near-left" and g.origin_from == "floor marker"


def test_non_square_field_and_wrong_counts():
    field = FieldProfile(6, 4, 0.6)
    tex, org = tile_texture(field)
    rvec, tvec = tripod_pose(field)
    img = render_view(tex, org, CAM, rvec, tvec)
    from vidodo.registration.camera_fit import fit_to_registration

    reg = fit_to_registration(0.0, grid.find_grid(img, field, camera=CAM).fit, "grid")
    assert corner_error_mm(reg, CAM, rvec, tvec, field) < 2.0
    # The same floor with the counts swapped cannot be right-handed from near-left.
    with pytest.raises(CalibrationError, match="tiles_x"):
        grid.find_grid(img, FieldProfile(4, 6, 0.6), camera=CAM)


def test_blank_frame_is_refused():
    with pytest.raises(CalibrationError, match="grid"):
        grid.find_grid(np.full((720, 1280), 120, np.uint8), FIELD)


def test_seam_samples_subpixel_on_straight_seams():
    """Seams seen straight from above are located within 0.1 px RMS (true camera)."""
    from vidodo.registration.frame import FrameRegistration

    field = FieldProfile(3, 3, 0.4)
    cam = CameraProfile(800, 800, 600.0, 600.0, 399.5, 399.5)
    rvec, tvec = look_at([0.6, 0.6, 1.5], [0.6, 0.6001, 0.0])
    tex, org = tile_texture(field, margin_m=0.4)
    img = render_view(tex, org, cam, rvec, tvec, noise=0.5, supersample=1)
    truth = FrameRegistration(0.0, True, cam.matrix, cam.dist_coeffs, rvec, tvec, 0, 0, 0, "")
    q, ax, val = grid.seam_samples(img, field, truth, search=grid.SeamSearch(half_width_px=6))
    assert len(q) > 100
    back = truth.image_to_floor(q)
    err_px = (back[np.arange(len(q)), ax] - val) * 600.0 / 1.5
    assert np.sqrt(np.mean(err_px ** 2)) < 0.15  # grain-limited at 2.5 mm per pixel
    assert math.isfinite(float(err_px.mean()))


def test_distort_matches_opencv_projection():
    """The lattice search's vectorised lens model equals ``cv2.projectPoints`` (OpenCV's
    own implementation of its model) for 5- and 8-term distortion vectors."""
    k = np.array([[1500.0, 0, 960.0], [0, 1490.0, 540.0], [0, 0, 1.0]])
    norm = np.random.default_rng(3).uniform(-0.8, 0.8, (500, 2))
    obj = np.column_stack([norm, np.ones(len(norm))])
    for dist in ([-0.2, 0.05, 0.001, -0.002, 0.01],
                 [-0.2, 0.05, 0.001, -0.002, 0.01, 0.1, 0.01, 0.002]):
        dist = np.array(dist)
        ref = cv2.projectPoints(obj, np.zeros(3), np.zeros(3), k, dist)[0].reshape(-1, 2)
        np.testing.assert_allclose(lattice.distort(norm, k, dist), ref, atol=1e-6)


def test_grid_on_full_hd_frame_meets_2mm():
    """A 1920 x 1080 frame takes the shrunk lattice search, then the full-resolution seam
    fit: the floor error at tile corners stays below 2 mm RMS (our target)."""
    from vidodo.registration.camera_fit import fit_to_registration

    cam = CameraProfile(1920, 1080, 1500.0, 1500.0, 963.0, 536.0, (-0.12, 0.03, 0, 0, 0))
    assert math.hypot(cam.width_px, cam.height_px) * 0.9 > grid.LATTICE_DIAG_PX
    tex, org = tile_texture(FIELD)
    rvec, tvec = tripod_pose()
    img = render_view(tex, org, cam, rvec, tvec, supersample=1)
    g = grid.find_grid(img, FIELD, camera=cam)
    reg = fit_to_registration(0.0, g.fit, "grid")
    assert g.origin == "near-left"
    assert corner_error_mm(reg, cam, rvec, tvec) < 2.0
    assert reg.rms_px < 0.5
