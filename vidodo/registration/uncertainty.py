"""How far a registration's own parameter error moves a floor point mapped through it.

A camera fit (:func:`~vidodo.registration.camera_fit.fit_camera`) gives the covariance
``C`` of its parameters (pose, and the freed lens terms). A pixel mapped to the floor
through the fitted model moves with the parameters; to first order its floor
covariance is ``J C J^T``, ``J`` the derivative of the floor point with respect to the
parameters (the linear propagation of covariance: JCGM 100:2008, *Guide to the
expression of uncertainty in measurement*, section 5.1.2; Hartley & Zisserman,
*Multiple View Geometry*, 2nd ed., section 5.2.1). ``J`` is taken by central
differences of :meth:`FrameRegistration.image_to_floor`, so the rolling-shutter rows
and the raised plane of a marker are mapped exactly as the tracker maps them.
"""

from __future__ import annotations

import functools
import math
from dataclasses import replace

import cv2
import numpy as np

__all__ = ["pose_covariance", "cluster_covariance", "soft_l1_weights", "floor_point_covariance",
           "PARAM_STEP", "held_out_excess_px", "HELD_OUT_LEVEL", "MAX_LEVERAGE"]

PARAM_STEP = {"rvec": 1e-5, "tvec": 1e-5, "focal": 1e-5, "k1": 1e-5, "k2": 1e-5}
"""Central-difference step per parameter kind [rad, m, log focal, -, -]: small against
any parameter's 1-sigma of interest, large against float64 rounding of the mapping."""


def _expand(names):
    """Parameter names one per entry: 'rvec' and 'tvec' stand for three each."""
    out = []
    for n in names:
        out += [(n, k) for k in range(3)] if n in ("rvec", "tvec") else [(n, 0)]
    return out


def _moved(reg, name, k, step):
    """``reg`` with one parameter moved by ``step``."""
    if name in ("rvec", "tvec"):
        v = np.asarray(getattr(reg, name), float).copy()
        v[k] += step
        return replace(reg, **{name: v})
    if name == "focal":
        cam = np.asarray(reg.camera_matrix, float).copy()
        cam[0, 0] *= math.exp(step)
        cam[1, 1] *= math.exp(step)
        return replace(reg, camera_matrix=cam)
    dist = np.asarray(reg.dist_coeffs, float).ravel().copy()
    dist[0 if name == "k1" else 1] += step
    return replace(reg, dist_coeffs=dist)


def pose_covariance(jac, res, n_params, n_obs=None):
    """Least-squares parameter covariance ``s^2 (J^T J)^-1``, ``s^2 = r^T r / (n - p)``.

    The covariance of a Gauss-Newton fit with the residual variance estimated from the
    fit itself (common practice; e.g. Draper & Smith, *Applied Regression Analysis*,
    3rd ed., section 2.6 for the linear case).

    Parameters
    ----------
    jac : ndarray (m, p)
        Derivative of the residuals with respect to the parameters.
    res : ndarray (m,)
        Residuals at the solution.
    n_params : int
        Parameters fitted (p).
    n_obs : int, optional
        Independent observations (n) behind the ``m`` residuals; default ``m``. A
        residual vector of rank one (a seam sample's 2-D pixel residual only moves across
        the seam) is one observation, not two: ``r^T r`` holds one squared error per
        such sample.

    Returns
    -------
    ndarray (p, p) or None
        None when ``J^T J`` is singular or there is no residual degree of freedom.
    """
    jac = np.asarray(jac, float)
    res = np.asarray(res, float).ravel()
    dof = (len(res) if n_obs is None else int(n_obs)) - int(n_params)
    if dof <= 0:
        return None
    try:
        return np.linalg.inv(jac.T @ jac) * (float(res @ res) / dof)
    except np.linalg.LinAlgError:
        return None


