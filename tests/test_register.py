"""Floor registration: geometry checked against OpenCV, fits on synthetic views, refusals.

Synthetic views come from ``test_grid`` (OpenCV's own lens model traced back to a
textured floor), so every true pixel is known exactly.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest
from test_grid import (
    CAM,
    FIELD,
    corner_error_mm,
    look_at,
    render_view,
    tile_texture,
    tripod_pose,
)
from test_lens import opencv_data
from test_selfcheck import write_still_floor

from vidodo import floor_features
from vidodo.errors import CalibrationError, InputError
from vidodo.profiles import CameraProfile, FieldProfile, FloorMarker
from vidodo.registration import camera_fit, frame
from vidodo.registration.registrar import FloorRegistrar, RegistrarSettings

K = np.array([[1000.0, 0, 640], [0, 1000.0, 360], [0, 0, 1]])


def _floor_pts(n=30, seed=4):
    rng = np.random.default_rng(seed)  # seed fixed; any spread of points will do
    return rng.uniform([0, 0], [3.6, 3.6], (n, 2))


# ------------------------------------------------------------------ geometry
def test_pose_from_homography_matches_opencv_solvepnp():
    """Zhang's decomposition H ~ K[r1 r2 t] agrees with cv2.solvePnP (IPPE) on exact data."""
    rvec, tvec = look_at([1.8, -1.8, 2.4], [1.8, 1.5, 0.0])
    fl = _floor_pts()
    px = cv2.projectPoints(np.column_stack([fl, np.zeros(len(fl))]), rvec, tvec, K,
                           None)[0].reshape(-1, 2)
    hmg, _ = cv2.findHomography(fl, px, 0)
    rv, tv = camera_fit.pose_from_homography(hmg, K)
    ok, rv_cv, tv_cv = cv2.solvePnP(np.column_stack([fl, np.zeros(len(fl))]), px, K, None,
                                    flags=cv2.SOLVEPNP_IPPE)
    assert ok
    np.testing.assert_allclose(rv, rv_cv.ravel(), atol=1e-6)
    np.testing.assert_allclose(tv, tv_cv.ravel(), atol=1e-6)
    np.testing.assert_allclose(rv, rvec, atol=1e-6)


@pytest.mark.parametrize("roll_deg", [0.0, 12.0])
def test_focal_from_homography(roll_deg):
    """Zhang (2000) eqs. 3-4 with square pixels and a known principal point give f back."""
    rvec, tvec = look_at([0.5, -2.0, 1.8], [2.0, 1.5, 0.0])
    r = cv2.Rodrigues(rvec)[0]
    c = math.cos(math.radians(roll_deg))
    s = math.sin(math.radians(roll_deg))
    roll = np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]])  # about the optical axis
    r, t = roll @ r, roll @ tvec
    hmg = K @ np.column_stack([r[:, 0], r[:, 1], t])
    f = camera_fit.focal_from_homography(hmg, (640, 360))
    assert f == pytest.approx(1000.0, rel=1e-6)


def test_focal_not_observable_straight_down():
    rvec, tvec = look_at([1.0, 1.0, 2.0], [1.0, 1.0001, 0.0])
    r = cv2.Rodrigues(rvec)[0]
    hmg = K @ np.column_stack([r[:, 0], r[:, 1], tvec])
    assert camera_fit.focal_from_homography(hmg, (640, 360)) is None


def _registration(rvec, tvec, k=K, dist=None):
    dist = np.zeros(5) if dist is None else dist
    return frame.FrameRegistration(0.0, True, k, dist, np.asarray(rvec, float),
                                      np.asarray(tvec, float), 0.0, 0.0, 0, "test")


