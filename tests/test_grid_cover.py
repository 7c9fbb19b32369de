"""Dense seam evidence across a family of lines, accumulated over the image's pixels.

A pencil of lines is drawn with ``cv2.line`` through a homography made by
``cv2.getPerspectiveTransform`` (both OpenCV, independent of the project); the visible
length of each line is checked against OpenCV's ``cv2.clipLine`` of the same image line.
"""

from __future__ import annotations

import math

import cv2
import numpy as np

from vidodo.registration.grid import cover
from vidodo.registration.grid.segments import find_segments

H_PX, W_PX = 480, 640


def _setup():
    """A homography rectified -> image (perspective), its family of lines rho = x."""
    src = np.float32([[0, 0], [1, 0], [1, 1], [0, 1]])
    dst = np.float32([[120, 460], [600, 430], [470, 90], [200, 120]])
    to_img = cv2.getPerspectiveTransform(src, dst)
    rhos_true = np.linspace(0.0, 1.0, 7)
    img = np.full((H_PX, W_PX), 170, np.uint8)
    ends = []
    for r in rhos_true:
        p = cv2.perspectiveTransform(np.float64([[[r, -0.4]], [[r, 1.3]]]), to_img)
        a, b = p.reshape(2, 2)
        ends.append((a, b))
        cv2.line(img, tuple(int(round(v)) for v in a), tuple(int(round(v)) for v in b), 60,
                 2, cv2.LINE_AA)
    return to_img, rhos_true, img, ends


def test_cover_peaks_on_drawn_lines_and_length_matches_clipline():
    to_img, rhos_true, img, ends = _setup()
    _seg, (evidence, line_angle) = find_segments(img)
    centre = np.array([W_PX / 2.0, H_PX / 2.0])
    scale = 2.0 / math.hypot(W_PX, H_PX)
    # Conditioned image -> rectified: undo the conditioning, then the homography.
    cond_to_pix = np.array([[1 / scale, 0, centre[0]], [0, 1 / scale, centre[1]], [0, 0, 1]])
    rect = np.linalg.inv(to_img) @ cond_to_pix
    grid = cover.pixel_grid((H_PX, W_PX), None, centre, scale)
    f = {"normal": np.array([1.0, 0.0]), "ref": np.array([0.0, 0.0])}
    floor_sign = float(np.sign(rect[2] @ [0.0, 0.0, 1.0]))
    per_pixel = cover.family_rho(grid, rect, f, evidence, line_angle, floor_sign)
    rhos = np.linspace(-0.2, 1.2, 1401)
    cov, length, _speed = cover.family_cover(per_pixel, rhos)
    for r, (a, b) in zip(rhos_true, ends, strict=True):
        near = np.abs(rhos - r) < 0.006
        assert cov[near].max() > 0.6, r
        # Visible length of the same image line, clipped by OpenCV to the frame.
        far_a, far_b = a + 10 * (a - b), b + 10 * (b - a)  # the whole image line
        ok, p1, p2 = cv2.clipLine((0, 0, W_PX, H_PX), tuple(int(v) for v in far_a),
                                  tuple(int(v) for v in far_b))
        assert ok
        expect = math.dist(p1, p2)
        got = float(np.median(length[near]))
        assert abs(got - expect) < 0.12 * expect, (r, got, expect)
    # Half-way between the lines: no seam evidence.
    mid = (rhos_true[:-1] + rhos_true[1:]) / 2
    for r in mid:
        assert cov[np.abs(rhos - r) < 0.004].max() < 0.1, r