def soft_l1_weights(res, scale):
    """Weights of SciPy's soft-L1 loss ``rho(z) = 2 (sqrt(1 + z) - 1)``, ``z = (r / c)^2``.

    The fit solves ``sum psi(r_i) dr_i/dx = 0`` with ``psi(r) = rho'(z) r``; its
    derivative is ``psi'(r) = rho'(z) + 2 z rho''(z) = (1 + z)^-1.5`` (the factor
    ``scipy.optimize.least_squares`` puts under the square root into the Jacobian it
    returns, ``J^T J`` then being its Gauss-Newton Hessian).

    Parameters
    ----------
    res : array_like
        Residuals [px].
    scale : float or None
        The loss scale ``c`` [px]; None: plain least squares (both weights 1).

    Returns
    -------
    (ndarray, ndarray)
        ``rho'(z)`` (``psi(r) / r``) and ``psi'(r)``, each like ``res``.
    """
    r = np.asarray(res, float)
    if scale is None:
        return np.ones_like(r), np.ones_like(r)
    z = (r / float(scale)) ** 2
    return (1.0 + z) ** -0.5, (1.0 + z) ** -1.5


def cluster_covariance(jac, res, groups, n_params, *, n_obs=None, loss_scale=None):
    """Parameter covariance of a (robust) least-squares fit whose residuals within a
    group share an error.

    Samples along one tile seam share that seam's error (its found position is offset
    the same way along its length: the seam locator's error depends on where the thin
    line falls within a pixel, which hardly changes along a seam that follows the
    pixel rows or columns), so they are not independent and ``s^2 (J^T J)^-1`` counts
    each seam as hundreds of independent measurements. The cluster-robust ("sandwich")
    covariance ``A^-1 M A^-1`` allows any correlation within a group (Liang & Zeger,
    Biometrika 73(1):13, 1986). For a fit with a robust loss both parts are the
    M-estimator's (Huber & Ronchetti, *Robust Statistics*, 2nd ed., 2009, section 7.6):
    with ``J~ = sqrt(psi') J`` and working residuals ``r~ = psi(r) / sqrt(psi')``,
    ``A = J~^T J~`` and ``M = sum_g J~_g^T u_g u_g^T J~_g``; for plain least squares
    ``J~ = J`` and ``r~ = r``.

    A camera pose has 6 parameters and a floor in view about 10 seams: each seam's
    leverage ``H_gg = J~_g A^-1 J~_g^T`` is large (the pose absorbs much of each seam's
    offset, leaving its residuals smaller than its error), and the plain sandwich
    (``u_g = r~_g``, even with the ``G / (G - 1)`` factor) falls short by about
    ``1 - p / G`` in variance. The bias-reduced form ``u_g = (I - H_gg)^-1/2 r~_g``
    (CR2; Bell & McCaffrey, Survey Methodology 28(2):169, 2002; recommended for few
    clusters by Cameron & Miller, J. Human Resources 50(2):317, 2015, section VI.B) is
    unbiased when the errors are in fact independent and equal. A group whose leverage
    in some direction reaches :data:`MAX_LEVERAGE` (it alone fixes that direction) is
    taken at that leverage. The result is never taken below the independent one,
    ``s^2 A^-1 (J^T J) A^-1`` with ``s^2 = sum psi(r_i)^2 / (n - p)``.

    Parameters
    ----------
    jac : ndarray (m, p)
        Derivative of the residuals (not scaled by the loss).
    res : ndarray (m,)
    groups : ndarray (m,) of int
        Group of each residual.
    n_params : int
    n_obs : int, optional
        Independent observations behind the residuals (:func:`pose_covariance`).
    loss_scale : float, optional
        Scale of the soft-L1 loss the fit used [px] (:func:`soft_l1_weights`); None:
        plain least squares.

    Returns
    -------
    ndarray (p, p) or None
        As :func:`pose_covariance` when there are at most ``p`` groups.
    """
    jac = np.asarray(jac, float)
    res = np.asarray(res, float).ravel()
    w, dpsi = soft_l1_weights(res, loss_scale)
    psi = w * res
    n = len(res) if n_obs is None else int(n_obs)
    if n <= int(n_params):
        return None
    root = np.sqrt(dpsi)
    jt = jac * root[:, None]
    try:
        bread = np.linalg.inv(jt.T @ jt)
    except np.linalg.LinAlgError:
        return None
    iid = bread @ (jac.T @ jac) @ bread * (float(psi @ psi) / (n - int(n_params)))
    groups = np.asarray(groups).ravel()
    uniq, inv = np.unique(groups, return_inverse=True)
    if len(uniq) <= int(n_params):
        return iid
    score = _cr2_scores(jt, psi / root, inv, len(uniq), bread)
    sandwich = bread @ (score.T @ score) @ bread
    # the larger of the two in every direction: the sandwich where it is larger, else iid
    return sandwich if np.all(np.linalg.eigvalsh(sandwich - iid) >= 0) else \
        _larger(iid, sandwich)


