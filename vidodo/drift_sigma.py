"""1-sigma of every drift figure, propagated from the truth track's and the clock's sigma.

A drift figure (final error, max error, ATE, RPE, final heading error) compares an
odometry source with the truth track; both the truth poses and the clock that places
the log on the video's time carry an uncertainty. The figures are not linear in them
(a maximum, an RMS after a fitted alignment), so the uncertainty is propagated by
Monte Carlo (common practice: JCGM 101:2008, "Propagation of distributions using a
Monte Carlo method"): each draw perturbs

* the truth track by its 1-sigma per sample: the part the run's samples share (the
  track's shared-error modes, ``shared<k>_x_m, shared<k>_y_m``: one standard normal per
  mode and draw, the same for every sample and the anchor, so that a difference of two
  samples keeps only ``Var(a - b) = Var(a) + Var(b) - 2 Cov(a, b)`` of it), and the
  rest (``sigma_xy_m`` less the shared variance, split equally over x and
  y; ``sigma_heading_rad``), correlated in time as a first-order Gauss-Markov process
  with :data:`CORRELATION_S` (the smoothed track's errors persist over neighbouring
  frames; fully independent draws would average away under the final pose's local fit);
  the clock of that process runs only while the robot moves (:func:`moving_steps`): a
  standing robot shows the camera the same marker at the same place, and the smoother
  has already averaged its frames, so its error stays for the whole stop (the final
  pose, averaged over a stop, keeps the 1-sigma of one sample, as the anchor does),
* the anchor pose (where the source is placed on the truth) by its own sigma,
* the clock offset by the clock's sigma (the source is sampled that much earlier or
  later); these two move the whole source, so their draws are stratified
  (:func:`_stratified_normals`): with plain draws their share of every 1-sigma was off
  by one common factor in all runs of one length (1.19 for the anchor heading at 318
  frames, the tank-tripod runs),

re-anchors the source and recomputes the figures; the figure's 1-sigma is the standard
deviation over the draws. The largest error is the exception: a maximum over a noisy
series is biased upwards (the sample that wins is the one whose noise happened to add
most), by about the sigma there times the expected maximum of the competing samples'
noise, first order in the sigma, while the smooth figures' bias is second order. Its
1-sigma is therefore the root mean square deviation of the figure from the true one,
``sqrt(std^2 + bias^2)``. The bias is found by simulation-extrapolation (SIMEX, Cook &
Stefanski, JASA 89:1314, 1994): a second set of draws adds the truth track's noise
alone once more (the anchor's and the clock's draws move the whole source, a smooth
effect already in the spread, and would be amplified wrongly), so their
mean is the figure at sqrt(2) times the noise; a maximum's bias grows linearly with the
noise when many samples compete (the expected maximum of n normal deviates is a
multiple of their sigma), so the line through the measured figure (noise 1) and the
draws' mean (noise sqrt 2), extrapolated to noise 0, gives
``bias = (mean of draws - measured) / (sqrt 2 - 1)``. Where one sample stands out the
bias grows more slowly than that and the extrapolation errs on the safe side.
``benchmarks/drift_coverage.py`` checks the share of true figures within 2 sigma over
rendered runs.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtri

from .errors import MeasurementError
from .metrics import MetricSettings, anchor_poses, source_metrics

__all__ = ["DriftInputs", "FIGURES", "CORRELATION_S", "figure_sigmas", "derived_sigmas",
           "moving_steps"]

FIGURES = ("ate_rmse_m", "rpe_path_rmse_m", "rpe_time_rmse_m", "final_err_m",
           "final_heading_err_rad", "max_err_m")
"""The figures of :class:`vidodo.metrics.SourceMetrics` given a 1-sigma."""

CORRELATION_S = 0.3
"""Correlation time of the truth track's errors in the draws [s] (the smoother's span
at 30 fps and the local corner-noise window; assumed, checked by the coverage
benchmark)."""

DRAWS = 40
"""Monte Carlo draws: the relative 1-sigma of a standard deviation from n draws is about
1 / sqrt(2 (n - 1)), 11 % here (common practice)."""


@dataclass(frozen=True)
class DriftInputs:
    """What one source's figures were computed from (see :func:`figure_sigmas`)."""

    t_s: np.ndarray
    """Truth sample times, ndarray (N,) [s]."""
    truth_poses: np.ndarray
    """Truth poses (x_m, y_m, heading_rad), ndarray (N, 3)."""
    sigma_xy_m: np.ndarray
    """Truth position 1-sigma per sample, ndarray (N,) [m]."""
    sigma_heading_rad: np.ndarray
    """Truth heading 1-sigma per sample, ndarray (N,) [rad]."""
    cum_length_m: np.ndarray
    """Truth path length, ndarray (N,) [m]."""
    source_at: Callable
    """``source_at(dt_s)``: the source's own poses (N, 3) on the truth times when the
    clock is off by ``dt_s``, and its pose at the anchor instant (3,)."""
    anchor_pose: tuple
    """Truth pose the source was anchored on (x_m, y_m, heading_rad)."""
    anchor_sigma: tuple
    """Its 1-sigma: position [m] and heading [rad]."""
    clock_sigma_s: float
    """1-sigma of the clock offset [s]."""
    metric_settings: MetricSettings
    """Settings of :func:`vidodo.metrics.source_metrics` as used."""
    shared_m: np.ndarray | None = None
    """The truth's shared position error as modes, ndarray (N, K, 2) [m] per unit
    standard normal (:mod:`vidodo.tracking.shared_error`); None: none shared."""
    anchor_index: int | None = None
    """The truth sample the anchor pose stands for; its shared error moves the anchor
    with the samples (None: the anchor's error is drawn on its own)."""


