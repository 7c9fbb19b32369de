"""Lens calibration against OpenCV's own stored calibration of real checkerboard photos.

Reference data: the Debian package ``opencv-doc`` (examples/data): ``left01.jpg`` ...
``left14.jpg`` (13 photos of a 9x6 inner-corner checkerboard, 25 mm squares) and
``left_intrinsics.yml``, the calibration OpenCV's calibration sample stored for them
(flags=2, i.e. CALIB_FIX_ASPECT_RATIO, aspect ratio 1).
"""

from __future__ import annotations

import os
import tomllib
from pathlib import Path

import cv2
import numpy as np
import pytest

from vidodo import lens
from vidodo.cli_main import main
from vidodo.errors import CalibrationError, InputError
from vidodo.profiles import load_camera

REPO = Path(__file__).resolve().parents[1]


def opencv_data() -> Path:
    """The opencv-doc example data folder (env VIDODO_OPENCV_DOC or .ext/ in the repo)."""
    env = os.environ.get("VIDODO_OPENCV_DOC")
    base = Path(env) if env else REPO / ".ext/opencv-doc/usr/share/doc/opencv-doc"
    for cand in (base, base / "examples/data", base / "usr/share/doc/opencv-doc/examples/data"):
        if (cand / "left01.jpg").is_file():
            return cand
    raise FileNotFoundError(
        f"opencv-doc example data not found under {base}; unpack the Debian package "
        "opencv-doc into .ext/opencv-doc (see .ci/run) or set VIDODO_OPENCV_DOC")


def left_images():
    return sorted(opencv_data().glob("left[0-9][0-9].jpg"))


def stored_left_calibration():
    fs = cv2.FileStorage(str(opencv_data() / "left_intrinsics.yml"), cv2.FILE_STORAGE_READ)
    k = fs.getNode("camera_matrix").mat()
    d = fs.getNode("distortion_coefficients").mat().ravel()
    fs.release()
    return k, d


@pytest.mark.parametrize("square_pixels", [False, True])
def test_left_images_match_opencv_stored_calibration(square_pixels):
    """fx, fy, cx, cy within 1 % of OpenCV's left_intrinsics.yml (opencv-doc)."""
    k_ref, d_ref = stored_left_calibration()
    cam, report = lens.calibrate_images(left_images(), (9, 6), 0.025,
                                        model=lens.LensModel(fix_aspect=square_pixels))
    assert report.n_used == 13
    got = [cam.fx_px, cam.fy_px, cam.cx_px, cam.cy_px]
    ref = [k_ref[0, 0], k_ref[1, 1], k_ref[0, 2], k_ref[1, 2]]
    np.testing.assert_allclose(got, ref, rtol=0.01)
    # The stored file reports 0.393 px average reprojection error for these views.
    assert report.rms_px < 0.6
    # Distortion: compare the radial displacement the two models predict at the image
    # corners (coefficients trade off against each other; the displacement does not).
    corners = np.array([[0, 0], [639, 0], [0, 479], [639, 479], [320, 0], [0, 240]], float)
    ours = cv2.undistortPoints(corners.reshape(-1, 1, 2), cam.matrix, cam.dist_coeffs,
                               P=k_ref).reshape(-1, 2)
    theirs = cv2.undistortPoints(corners.reshape(-1, 1, 2), k_ref, d_ref,
                                 P=k_ref).reshape(-1, 2)
    assert np.max(np.linalg.norm(ours - theirs, axis=1)) < 3.0
    assert np.sign(cam.distortion[0]) == np.sign(d_ref[0])  # barrel, k1 < 0


def test_lens_command_writes_profile(tmp_path, capsys):
    out = tmp_path / "cam.toml"
    code = main(["lens", *map(str, left_images()), "--board", "9x6", "--square-mm", "25",
                 "-o", str(out)])
    assert code == 0
    cam = load_camera(out)
    k_ref, _ = stored_left_calibration()
    assert abs(cam.fx_px / k_ref[0, 0] - 1) < 0.01
    assert (cam.width_px, cam.height_px) == (640, 480)
    with open(out, "rb") as fh:
        assert "camera" in tomllib.load(fh)
    assert "reprojection error" in capsys.readouterr().out


def test_folder_input_and_skipped_views(tmp_path):
    """A folder with a non-board picture: that view is skipped and named."""
    for p in left_images()[:4]:
        (tmp_path / p.name).write_bytes(p.read_bytes())
    cv2.imwrite(str(tmp_path / "zz_blank.png"), np.full((480, 640), 128, np.uint8))
    cam, report = lens.calibrate_images([tmp_path], (9, 6), 0.025)
    assert report.n_views == 5 and report.n_used == 4
    assert report.skipped[0][0] == "zz_blank.png"


def test_unreadable_image_is_input_error_and_writes_nothing(tmp_path, capsys):
    bad = tmp_path / "broken.jpg"
    bad.write_bytes(b"not an image")
    out = tmp_path / "cam.toml"
    with pytest.raises(InputError, match="broken.jpg"):
        lens.calibrate_images([bad], (9, 6), 0.025)
    assert main(["lens", str(bad), "--square-mm", "25", "-o", str(out)]) == 2
    assert not out.exists()
    assert list(tmp_path.iterdir()) == [bad]