MAX_LEVERAGE = 0.99
"""Largest leverage of one group in one direction that :func:`cluster_covariance`
corrects for (beyond it the group alone fixes that direction; its residual is ~0)."""


def _cr2_scores(jt, rt, inv, n_groups, bread):
    """Per group ``J~_g^T (I - H_gg)^-1/2 r~_g``, (G, p). ``H_gg`` has rank at most p:
    with ``J~_g A^-1/2 = U S V^T`` (thin SVD), ``(I - H_gg)^-1/2 = I + U ((1 - S^2)^-1/2
    - 1) U^T``."""
    half = _psd_root(bread)  # A^-1 = L L^T: J~_g L has the leverages' SVD
    out = np.zeros((n_groups, jt.shape[1]))
    order = np.argsort(inv, kind="stable")
    bounds = np.searchsorted(inv[order], np.arange(n_groups + 1))
    for g in range(n_groups):
        rows = order[bounds[g]:bounds[g + 1]]
        jg, rg = jt[rows], rt[rows]
        u, sv, _ = np.linalg.svd(jg @ half, full_matrices=False)
        lev = np.minimum(sv ** 2, MAX_LEVERAGE)
        adj = rg + u @ (((1.0 - lev) ** -0.5 - 1.0) * (u.T @ rg))
        out[g] = jg.T @ adj
    return out


def _larger(a, b):
    """The covariance that is at least ``a`` and ``b`` in every direction along the
    eigenvectors of ``a^-1 b`` (simultaneous diagonalisation, each factor the larger)."""
    la = _psd_root(a)
    li = np.linalg.inv(la)
    w, v = np.linalg.eigh(li @ b @ li.T)
    return la @ v @ np.diag(np.maximum(w, 1.0)) @ v.T @ la.T


def _psd_root(m):
    """Symmetric square root ``L`` (``L L^T = m``) of a covariance that rounding may
    have left with eigenvalues at or just below zero: those are raised to a relative
    floor of 1e-12 of the largest (a direction the fit hardly fixes keeps a tiny
    variance rather than failing a Cholesky factorisation)."""
    w, v = np.linalg.eigh(0.5 * (m + m.T))
    floor = 1e-12 * max(float(np.max(np.abs(w))), np.finfo(float).tiny)
    return v @ np.diag(np.sqrt(np.maximum(w, floor))) @ v.T


