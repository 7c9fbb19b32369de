"""The seam fit's parameter covariance against Monte Carlo of the same fit on a known
camera, the bias-reduced cluster covariance on few clusters, and the soft-L1 weights
against SciPy's own scaling of the Jacobian."""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest
from scipy.optimize import least_squares

from vidodo.profiles import CameraProfile
from vidodo.registration.camera_fit import fit_camera
from vidodo.registration.frame import FrameRegistration
from vidodo.registration.uncertainty import cluster_covariance, soft_l1_weights

K = np.array([[900.0, 0, 639.5], [0, 900.0, 359.5], [0, 0, 1]])
DIST = np.array([0.05, -0.1, 0, 0, 0])
CAM = CameraProfile(1280, 720, 900.0, 900.0, 639.5, 359.5, tuple(DIST))


def _camera():
    """A camera 1.6 m high, 1.5 m before a 2.4 m field, looking down at it."""
    rvec, _ = cv2.Rodrigues(np.array([[1, 0, 0], [0, -0.6, -0.8], [0, 0.8, -0.6]], float))
    r = cv2.Rodrigues(rvec)[0]
    return FrameRegistration(0.0, True, K, DIST, rvec.ravel(), -r @ np.array([1.2, -1.5, 1.6]),
                             0, 0, 0, "")


def _seams(reg):
    """Exact seam pixels of a 4 x 4 field of 0.6 m tiles (inner and outer lines)."""
    q, ax, val = [], [], []
    for a in (0, 1):
        for v in np.arange(0.0, 2.41, 0.6):
            s = np.linspace(0.05, 2.35, 40)
            fl = np.column_stack([np.full_like(s, v), s] if a == 0 else [s, np.full_like(s, v)])
            q.append(reg.floor_to_image(fl))
            ax.append(np.full(len(s), a))
            val.append(np.full(len(s), v))
    return q, np.concatenate(ax), np.concatenate(val)


@pytest.mark.parametrize("seam_px, sample_px", [(0.0, 0.3), (0.15, 0.1)])
def test_seam_fit_covariance_matches_monte_carlo(seam_px, sample_px):
    """Monte Carlo of the seam fit itself (pose only, lens known): seam samples of a known
    camera with independent noise per sample, and with an offset shared by each seam's
    samples. The floor position of a point at the field's middle, mapped through each
    fitted camera, spreads as the mean reported covariance says (per axis within 25 %,
    the scatter of 10 seam offsets and 200 draws allows that; JCGM 101:2008's check of a
    propagated uncertainty by Monte Carlo). Independent noise: each seam sample is one
    observation (its 2-D residual has rank one), so ``s^2`` over ``n - p`` is right."""
    reg = _camera()
    q0, ax, val = _seams(reg)
    rng = np.random.default_rng(11)  # seed fixed: the statistics depend on it
    px = reg.floor_to_image(np.array([[1.2, 1.2]]))
    floor, var = [], []
    for _ in range(200):
        q = np.vstack([p + rng.normal(0, seam_px, 2) + rng.normal(0, sample_px, p.shape)
                       for p in q0])
        fit = fit_camera((1280, 720), seams=(q, ax, val), camera=CAM,
                         init=(K, DIST, reg.rvec, reg.tvec))
        moved = FrameRegistration(0.0, True, K, DIST, fit.rvec, fit.tvec, 0, 0, 0, "",
                                  param_cov=fit.covariance, param_names=fit.free)
        floor.append(moved.image_to_floor(px)[0])
        from vidodo.registration.uncertainty import floor_point_covariance

        var.append(np.diag(floor_point_covariance(moved, px)[0][0]))
    emp = np.std(np.array(floor), axis=0)
    rep = np.sqrt(np.mean(var, axis=0))
    assert rep == pytest.approx(emp, rel=0.25)


def test_cluster_covariance_few_clusters_matches_monte_carlo():
    """Ten groups for six parameters, each group spanning two directions (a seam: offset
    and slope): the bias-reduced sandwich follows the estimator's real spread (Monte Carlo
    of least squares on such data; Bell & McCaffrey 2002), the plain one with the
    G / (G - 1) factor falls well short."""
    rng = np.random.default_rng(21)  # seed fixed: the statistics depend on it
    groups = np.repeat(np.arange(10), 30)
    t = np.tile(np.linspace(-1, 1, 30), 10)
    a, b = rng.normal(size=(10, 6)), rng.normal(size=(10, 6))
    jac = a[groups] + t[:, None] * b[groups]
    est, cr2, plain = [], [], []
    bread = np.linalg.inv(jac.T @ jac)
    for _ in range(1500):
        y = rng.normal(0, 1, 10)[groups] + rng.normal(0, 0.3, len(t))
        beta = bread @ jac.T @ y
        res = y - jac @ beta
        est.append(beta)
        cr2.append(np.diag(cluster_covariance(jac, res, groups, 6)))
        score = np.zeros((10, 6))
        np.add.at(score, groups, jac * res[:, None])
        plain.append(np.diag(bread @ score.T @ score @ bread) * 10 / 9)
    true_var = np.var(np.array(est), axis=0)
    assert np.mean(cr2, axis=0) == pytest.approx(true_var, rel=0.2)
    assert np.all(np.mean(plain, axis=0) < 0.75 * true_var)


def test_soft_l1_weights_match_scipy_jacobian():
    """SciPy's least_squares with loss='soft_l1' returns the Jacobian scaled by
    sqrt(psi'(r)) per row; ``soft_l1_weights`` gives that psi'."""
    x = np.linspace(0, 1, 30)
    y = 2 * x + 1 + np.where(np.arange(30) % 7 == 0, 2.0, 0.05 * np.sin(9 * x))

    def fun(p):
        return p[0] * x + p[1] - y

    sol = least_squares(fun, [1.0, 0.0], loss="soft_l1", f_scale=0.5)
    plain = np.column_stack([x, np.ones_like(x)])
    _, dpsi = soft_l1_weights(sol.fun, 0.5)
    assert sol.jac == pytest.approx(plain * np.sqrt(dpsi)[:, None], rel=1e-5, abs=1e-7)
    assert math.isclose(soft_l1_weights(np.array([0.5]), 0.5)[0][0], 2 ** -0.5)


def test_larger_of_two_covariances_survives_rounding_below_zero():
    """A fit that hardly fixes one direction can leave its covariance with an eigenvalue
    rounded just below zero (seen on a grazing-view registration). The larger of two
    covariances must still be a covariance (symmetric, positive semi-definite: common
    practice) and at least each input in every direction, not a failed factorisation."""
    from vidodo.registration.uncertainty import _larger

    rot, _ = np.linalg.qr(np.random.default_rng(3).normal(size=(3, 3)))
    a = rot @ np.diag([1.0, 1e-3, -1e-10]) @ rot.T
    b = np.diag([0.5, 0.5, 0.5])
    with pytest.raises(np.linalg.LinAlgError):
        np.linalg.cholesky(a)  # what the old factorisation met
    out = _larger(a, b)
    assert np.allclose(out, out.T)
    assert np.linalg.eigvalsh(out - b).min() > -1e-9
    assert np.linalg.eigvalsh(out - a).min() > -1e-9
