"""Renderer geometry against OpenCV's independent projection and marker detector.

References used here:
* ``cv2.projectPoints`` (OpenCV 5.0): the pinhole + radial/tangential distortion model
  the renderer must agree with (< 0.5 px);
* ``cv2.aruco.ArucoDetector`` with AprilTag edge refinement (OpenCV 5.0): finds the
  rendered fiducials and reports their corners independently of the renderer;
* rolling shutter closed form: a row read ``dt`` later sees a point moving at ``v``
  displaced by ``v dt``; seen straight down from height ``Z`` that is ``f v dt / Z``
  pixels (pinhole similar triangles, common practice).
"""

import dataclasses
import math

import cv2
import numpy as np
import pytest
from apriltag3 import apriltag3_corners
from numpy.testing import assert_allclose

from vidodo.profiles import (
    CameraProfile,
    FieldProfile,
    FloorMarker,
    Marker,
    RobotProfile,
    marker_corners_local,
)
from vidodo.synth.motion import look_at_pose
from vidodo.synth.render import RenderSettings, camera_rays, floor_points, render_frames

DIST = (-0.12, 0.05, 0.0008, -0.0006, -0.01)


def _look_at(centre, target):
    """Floor -> camera rvec, tvec for a camera at ``centre`` looking at ``target``."""
    rot, t = look_at_pose(centre, target)
    return cv2.Rodrigues(rot)[0].ravel(), t


def _robot(z_m=0.32, yaw_rad=0.0, family="DICT_4X4_50", size_m=0.16):
    return RobotProfile("test", 0.40, 0.36, 0.25,
                        (Marker(7, family, size_m, 0.02, -0.01, z_m, yaw_rad),), (), "t")


def _detect(img, family="DICT_4X4_50"):
    """Marker corners by cv2.aruco with AprilTag edge refinement, in OpenCV pixels.

    The AprilTag refinement puts pixel centres at (0.5, 0.5), OpenCV at (0, 0)
    (AprilRobotics/apriltag issue #121), so 0.5 px is subtracted.
    """
    dictionary = cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, family))
    params = cv2.aruco.DetectorParameters()
    params.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_APRILTAG
    corners, ids, _ = cv2.aruco.ArucoDetector(dictionary, params).detectMarkers(img)
    if ids is None:
        return {}
    return {int(i): c.reshape(4, 2) - 0.5 for i, c in zip(ids.ravel(), corners, strict=True)}


def _marker_corners_floor(marker, pose):
    """Marker corners in the floor frame (3D) for a robot floor pose (x, y, heading)."""
    local = marker_corners_local(marker.size_m)
    cy, sy = math.cos(marker.yaw_rad), math.sin(marker.yaw_rad)
    body = local @ np.array([[cy, sy], [-sy, cy]]) + [marker.x_m, marker.y_m]
    c, s = math.cos(pose[2]), math.sin(pose[2])
    floor = body @ np.array([[c, s], [-s, c]]) + pose[:2]
    return np.column_stack([floor, np.full(4, marker.z_m)])


def test_pixel_rays_reproject_onto_pixel_centres():
    """Every pixel's ray, projected by cv2.projectPoints, lands on that pixel (< 1e-3 px)."""
    cam = CameraProfile(320, 240, 260.0, 255.0, 161.3, 118.7, DIST)
    rays = camera_rays(cam)
    pts = np.stack([rays.xn.ravel(), rays.yn.ravel(), np.ones(rays.xn.size)], axis=1)
    uv = cv2.projectPoints(pts.astype(np.float64), np.zeros(3), np.zeros(3), cam.matrix,
                           cam.dist_coeffs)[0][:, 0]
    u, v = np.meshgrid(np.arange(320.0), np.arange(240.0))
    assert np.abs(uv - np.column_stack([u.ravel(), v.ravel()])).max() < 1e-3


def test_floor_points_project_back_to_their_pixels():
    """Floor points of the ray map, projected by cv2.projectPoints, return to the pixel."""
    cam = CameraProfile(320, 240, 260.0, 255.0, 161.3, 118.7, DIST)
    rvec, tvec = _look_at(np.array([1.0, -1.2, 1.6]), [1.2, 1.0, 0.0])
    xy = floor_points(cam, rvec, tvec)
    ok = np.isfinite(xy[..., 0])
    assert ok.mean() > 0.9
    pts = np.column_stack([xy[ok], np.zeros(ok.sum())])
    uv = cv2.projectPoints(pts, rvec, tvec, cam.matrix, cam.dist_coeffs)[0][:, 0]
    v, u = np.nonzero(ok)
    assert np.abs(uv - np.column_stack([u, v])).max() < 1e-3


