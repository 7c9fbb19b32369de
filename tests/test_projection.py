"""Many-pose projection against OpenCV's own (``cv2.projectPoints``, ``cv2.Rodrigues``),
the reference implementation of the camera model vidodo uses."""

import cv2
import numpy as np
import pytest

from vidodo.registration.frame import FrameRegistration, project_rows
from vidodo.registration.projection import project_many, rodrigues_many, supported

K = np.array([[1400.0, 0.0, 959.5], [0.0, 1380.0, 539.5], [0.0, 0.0, 1.0]])
LENSES = [np.zeros(5), np.array([0.09, -0.2, 0.0008, 0.0005, 0.1]),
          np.array([0.1, -0.2, 0.001, 0.002, 0.05, 0.01, -0.02, 0.03]),
          np.array([0.05, -0.1, 0.001, -0.001, 0.02, 0.0, 0.0, 0.0, 1e-3, -1e-3, 2e-3, 1e-4])]


@pytest.mark.parametrize("dist", LENSES, ids=["none", "5", "rational", "thin-prism"])
def test_project_many_equals_opencv_per_pose(dist):
    rng = np.random.default_rng(7)
    for _ in range(20):
        rv, tv = rng.normal(0, 1, 3), rng.normal(0, 0.5, 3) + [0, 0, 4]
        obj = np.column_stack([rng.uniform(-2, 2, (100, 2)), rng.uniform(-0.3, 0.3, 100)])
        want = cv2.projectPoints(obj, rv, tv, K, dist)[0].reshape(-1, 2)
        got = project_many(obj, rodrigues_many(rv)[0], tv, K, dist)
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-9)


def test_rodrigues_many_equals_opencv():
    rng = np.random.default_rng(3)
    rvecs = np.vstack([rng.normal(0, 1.5, (200, 3)), np.zeros((1, 3)), [[1e-20, 0, 0]]])
    got = rodrigues_many(rvecs)
    for r, m in zip(rvecs, got, strict=True):
        np.testing.assert_allclose(m, cv2.Rodrigues(r)[0], rtol=0, atol=1e-15)


def test_tilted_sensor_is_left_to_opencv():
    tilted = np.r_[LENSES[1], np.zeros(7), 0.01, 0.0]
    assert not supported(tilted)
    with pytest.raises(ValueError):
        project_many(np.zeros((1, 3)), np.eye(3), [0, 0, 1], K, tilted)
    # project_rows then projects band by band with OpenCV: same as the plain call
    obj = np.array([[0.5, 0.2, 0.0], [1.0, -0.4, 0.0]])
    rv, tv = np.array([0.2, -0.1, 0.05]), np.array([0.1, 0.2, 3.0])
    got = project_rows(obj, (rv, tv), (np.zeros(3), np.zeros(3)), np.zeros(2), K, tilted)
    np.testing.assert_allclose(got, cv2.projectPoints(obj, rv, tv, K, tilted)[0].reshape(-1, 2),
                               atol=1e-9)


def test_project_rows_each_band_at_its_own_pose():
    """Every point lands where OpenCV puts it at the pose of its band's mean time."""
    rng = np.random.default_rng(5)
    obj = np.column_stack([rng.uniform(0, 3.6, (300, 2)), np.zeros(300)])
    dt = rng.uniform(0, 0.03, 300)
    rv, tv = np.array([-2.0, 0.3, 0.2]), np.array([-1.0, 1.0, 3.5])
    rates = (np.array([0.3, -0.2, 0.1]), np.array([0.2, 0.3, -0.1]))
    bands = 8
    got = project_rows(obj, (rv, tv), rates, dt, K, LENSES[1], bands=bands)
    edges = np.linspace(dt.min(), dt.max() + 1e-12, bands + 1)
    idx = np.clip(np.searchsorted(edges, dt, side="right") - 1, 0, bands - 1)
    for b in range(bands):
        sel = idx == b
        d = dt[sel].mean()
        want = cv2.projectPoints(obj[sel], rv + d * rates[0], tv + d * rates[1], K,
                                 LENSES[1])[0].reshape(-1, 2)
        np.testing.assert_allclose(got[sel], want, rtol=1e-12, atol=1e-9)


def test_rolling_image_to_floor_inverts_each_rows_pose():
    """A pixel maps to the floor point that OpenCV projects to it at that row's pose."""
    rv, tv = np.array([-2.0, 0.3, 0.2]), np.array([-1.0, 1.0, 3.5])
    rates = (np.array([0.3, -0.2, 0.1]), np.array([0.2, 0.3, -0.1]))
    reg = FrameRegistration(0.0, True, K, LENSES[1], rv, tv, 0.1, 1e-3, 10, "tracked",
                            readout_s=0.03, rvec_rate=rates[0], tvec_rate=rates[1])
    px = np.array([[300.0, 200.0], [960.0, 540.0], [1500.0, 900.0]])
    floor = reg.image_to_floor(px)
    for p, f in zip(px, floor, strict=True):
        d = p[1] / (2 * K[1, 2] + 1) * 0.03
        back = cv2.projectPoints(np.array([[f[0], f[1], 0.0]]), rv + d * rates[0],
                                 tv + d * rates[1], K, LENSES[1])[0].reshape(2)
        np.testing.assert_allclose(back, p, atol=1e-6)
