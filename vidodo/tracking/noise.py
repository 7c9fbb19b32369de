"""Corner noise and rolling-shutter readout, estimated from the rigid fits of a run."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["estimate_readout", "readout_terms", "readout_from_terms", "readout_block_sigma",
           "CornerNoise", "estimate_corner_noise", "local_corner_noise", "LOCAL_NOISE_HALF_WINDOW"]

LOCAL_NOISE_HALF_WINDOW = 15
"""Fits on each side pooled for the local corner noise: with one marker (5 degrees of
freedom a fit) 31 fits give 155, a 1-sigma of about 6% on the local noise estimate."""

MIN_LOCAL_PAIRS = 5
"""Pairs of consecutive fits a window needs for its own lag-1 correlation; with fewer,
the run's is used."""

MIN_NOISE_PAIRS = 20
"""Pairs of consecutive detections needed before the split of the corner noise into a
frame-to-frame persistent and a fresh part is trusted; with fewer, all of it is taken as
persistent (the cautious side: the smoother cannot average it away)."""


def readout_terms(fixes, corner_frac, vx, vy, omega, *, min_speed_mps=0.05):
    """Each moving frame's share of the readout regression of :func:`estimate_readout`.

    Returns
    -------
    num, den : ndarray (K,)
        Per frame used, in order: the weighted products of predicted shear and residual
        (num) and of the shear with itself (den); the estimate is ``sum num / sum den``.
    """
    num, den = [], []
    for f, cf, u, v, w in zip(fixes, corner_frac, vx, vy, omega, strict=True):
        if f.floor_m is None or not np.isfinite(u) or math.hypot(u, v) < min_speed_mps:
            continue
        rel = f.floor_m - (f.x_m, f.y_m)
        vel = np.column_stack([u - w * rel[:, 1], v + w * rel[:, 0]])
        g = vel * (cf - cf.mean())[:, None]
        A, W = f.jac, f.weight
        info = np.einsum("nji,njk,nkl->il", A, W, A)
        try:
            inv = np.linalg.inv(info)
        except np.linalg.LinAlgError:
            continue

        def perp(vec, A=A, W=W, inv=inv):
            coef = inv @ np.einsum("nji,njk,nk->i", A, W, vec)
            return vec - np.einsum("nij,j->ni", A, coef)

        gp, dp = perp(g), perp(f.resid_m)
        num.append(float(np.einsum("ni,nij,nj->", gp, W, dp)))
        den.append(float(np.einsum("ni,nij,nj->", gp, W, gp)))
    return np.array(num), np.array(den)


def estimate_readout(fixes, corner_frac, vx, vy, omega, sigma_px, *, min_speed_mps=0.05):
    """Rolling-shutter readout time from the shear of the markers in moving frames.

    A corner read a fraction ``f`` of the readout later than the marker's mean row is
    displaced by its velocity times ``(f - mean f) * readout``. That shear is what the
    rigid fit leaves in its residuals; regressing the residuals on the predicted shear
    (with the rigid part projected out) gives the readout time by weighted least
    squares (model: Ringaby & Forssen, IJCV 96:335, 2012, row-wise exposure).

    Parameters
    ----------
    fixes : list of PoseFix
        Fits of the frames with detections.
    corner_frac : list of ndarray
        Readout fraction of each corner of each fix.
    vx, vy, omega : ndarray
        Floor velocity [m/s] and yaw rate [rad/s] at each fix (from a first smoothing).
    sigma_px : float
        Corner noise [px].

    Returns
    -------
    tuple of float
        ``(readout_s, sigma_s, frames_used)``; NaN when no frame moved enough.
        ``sigma_s`` is the regression's own, for independent corner noise; see
        :func:`readout_block_sigma` for one that is not.
    """
    terms = readout_terms(fixes, corner_frac, vx, vy, omega, min_speed_mps=min_speed_mps)
    return readout_from_terms(*terms, sigma_px)


def readout_from_terms(num, den, sigma_px):
    """:func:`estimate_readout` from its per-frame terms (:func:`readout_terms`):
    ``(readout_s, sigma_s, frames_used)``."""
    total = float(np.sum(den))
    if total <= 0:
        return float("nan"), float("nan"), len(den)
    return float(np.sum(num)) / total, sigma_px / math.sqrt(total), len(den)


