"""Floor corner tracking: corner spread (bucketing) and sub-pixel re-location.

The frames are a textured image and its warp by a known homography
(``cv2.warpPerspective``), so every corner's true position in the new frame is known.
"""

from __future__ import annotations

import cv2
import numpy as np

from vidodo import floor_features


def _texture(shape=(480, 640), seed=3):
    """Smooth random texture: strong contrast on the left half, faint on the right."""
    rng = np.random.default_rng(seed)  # seed fixed; any texture will do
    img = cv2.GaussianBlur(rng.normal(0, 1, shape).astype(np.float32), (0, 0), 2.0)
    img /= img.std()
    gain = np.where(np.arange(shape[1]) < shape[1] // 2, 40.0, 6.0)[None, :]
    return np.clip(128 + gain * img, 0, 255).astype(np.uint8)


def test_corners_are_spread_over_faint_and_strong_texture():
    """Both halves get corners, though one has a seventh of the other's contrast.

    A single Shi-Tomasi quality level relative to the strongest corner of the image
    (``cv2.goodFeaturesToTrack``) leaves the faint half nearly empty; the tracker's
    per-cell picking (feature bucketing, common practice) does not.
    """
    img = _texture()
    usable = np.ones(img.shape, bool)
    tracker = floor_features.FloorPatchTracker(img, usable, max_points=400)
    right = tracker.ref_px[:, 0] >= img.shape[1] // 2
    assert tracker.n_points > 200
    assert 0.35 < right.mean() < 0.65
    whole = cv2.goodFeaturesToTrack(img, 400, 0.05, 8, blockSize=7).reshape(-1, 2)
    assert (whole[:, 0] >= img.shape[1] // 2).mean() < 0.1  # the contrast is lopsided


def test_corners_found_again_through_a_known_homography():
    """Corners in both halves are found again within 0.1 px (median) of the true map."""
    img = _texture()
    usable = np.ones(img.shape, bool)
    tracker = floor_features.FloorPatchTracker(img, usable, max_points=400)
    h = np.array([[1.01, 0.02, 3.3], [-0.015, 0.995, -2.2], [1e-5, -2e-5, 1.0]])
    moved = cv2.warpPerspective(img, h, (img.shape[1], img.shape[0]), flags=cv2.INTER_CUBIC)
    found, ok = tracker.locate(moved, h)
    truth = cv2.perspectiveTransform(tracker.ref_px.reshape(-1, 1, 2), h).reshape(-1, 2)
    err = np.linalg.norm(found - truth, axis=1)
    right = tracker.ref_px[:, 0] >= img.shape[1] // 2
    for half in (right, ~right):
        assert (ok & half).sum() > 0.7 * half.sum()
        assert np.median(err[ok & half]) < 0.1
