"""The registration's own error carried into floor points and the robot's pose, and the
readout estimate's spread: each propagation formula against a closed form or a Monte
Carlo of the same model."""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest

from vidodo.profiles import Marker
from vidodo.registration.camera_fit import fit_camera
from vidodo.registration.frame import FrameRegistration
from vidodo.registration.uncertainty import (
    cluster_covariance,
    floor_point_covariance,
    pose_covariance,
)
from vidodo.tracking.detector import Detection
from vidodo.tracking.noise import readout_block_sigma
from vidodo.tracking.pose_fit import fit_pose
from vidodo.tracking.registration_error import registration_pose_cov, view_rate

K = np.array([[900.0, 0, 639.5], [0, 900.0, 359.5], [0, 0, 1]])
TAG = Marker(family="DICT_4X4_50", id=3, size_m=0.15, x_m=0.0, y_m=0.0, z_m=0.2,
             yaw_rad=0.0)


def _nadir(height_m=2.0, cov=None, names=()):
    """A camera straight above the floor origin (x right, y down the image, optical
    axis straight down): floor (x, y) -> camera (x, -y, h)."""
    rvec = np.array([math.pi, 0.0, 0.0])  # rotation of 180 deg about x
    tvec = np.array([0.0, 0.0, height_m])
    return FrameRegistration(0.0, True, K, np.zeros(5), rvec, tvec, 0.1, 1e-4, 100, "grid",
                             param_cov=cov, param_names=names)


def _oblique(cov=None, names=()):
    """A camera 1.6 m high, 1.5 m before the field, looking down at it."""
    rvec, _ = cv2.Rodrigues(np.array([[1, 0, 0], [0, -0.6, -0.8], [0, 0.8, -0.6]], float))
    centre = np.array([1.0, -1.5, 1.6])
    r = cv2.Rodrigues(rvec)[0]
    return FrameRegistration(0.0, True, K, np.array([0.05, -0.1, 0, 0, 0]), rvec.ravel(),
                             -r @ centre, 0.1, 1e-4, 100, "grid", param_cov=cov,
                             param_names=names)


def test_nadir_translation_closed_form():
    """Looking straight down, a camera shifted by t along its x axis maps every floor
    point by -t (the ray moves with the camera): tvec_x with 1-sigma s gives floor x
    1-sigma s and nothing in y, at any pixel (closed form)."""
    cov = np.diag([0, 0, 0, 1e-6, 0, 0])
    reg = _nadir(cov=cov, names=("rvec", "tvec"))
    c, _ = floor_point_covariance(reg, np.array([[100.0, 80.0], [640.0, 360.0]]))
    assert c[:, 0, 0] == pytest.approx(1e-6, rel=1e-6)
    assert c[:, 1, 1] == pytest.approx(0.0, abs=1e-15)
    # Height error on a nadir view scales the floor about the nadir: x = h u / f, so
    # sigma_x = |u| / f * sigma_h (closed form); at the image centre nothing moves.
    reg = _nadir(cov=np.diag([0, 0, 0, 0, 0, 4e-6]), names=("rvec", "tvec"))
    c, _ = floor_point_covariance(reg, np.array([[639.5 + 300.0, 359.5], [639.5, 359.5]]))
    assert math.sqrt(c[0, 0, 0]) == pytest.approx(300.0 / 900.0 * 2e-3, rel=1e-5)
    assert c[1, 0, 0] == pytest.approx(0.0, abs=1e-15)


def test_floor_covariance_matches_monte_carlo():
    """First-order propagation agrees with drawing the parameters (Monte Carlo of the
    same mapping, JCGM 101:2008's check of the law of propagation): pose and lens terms
    of a few tenths of a milliradian, millimetre and percent, on an oblique view."""
    rng = np.random.default_rng(3)  # seed fixed: the statistics depend on it
    a = rng.normal(size=(9, 9))
    scale = np.diag([2e-4] * 3 + [2e-3] * 3 + [5e-3, 5e-3, 5e-3])
    cov = scale @ (a @ a.T / 9) @ scale
    names = ("rvec", "tvec", "focal", "k1", "k2")
    reg = _oblique(cov, names)
    px = np.array([[300.0, 500.0], [900.0, 250.0]])
    c, _ = floor_point_covariance(reg, px, 0.2)
    base = reg.image_to_floor(px, 0.2)
    draws = rng.multivariate_normal(np.zeros(9), cov, size=3000)
    out = []
    for d in draws:
        cam = K.copy()
        cam[0, 0] = cam[1, 1] = K[0, 0] * math.exp(d[6])
        dist = reg.dist_coeffs.copy()
        dist[0] += d[7]
        dist[1] += d[8]
        moved = FrameRegistration(0.0, True, cam, dist, reg.rvec + d[:3], reg.tvec + d[3:6],
                                  0, 0, 0, "")
        out.append(moved.image_to_floor(px, 0.2) - base)
    out = np.array(out)
    for k in range(2):
        emp = np.cov(out[:, k].T)
        assert np.sqrt(np.diag(emp)) == pytest.approx(np.sqrt(np.diag(c[k])), rel=0.06)


