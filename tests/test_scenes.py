"""The randomised floor-and-camera scene generator (vidodo/synth/scene_spec.py, scenes.py).

References outside the generator: OpenCV's ``cv2.projectPoints`` (the pinhole model
with Brown-Conrady distortion) for where field corners and seams must appear, and the
profile readers of vidodo for the files a user would get.
"""

from __future__ import annotations

import dataclasses
import json
from collections import Counter

import cv2
import numpy as np
import pytest

from vidodo.profiles import load_camera, load_field
from vidodo.synth import scenes
from vidodo.synth.scene_spec import SPEC_CATEGORIES, draw_scene

SMALL_SEEDS = (10, 15, 41)
"""Scenes with small pictures (640 x 360 or portrait), cheap to render."""


@pytest.fixture(scope="module")
def small_scenes():
    return {s: scenes.render_scene(s) for s in SMALL_SEEDS}


def test_drawing_is_deterministic_per_seed():
    assert draw_scene(7) == draw_scene(7)
    assert draw_scene(7) != draw_scene(8)


def test_rendering_is_deterministic_per_seed(small_scenes):
    again = scenes.render_scene(SMALL_SEEDS[0])
    first = small_scenes[SMALL_SEEDS[0]]
    assert again.file_bytes == first.file_bytes
    assert scenes.truth_dict(again) == scenes.truth_dict(first)


def _project(spec, ij):
    """cv2.projectPoints of field corners (i, j) * tile (independent reference)."""
    pts = np.column_stack([np.asarray(ij, float) * spec.field.tile_size_m, np.zeros(len(ij))])
    cam = spec.setup.camera
    rvec, tvec = np.asarray(spec.setup.rvec), np.asarray(spec.setup.tvec)
    z = (pts @ cv2.Rodrigues(rvec)[0].T + tvec)[:, 2]
    return cv2.projectPoints(pts, rvec, tvec, cam.matrix, cam.dist_coeffs)[0][:, 0], z


@pytest.mark.parametrize("seed", SMALL_SEEDS)
def test_corners_in_view_agree_with_projectpoints(small_scenes, seed):
    sc = small_scenes[seed]
    spec = sc.spec
    cam = spec.setup.camera
    assert len(sc.corners) > 0
    uv, _ = _project(spec, sc.corners[:, :2])
    # stated pixel positions: where OpenCV's projection puts the corners (0.01 px)
    np.testing.assert_allclose(sc.corners[:, 2:], uv, atol=0.01)
    # every corner not stated is outside the picture, behind the camera or covered by
    # an object in the rendered picture
    tx, ty = spec.field.tiles_x, spec.field.tiles_y
    gi, gj = np.meshgrid(np.arange(tx + 1), np.arange(ty + 1))
    stated = {(int(i), int(j)) for i, j in sc.corners[:, :2]}
    missing = [(i, j) for i, j in zip(gi.ravel(), gj.ravel(), strict=True)
               if (i, j) not in stated]
    if not missing:
        return
    uv, z = _project(spec, missing)
    inside = ((z > 0) & (uv[:, 0] >= 1) & (uv[:, 0] <= cam.width_px - 2) & (uv[:, 1] >= 1)
              & (uv[:, 1] <= cam.height_px - 2))
    for (u, v), flag in zip(uv, inside, strict=True):
        if flag:  # in the picture: something must hide it there
            r, c = int(round(v)), int(round(u))
            assert sc.floor_seen[r - 1:r + 2, c - 1:c + 2].min() < 1.0


def _clean(spec):
    """The scene with only tiles and dark straight seams, a clean picture."""
    look = dataclasses.replace(spec.look, seam_depth=0.5, seam_width_m=0.004, teeth_pitch_m=0.0,
                               teeth_depth_m=0.0, tapes=(), arts=(), shadows=(), wear=0.0,
                               grain=1.0, alternating=False)
    pic = dataclasses.replace(spec.picture, blur_px=0.0, noise_sigma=0.0, compression="png",
                              flicker=(0.0, 100.0, 0.0))
    return dataclasses.replace(spec, look=look, picture=pic, boxes=(), balls=())