def floor_point_covariance(reg, points_px, height_m=0.0):
    """Floor covariance of pixels mapped through ``reg`` from its parameter covariance.

    Parameters
    ----------
    reg : FrameRegistration
        With ``param_cov`` (P, P) over ``param_names`` (see
        :attr:`FrameRegistration.param_names`).
    points_px : array_like (N, 2)
        Distorted pixels [px].
    height_m : float
        Height of the plane the pixels are mapped onto [m].

    Returns
    -------
    cov : ndarray (N, 2, 2)
        Covariance of each floor point [m^2]; zeros when ``reg`` has no covariance.
    jac : ndarray (N, 2, P)
        Derivative of each floor point with respect to the parameters [m per unit].
    """
    pts = np.asarray(points_px, float).reshape(-1, 2)
    cov = getattr(reg, "param_cov", None)
    names = _expand(getattr(reg, "param_names", ()))
    if cov is None or not names or len(names) != np.shape(cov)[0]:
        return np.zeros((len(pts), 2, 2)), np.zeros((len(pts), 2, 0))
    jac = np.full((len(pts), 2, len(names)), np.nan)
    good = np.all(np.isfinite(pts), axis=1) if reg.ok else np.zeros(len(pts), bool)
    # A pose step leaves the lens alone: the pixels' rays are undistorted once.
    norm = cv2.undistortPoints(pts[good].reshape(-1, 1, 2), reg.camera_matrix,
                               reg.dist_coeffs).reshape(-1, 2) if good.any() else None
    z = np.broadcast_to(np.asarray(height_m, float), (len(pts),))[good]
    for j, (name, k) in enumerate(names):
        h = PARAM_STEP[name]
        if name in ("rvec", "tvec"):
            if norm is None:
                continue
            plus = _moved(reg, name, k, h).rays_to_floor(norm, pts[good, 1], z)
            minus = _moved(reg, name, k, -h).rays_to_floor(norm, pts[good, 1], z)
            jac[good, :, j] = (plus - minus) / (2.0 * h)
        else:
            plus = _moved(reg, name, k, h).image_to_floor(pts, height_m)
            minus = _moved(reg, name, k, -h).image_to_floor(pts, height_m)
            jac[:, :, j] = (plus - minus) / (2.0 * h)
    return np.einsum("nip,pq,njq->nij", jac, np.asarray(cov, float), jac), jac


HELD_OUT_LEVEL = 0.95
"""Confidence with which the clicks must show an error beyond their noise before it
overrides a registration's covariance (one-sided; common practice)."""


@functools.lru_cache(maxsize=64)
def _f_point(level: float, dof_num: int, dof_den: int) -> float:
    """The ``level`` point of Fisher's F distribution (SciPy, imported on first use)."""
    from scipy.stats import f as fisher_f

    return float(fisher_f.ppf(level, dof_num, dof_den))


def held_out_excess_px(click_rms_px: float, fit_rms_px: float, n: int, p: int) -> float:
    """A registration's error at clicked points it did not use, beyond the click noise,
    where the clicks show one [px]; 0 where they do not.

    The clicks' mean squared residual against the registration, ``c^2``, is the click
    noise (``2 s^2`` per click, ``s^2`` per axis) plus the mapping's own error ``m^2``;
    the noise is estimated from the fit to the clicks alone, ``2 n r^2 / (2n - p)``
    with ``r`` its RMS residual. Without a mapping error both are scaled chi-square
    variates with 2n and 2n - p degrees of freedom (Draper & Smith, *Applied Regression
    Analysis*, 3rd ed., section 2.6), so their ratio follows Fisher's F(2n, 2n - p)
    (the lack-of-fit F test, ibid. section 2.1). The difference ``c^2 - noise``
    estimates ``m^2`` and is taken only where the ratio exceeds the F distribution's
    :data:`HELD_OUT_LEVEL` point: a plain difference, taken wherever it is larger than
    the covariance's figure, is biased up when a dozen clicks make it noisier than the
    error it measures.

    Parameters
    ----------
    click_rms_px : float
        RMS distance of the clicks from the registration (2-D) [px].
    fit_rms_px : float
        RMS residual (2-D) of the fit to the clicks alone [px].
    n : int
        Clicks.
    p : int
        Parameters of the clicks-only fit.

    Returns
    -------
    float
        ``sqrt(c^2 - noise)`` where significant, else 0; NaN when not defined.
    """
    if not (math.isfinite(click_rms_px) and math.isfinite(fit_rms_px)) or 2 * n <= p:
        return math.nan
    noise2 = 2.0 * n * fit_rms_px ** 2 / (2 * n - p)
    excess2 = click_rms_px ** 2 - noise2
    crit = _f_point(HELD_OUT_LEVEL, 2 * int(n), 2 * int(n) - int(p))
    return math.sqrt(excess2) if click_rms_px ** 2 > crit * noise2 else 0.0