def _static_frame(cam, field, robot, pose, rvec, tvec, **kw):
    gen = render_frames(field, robot, cam, frame_times_s=[0.0],
                        pose_at=lambda t: np.tile(pose, (np.size(t), 1)),
                        camera_pose_at=lambda t: (rvec, tvec), settings=RenderSettings(**kw))
    return next(iter(gen))


@pytest.mark.parametrize(("family", "z_m"), [("DICT_4X4_50", 0.32), ("DICT_APRILTAG_36h11", 0.32),
                                           ("DICT_4X4_50", 0.25)])
def test_rendered_markers_found_at_projected_corners(family, z_m):
    """Robot and floor markers found by cv2.aruco within 0.5 px of cv2.projectPoints.

    Static robot, no noise, no blur, lens with radial and tangential distortion; the
    marker on a mast, or lying flush on the chassis top (z = height = 0.25 m).
    """
    cam = CameraProfile(640, 360, 560.0, 560.0, 322.0, 178.0, DIST)
    fm = FloorMarker(3, family, 0.18, 1.45, 1.05, 0.4)
    field = FieldProfile(4, 4, 0.6096, floor_markers=(fm,))
    robot = _robot(z_m=z_m, yaw_rad=0.3, family=family)
    pose = np.array([0.75, 1.15, 0.5])
    rvec, tvec = _look_at(np.array([1.0, -0.6, 1.5]), [1.1, 1.0, 0.0])
    img = _static_frame(cam, field, robot, pose, rvec, tvec)
    found = _detect(img, family)
    assert set(found) == {3, 7}
    want_robot = cv2.projectPoints(_marker_corners_floor(robot.markers[0], pose), rvec, tvec,
                                   cam.matrix, cam.dist_coeffs)[0][:, 0]
    floor3 = np.column_stack([fm.corners_floor_m(), np.zeros(4)])
    want_floor = cv2.projectPoints(floor3, rvec, tvec, cam.matrix, cam.dist_coeffs)[0][:, 0]
    assert np.abs(found[7] - want_robot).max() < 0.5
    assert np.abs(found[3] - want_floor).max() < 0.5
    # the marker is big enough in the image for the check to mean something
    assert np.ptp(want_robot[:, 0]) > 40
    if family == "DICT_APRILTAG_36h11":
        # second, independent detector: the AprilTag 3 library (pupil-apriltags). Its
        # corners wrap counter-clockwise on screen starting top-right of the image
        # cv2.aruco draws (as observed here: TR, TL, BL, BR), and its pixel centres sit
        # at (0.5, 0.5) (AprilRobotics/apriltag issue #121)
        tags = {i: c[[1, 0, 3, 2]] - 0.5 for i, c in apriltag3_corners(img).items()}
        assert np.abs(tags[7] - want_robot).max() < 0.5
        assert np.abs(tags[3] - want_floor).max() < 0.5


def test_rolling_shutter_shears_a_sideways_moving_marker():
    """Lower rows see the robot later: corner shift = f v (v_row / H) t_readout / Z."""
    readout = 0.030
    cam = CameraProfile(640, 480, 600.0, 600.0, 320.0, 240.0, readout_s=readout)
    field = FieldProfile(4, 4, 0.6096)
    robot = _robot(z_m=0.30, size_m=0.20, yaw_rad=0.15)
    height = 1.8
    # straight down; camera x along floor +x, camera y along floor -y
    rvec = cv2.Rodrigues(np.diag([1.0, -1.0, -1.0]))[0].ravel()
    centre = np.array([1.2, 1.23, height])
    tvec = -np.diag([1.0, -1.0, -1.0]) @ centre
    speed = 2.0  # [m/s] along floor +x = image +u
    start = np.array([1.1, 1.2, 0.0])

    def pose_at(t):
        t = np.asarray(t, float)
        return np.column_stack([start[0] + speed * t, np.full(t.size, start[1]),
                                np.zeros(t.size)])

    gen = render_frames(field, robot, cam, frame_times_s=[0.0], pose_at=pose_at,
                        camera_pose_at=lambda t: (rvec, tvec))
    img = next(iter(gen))
    found = _detect(img)[7]
    static = cv2.projectPoints(_marker_corners_floor(robot.markers[0], start), rvec, tvec,
                               cam.matrix, cam.dist_coeffs)[0][:, 0]
    depth = height - robot.markers[0].z_m
    shift = cam.fx_px * speed * (static[:, 1] / cam.height_px) * readout / depth
    assert shift.max() > 10  # clearly visible shear
    assert np.abs(found[:, 0] - (static[:, 0] + shift)).max() < 0.5
    assert np.abs(found[:, 1] - static[:, 1]).max() < 0.5


