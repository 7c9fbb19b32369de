"""The registration self-check: every refusal reason gives exit 3, the one-line message,
and nothing written but the preview.

The views are the synthetic floors of ``test_grid`` (a tile texture traced through
OpenCV's lens model, so the true camera is known exactly). To reach each check on its
own, the automatic grid is replaced by a fixed fit (the true camera moved, shifted or
given a wrong lens): the check must refuse it from the picture alone.
"""

from __future__ import annotations

import dataclasses
import math

import cv2
import numpy as np
import pandas as pd
import pytest
from test_grid import CAM, FIELD, look_at, render_view, tile_texture, tripod_pose
from test_profiles import ROBOT

from vidodo.cli_main import main
from vidodo.errors import EXIT_MEASURE, REFUSAL_HINT, RegistrationRefused
from vidodo.outputs import MANIFEST
from vidodo.profiles import FieldProfile, camera_to_dict, dump_toml
from vidodo.registration import grid, selfcheck
from vidodo.registration.camera_fit import CameraFit
from vidodo.registration.frame import FrameRegistration

PREFIX = "the floor could not be registered reliably: "


def write_still_floor(folder):
    """``folder/floor.png``: the tiled floor seen from the tripod pose of ``test_grid``;
    returns that pose (rvec, tvec)."""
    tex, org = tile_texture(FIELD)
    rvec, tvec = tripod_pose()
    cv2.imwrite(str(folder / "floor.png"), render_view(tex, org, CAM, rvec, tvec,
                                                       supersample=1))
    return rvec, tvec


@pytest.fixture(scope="module")
def still(tmp_path_factory):
    d = tmp_path_factory.mktemp("selfcheck")
    return (d, *write_still_floor(d))


def _field_toml(folder, tiles, size_m):
    p = folder / f"field_{tiles}_{size_m}.toml"
    p.write_text(f"[floor]\ntiles_x = {tiles}\ntiles_y = {tiles}\ntile_size_m = {size_m}\n")
    return p


def _shifted(rvec, tvec, dx_m, dy_m):
    """The pose of the same camera in a floor frame whose origin is at (dx, dy)."""
    r = cv2.Rodrigues(np.asarray(rvec, float))[0]
    return np.asarray(rvec, float), np.asarray(tvec, float) + r @ np.array([dx_m, dy_m, 0.0])


def _fake_grid(monkeypatch, rvec, tvec, k=None, dist=None):
    k = CAM.matrix if k is None else k
    dist = CAM.dist_coeffs if dist is None else dist
    fit = CameraFit(np.asarray(k, float), np.asarray(dist, float), np.asarray(rvec, float),
                    np.asarray(tvec, float), 0.4, 0.001, 500, np.ones(500, bool))

    def find_grid(*_a, **_k):
        return grid.GridResult(fit, "near-left", "hint", 100)

    monkeypatch.setattr(grid, "find_grid", find_grid)