READOUT_BLOCKS = 10
"""Blocks of consecutive moving frames for :func:`readout_block_sigma`."""


def readout_block_sigma(num, den, blocks=READOUT_BLOCKS):
    """1-sigma of the readout estimate from its spread over blocks of frames [s].

    The regression's own sigma assumes the corner noise independent from frame to
    frame and the shear model exact. Neither need hold: the noise persists between
    frames, and whatever else shears the marker (an inexact lens, blur) is taken for
    readout. The delete-a-block jackknife (Kunsch, Annals of Statistics 17(3):1217,
    1989) measures the estimate's spread over blocks of consecutive frames, which holds
    both: ``(B - 1) / B * sum_b (r_(-b) - mean)^2``, ``r_(-b)`` the estimate without
    block b.

    Returns
    -------
    float
        NaN with fewer than 2 frames per block or a block-less estimate undefined.
    """
    num, den = np.asarray(num, float), np.asarray(den, float)
    b = int(blocks)
    if b < 2 or len(num) < 2 * b:
        return float("nan")
    edges = np.linspace(0, len(num), b + 1).astype(int)
    n_b = np.add.reduceat(num, edges[:-1])
    d_b = np.add.reduceat(den, edges[:-1])
    rest = d_b.sum() - d_b
    if np.any(rest <= 0):
        return float("nan")
    loo = (n_b.sum() - n_b) / rest
    return float(math.sqrt((b - 1) / b * np.sum((loo - loo.mean()) ** 2)))


@dataclass(frozen=True)
class CornerNoise:
    """Corner noise of one run, estimated from the misfit of the rigid marker layout."""

    sigma_px: float
    """1-sigma per corner coordinate, all of it [px]: sqrt(chi^2 / dof) of the rigid fits."""
    fresh_px: float
    """Part that is new in every frame (the smoother averages it) [px]."""
    persistent_px: float
    """Part that stays from one frame to the next (blur, sampling, print; the smoother
    cannot average it) [px]."""
    lag1_corr: float
    """Correlation of the whitened corner residuals of consecutive frames, in [0, 1]."""
    dof: int
    """Residual degrees of freedom summed over the run."""
    pairs: int
    """Pairs of consecutive frames behind ``lag1_corr``."""


def _pair_terms(fixes, frame_index):
    """Per fix k paired with fix k + 1 (consecutive frames, same corners): the sum of
    the products of their whitened residuals, the mean of their sums of squares, and 1;
    zeros where k is not paired. Three arrays (M,) [px^2, px^2, -]. The residuals are
    whitened to 1 px units by each fix's weight, W = L L^T, so r^T W r = |L^T r|^2."""
    m = len(fixes)
    num, den, pair = np.zeros(m), np.zeros(m), np.zeros(m)
    fi = list(frame_index)
    paired = [k for k in range(m - 1) if fi[k + 1] == fi[k] + 1
              and fixes[k].resid_m.shape == fixes[k + 1].resid_m.shape]
    if not paired:
        return num, den, pair
    used = sorted(set(paired) | {k + 1 for k in paired})
    by_shape: dict = {}  # fixes of one residual shape whitened in one call
    for k in used:
        by_shape.setdefault(fixes[k].resid_m.shape, []).append(k)
    white = {}
    for ks in by_shape.values():
        L = np.linalg.cholesky(np.stack([fixes[k].weight for k in ks]))
        r = np.einsum("knji,knj->kni", L, np.stack([fixes[k].resid_m for k in ks]))
        white.update(zip(ks, r, strict=True))
    for k in paired:
        ra, rb = white[k], white[k + 1]
        num[k] = float(np.sum(ra * rb))
        den[k] = 0.5 * float(np.sum(ra * ra) + np.sum(rb * rb))
        pair[k] = 1.0
    return num, den, pair