def _assert_blur_ramp(profile, edge_u, width_px, half_px, plateau_px):
    """An edge near ``edge_u`` blurred by a box filter: a linear ramp ``width_px`` wide
    (its 10-90 % part spans 0.8 of it) whose 50 % point is the mid-exposure edge (frame
    time = mid-exposure). The ramp is sought within ``half_px`` of the edge, between
    plateaus ``plateau_px`` wide on either side."""
    e = int(round(edge_u))
    left = profile[e - half_px - plateau_px:e - half_px].mean()
    right = profile[e + half_px + 1:e + half_px + 1 + plateau_px].mean()
    frac = (profile[e - half_px:e + half_px + 1] - left) / (right - left)
    inside = np.flatnonzero((frac > 0.1) & (frac < 0.9))
    assert abs(inside.size / 0.8 - width_px) < 2.5
    u = np.arange(e - half_px, e + half_px + 1)
    assert abs(np.interp(0.5, frac, u) - edge_u) < 1.0


def test_motion_blur_ramp_matches_travel_during_exposure():
    """Exposure T blurs a sideways edge into a linear ramp f v T / Z px wide, centred on
    the edge's mid-exposure position (box-filter blur of a step, common practice)."""
    cam = CameraProfile(640, 480, 600.0, 600.0, 320.0, 240.0)
    field = FieldProfile(4, 4, 0.6096)
    robot = _robot(z_m=0.30, size_m=0.08)
    height = 1.8
    rot = np.diag([1.0, -1.0, -1.0])
    rvec = cv2.Rodrigues(rot)[0].ravel()
    tvec = -rot @ np.array([1.2, 1.2, height])
    speed, exposure = 1.5, 0.02

    def pose_at(t):
        t = np.asarray(t, float)
        return np.column_stack([1.2 + speed * t, np.full(t.size, 1.2), np.zeros(t.size)])

    def profile(exp):
        img = next(iter(render_frames(field, robot, cam, frame_times_s=[0.0], pose_at=pose_at,
                                      camera_pose_at=lambda t: (rvec, tvec),
                                      settings=RenderSettings(exposure_s=exp,
                                                              contact_shadow=0.0))))
        return img[225:256, :, 0].astype(float).mean(axis=0)  # blue: chassis vs grey floor

    sharp, blurred = profile(0.0), profile(exposure)
    # chassis right edge at mid-exposure: u = cx + f (L/2) / (Z - H)
    depth = height - robot.height_m
    edge_u = cam.cx_px + cam.fx_px * 0.5 * robot.length_m / depth
    assert abs(int(np.argmax(-np.diff(sharp[360:480]))) + 360.5 - edge_u) < 1.0
    _assert_blur_ramp(blurred, edge_u, cam.fx_px * speed * exposure / depth, 14, 11)


def test_same_seed_same_frames_and_noise_level():
    """Deterministic for a seed; the added noise has the requested sigma (+-10 %)."""
    cam = CameraProfile(320, 240, 260.0, 260.0, 160.0, 120.0)
    field = FieldProfile(4, 4, 0.6096)
    robot = _robot()
    pose = np.array([1.2, 1.2, 0.0])
    rvec, tvec = _look_at(np.array([1.2, -0.5, 1.5]), [1.2, 1.0, 0.0])
    clean = _static_frame(cam, field, robot, pose, rvec, tvec)
    a = _static_frame(cam, field, robot, pose, rvec, tvec, noise_sigma=3.0, seed=5)
    b = _static_frame(cam, field, robot, pose, rvec, tvec, noise_sigma=3.0, seed=5)
    c = _static_frame(cam, field, robot, pose, rvec, tvec, noise_sigma=3.0, seed=6)
    assert np.array_equal(a, b)
    assert not np.array_equal(a, c)
    d = a.astype(float) - clean
    mid = (clean > 20) & (clean < 235)
    # rounding to whole grey levels adds 1/12 to the variance (uniform quantisation
    # error, Sheppard 1898; common practice)
    assert_allclose(d[mid].std(), math.sqrt(3.0**2 + 1 / 12), rtol=0.1)