def test_image_to_floor_with_height_matches_projectpoints():
    """A point at height h projected by cv2.projectPoints comes back at its (x, y)."""
    dist = np.array([-0.1, 0.02, 0.001, -0.0005, 0.0])
    rvec, tvec = look_at([1.8, -1.8, 2.4], [1.8, 1.5, 0.0])
    reg = _registration(rvec, tvec, K, dist)
    rng = np.random.default_rng(5)  # seed fixed; any points in view will do
    pts = np.column_stack([rng.uniform(0.2, 3.4, (40, 2)), rng.uniform(0, 0.5, 40)])
    px = cv2.projectPoints(pts, rvec, tvec, K, dist)[0].reshape(-1, 2)
    back = reg.image_to_floor(px, height_m=pts[:, 2])
    np.testing.assert_allclose(back, pts[:, :2], atol=1e-7)
    np.testing.assert_allclose(reg.floor_to_image(pts), px, atol=1e-9)


def test_parallax_of_raised_marker_matches_similar_triangles():
    """Reading a raised point as if on the floor moves it away from the nadir by
    d*h/(C_z - h) (similar triangles; the camera centre, the point and its floor
    shadow along the ray are collinear)."""
    rvec, tvec = look_at([1.8, -1.8, 2.4], [1.8, 1.5, 0.0])
    reg = _registration(rvec, tvec)
    c = reg.camera_centre_m
    p = np.array([[2.5, 2.0, 0.3]])
    naive = reg.image_to_floor(reg.floor_to_image(p), 0.0)[0]
    d = np.linalg.norm(p[0, :2] - c[:2])
    assert np.linalg.norm(naive - p[0, :2]) == pytest.approx(d * 0.3 / (c[2] - 0.3), rel=1e-9)


def test_failed_registration_maps_to_nan():
    reg = frame.failed(1.0, "no floor")
    assert not reg.ok and reg.reason == "no floor"
    assert np.isnan(reg.image_to_floor([[1.0, 2.0]])).all()
    assert np.isnan(reg.floor_to_image([[1.0, 2.0]])).all()


# ------------------------------------------------------------- points input
def _write_csv(path, text):
    path.write_text(text)
    return path


def test_points_csv_errors_name_column_and_line(tmp_path):
    p = _write_csv(tmp_path / "a.csv", "u_px,v_px,x_m\n1,2,3\n")
    with pytest.raises(InputError, match="missing column.*y_m"):
        camera_fit.read_points_csv(p)
    p = _write_csv(tmp_path / "b.csv", "u_px,v_px,x_m,y_m\n1,2,3,4\n5,six,7,8\n")
    with pytest.raises(InputError, match="line 3, column v_px"):
        camera_fit.read_points_csv(p)
    p = _write_csv(tmp_path / "c.csv", "")
    with pytest.raises(InputError, match="empty"):
        camera_fit.read_points_csv(p)
    with pytest.raises(InputError, match="not found"):
        camera_fit.read_points_csv(tmp_path / "missing.csv")


def test_refusals_one_line_naming_the_cause():
    fl = _floor_pts(8)
    with pytest.raises(CalibrationError, match="3 point"):
        camera_fit.check_correspondences(fl[:3] * 100, fl[:3])
    line = np.column_stack([np.linspace(0, 3, 6), 0.5 * np.linspace(0, 3, 6) + 0.001 *
                            np.array([0, 1, 0, 1, 0, 1])])
    with pytest.raises(CalibrationError, match="collinear"):
        camera_fit.check_correspondences(line * 100 + 7, line)
    # Mirrored: x and y swapped in the floor coordinates.
    rvec, tvec = look_at([1.8, -1.8, 2.4], [1.8, 1.5, 0.0])
    px = cv2.projectPoints(np.column_stack([fl, np.zeros(len(fl))]), rvec, tvec, K,
                           None)[0].reshape(-1, 2)
    with pytest.raises(CalibrationError, match="mirrored") as info:
        camera_fit.fit_camera((1280, 720), points=(px, fl[:, ::-1]))
    assert "\n" not in str(info.value)