def test_pose_covariance_of_a_line_fit():
    """``s^2 (J^T J)^-1`` of a straight-line fit equals the textbook slope variance
    s^2 / sum (x - mean x)^2 (Draper & Smith, Applied Regression Analysis, section 1.4)."""
    x = np.linspace(0, 1, 11)
    jac = np.column_stack([np.ones_like(x), x])
    res = np.sin(7 * x) * 0.1  # any residuals orthogonal enough; s^2 from them
    c = pose_covariance(jac, res, 2)
    s2 = float(res @ res) / (len(x) - 2)
    assert c[1, 1] == pytest.approx(s2 / np.sum((x - x.mean()) ** 2), rel=1e-12)


def test_cluster_covariance_matches_monte_carlo():
    """Residuals sharing an error per group: the cluster-robust covariance follows the
    estimator's real spread (Monte Carlo of least squares on such data), where the
    independent one is far too small (Liang & Zeger 1986)."""
    rng = np.random.default_rng(8)  # seed fixed: the statistics depend on it
    groups = np.repeat(np.arange(40), 25)
    x = rng.uniform(-1, 1, len(groups))
    jac = np.column_stack([np.ones_like(x), x])
    slopes, cluster, iid = [], [], []
    for _ in range(400):
        y = rng.normal(0, 1, 40)[groups] + rng.normal(0, 0.3, len(x))
        beta, *_ = np.linalg.lstsq(jac, y, rcond=None)
        res = y - jac @ beta
        slopes.append(beta[0])
        cluster.append(cluster_covariance(jac, res, groups, 2)[0, 0])
        iid.append(pose_covariance(jac, res, 2)[0, 0])
    true_var = np.var(slopes)
    assert np.mean(cluster) == pytest.approx(true_var, rel=0.2)
    assert np.mean(iid) < 0.2 * true_var


def test_cluster_covariance_never_below_independent():
    """Independent residuals, one group each pair: never smaller than s^2 (J^T J)^-1."""
    rng = np.random.default_rng(2)
    jac = rng.normal(size=(60, 3))
    res = rng.normal(size=60)
    c = cluster_covariance(jac, res, np.repeat(np.arange(30), 2), 3)
    assert np.all(np.linalg.eigvalsh(c - pose_covariance(jac, res, 3)) >= -1e-12)


def test_registration_pose_cov_matches_monte_carlo():
    """The robot pose's covariance from the registration (gain of the rigid fit times
    the parameter covariance) agrees with refitting the pose through drawn
    registrations (Monte Carlo of the same fit)."""
    rng = np.random.default_rng(5)  # seed fixed: the statistics depend on it
    cov = np.diag([3e-4, 3e-4, 3e-4, 3e-3, 3e-3, 3e-3]) ** 2
    reg = _oblique(cov, ("rvec", "tvec"))
    local = np.array([[-1, 1], [1, 1], [1, -1], [-1, -1]], float) * TAG.size_m / 2
    th = 0.4
    rot = np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])
    world = local @ rot.T + (1.2, 1.0)
    px = reg.floor_to_image(np.column_stack([world, np.full(4, TAG.z_m)]))
    dets = [Detection(0, px)]
    fix = fit_pose(dets, (TAG,), reg)
    c = registration_pose_cov(fix, dets, (TAG,), reg)
    draws = rng.multivariate_normal(np.zeros(6), cov, size=1500)
    poses = []
    for d in draws:
        moved = FrameRegistration(0.0, True, K, reg.dist_coeffs, reg.rvec + d[:3],
                                  reg.tvec + d[3:], 0, 0, 0, "")
        f = fit_pose(dets, (TAG,), moved)
        poses.append([f.x_m, f.y_m, f.heading_rad])
    emp = np.cov(np.array(poses).T)
    assert np.sqrt(np.diag(emp)) == pytest.approx(np.sqrt(np.diag(c)), rel=0.08)
    # Tied to an earlier registration with share 1/4: its variance adds at a quarter.
    tied = FrameRegistration(0.0, True, K, reg.dist_coeffs, reg.rvec, reg.tvec, 0, 0, 0,
                             "", tied_to=reg, tied_share=0.25)
    assert registration_pose_cov(fix, dets, (TAG,), tied) == pytest.approx(c / 4, rel=1e-6)