def estimate_corner_noise(fixes, frame_index=None, *, floor_px=0.02) -> CornerNoise:
    """Estimate the run's corner noise from the residuals of the rigid marker fits.

    With Gaussian corner noise of 1-sigma s per coordinate, the whitened sum of squared
    residuals of a least-squares fit of p parameters to n observations follows
    s^2 chi^2(n - p), so sum(chi2) / sum(dof) is an unbiased estimate of s^2 (e.g. Draper
    & Smith, *Applied Regression Analysis*, 3rd ed., section 2.6; here n = 2 x corners
    and p = 3 for x, y, heading). The share that persists between consecutive frames is
    the lag-1 correlation of the whitened residuals (residuals of frame k and k + 1 in
    the same corner order): persistent^2 = rho s^2, fresh^2 = (1 - rho) s^2.

    Parameters
    ----------
    fixes : sequence of PoseFix
        Fits of the detected frames, in frame order.
    frame_index : sequence of int, optional
        Frame number of each fix; consecutive numbers form the pairs for the
        correlation. Without it no split is made (all noise counted as persistent).
    floor_px : float
        Smallest ``sigma_px`` returned [px] (a fit of exact corners is not exact in
        the image: quantisation alone is 1/sqrt(12) px per pixel edge, common practice).

    Returns
    -------
    CornerNoise
    """
    dof = int(sum(f.dof for f in fixes))
    if dof <= 0:
        raise ValueError("estimate_corner_noise: no residual degrees of freedom")
    s2 = sum(f.chi2_unit for f in fixes) / dof
    num = den = 0.0
    pairs = 0
    if frame_index is not None:
        terms = _pair_terms(fixes, frame_index)
        num, den = sum(terms[0].tolist(), 0.0), sum(terms[1].tolist(), 0.0)
        pairs = int(terms[2].sum())
    rho = float(np.clip(num / den, 0.0, 1.0)) if pairs >= MIN_NOISE_PAIRS and den > 0 else 1.0
    sigma = max(math.sqrt(s2), floor_px)
    return CornerNoise(sigma, sigma * math.sqrt(1.0 - rho), sigma * math.sqrt(rho), rho, dof,
                       pairs)


def _window_sums(values, half_window):
    """Sum of ``values`` over the ``half_window`` entries on each side of each entry."""
    m = len(values)
    k = np.arange(m)
    lo, hi = np.maximum(k - int(half_window), 0), np.minimum(k + int(half_window) + 1, m)
    c = np.concatenate([[0.0], np.cumsum(values)])
    return c[hi] - c[lo]


def local_corner_noise(fixes, frame_index, noise, *, half_window=LOCAL_NOISE_HALF_WINDOW):
    """Corner noise around each fix: variance relative to the run's, and persistent share.

    The noise changes along a run (distance, blur, viewing angle), and so does the share
    that persists from frame to frame (all of it while the robot stands still). Both are
    estimated as in :func:`estimate_corner_noise`, pooled over the ``half_window`` fits
    (and pairs of consecutive fits) on each side of each fix. The persistent share is
    never taken below the run's (the cautious side: a lower local correlation while
    moving would let the smoother average more).

    Parameters
    ----------
    fixes : sequence of PoseFix
    frame_index : sequence of int
        Frame number of each fix (consecutive numbers form the pairs).
    noise : CornerNoise
        The run's estimate (``sigma_px`` and ``lag1_corr``).

    Returns
    -------
    var_scale : ndarray (M,)
        Local chi^2 / dof over ``noise.sigma_px^2`` [-] (ones if that is 0).
    lag1_corr : ndarray (M,)
        Persistent share of the variance, in [``noise.lag1_corr``, 1].
    """
    m = len(fixes)
    scale = np.ones(m)
    rho = np.full(m, float(noise.lag1_corr))
    if m < 2:
        return scale, rho
    if noise.sigma_px > 0:
        chi2 = np.array([f.chi2_unit for f in fixes], float)
        dof = np.array([f.dof for f in fixes], float)
        scale = (_window_sums(chi2, half_window)
                 / np.maximum(_window_sums(dof, half_window), 1.0) / noise.sigma_px**2)
    num, den, pair = _pair_terms(fixes, frame_index)
    pn, pd_, pc = (_window_sums(v, half_window) for v in (num, den, pair))
    with np.errstate(divide="ignore", invalid="ignore"):
        local = np.clip(pn / pd_, 0.0, 1.0)
    rho = np.where((pc >= MIN_LOCAL_PAIRS) & (pd_ > 0), np.maximum(local, rho), rho)
    return scale, rho