@pytest.mark.parametrize("n_frames", [1, 2])  # 1: floor drawn exactly; 2: moving-camera path
def test_panning_camera_rolling_shutter_on_floor_marker(n_frames):
    """A panning camera reads row v at t + (v / H) t_readout: a floor marker's corners
    sit where cv2.projectPoints puts them with the camera pose of their own row."""
    readout = 0.03
    cam = CameraProfile(640, 360, 500.0, 500.0, 321.0, 181.0, DIST, readout_s=readout)
    fm = FloorMarker(4, "DICT_4X4_50", 0.2, 1.3, 1.0, -0.2)
    field = FieldProfile(4, 4, 0.6096, floor_markers=(fm,))
    centre = np.array([1.2, -0.6, 1.5])

    def camera_pose_at(t):
        return _look_at(centre, [1.0 + 2.0 * t, 1.0, 0.0])

    gen = render_frames(field, _robot(), cam, frame_times_s=np.arange(n_frames) * 0.1,
                        pose_at=lambda t: np.tile([3.0, 3.0, 0.0], (np.size(t), 1)),
                        camera_pose_at=camera_pose_at)
    found = _detect(next(iter(gen)))[4]
    corners = np.column_stack([fm.corners_floor_m(), np.zeros(4)])
    still = cv2.projectPoints(corners, *camera_pose_at(0.0), cam.matrix,
                              cam.dist_coeffs)[0][:, 0]
    want = still.copy()
    for _ in range(3):  # each corner with the pose of the row it lands on
        for i in range(4):
            rv, tv = camera_pose_at(want[i, 1] / cam.height_px * readout)
            want[i] = cv2.projectPoints(corners[i:i + 1], rv, tv, cam.matrix,
                                        cam.dist_coeffs)[0][0, 0]
    assert np.abs(want - still).max() > 5  # the readout visibly moves the corners
    assert np.abs(found - want).max() < 0.5


def test_robot_right_under_the_camera_fills_the_view():
    """Camera 5 cm above the chassis top, looking down: every ray meets the chassis top
    or the mast/plate (chassis colour from render_robot.CHASSIS_BGR), none the floor."""
    from vidodo.synth.render_robot import CHASSIS_BGR

    cam = CameraProfile(160, 120, 60.0, 60.0, 80.0, 60.0)
    robot = RobotProfile("big", 2.0, 2.0, 0.25, (Marker(1, "DICT_4X4_50", 0.05, 0.5, 0.5,
                                                       0.4),), (), "t")
    rot = np.diag([1.0, -1.0, -1.0])
    rvec, tvec = cv2.Rodrigues(rot)[0].ravel(), -rot @ np.array([0.0, 0.0, 0.30])
    img = _static_frame(cam, FieldProfile(4, 4, 0.6096), robot, np.zeros(3), rvec, tvec)
    chassis = np.all(np.abs(img.astype(float) - CHASSIS_BGR) < 2, axis=2)
    assert chassis.mean() > 0.95


def test_robot_changes_only_pixels_inside_its_projected_outline():
    """Rendered with and without the robot, frames differ only inside the convex hull
    of the chassis, mast and plate corners projected by cv2.projectPoints (+1 px)."""
    cam = CameraProfile(320, 240, 280.0, 280.0, 160.0, 120.0, DIST)
    field = FieldProfile(4, 4, 0.6096)
    robot = _robot(z_m=0.45, yaw_rad=0.4)
    rvec, tvec = _look_at(np.array([1.2, -0.4, 1.4]), [1.2, 1.0, 0.0])
    pose = np.array([1.1, 1.0, 0.7])
    kw = {"contact_shadow": 0.0}
    with_robot = _static_frame(cam, field, robot, pose, rvec, tvec, **kw)
    without = _static_frame(cam, field, robot, np.array([50.0, 50.0, 0.0]), rvec, tvec, **kw)
    m = robot.markers[0]
    # the plate: 4 x 4 data + black border = 6 modules, plus 1 white module each side
    plate = _marker_corners_floor(dataclasses.replace(m, size_m=m.size_m * 8 / 6), pose)
    hl, hw = robot.length_m / 2, robot.width_m / 2
    # chassis box, and the same outline up to the plate (covers the mast)
    box = np.array([[x, y, z] for x in (-hl, hl) for y in (-hw, hw)
                    for z in (0.0, robot.height_m, m.z_m)])
    c, s = math.cos(pose[2]), math.sin(pose[2])
    box_floor = box[:, :2] @ np.array([[c, s], [-s, c]]) + pose[:2]
    pts = np.vstack([plate, np.column_stack([box_floor, box[:, 2]])])
    hull = cv2.convexHull(cv2.projectPoints(pts, rvec, tvec, cam.matrix,
                                            cam.dist_coeffs)[0][:, 0].astype(np.float32))
    changed = np.argwhere(np.any(with_robot != without, axis=2))
    dist = np.array([cv2.pointPolygonTest(hull, (float(u), float(v)), True)
                     for v, u in changed])
    assert changed.shape[0] > 500
    assert dist.min() > -1.5