def moving_steps(poses, cum_length_m, sigma_heading_rad):
    """Whether the robot moved between each sample and the one before, ndarray (N,) of
    bool (False for the first): the truth's path length grew (steps under its noise gate
    are held back, :func:`vidodo.metrics.path_length`) or its heading changed by at
    least 3 of its 1-sigma (the gate of the turn count)."""
    s = np.asarray(cum_length_m, float)
    h = np.asarray(poses, float)[:, 2]
    sh = np.nan_to_num(np.asarray(sigma_heading_rad, float))
    out = np.zeros(s.size, bool)
    out[1:] = (np.diff(s) > 0) | ~(np.abs(np.diff(h)) < 3.0 * sh[1:])
    return out


def _gauss_markov(t, rng, n, tau, moving=None):
    """Unit-variance first-order Gauss-Markov draws, ndarray (N, n), on times ``t``;
    with ``moving`` (N,) bool, time passes only over the steps marked True."""
    out = np.empty((t.size, n))
    out[0] = rng.standard_normal(n)
    dt = np.diff(t, prepend=t[0])
    if moving is not None:
        dt = np.where(moving, dt, 0.0)
    rho = np.exp(-np.nan_to_num(dt, nan=0.0) / tau)
    for k in range(1, t.size):
        out[k] = rho[k] * out[k - 1] + np.sqrt(1.0 - rho[k] ** 2) * rng.standard_normal(n)
    return out


def figure_sigmas(inp: DriftInputs, *, draws=DRAWS, seed=0, measured=None) -> dict:
    """1-sigma of each figure in :data:`FIGURES` (None where never measured).

    Parameters
    ----------
    inp : DriftInputs
    draws : int
        Monte Carlo draws.
    seed : int
        Seed of the draws (the result is reproducible).
    measured : float, optional
        The largest error as measured [m]; with it, its selection bias (by SIMEX) is
        added to its 1-sigma (see the module's notes).

    Returns
    -------
    dict of str -> float or None
        ``{figure: sigma}`` in the figure's unit.
    """
    rng = np.random.default_rng(seed)
    values = _draw_figures(inp, rng, draws, truth_only=False)
    out = {f: (float(np.std(v, ddof=1)) if len(v) >= 3 else None) for f, v in values.items()}
    if out["max_err_m"] is not None and measured is not None:
        # selection bias from the truth track's own noise only: the anchor's and the
        # clock's draws move the whole source (their effect is in the spread already)
        sel = _draw_figures(inp, rng, draws, truth_only=True)["max_err_m"]
        if len(sel) >= 3:
            bias = (float(np.mean(sel)) - float(measured)) / (np.sqrt(2.0) - 1.0)
            out["max_err_m"] = float(np.hypot(out["max_err_m"], bias))
    return out