def test_points_method_on_exact_correspondences(tmp_path):
    """Tile corners 'clicked' at their exact pixels give the true camera back."""
    rvec, tvec = tripod_pose()
    corners = FIELD.tile_corners_m()
    px = cv2.projectPoints(np.column_stack([corners, np.zeros(len(corners))]), rvec, tvec,
                           CAM.matrix, CAM.dist_coeffs)[0].reshape(-1, 2)
    rows = "\n".join(f"{u:.4f},{v:.4f},{x},{y}" for (u, v), (x, y) in zip(px, corners,
                                                                          strict=True))
    p = _write_csv(tmp_path / "pts.csv", "u_px,v_px,x_m,y_m\n" + rows + "\n")
    registrar = FloorRegistrar(FIELD, CAM, method="points", points_csv=p,
                               settings=RegistrarSettings(refine_on_seams=False))
    reg = registrar.register(np.zeros((720, 1280), np.uint8), 0.0)
    assert reg.ok and reg.method == "points"
    assert corner_error_mm(reg, CAM, rvec, tvec) < 0.1
    assert reg.rms_px < 0.01


def test_points_method_refuses_high_error(tmp_path):
    fl = _floor_pts(12)
    rvec, tvec = look_at([1.8, -1.8, 2.4], [1.8, 1.5, 0.0])
    px = cv2.projectPoints(np.column_stack([fl, np.zeros(len(fl))]), rvec, tvec, K,
                           None)[0].reshape(-1, 2)
    px[3] += [40.0, -25.0]  # one badly picked corner
    rows = "\n".join(f"{u},{v},{x},{y}" for (u, v), (x, y) in zip(px, fl, strict=True))
    p = _write_csv(tmp_path / "pts.csv", "u_px,v_px,x_m,y_m\n" + rows + "\n")
    cam = CameraProfile(1280, 720, 1000.0, 1000.0, 640.0, 360.0)
    registrar = FloorRegistrar(FIELD, cam, method="points", points_csv=p,
                               settings=RegistrarSettings(refine_on_seams=False,
                                                          max_rms_px=2.0))
    with pytest.raises(CalibrationError, match="above the 2.0 px limit"):
        registrar.register_reference(np.zeros((720, 1280), np.uint8), 0.0)
    # Per frame it is a flagged frame, not an exception.
    reg = registrar.register(np.zeros((720, 1280), np.uint8), 0.0)
    assert not reg.ok and "limit" in reg.reason


# ------------------------------------------------------------------- markers
MARKERS = (FloorMarker(20, "DICT_4X4_50", 0.2, 0.3, 0.3), FloorMarker(21, "DICT_4X4_50", 0.2,
                                                                       3.3, 0.3),
           FloorMarker(22, "DICT_4X4_50", 0.2, 0.3, 3.3), FloorMarker(23, "DICT_4X4_50", 0.2,
                                                                      3.3, 3.3))


@pytest.fixture(scope="module")
def marker_field_view():
    field = FieldProfile(6, 6, 0.6, floor_markers=MARKERS)
    tex, org = tile_texture(field, markers=MARKERS)
    rvec, tvec = tripod_pose(field)
    return field, tex, org, rvec, tvec, render_view(tex, org, CAM, rvec, tvec)


def test_markers_method_then_seams(marker_field_view):
    field, _tex, _org, rvec, tvec, img = marker_field_view
    only = FloorRegistrar(field, CAM, method="markers",
                          settings=RegistrarSettings(refine_on_seams=False))
    reg0 = only.register_reference(img, 0.0)
    assert reg0.method == "markers" and reg0.n_points == 16
    err0 = corner_error_mm(reg0, CAM, rvec, tvec)
    both = FloorRegistrar(field, CAM, method="markers")
    reg = both.register_reference(img, 0.0)
    assert reg.method == "markers+seams"
    err = corner_error_mm(reg, CAM, rvec, tvec)
    assert err < 2.0 and err < err0 + 0.5


def test_auto_uses_grid_without_markers():
    tex, org = tile_texture(FIELD)
    rvec, tvec = tripod_pose()
    img = render_view(tex, org, CAM, rvec, tvec, supersample=1)
    reg = FloorRegistrar(FIELD, None).register(img, 0.0)
    assert reg.ok and reg.method == "grid", reg.reason
    assert corner_error_mm(reg, CAM, rvec, tvec) < 2.5


