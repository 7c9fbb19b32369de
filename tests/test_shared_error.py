"""The track's shared error (vidodo.tracking.shared_error): one registration error and
one common corner shift per run, seen through each frame's geometry. Checked against a
Monte Carlo of the same pose fit (JCGM 101:2008's check of linear propagation) and the
linear-propagation rule for a covariance between two linear images of one random
vector, ``Cov(A b, B b) = A Cov(b) B^T`` (JCGM 100:2008, section 5.2; textbook)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from test_registration_uncertainty import TAG, K, _oblique

from vidodo.registration.frame import FrameRegistration
from vidodo.tracking.detector import Detection
from vidodo.tracking.pose_fit import fit_pose
from vidodo.tracking.registration_error import (
    registration_pose_cov,
    registration_pose_loadings,
)
from vidodo.tracking.shared_error import SHARED_MODES, shared_modes


def _tag_at(reg, x_m, y_m, th=0.4):
    """The tag's detection and pose fit with its centre at (x_m, y_m)."""
    local = np.array([[-1, 1], [1, 1], [1, -1], [-1, -1]], float) * TAG.size_m / 2
    rot = np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])
    world = local @ rot.T + (x_m, y_m)
    px = reg.floor_to_image(np.column_stack([world, np.full(4, TAG.z_m)]))
    dets = [Detection(0, px)]
    return dets, fit_pose(dets, (TAG,), reg)


def test_registration_loadings_give_the_covariance_between_frames():
    """Two frames of a still camera, the robot 1.3 m apart: one registration error moves
    both poses. The loadings' products give each frame's covariance (equal to
    ``registration_pose_cov``) and the covariance between the frames, which a Monte Carlo
    of refitting both poses through one drawn registration reproduces (1500 draws;
    entries within 10 % of the frames' 1-sigma product)."""
    rng = np.random.default_rng(7)  # seed fixed: the statistics depend on it
    cov = np.diag([3e-4, 3e-4, 3e-4, 3e-3, 3e-3, 3e-3]) ** 2
    reg = _oblique(cov, ("rvec", "tvec"))
    (d1, f1), (d2, f2) = _tag_at(reg, 0.6, 0.8), _tag_at(reg, 1.9, 1.4, 1.2)
    frames = [(f, [d[0].corners_px], [TAG.z_m], reg) for d, f in ((d1, f1), (d2, f2))]
    l1, l2 = registration_pose_loadings(frames)
    assert l1 @ l1.T == pytest.approx(registration_pose_cov(f1, d1, (TAG,), reg), rel=1e-9)
    cross = l1[:2] @ l2[:2].T
    draws = rng.multivariate_normal(np.zeros(6), cov, size=1500)
    out = []
    for d in draws:
        moved = FrameRegistration(0.0, True, K, reg.dist_coeffs, reg.rvec + d[:3],
                                  reg.tvec + d[3:], 0, 0, 0, "")
        a, b = fit_pose(d1, (TAG,), moved), fit_pose(d2, (TAG,), moved)
        out.append([a.x_m, a.y_m, b.x_m, b.y_m])
    emp = np.cov(np.array(out).T)[:2, 2:]
    scale = math.sqrt(np.trace(l1[:2] @ l1[:2].T) * np.trace(l2[:2] @ l2[:2].T)) / 2
    assert np.abs(emp - cross).max() < 0.1 * scale
    assert np.abs(cross).max() > 0.3 * scale  # the frames' errors are far from independent


class _Linear:
    """A registration that maps pixels to the floor linearly, ``floor = S px``."""

    def __init__(self, s):
        self.s = np.asarray(s, float)

    def image_to_floor(self, px, _z=0.0):
        return np.asarray(px, float).reshape(-1, 2) @ self.s.T


def test_common_corner_shift_modes_give_its_covariance_between_frames():
    """A corner shift b common to the run (1-sigma 0.05 px per axis) seen through each
    frame's image-to-floor derivative S_i: the modes give ``Cov(S_i b, S_j b) = S_i
    Cov(b) S_j^T`` for every pair of frames, between detections too (interpolated);
    without a still camera the registration adds no mode."""
    maps = [np.array([[0.004, 0.001], [0.0, 0.006]]), np.array([[0.003, -0.002],
                                                                [0.001, 0.008]])]
    corners = np.array([[100.0, 100], [140, 100], [140, 140], [100, 140]])
    inputs = [(None, [corners], [0.0], _Linear(m)) for m in maps]
    modes = shared_modes(inputs, np.array([0, 4]), 5, 0.05, still=False)
    assert modes.shape == (5, SHARED_MODES, 2)
    for i, a in ((0, maps[0]), (4, maps[1])):
        for j, b in ((0, maps[0]), (4, maps[1])):
            got = modes[i].T @ modes[j]
            assert got == pytest.approx(0.05**2 * a @ b.T, abs=1e-15)
    assert modes[2] == pytest.approx((modes[0] + modes[4]) / 2)