def _refused(capsys, args, out, reason_part):
    code = main(["register", *args, "-o", str(out), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == EXIT_MEASURE == 3
    assert len(err) == 1, err
    assert PREFIX in err[0] and err[0].endswith(REFUSAL_HINT), err[0]
    assert reason_part in err[0], err[0]
    assert sorted(p.name for p in out.iterdir() if p.name != MANIFEST) == ["preview.png"]
    assert cv2.imread(str(out / "preview.png")) is not None
    assert not [p for p in out.parent.iterdir() if p.name.startswith(".")]


def test_true_camera_passes_every_check(still, tmp_path, monkeypatch, capsys):
    d, rvec, tvec = still
    _fake_grid(monkeypatch, rvec, tvec)
    code = main(["register", str(d / "floor.png"), "--field", str(_field_toml(d, 6, 0.6)),
                 "--camera-height-m", "2.3", "-o", str(tmp_path / "out"), "--quiet"])
    assert code == 0, capsys.readouterr().err
    assert (tmp_path / "out" / "registration.csv").is_file()


def test_refused_camera_height_out_of_range(still, tmp_path, monkeypatch, capsys):
    d, _r, _t = still
    sx, sy = FIELD.size_m
    rvec, tvec = look_at([sx / 2, -2.0, 6.0], [sx / 2, sy * 0.45, 0.0])
    _fake_grid(monkeypatch, rvec, tvec)
    _refused(capsys, [str(d / "floor.png"), "--field", str(_field_toml(d, 6, 0.6))],
             tmp_path / "out", "6.00 m above the floor")


def test_refused_camera_height_against_the_given_one(still, tmp_path, monkeypatch, capsys):
    d, rvec, tvec = still
    _fake_grid(monkeypatch, rvec, tvec)
    _refused(capsys, [str(d / "floor.png"), "--field", str(_field_toml(d, 6, 0.6)),
                      "--camera-height-m", "1.2"], tmp_path / "out", "given height is 1.20 m")


def test_refused_implausible_focal_length(still, tmp_path, monkeypatch, capsys):
    d, rvec, tvec = still
    k = CAM.matrix.copy()
    k[0, 0] = k[1, 1] = 150.0  # 0.12 x the image width: a 154 deg lens
    _fake_grid(monkeypatch, rvec, tvec, k=k)
    _refused(capsys, [str(d / "floor.png"), "--field", str(_field_toml(d, 6, 0.6))],
             tmp_path / "out", "focal length is 0.12 x the image size")


@pytest.mark.parametrize(("shift_m", "tiles", "tile_m", "reason"), [
    ((0.2, 0.15), 6, 0.6, "seams were found on only"),
    # A 3 x 3 field of 1.2 m tiles on the 0.6 m tiling: every predicted edge is a seam,
    # but so is every line half a tile off.
    (None, 3, 1.2, "half a tile off the grid as often as on it"),
    # A 4 x 4 field inside the 6 x 6 tiling: the tiles continue past every edge.
    ((0.6, 0.6), 4, 0.6, "field's place in the tile pattern cannot be told"),
], ids=["grid off the seams", "twice the tile size", "field place in the tiling unknown"])
def test_refused_grid_against_the_seams(still, tmp_path, monkeypatch, capsys, shift_m, tiles,
                                        tile_m, reason):
    """A grid that does not lie on the tile seams the picture shows is refused."""
    d, rvec, tvec = still
    _fake_grid(monkeypatch, *(_shifted(rvec, tvec, *shift_m) if shift_m else (rvec, tvec)))
    _refused(capsys, [str(d / "floor.png"), "--field", str(_field_toml(d, tiles, tile_m))],
             tmp_path / "out", reason)


def test_refused_image_halves_disagree(still, tmp_path, monkeypatch, capsys):
    d, rvec, tvec = still
    _fake_grid(monkeypatch, rvec, tvec)
    monkeypatch.setattr(selfcheck, "subset_disagreement_m", lambda *a: 0.08)
    _refused(capsys, [str(d / "floor.png"), "--field", str(_field_toml(d, 6, 0.6))],
             tmp_path / "out", "halves of the image disagree by 80 mm")


def test_refused_small_picture_without_lens_profile(tmp_path, monkeypatch, capsys):
    """Under 1280 px without a lens profile the lens rests on the seams alone: refused;
    the same picture with its lens profile passes (the check is about the lens)."""
    cam = dataclasses.replace(CAM, width_px=960, height_px=540, fx_px=750.0, fy_px=750.0,
                              cx_px=481.0, cy_px=268.0)
    tex, org = tile_texture(FIELD)
    rvec, tvec = tripod_pose()
    cv2.imwrite(str(tmp_path / "small.png"), render_view(tex, org, cam, rvec, tvec,
                                                         supersample=1))
    _fake_grid(monkeypatch, rvec, tvec, k=cam.matrix, dist=cam.dist_coeffs)
    field = _field_toml(tmp_path, 6, 0.6)
    _refused(capsys, [str(tmp_path / "small.png"), "--field", str(field)],
             tmp_path / "out", "without a lens profile the lens is estimated on the tile seams")
    (tmp_path / "camera.toml").write_text(dump_toml(camera_to_dict(cam)))
    code = main(["register", str(tmp_path / "small.png"), "--field", str(field), "--camera",
                 str(tmp_path / "camera.toml"), "-o", str(tmp_path / "ok"), "--quiet"])
    assert code == 0, capsys.readouterr().err


def _refused_points(capsys, still, tmp_path, rvec, tvec, floor, reason_part):
    """``register --points`` with the tile corners seen from (rvec, tvec) labelled
    ``floor``: refused with ``reason_part``."""
    d = still[0]
    corners = FIELD.tile_corners_m()
    px = cv2.projectPoints(np.column_stack([corners, np.zeros(len(corners))]), rvec, tvec,
                           CAM.matrix, CAM.dist_coeffs)[0].reshape(-1, 2)
    rows = ["u_px,v_px,x_m,y_m"] + [f"{u:.3f},{v:.3f},{x:.3f},{y:.3f}"
                                    for (u, v), (x, y) in zip(px, floor, strict=True)]
    pts = tmp_path / "points.csv"
    pts.write_text("\n".join(rows) + "\n")
    out = tmp_path / "res" / "out"
    out.parent.mkdir()
    _refused(capsys, [str(d / "floor.png"), "--field", str(_field_toml(d, 6, 0.6)),
                      "--points", str(pts)], out, reason_part)


def test_refused_clicked_point_off_by_a_tile(still, tmp_path, capsys):
    _, rvec, tvec = still
    floor = FIELD.tile_corners_m().copy()
    floor[10, 0] += 0.6  # point 11 labelled one tile off
    _refused_points(capsys, still, tmp_path, rvec, tvec, floor, "point 11")


def test_refused_clicks_the_seams_pull_away_from(still, tmp_path, capsys):
    """Clicks consistent among themselves (each predicted well by the others) but made on
    a view 25 mm off the one filmed (as if the camera was nudged after the clicked frame):
    the tile seams move the fit away from every click, and the check refuses."""
    _, rvec, tvec = still
    rv, tv = _shifted(rvec, tvec, 0.02, 0.015)
    _refused_points(capsys, still, tmp_path, rv, tv, FIELD.tile_corners_m(),
                    "px RMS from the registration fitted to them and the tile seams")


# ------------------------------------------------------------- unit checks
def test_seam_evidence_separates_true_and_half_offset_lines(still):
    d, rvec, tvec = still
    grey = cv2.imread(str(d / "floor.png"), cv2.IMREAD_GRAYSCALE)
    truth = FrameRegistration(0.0, True, CAM.matrix, CAM.dist_coeffs, rvec, tvec, 0, 0, 0, "")
    ev = selfcheck.seam_evidence(grey, FIELD, truth)
    assert ev["supported"] > 0.65 and ev["offset_supported"] < 0.15
    moved = FrameRegistration(0.0, True, CAM.matrix, CAM.dist_coeffs,
                              *_shifted(rvec, tvec, 0.3, 0.3), 0, 0, 0, "")
    ev2 = selfcheck.seam_evidence(grey, FIELD, moved)
    assert ev2["supported"] < 0.3 and ev2["offset_supported"] > 0.5


def test_image_halves_agree_on_the_true_camera(still):
    d, rvec, tvec = still
    grey = cv2.imread(str(d / "floor.png"), cv2.IMREAD_GRAYSCALE)
    truth = FrameRegistration(0.0, True, CAM.matrix, CAM.dist_coeffs, rvec, tvec, 0, 0, 0, "")
    ev = selfcheck.seam_evidence(grey, FIELD, truth)
    sub = selfcheck.subset_disagreement_m((1280, 720), FIELD, truth, ev["samples"])
    assert sub < 0.01  # grain-limited seams: a few millimetres at the far corners
    wrong_k1 = FrameRegistration(0.0, True, CAM.matrix, np.array([0.25, 0, 0, 0, 0.0]), rvec,
                                 tvec, 0, 0, 0, "")
    assert selfcheck.subset_disagreement_m((1280, 720), FIELD, wrong_k1,
                                           ev["samples"]) > 3 * sub


def _track(xy):
    xy = np.asarray(xy, float)
    return pd.DataFrame({"x_m": xy[:, 0], "y_m": xy[:, 1], "detected": True})


def test_track_checks_marker_size_and_field_outline():
    inside = _track([[0.5, 0.5], [1.0, 1.2], [2.0, 2.0]])
    assert selfcheck.check_track(inside, {"marker_scale_median": 1.01}, FIELD) == ""
    why = selfcheck.check_track(inside, {"marker_scale_median": 1.577}, FIELD)
    assert "measures 158% of its size" in why
    out = _track([[5.0, 0.5], [6.0, 1.2], [7.0, 2.0]])
    assert "100% of the robot's path lies outside the field" in selfcheck.check_track(
        out, {"marker_scale_median": 1.0}, FIELD)
    assert selfcheck.check_track(out, {"marker_scale_median": 1.0}, FIELD,
                                 outline=False) == ""


class _Registrar:
    """The parts of a FloorRegistrar that :func:`selfcheck.place_track` reads."""

    def __init__(self, known, start, still):
        from vidodo.registration.registrar import RegistrarSettings

        d, rvec, tvec = still
        self.settings = RegistrarSettings(start_tile=start, relative_ok=True)
        self.field = FIELD
        self.check_report = selfcheck.CheckReport("", {}, known)
        self.reference = FrameRegistration(0.0, True, CAM.matrix, CAM.dist_coeffs, rvec,
                                           tvec, 0, 0, 0, "grid")
        self.reference_grey = cv2.imread(str(d / "floor.png"), cv2.IMREAD_GRAYSCALE)


def test_start_tile_places_a_relative_track_by_whole_tiles(still):
    track = _track([[0.3 + 1.2, 0.4 - 0.6], [0.9, 0.5]])  # starts on tile (2, -1)
    moved, said = selfcheck.place_track(track, {}, _Registrar(False, (0, 0), still))
    np.testing.assert_allclose(moved[["x_m", "y_m"]].to_numpy()[0], [0.3, 0.4], atol=1e-12)
    assert "start tile 0, 0" in said
    kept, said = selfcheck.place_track(track, {}, _Registrar(False, None, still))
    assert kept is track and said.startswith("the tile corner at pixel (")


def test_start_tile_against_a_fixed_registration_is_refused(still):
    track = _track([[1.5, 0.3], [1.6, 0.4]])  # tile (2, 0)
    with pytest.raises(RegistrationRefused, match=r"starts on tile \(2, 0\).*start tile "
                                                  r"\(0, 0\)") as exc:
        selfcheck.place_track(track, {}, _Registrar(True, (0, 0), still))
    assert exc.value.preview_bgr.shape == (720, 1280, 3)
    assert str(exc.value).startswith(PREFIX) and "\n" not in str(exc.value)


def test_pose_problem_limits():
    reg = FrameRegistration(0.0, True, CAM.matrix, np.zeros(5), *tripod_pose(), 0, 0, 0, "")
    assert selfcheck.pose_problem(reg, (1280, 720), selfcheck.CheckLimits(),
                                  lens_known=False) == ""
    assert "k1 = -1.50" in selfcheck.pose_problem(
        FrameRegistration(0.0, True, CAM.matrix, np.array([-1.5, 0, 0, 0, 0]),
                          *tripod_pose(), 0, 0, 0, ""), (1280, 720), selfcheck.CheckLimits(),
        lens_known=False)
    assert math.isclose(reg.camera_centre_m[2], 2.4)


def test_grade_refusal_writes_only_the_preview(tmp_path, monkeypatch, capsys):
    """A refusal during tracking (marker size, path outside the field) ends ``grade``
    with exit 3 and the preview alone in the output folder."""
    import vidodo.tracking.tracker

    def refusing(*_a, **_k):
        raise RegistrationRefused("the robot's marker measures 158% of its size",
                                  np.zeros((36, 64, 3), np.uint8))

    monkeypatch.setattr(vidodo.tracking.tracker, "track_video", refusing)
    video = tmp_path / "run.mp4"
    video.write_bytes(b"\x00")
    log = tmp_path / "log.csv"
    log.write_text("t_s\n0\n")
    robot = tmp_path / "robot.toml"
    robot.write_text(ROBOT)
    field = _field_toml(tmp_path, 6, 0.6)
    out = tmp_path / "grade"
    code = main(["grade", str(video), str(log), "--robot", str(robot), "--field", str(field),
                 "--out", str(out), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 3 and len(err) == 1 and PREFIX in err[0] and "158%" in err[0]
    assert sorted(p.name for p in out.iterdir() if p.name != MANIFEST) == ["preview.png"]


def test_field_profile_start_tile_is_checked(tmp_path):
    from vidodo.errors import InputError
    from vidodo.profiles import load_field

    p = tmp_path / "f.toml"
    p.write_text("[floor]\ntiles_x = 6\ntiles_y = 4\ntile_size_m = 0.6\nstart_tile = [2, 3]\n")
    assert load_field(p).start_tile == (2, 3)
    p.write_text("[floor]\ntiles_x = 6\ntiles_y = 4\ntile_size_m = 0.6\nstart_tile = [2, 4]\n")
    with pytest.raises(InputError, match="outside the field's 6 x 4 tiles"):
        load_field(p)
    assert FieldProfile(2, 2, 0.5).start_tile is None


def test_grade_and_track_take_points_start_tile_and_camera_height(tmp_path):
    """``grade`` and ``track`` build the same registrar from --points, --start-tile and
    --camera-height-m."""
    import argparse

    from vidodo.commands import grade, registration_options, track

    pts = tmp_path / "p.csv"
    pts.write_text("u_px,v_px,x_m,y_m\n10,10,0,0\n500,12,1,0\n505,400,1,1\n12,405,0,1\n")
    for verb in (grade, track):
        parser = argparse.ArgumentParser()
        verb.add_arguments(parser)
        args = parser.parse_known_args(["v.mp4", "log.csv", "--robot", "r", "--field", "f",
                                        "--out", "o", "--points", str(pts), "--start-tile",
                                        "1,2", "--camera-height-m", "1.5"])[0]
        reg = registration_options.registrar_from_args(args, FIELD, None)
        assert reg.method == "points" and reg.settings.start_tile == (1, 2)
        assert reg.settings.limits.camera_height_m == 1.5 and reg.settings.relative_ok
    args.start_tile = "6,0"
    with pytest.raises(Exception, match="--start-tile: tile \\(6, 0\\) is outside"):
        registration_options.registrar_from_args(args, FIELD, None)


@pytest.mark.slow
def test_small_handheld_view_with_floor_markers_is_refused_when_wrong(rendered_run):
    """The hand-held scenario at 640 x 360 with its true lens: floor markers sharpened on
    the seams land off the tiles (checked here against the renderer's true camera: more
    than 5 mm RMS at the tile corners in view), and the self-check refuses it, naming
    the image size. At 1280 x 720 the same registration passes (benchmark:
    ``registration_accuracy.py``)."""
    from vidodo.profiles import load_camera, load_field
    from vidodo.registration.registrar import FloorRegistrar, RegistrarSettings
    from vidodo.video import VideoReader

    run = rendered_run("mecanum-handheld", 0, video__max_duration_s=0.5)
    field, cam = load_field(run / "field.toml"), load_camera(run / "camera.toml")
    with VideoReader(run / "video.mp4", threaded=False) as reader:
        _, t_s, frame = next(iter(reader))
    poses = pd.read_csv(run / "truth" / "camera_poses.csv")
    k = int(np.argmin(np.abs(poses["t_s"].to_numpy() - t_s)))
    rvec = poses.loc[k, ["rvec_0", "rvec_1", "rvec_2"]].to_numpy(float)
    tvec = poses.loc[k, ["tvec_0_m", "tvec_1_m", "tvec_2_m"]].to_numpy(float)
    corners = field.tile_corners_m()
    px = cv2.projectPoints(np.column_stack([corners, np.zeros(len(corners))]), rvec, tvec,
                           cam.matrix, cam.dist_coeffs)[0].reshape(-1, 2)
    inside = ((px[:, 0] > 0) & (px[:, 0] < cam.width_px) & (px[:, 1] > 0)
              & (px[:, 1] < cam.height_px))
    unchecked = FloorRegistrar(field, cam, settings=RegistrarSettings(self_check=False))
    reg = unchecked.register_reference(frame, t_s)
    err = reg.image_to_floor(px[inside]) - corners[inside]
    assert np.sqrt(np.mean(np.sum(err ** 2, axis=1))) > 0.005
    with pytest.raises(RegistrationRefused, match=r"seams were found on only .* at 640 x "
                                                  r"360 px") as exc:
        FloorRegistrar(field, cam).register_reference(frame, t_s)
    assert str(exc.value).startswith(PREFIX)