# --------------------------------------------------------------- hand-held
def test_handheld_sequence_reregistered_every_frame(marker_field_view):
    """A swaying camera: every frame re-registered; a static repeat is recognised; a
    blank frame is flagged, not raised; a masked robot-sized box is ignored."""
    field, tex, org, rvec0, tvec0, img0 = marker_field_view
    registrar = FloorRegistrar(field, CAM, method="auto")
    reg = registrar.register(img0, 0.0)
    assert reg.ok
    sx, sy = field.size_m
    errs = []
    for i, (dx, dz, dyaw) in enumerate([(0.04, 0.02, 0.5), (-0.05, -0.03, -1.0),
                                        (0.10, 0.05, 1.5)]):
        c = np.array([sx / 2 + dx, -2.0, 2.4 + dz])
        target = np.array([sx / 2 + math.tan(math.radians(dyaw)) * 3.0, sy * 0.45, 0])
        rvec, tvec = look_at(c, target)
        img = render_view(tex, org, CAM, rvec, tvec, supersample=1, seed=10 + i)
        mask = np.zeros(img.shape, bool)
        mask[300:420, 560:700] = True
        img[mask] = 30  # the "robot"
        reg = registrar.register(img, 0.1 * (i + 1), mask=mask)
        assert reg.ok, reg.reason
        assert reg.method != "static"
        errs.append(corner_error_mm(reg, CAM, rvec, tvec, field))
    assert max(errs) < 4.0, errs
    again = registrar.register(img, 0.5, mask=mask)
    assert again.ok and again.method == "static"
    blank = registrar.register(np.full_like(img, 128), 0.6)
    assert not blank.ok and blank.reason


# --------------------------------------------------------- real image pair
def test_feature_reregistration_recovers_graffiti_homography():
    """graf1 -> graf3 of the Oxford affine-region set (Mikolajczyk et al., IJCV 2005),
    ground truth H1to3p.xml (opencv-doc): mean transfer error < 2 px on a grid."""
    data = opencv_data()
    a = cv2.imread(str(data / "graf1.png"))
    b = cv2.imread(str(data / "graf3.png"))
    fs = cv2.FileStorage(str(data / "H1to3p.xml"), cv2.FILE_STORAGE_READ)
    h_true = fs.getNode("H13").mat()
    fs.release()
    m = floor_features.match_homography(a, b, floor_features.MatchSettings("sift"))
    assert m.H is not None, m.reason
    r = floor_features.refine_homography(a, b, m.H)
    assert r.H is not None, r.reason
    gx, gy = np.meshgrid(np.linspace(0, a.shape[1] - 1, 20), np.linspace(0, a.shape[0] - 1, 16))
    grid_pts = np.column_stack([gx.ravel(), gy.ravel()]).reshape(-1, 1, 2)
    err = np.linalg.norm(cv2.perspectiveTransform(grid_pts, r.H)
                         - cv2.perspectiveTransform(grid_pts, h_true), axis=2)
    assert err.mean() < 2.0, err.mean()


# ------------------------------------------------------------------ command
FIELD_TOML = "[floor]\ntiles_x = 6\ntiles_y = 6\ntile_size_m = 0.6\norigin_hint = \"near-left\"\n"


@pytest.fixture(scope="module")
def still(tmp_path_factory):
    d = tmp_path_factory.mktemp("still")
    write_still_floor(d)
    (d / "field.toml").write_text(FIELD_TOML)
    return d


def test_register_command_writes_preview_and_csv(still, tmp_path, capsys):
    from vidodo.cli_main import main

    out = tmp_path / "out"
    code = main(["register", str(still / "floor.png"), "--field", str(still / "field.toml"),
                 "-o", str(out), "--quiet"])
    assert code == 0
    assert (out / "preview.png").is_file()
    import pandas as pd

    df = pd.read_csv(out / "registration.csv")
    assert list(df.columns[:3]) == ["t_s", "ok", "method"]
    assert bool(df["ok"].iloc[0]) and df["method"].iloc[0] == "grid"
    assert "registered by grid" in capsys.readouterr().out