def test_fit_camera_covariance_of_seams_groups_by_seam():
    """A seam-only fit whose samples share a per-seam offset: its covariance (cluster-
    robust over seam lines) is larger than the independent one would be."""
    reg = _oblique()
    rng = np.random.default_rng(4)
    q, ax, val = [], [], []
    for a in (0, 1):
        for v in np.arange(0.0, 2.41, 0.6):
            s = np.linspace(0.05, 2.35, 60)
            fl = np.column_stack([np.full_like(s, v), s] if a == 0 else [s, np.full_like(s, v)])
            img = reg.floor_to_image(fl) + rng.normal(0, 0.5, 2)  # one offset per seam
            q.append(img + rng.normal(0, 0.1, img.shape))
            ax.append(np.full(len(s), a))
            val.append(np.full(len(s), v))
    q, ax, val = np.vstack(q), np.concatenate(ax), np.concatenate(val)
    from vidodo.profiles import CameraProfile

    cam = CameraProfile(1280, 720, 900.0, 900.0, 639.5, 359.5, tuple(reg.dist_coeffs))
    fit = fit_camera((1280, 720), seams=(q, ax, val), camera=cam,
                     init=(K, reg.dist_coeffs, reg.rvec, reg.tvec))
    jac_free = np.eye(6)  # the covariance is over (rvec, tvec)
    assert fit.covariance.shape == (6, 6) and fit.free == ("rvec", "tvec")
    assert np.all(np.isfinite(fit.covariance @ jac_free))
    # translation 1-sigma of several millimetres: seam offsets of 0.5 px at ~4 mm/px
    # over ten seams, not the 0.1 px per sample spread over 600 samples
    assert math.sqrt(fit.covariance[3, 3]) > 5 * 0.1 / math.sqrt(600) * 2.0e-3 / 0.1


def test_readout_block_sigma_matches_monte_carlo():
    """The delete-a-block jackknife of a ratio estimate follows its real spread when the
    terms are correlated from frame to frame (AR(1), rho 0.8: the independent sigma is
    three times too small; Kunsch 1989), checked by Monte Carlo."""
    rng = np.random.default_rng(6)  # seed fixed: the statistics depend on it
    n, rho = 400, 0.8
    den = np.full(n, 1.0)
    est, jack = [], []
    for _ in range(400):
        e = np.empty(n)
        e[0] = rng.normal()
        for k in range(1, n):
            e[k] = rho * e[k - 1] + math.sqrt(1 - rho ** 2) * rng.normal()
        num = 0.02 * den + 0.01 * e
        est.append(num.sum() / den.sum())
        jack.append(readout_block_sigma(num, den))
    assert np.sqrt(np.mean(np.square(jack))) == pytest.approx(np.std(est), rel=0.2)
    assert 0.01 / math.sqrt(n) < 0.5 * np.std(est)
    assert math.isnan(readout_block_sigma(np.ones(5), np.ones(5)))


def test_view_rate_of_a_gliding_camera():
    """A camera looking straight down, gliding along floor x at 0.3 m/s: the floor point
    under any pixel moves at 0.3 m/s along x (closed form: the ray moves with the camera);
    a still camera (the same registration) gives zero."""
    a = _nadir()
    # camera frame x = floor x for this nadir camera, and tvec = -R c: moving the centre
    # by +dx moves tvec_x by -dx
    b = FrameRegistration(0.1, True, K, np.zeros(5), a.rvec, a.tvec - (0.03, 0, 0), 0, 0, 0,
                          "")
    rate = view_rate(b, (a, 0.0), 0.1, (200.0, 600.0), 0.2)
    assert rate == pytest.approx([0.3, 0.0], abs=1e-9)
    assert view_rate(a, (a, 0.0), 0.1, (200.0, 600.0), 0.2) == pytest.approx([0, 0])
    assert view_rate(b, (a, -1.0), 0.1, (200.0, 600.0), 0.2) == pytest.approx([0, 0])