def test_seams_are_rendered_where_projectpoints_puts_them():
    spec = _clean(draw_scene(10))
    sc = scenes.render_spec(spec)
    grey = cv2.cvtColor(sc.image, cv2.COLOR_BGR2GRAY).astype(np.float32)
    tile = spec.field.tile_size_m
    cam = spec.setup.camera
    rvec, tvec = np.asarray(spec.setup.rvec), np.asarray(spec.setup.tvec)
    offsets = []
    for i in range(1, spec.field.tiles_x):
        for y in (np.arange(spec.field.tiles_y) + 0.5) * tile:
            pts = np.array([[i * tile + d, y, 0.0] for d in (-1e-3, 0.0, 1e-3)])
            uv = cv2.projectPoints(pts, rvec, tvec, cam.matrix, cam.dist_coeffs)[0][:, 0]
            step = (uv[2] - uv[0]) / np.linalg.norm(uv[2] - uv[0])
            t = np.arange(-4.0, 4.01, 0.25)
            pos = uv[1] + t[:, None] * step
            if not np.all((pos > 5) & (pos < [cam.width_px - 6, cam.height_px - 6])):
                continue
            prof = cv2.remap(grey, pos[:, 0:1].astype(np.float32),
                             pos[:, 1:2].astype(np.float32), cv2.INTER_LINEAR)[:, 0]
            if prof.max() - prof.min() < 10:  # seam thinner than the picture resolves
                continue
            # centroid of the dip: the part more than half-way down from the median
            med = np.median(prof)
            w = np.clip(med - prof - 0.5 * (med - prof.min()), 0, None)
            offsets.append(float((w * t).sum() / w.sum()))
    assert len(offsets) >= 5
    assert abs(np.median(offsets)) < 0.25
    assert np.max(np.abs(offsets)) < 0.6


def test_seam_contrast_criterion_can_fail():
    spec = _clean(draw_scene(41))
    strong = scenes.render_spec(spec)
    none = scenes.render_spec(dataclasses.replace(
        spec, look=dataclasses.replace(spec.look, seam_depth=0.0, tile_gain_sd=0.0)))
    assert strong.seams_visible and strong.seam_contrast > 2 * scenes.SEAM_VISIBLE_CONTRAST
    assert not none.seams_visible and abs(none.seam_contrast) < scenes.SEAM_VISIBLE_CONTRAST


def test_every_category_occurs_over_the_benchmark_seeds():
    counts = Counter()
    hints = Counter()
    for seed in scenes.BENCHMARK_SEEDS:
        spec = draw_scene(seed)
        corners = scenes.corners_in_view(spec, step=8)
        counts.update(spec.categories + scenes.view_categories(spec, corners))
        hints[spec.field.origin_hint] += 1
        h = spec.setup.height_m
        assert 0.8 <= h <= 3.0
        # the lens can be inverted at the picture's corners (OpenCV's undistortPoints,
        # then projectPoints back onto the same pixels)
        cam = spec.setup.camera
        px = np.array([[0, 0], [cam.width_px - 1, 0], [0, cam.height_px - 1],
                       [cam.width_px - 1, cam.height_px - 1]], float)
        crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-12)
        und = cv2.undistortPoints(px[:, None], cam.matrix, cam.dist_coeffs, None, np.eye(3),
                                  np.eye(3), crit)[:, 0]
        back = cv2.projectPoints(np.column_stack([und, np.ones(4)]), np.zeros(3), np.zeros(3),
                                 cam.matrix, cam.dist_coeffs)[0][:, 0]
        np.testing.assert_allclose(back, px, atol=0.01, err_msg=f"seed {seed}")
    assert len(scenes.BENCHMARK_SEEDS) >= 200
    for cat in SPEC_CATEGORIES + scenes.VIEW_CATEGORIES:
        assert counts[cat] >= 5, cat
    assert set(hints) == {"near-left", "near-right", "far-left", "far-right"}


def test_written_scene_reads_as_a_user_would(tmp_path, small_scenes):
    seed = SMALL_SEEDS[1]
    picture = scenes.write_scene(seed, tmp_path)
    truth = json.loads((tmp_path / "truth.json").read_text())
    field = load_field(tmp_path / "field.toml")
    camera = load_camera(tmp_path / "camera.toml")
    spec = small_scenes[seed].spec
    assert picture.name == truth["picture"]
    assert (field.tiles_x, field.tiles_y, field.origin_hint) == (
        spec.field.tiles_x, spec.field.tiles_y, spec.field.origin_hint)
    np.testing.assert_allclose(camera.matrix, truth["camera"]["camera_matrix"])
    assert truth["n_corners_in_view"] == len(small_scenes[seed].corners)
    img = cv2.imread(str(picture))
    assert img.shape[:2] == (camera.height_px, camera.width_px)


def test_start_tile_has_its_four_corners_in_view(small_scenes):
    for sc in small_scenes.values():
        tile = scenes.start_tile(sc)
        seen = {(int(i), int(j)) for i, j in sc.corners[:, :2]}
        if tile is None:  # no whole tile in view: fewer than four corners of any tile
            assert not any({(i, j), (i + 1, j), (i, j + 1), (i + 1, j + 1)} <= seen
                           for i, j in seen)
            continue
        i, j = tile
        assert {(i, j), (i + 1, j), (i, j + 1), (i + 1, j + 1)} <= seen