def test_register_command_bad_input_exit_codes_and_no_output(still, tmp_path):
    from vidodo.cli_main import main

    out = tmp_path / "out"
    bad_pts = tmp_path / "pts.csv"
    bad_pts.write_text("u_px,v_px,x\n1,2,3\n")
    args = [str(still / "floor.png"), "--field", str(still / "field.toml"), "-o", str(out),
            "--quiet"]
    assert main(["register", *args, "--points", str(bad_pts)]) == 2
    few = tmp_path / "few.csv"
    few.write_text("u_px,v_px,x_m,y_m\n1,2,0,0\n5,6,1,0\n9,3,0,1\n")
    assert main(["register", *args, "--points", str(few)]) == 3
    broken = tmp_path / "clip.mp4"
    broken.write_bytes(b"\x00" * 64)
    assert main(["register", str(broken), "--field", str(still / "field.toml"), "-o",
                 str(out), "--quiet"]) == 2
    blank = tmp_path / "blank.png"
    cv2.imwrite(str(blank), np.full((720, 1280), 128, np.uint8))
    assert main(["register", str(blank), "--field", str(still / "field.toml"), "-o",
                 str(out), "--quiet"]) == 3
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".out")]


def test_rolling_shutter_rows_see_their_own_pose():
    """Row v is read at dt = v/H * readout with pose rvec + dt*rvec_rate (the renderer's
    and common practice's linear model); a pixel produced by cv2.projectPoints with that
    row's pose maps back to its floor point, and floor_to_image finds the row again."""
    rvec, tvec = look_at([1.8, -1.8, 2.4], [1.8, 1.5, 0.0])
    k = np.array([[900.0, 0, 639.5], [0, 900.0, 359.5], [0, 0, 1]])
    rate_r, rate_t = np.array([0.02, -0.03, 0.01]), np.array([0.05, 0.02, -0.01])
    reg = frame.FrameRegistration(0.0, True, k, np.zeros(5), rvec, tvec, 0, 0, 0, "t",
                                     readout_s=0.03, rvec_rate=rate_r, tvec_rate=rate_t)
    x = np.array([[1.0, 2.0, 0.0], [3.0, 0.5, 0.0]])
    for pt in x:
        dt = 0.0
        for _ in range(20):  # the pixel's own row, by fixed-point iteration
            px = cv2.projectPoints(pt[None], rvec + dt * rate_r, tvec + dt * rate_t, k,
                                   None)[0].reshape(2)
            dt = px[1] / 720 * 0.03
        np.testing.assert_allclose(reg.image_to_floor(px[None])[0], pt[:2], atol=1e-6)
        np.testing.assert_allclose(reg.floor_to_image(pt[None])[0], px, atol=1e-3)
    still = frame.FrameRegistration(0.0, True, k, np.zeros(5), rvec, tvec, 0, 0, 0, "t")
    assert not still.rolling and reg.rolling


def test_reference_retried_after_a_pause(still):
    """A frame that cannot be the reference is flagged; the next full attempt waits."""
    img = cv2.imread(str(still / "floor.png"))
    registrar = FloorRegistrar(FIELD, CAM,
                               settings=RegistrarSettings(reference_retry_s=0.5))
    first = registrar.register(np.full_like(img, 128), 0.0)
    assert not first.ok and "grid" in first.reason
    soon = registrar.register(img, 0.2)
    assert not soon.ok and soon.reason.startswith("no reference yet")
    later = registrar.register(img, 0.6)
    assert later.ok and later.method == "grid"