def test_unreadable_video_is_input_error(tmp_path):
    bad = tmp_path / "clip.mp4"
    bad.write_bytes(b"\x00" * 100)
    with pytest.raises(InputError, match="clip.mp4"):
        lens.calibrate_video(bad, (9, 6), 0.025)


def test_too_few_views_is_calibration_error(tmp_path):
    out = tmp_path / "cam.toml"
    with pytest.raises(CalibrationError, match="need at least 3"):
        lens.calibrate_images(left_images()[:2], (9, 6), 0.025)
    code = main(["lens", *map(str, left_images()[:2]), "--square-mm", "25",
                 "-o", str(out)])
    assert code == 3 and not out.exists()


def test_wrong_board_size_finds_nothing():
    with pytest.raises(CalibrationError, match="board found in 0"):
        lens.calibrate_images(left_images()[:3], (7, 7), 0.025)


def test_synthetic_board_views_recover_known_lens():
    """Project a board through a known lens (OpenCV projectPoints) and fit it back."""
    k = np.array([[900.0, 0, 650], [0, 900, 350], [0, 0, 1]])
    d = np.array([-0.12, 0.05, 0.0, 0.0, 0.0])
    spec = lens.BoardSpec(9, 6, 0.03)
    obj = lens.board_points_m(spec)
    rng = np.random.default_rng(7)  # seed fixed; result does not depend on it
    views = []
    for _ in range(12):
        rvec = rng.normal(0, 0.35, 3)
        tvec = np.array([-0.12, -0.08, 0.6]) + rng.normal(0, 0.05, 3)
        img, _ = cv2.projectPoints(obj, rvec, tvec, k, d)
        views.append((obj, img.reshape(-1, 2) + rng.normal(0, 0.05, (len(obj), 2))))
    cam, rep = lens.calibrate_views(views, (1280, 720), spec,
                                    model=lens.LensModel(zero_tangent=True))
    np.testing.assert_allclose([cam.fx_px, cam.fy_px, cam.cx_px, cam.cy_px],
                               [900, 900, 650, 350], rtol=0.005)
    assert abs(cam.distortion[0] - d[0]) < 0.02
    assert rep.rms_px < 0.1


def test_calibrate_from_clip(tmp_path):
    """The same 13 photos as a clip (MJPEG in AVI, written by OpenCV): same intrinsics."""
    clip = tmp_path / "board.avi"
    writer = cv2.VideoWriter(str(clip), cv2.VideoWriter_fourcc(*"MJPG"), 2.0, (640, 480))
    assert writer.isOpened()
    for p in left_images():
        writer.write(cv2.imread(str(p)))
    writer.release()
    cam, report = lens.calibrate_video(clip, (9, 6), 0.025, every_s=0.4)
    k_ref, _ = stored_left_calibration()
    assert report.n_used >= 12
    np.testing.assert_allclose([cam.fx_px, cam.fy_px], [k_ref[0, 0], k_ref[1, 1]], rtol=0.01)


def test_charuco_views_recover_known_lens(tmp_path):
    """A ChArUco board (OpenCV's generateImage) seen through a known pinhole camera
    (each view a homography K [r1 r2 t], warped with cv2.warpPerspective)."""
    dic = "DICT_5X5_100"
    squares, square_m, marker_m = (7, 5), 0.04, 0.03
    board = cv2.aruco.CharucoBoard(squares, square_m, marker_m,
                                   cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_5X5_100))
    px_per_m = 4000.0
    art = board.generateImage((int(squares[0] * square_m * px_per_m),
                               int(squares[1] * square_m * px_per_m)))
    k = np.array([[800.0, 0, 479.5], [0, 800.0, 359.5], [0, 0, 1]])
    to_m = np.diag([1 / px_per_m, 1 / px_per_m, 1.0])
    rng = np.random.default_rng(3)  # seed fixed; any spread of views will do
    paths = []
    for i in range(8):
        rvec = rng.normal(0, 0.3, 3)
        r = cv2.Rodrigues(rvec)[0]
        t = np.array([-0.14, -0.1, 0.55]) + rng.normal(0, 0.03, 3)
        hmg = k @ np.column_stack([r[:, 0], r[:, 1], t]) @ to_m
        img = cv2.warpPerspective(art, hmg, (960, 720), flags=cv2.INTER_AREA,
                                  borderValue=255)
        paths.append(tmp_path / f"v{i}.png")
        cv2.imwrite(str(paths[-1]), img)
    cam, report = lens.calibrate_images(paths, squares, square_m, dictionary=dic,
                                        marker_m=marker_m,
                                        model=lens.LensModel(zero_tangent=True))
    assert report.n_used >= 6
    np.testing.assert_allclose([cam.fx_px, cam.fy_px], [800, 800], rtol=0.02)
    np.testing.assert_allclose([cam.cx_px, cam.cy_px], [479.5, 359.5], atol=12)
