"""Tests of vidodo.drift_sigma (Monte Carlo 1-sigma of the drift figures).

Reference: the true figures are known by construction (the source's error against the
noise-free truth is set exactly), and a 1-sigma that is honest covers about 95 % of the
errors within 2 sigma (normal distribution, handbook value 95.45 %).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from vidodo.drift_sigma import (
    CORRELATION_S,
    DriftInputs,
    _gauss_markov,
    _stratified_normals,
    figure_sigmas,
    moving_steps,
)
from vidodo.metrics import MetricSettings, path_length, source_metrics


def _case(rng, sigma_m):
    """A 10 s curve at 30 fps; the source is off by a smooth error profile whose largest
    value is 3 mm; the truth track carries correlated noise of ``sigma_m``."""
    t = np.arange(0.0, 10.0, 1 / 30)
    q = np.column_stack([0.3 * t, 0.5 * np.sin(0.4 * t), np.zeros(t.size)])
    q[:, 2] = np.arctan2(0.2 * np.cos(0.4 * t), 0.3)
    e = 0.003 * (0.8 + 0.2 * np.cos(0.7 * t))  # largest at t = 0 and 8.98 s
    p = q.copy()
    p[:, 1] += e
    noise = _gauss_markov(t, rng, 3, CORRELATION_S) * np.array([sigma_m / np.sqrt(2)] * 2
                                                                + [1e-4])
    qm = q + noise
    return t, q, p, qm, float(np.max(e))


def test_max_error_sigma_covers_its_selection_bias():
    """The largest error over a noisy truth track is biased upwards by about the sigma
    there times the expected maximum of the other samples' noise. A flat error profile
    (many samples compete) is the hard case: with the bias (SIMEX, Cook & Stefanski
    1994) in its 1-sigma, the true largest error (3 mm, known by construction) lies
    within 2 sigma of the measured one in at least 85 % of 20 draws (95 % expected of
    an honest sigma, binomial 1-sigma 5 %; measured: 18 of 20); the draws' spread alone
    covers it in few (measured: 0 of 20; the plain bootstrap bias without the
    extrapolation covered 17 of 30 in a trial run)."""
    rng = np.random.default_rng(5)  # seed fixed for reproducibility
    hits, hits_std = [], []
    sigma_m = 0.001
    for k in range(20):
        t, _q, p, qm, true_max = _case(rng, sigma_m)
        st = MetricSettings(sigma_m=sigma_m, name="x")
        m = source_metrics(t, qm, p, path_length(qm[:, :2]), st)
        inp = DriftInputs(
            t_s=t, truth_poses=qm, sigma_xy_m=np.full(t.size, sigma_m),
            sigma_heading_rad=np.full(t.size, 1e-4), cum_length_m=path_length(qm[:, :2]),
            source_at=lambda dt, p=p: (p, p[0]), anchor_pose=tuple(p[0]),
            anchor_sigma=(0.0, 0.0), clock_sigma_s=0.0, metric_settings=st)
        # no re-anchoring noise: the anchor is the source's own first pose
        s = figure_sigmas(inp, seed=k, measured=m.max_err_m)["max_err_m"]
        s_std = figure_sigmas(inp, seed=k)["max_err_m"]
        hits.append(abs(m.max_err_m - true_max) <= 2 * s)
        hits_std.append(abs(m.max_err_m - true_max) <= 2 * s_std)
    assert np.mean(hits) >= 0.85
    assert np.mean(hits_std) < 0.7


def test_final_heading_sigma_of_a_stop_keeps_one_samples_sigma():
    """A robot that ends standing still: the smoothed track's error stays for the whole
    stop (same marker, same place, frames already averaged by the smoother), so the
    final heading, averaged over the last 0.3 s of the stop, is off by one sample's
    1-sigma, and the final heading error's 1-sigma is sqrt(anchor^2 + truth^2) in
    closed form (independent normal errors add in variance, handbook rule). With the
    truth's errors decorrelating over time while standing, the average claimed 10 %
    less in a trial (2.02 against 2.24 mrad). 800 draws: relative error of the Monte
    Carlo sigma 2.5 %."""
    t = np.arange(0.0, 6.0, 1 / 30)
    s = 0.5 * np.clip(np.minimum(t, 4.0) - 0.5, 0.0, None)  # moves 0.5-4 s, then stands
    q = np.column_stack([s, np.zeros_like(s), np.zeros_like(s)])
    sh, sa = 0.002, 0.001
    st = MetricSettings(sigma_m=0.001, sigma_heading_rad=sh, name="x")
    inp = DriftInputs(
        t_s=t, truth_poses=q, sigma_xy_m=np.full(t.size, 0.001),
        sigma_heading_rad=np.full(t.size, sh), cum_length_m=path_length(q[:, :2], 0.003),
        source_at=lambda dt: (q, q[0]), anchor_pose=tuple(q[0]), anchor_sigma=(0.0, sa),
        clock_sigma_s=0.0, metric_settings=st)
    assert not moving_steps(q, inp.cum_length_m, inp.sigma_heading_rad)[-55:].any()
    got = figure_sigmas(inp, draws=800, seed=1)["final_heading_err_rad"]
    assert got == pytest.approx(np.hypot(sa, sh), rel=0.075)


def test_anchor_heading_share_exact_with_few_draws():
    """A source off sideways by 5 cm at the end of a 3 m straight run, the truth exact,
    only the anchor heading uncertain (2 mrad): turning the source about the anchor
    moves its end sideways by lever times angle, so the final error's 1-sigma is
    3 m x 2 mrad = 6 mm to first order (closed form). With the anchor's draws stratified
    (Latin hypercube, McKay, Beckman & Conover 1979) 40 draws give it within 2 % for any
    seed; plain random draws scatter by about 11 % (1 / sqrt(2 x 39), common practice),
    and by the same factor in every run of one length."""
    t = np.arange(0.0, 10.0, 1 / 30)
    q = np.column_stack([0.3 * t, np.zeros_like(t), np.zeros_like(t)])
    p = q.copy()
    p[:, 1] = 0.05 * (t / t[-1]) ** 2
    st = MetricSettings(sigma_m=1e-9, name="x")
    inp = DriftInputs(
        t_s=t, truth_poses=q, sigma_xy_m=np.full(t.size, 1e-9),
        sigma_heading_rad=np.full(t.size, 1e-9), cum_length_m=path_length(q[:, :2]),
        source_at=lambda dt: (p, p[0]), anchor_pose=tuple(q[0]), anchor_sigma=(0.0, 0.002),
        clock_sigma_s=0.0, metric_settings=st)
    got = [figure_sigmas(inp, seed=s)["final_err_m"] for s in range(5)]
    assert np.allclose(got, 3.0 * 0.002, rtol=0.02), got


def test_stratified_normals_have_unit_moments():
    """Each column holds the same n normal quantiles, permuted: mean 0 and sample
    variance 1 exactly; the columns are paired at random (no common order)."""
    z = _stratified_normals(np.random.default_rng(3), 40, 4)
    assert np.allclose(z.mean(axis=0), 0.0, atol=1e-12)
    assert np.allclose(z.std(axis=0, ddof=1), 1.0)
    assert np.allclose(np.sort(z, axis=0), np.sort(z[:, :1], axis=0))
    assert abs(np.corrcoef(z.T)[0, 1]) < 0.5


def _shared_case(mode_y_m, sigma_xy_m):
    """A 3 m straight run whose source ends 0.3 m off sideways; the truth's error is one
    shared mode along y, ``mode_y_m`` per sample (N,), and a per-sample 1-sigma
    ``sigma_xy_m`` (N,); anchored at the first sample."""
    t = np.arange(0.0, 10.0, 1 / 30)
    q = np.column_stack([0.3 * t, np.zeros_like(t), np.zeros_like(t)])
    p = q.copy()
    p[:, 1] = 0.3 * (t / t[-1]) ** 2
    modes = np.zeros((t.size, 1, 2))
    modes[:, 0, 1] = mode_y_m
    st = MetricSettings(sigma_m=1e-9, name="x")
    return DriftInputs(
        t_s=t, truth_poses=q, sigma_xy_m=sigma_xy_m, sigma_heading_rad=np.full(t.size, 1e-9),
        cum_length_m=path_length(q[:, :2]), source_at=lambda dt: (p, p[0]),
        anchor_pose=tuple(q[0]), anchor_sigma=(float(sigma_xy_m[0]), 0.0),
        clock_sigma_s=0.0, metric_settings=st, shared_m=modes, anchor_index=0)


def test_shared_error_cancels_in_the_final_error():
    """An error the anchor and the end share is drawn once per run: the final error is
    the source's end minus the truth's end, both moved by it, so its 1-sigma is that of
    a difference of two fully correlated normals, ``Var(a - b) = s_a^2 + s_b^2 - 2 rho
    s_a s_b`` with rho = 1 (textbook rule for the variance of a difference): |1.5 mm -
    1 mm| = 0.5 mm for a mode growing from 1 to 1.5 mm along the run. Drawn as
    independent per sample (the old model) it is 1.36 mm here (hypot(1, 1.5) = 1.8 mm
    less the averaging of the end's local fit over moving samples). The final error is
    linear in the single stratified normal, so 40 draws give it to rounding."""
    n = 300
    mode = np.linspace(0.001, 0.0015, n)
    got = figure_sigmas(_shared_case(mode, mode.copy()), seed=2)["final_err_m"]
    assert got == pytest.approx(0.0005, rel=0.01)
    alone = figure_sigmas(replace(_shared_case(mode, mode.copy()), shared_m=None,
                                  anchor_index=None), seed=2)["final_err_m"]
    assert alone > 2 * got  # independent draws would not cancel it


def test_partly_shared_error_keeps_the_rest_independent():
    """1-sigma 2 mm radial everywhere, of which a constant 1 mm along y is shared: the
    shared part cancels in the final error (``Var(a - b) = s_a^2 + s_b^2 - 2 Cov(a, b)``,
    Cov the shared 1 mm^2 at both ends), the rest (radial sqrt(2^2 - 1^2) mm, split
    equally over the axes: 1.5 mm^2 along y) at the anchor and at the end adds in
    variance: 1-sigma sqrt(2 x 1.5) mm = 1.73 mm (with the shared part drawn
    independently too: sqrt(2 x 2.5) = 2.24 mm). 800 draws (relative Monte Carlo error
    2.5 %)."""
    n = 300
    got = figure_sigmas(_shared_case(np.full(n, 0.001), np.full(n, 0.002)), draws=800,
                        seed=3)["final_err_m"]
    assert got == pytest.approx(np.sqrt(2 * 1.5e-6), rel=0.08)