def test_pose_fit_drops_points_a_few_tenths_of_a_pixel_off():
    """Points on an object leaving the floor (0.8 px off) are dropped, not averaged in.

    Reference: ``cv2.solvePnP`` (iterative) on the floor points alone. The outlier limit
    follows the residuals: 0.1 % of 2-D Gaussian residual lengths (Rayleigh) exceed
    3.72 sigma, ``exp(-3.72**2 / 2) = 0.001`` (Rayleigh tail, common practice); with
    0.1 px noise that is about 0.37 px, so the 0.8 px points go.
    """
    rng = np.random.default_rng(7)  # seed fixed; any noise draw will do
    rvec, tvec = tripod_pose()
    fl = rng.uniform([0, 0], [3.6, 3.6], (300, 2))
    obj = np.column_stack([fl, np.zeros(len(fl))])
    px = cv2.projectPoints(obj, rvec, tvec, K, np.zeros(5))[0].reshape(-1, 2)
    px += rng.normal(0, 0.1, px.shape)
    moved = np.zeros(len(px), bool)
    moved[:30] = True  # a robot starting to move: its corners shift together
    px[moved] += [0.8, 0.0]
    fit = camera_fit.pose_fit_points(px, fl, K, np.zeros(5), (rvec + 0.01, tvec + 0.02))
    assert not fit.inliers[moved].any()
    assert fit.inliers[~moved].mean() > 0.98
    ok, rv_ref, tv_ref = cv2.solvePnP(obj[~moved], px[~moved], K, np.zeros(5), rvec.copy(),
                                      tvec.copy(), useExtrinsicGuess=True,
                                      flags=cv2.SOLVEPNP_ITERATIVE)
    assert ok
    np.testing.assert_allclose(fit.rvec, rv_ref.ravel(), atol=2e-5)
    np.testing.assert_allclose(fit.tvec, tv_ref.ravel(), atol=2e-4)


def test_seam_fits_of_later_frames_average_down_the_reference_error(tmp_path):
    """A reference clicked 1.5 px off at the far corners: seam fits of the swaying frames
    that follow pull the tracked floor positions back to the truth.

    Truth: the camera poses the views are rendered with (``render_view``, OpenCV's lens
    model); the error is measured at every tile corner projected by ``cv2.projectPoints``.
    """
    tex, org = tile_texture(FIELD)
    rvec0, tvec0 = tripod_pose()
    corners = FIELD.tile_corners_m()
    px = cv2.projectPoints(np.column_stack([corners, np.zeros(len(corners))]), rvec0, tvec0,
                           CAM.matrix, CAM.dist_coeffs)[0].reshape(-1, 2)
    px[:, 1] -= 1.5 * (corners[:, 1] / FIELD.size_m[1])  # clicks drift up to 1.5 px
    rows = "\n".join(f"{u:.4f},{v:.4f},{x},{y}" for (u, v), (x, y) in zip(px, corners,
                                                                          strict=True))
    p = _write_csv(tmp_path / "pts.csv", "u_px,v_px,x_m,y_m\n" + rows + "\n")
    sx, sy = FIELD.size_m

    def run(anchor_every_s):
        registrar = FloorRegistrar(FIELD, CAM, method="points", points_csv=p,
                                   settings=RegistrarSettings(
                                       refine_on_seams=False, anchor_every_s=anchor_every_s))
        img0 = render_view(tex, org, CAM, rvec0, tvec0, supersample=1, seed=20)
        first = registrar.register(img0, 0.0)
        assert first.ok
        errs = [corner_error_mm(first, CAM, rvec0, tvec0)]
        for i in range(8):
            c = np.array([sx / 2 + 0.03 * math.sin(i), -2.0 + 0.02 * math.cos(i), 2.4])
            rvec, tvec = look_at(c, [sx / 2 + 0.05 * math.sin(0.7 * i), sy * 0.45, 0.0])
            img = render_view(tex, org, CAM, rvec, tvec, supersample=1, seed=21 + i)
            reg = registrar.register(img, 0.1 * (i + 1))
            assert reg.ok and reg.method == "tracked", reg.reason
            errs.append(corner_error_mm(reg, CAM, rvec, tvec))
        return errs

    kept = run(None)
    anchored = run(0.25)
    assert kept[0] > 3.0  # the clicked reference is off
    assert min(kept[1:]) > 0.6 * kept[0]  # tracking alone carries its error along
    assert max(anchored[-3:]) < 0.5 * kept[0]
    assert max(anchored[-3:]) < 2.0