def test_lens_that_cannot_be_inverted_is_refused():
    """k1 = -2 folds the image edge back inwards (radial factor 1 - 2 r^2 turns at
    r^2 = 1/6): no ray reprojects onto the corner pixels, so the camera is refused."""
    from vidodo.errors import InputError

    cam = CameraProfile(320, 240, 150.0, 150.0, 160.0, 120.0, (-2.0, 0.0, 0.0, 0.0, 0.0))
    with pytest.raises(InputError, match="cannot be inverted"):
        camera_rays(cam)


def test_moving_camera_blurs_the_floor_by_its_travel():
    """A camera gliding sideways at v during exposure T smears a floor edge into a ramp
    f v T / Z px wide centred on the mid-exposure position (box-filter blur, common
    practice), like the robot's blur but from the camera's own motion."""
    cam = CameraProfile(640, 480, 600.0, 600.0, 320.0, 240.0)
    fm = FloorMarker(2, "DICT_4X4_50", 0.3, 1.2, 1.23, 0.0)
    field = FieldProfile(4, 4, 0.6096, floor_markers=(fm,))
    height, speed, exposure = 1.5, 1.0, 0.02
    rot = np.diag([1.0, -1.0, -1.0])  # straight down: image u along floor +x

    def camera_pose_at(t):
        return cv2.Rodrigues(rot)[0].ravel(), -rot @ np.array([1.2 + speed * t, 1.23, height])

    gen = render_frames(field, _robot(), cam, frame_times_s=[0.0, 0.1],
                        pose_at=lambda t: np.tile([9.0, 9.0, 0.0], (np.size(t), 1)),
                        camera_pose_at=camera_pose_at,
                        settings=RenderSettings(exposure_s=exposure))
    profile = next(iter(gen))[230:251, :, 1].astype(float).mean(axis=0)
    # the camera moves +x, so the floor moves -u; the marker's black border meets its
    # white quiet zone at floor x = 1.2 + 0.15, i.e. u = cx + f 0.15 / Z at mid-exposure
    edge_u = cam.cx_px + cam.fx_px * 0.15 / height
    _assert_blur_ramp(profile, edge_u, cam.fx_px * speed * exposure / height, 8, 4)


@pytest.mark.parametrize("k", [4, 8, 12, 16, 32])
def test_motion_blur_centred_on_mid_exposure(k):
    """A step edge moving at constant speed, box-blurred over the exposure, has a
    profile symmetric about the edge's mid-exposure place (closed form: the blur is the
    step convolved with a box centred there), so the centroid of its gradient lies
    there. Pixels as the renderer samples them (its sub-pixel offsets and exposure
    times, :func:`vidodo.synth.render.sample_pattern`), 4 speeds (1-8 px per
    exposure): averaged over 40 sub-pixel places of the edge (one place alone is off
    by the samples' quantisation) within 0.02 px. A pattern that tied offsets to times
    put it 0.1 px off and made a moving marker read about 1 ms early."""
    from vidodo.synth.render import sample_pattern

    offs, frac = sample_pattern(k)
    assert frac.min() >= -0.5 and frac.max() <= 0.5
    u = np.arange(-20, 21).astype(float)
    for v in (1.0, 2.0, 4.0, 8.0):
        shift = []
        for x0 in np.linspace(0.0, 1.0, 40, endpoint=False):
            val = np.mean((u[:, None] + offs[None, :, 0]) < (x0 + v * frac[None, :]), axis=1)
            g = -np.diff(val)
            shift.append(np.sum(g * (u[:-1] + 0.5)) / np.sum(g) - x0)
        assert np.mean(shift) == pytest.approx(0.0, abs=0.02)