def _stratified_normals(rng, n, k):
    """Standard normal draws, ndarray (n, k), stratified per column (Latin hypercube
    sampling at the strata's midpoints, McKay, Beckman & Conover, Technometrics 21:239,
    1979), scaled to a sample variance of exactly 1.

    The anchor's and the clock's draws each move the whole source, so their share of a
    figure's 1-sigma is the spread of n numbers; plain random draws leave it off by
    about 1 / sqrt(2 (n - 1)), 11 % for 40 draws, and by the same factor in every run
    of one length (the generator's seed is fixed).
    """
    z = ndtri((np.arange(n) + 0.5) / n)
    z = z / np.std(z, ddof=1) if n > 1 else np.zeros(1)
    return np.column_stack([rng.permutation(z) for _ in range(k)])


def _draw_figures(inp: DriftInputs, rng, draws, *, truth_only):
    """The figures over ``draws`` Monte Carlo draws, dict of lists; ``truth_only``
    draws the truth track's noise alone (anchor pose and clock as measured)."""
    t = np.asarray(inp.t_s, float)
    q = np.asarray(inp.truth_poses, float)
    modes, sxy, sa_xy = _split_shared(inp)
    sh = np.nan_to_num(np.asarray(inp.sigma_heading_rad, float))
    sa_h = inp.anchor_sigma[1]
    sc = inp.clock_sigma_s
    if truth_only:  # the shared part, like the anchor and the clock, moves the whole run
        modes, sa_xy, sa_h, sc = modes[:, :0], 0.0, 0.0, 0.0
    moving = moving_steps(q, inp.cum_length_m, sh)
    values = {f: [] for f in FIGURES}
    # anchor x, y, heading, the clock and the shared modes
    whole = _stratified_normals(rng, draws, 4 + modes.shape[1])
    ka = inp.anchor_index
    for k in range(draws):
        noise = _gauss_markov(t, rng, 3, CORRELATION_S, moving)
        shared = np.einsum("nkj,k->nj", modes, whole[k, 4:])
        qd = q + noise * np.column_stack([sxy, sxy, sh])
        qd[:, :2] += shared
        dt = float(whole[k, 3] * sc)
        p, pa = inp.source_at(dt)
        qa = np.asarray(inp.anchor_pose, float) + whole[k, :3] * (
            sa_xy / np.sqrt(2.0), sa_xy / np.sqrt(2.0), sa_h)
        if ka is not None and modes.shape[1]:
            qa[:2] += shared[ka]
        a = anchor_poses(p, pa, qa)
        try:
            m = source_metrics(t, qd, a, inp.cum_length_m, inp.metric_settings)
        except MeasurementError:
            continue
        for f in FIGURES:
            v = getattr(m, f)
            if v is not None:
                values[f].append(float(v))
    return values


def _split_shared(inp: DriftInputs):
    """The shared modes (N, K, 2) [m], the per-axis 1-sigma of the rest per sample (N,)
    [m] and the anchor's radial 1-sigma less its shared part [m]."""
    sxy = np.nan_to_num(np.asarray(inp.sigma_xy_m, float))
    n = sxy.size
    modes = np.zeros((n, 0, 2)) if inp.shared_m is None else np.nan_to_num(
        np.asarray(inp.shared_m, float).reshape(n, -1, 2))
    shared_var = np.sum(modes**2, axis=(1, 2))
    rest = np.sqrt(np.clip(sxy**2 - shared_var, 0.0, None)) / np.sqrt(2.0)
    sa_xy = float(inp.anchor_sigma[0])
    if inp.anchor_index is not None and modes.shape[1]:
        sa_xy = float(np.sqrt(max(sa_xy**2 - shared_var[inp.anchor_index], 0.0)))
    return modes, rest, sa_xy


def derived_sigmas(m, sig: dict) -> dict:
    """Add the 1-sigma of drift % and heading drift per turn, which are the final
    errors divided by the path length and by the turns made (taken as exact)."""
    out = dict(sig)
    if m.drift_pct is not None and sig.get("final_err_m") is not None and m.final_err_m:
        out["drift_pct"] = abs(m.drift_pct) * sig["final_err_m"] / m.final_err_m
    h = sig.get("final_heading_err_rad")
    if m.heading_drift_deg_per_turn is not None and h is not None and m.final_heading_err_rad:
        out["heading_drift_deg_per_turn"] = abs(
            m.heading_drift_deg_per_turn * h / m.final_heading_err_rad)
    return out
