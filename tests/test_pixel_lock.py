"""Pixel locking of a marker's common shift (vidodo.tracking.pixel_lock).

References: the average of a periodic error over a span of phases (closed form, the
sinc of the span, checked by Monte Carlo here); a pinhole camera looking straight down
(common practice: a pixel at depth D covers D / f on a plane parallel to the image). The
locking amplitude itself is measured on exact-coverage tags in
``tests/test_corner_bias.py``.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest

from vidodo.registration.frame import FrameRegistration
from vidodo.tracking.detector import PIXEL_LOCK_PX
from vidodo.tracking.finish import _lock_share
from vidodo.tracking.pixel_lock import lock_attenuation, lock_floor_vars, lock_sigma_px

AMP = PIXEL_LOCK_PX["apriltag"]


def test_attenuation_bounds_the_averaged_periodic_error_monte_carlo():
    """A periodic edge error of period 1 px (first harmonic, RMS 1 over the phase)
    averaged along an edge whose phase drifts by ``s`` px: over random start phases its
    RMS is |sinc(s)| (closed form), which the carried envelope must not fall below."""
    rng = np.random.default_rng(3)
    start = rng.uniform(0, 1, 20000)
    along = np.linspace(0.0, 1.0, 401)
    for s in (0.0, 0.3, 0.5, 1.0, 1.5, 2.7, 6.0):
        phase = start[:, None] + s * along[None, :]
        avg = np.mean(math.sqrt(2.0) * np.sin(2 * np.pi * phase), axis=1)
        rms = float(np.sqrt(np.mean(avg**2)))
        assert rms == pytest.approx(abs(np.sinc(s)), abs=0.02)
        assert rms <= float(lock_attenuation(s)) + 0.02


def _square(side_px, angle_rad, centre=(400.0, 300.0)):
    unit = np.array([[-0.5, -0.5], [0.5, -0.5], [0.5, 0.5], [-0.5, 0.5]])
    c, s = math.cos(angle_rad), math.sin(angle_rad)
    return np.asarray(centre) + side_px * unit @ np.array([[c, s], [-s, c]])


def test_sigma_of_aligned_and_turned_squares():
    assert lock_sigma_px(_square(55, 0.0), "apriltag") == pytest.approx([AMP, AMP])
    # turned by a: every edge drifts 55 sin(a) px across the grid the other way
    a = math.radians(1.0)
    want = AMP / (math.pi * 55 * math.sin(a))
    assert lock_sigma_px(_square(55, a), "apriltag") == pytest.approx([want, want], rel=1e-9)
    assert np.all(lock_sigma_px(_square(55, math.radians(20)), "apriltag") < 0.02)
    assert np.all(lock_sigma_px(_square(55, 0.0), "contour") == 0.0)  # not measured


def _down(height_m, f_px=900.0):
    """A registration looking straight down at the floor point (1, 1)."""
    R = np.diag([1.0, -1.0, -1.0])
    centre = np.array([1.0, 1.0, height_m])
    K = np.array([[f_px, 0, 399.5], [0, f_px, 299.5], [0, 0, 1]])
    return FrameRegistration(0.0, True, K, np.zeros(5), cv2.Rodrigues(R)[0].ravel(),
                             -R @ centre, 0.2, 0.001, 50, "points")


def test_floor_variance_straight_down_closed_form():
    """Straight down from H onto a marker at z: a pixel is (H - z) / f on its plane,
    so the variance from each axis is (sigma * (H - z) / f)^2; two markers lock
    independently and the position is their mean (variance sum / 4)."""
    reg, z = _down(2.0), 0.3
    scale = (2.0 - z) / 900.0
    one = lock_floor_vars([(reg, [_square(55, 0.0)], [z])], "apriltag")
    assert one[0] == pytest.approx([(AMP * scale) ** 2] * 2, rel=1e-6)
    two = lock_floor_vars([(reg, [_square(55, 0.0), _square(55, 0.0, (200, 200))], [z, z])],
                          "apriltag")
    assert two[0] == pytest.approx(2 * one[0] / 4, rel=1e-6)


class _Signal:
    def __init__(self, sigma, r_scale=1.0):
        self.sigma_value = np.asarray(sigma, float)
        self.r_scale = r_scale


def test_share_kept_at_rest_averaged_when_moving_along_the_axis():
    """A marker still (or moving only along u) keeps the whole locking of v; one that
    moves along v by 0.5 px a frame over a smoother window of 4 frames (measurement
    variance 4 times the smoothed one) keeps min(1, 1 / (pi 2))^2 of it."""
    unit_sd = np.full((3, 3), 1e-3)
    fresh = np.ones(3)
    sx = sy = _Signal(np.full(3, 0.5e-3))  # (1e-3)^2 / (0.5e-3)^2 = 4 frames
    pos = np.arange(3.0)
    still = _lock_share(sx, sy, unit_sd, fresh, pos, np.zeros((3, 2)))
    assert still == pytest.approx(np.ones((3, 2)))
    along_u = _lock_share(sx, sy, unit_sd, fresh, pos, np.tile([2.0, 0.0], (3, 1)))
    assert along_u[:, 1] == pytest.approx(np.ones(3))
    assert along_u[:, 0] == pytest.approx(np.full(3, (1 / (math.pi * 8.0)) ** 2))
    along_v = _lock_share(sx, sy, unit_sd, fresh, pos, np.tile([0.0, 0.5], (3, 1)))
    assert along_v[:, 1] == pytest.approx(np.full(3, (1 / (math.pi * 2.0)) ** 2))
