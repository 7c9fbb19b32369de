"""Alignment, ATE and RPE against published examples, SciPy, and hand computations."""

import math

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy.linalg import orthogonal_procrustes

from vidodo.errors import MeasurementError
from vidodo.metrics import (
    MetricSettings,
    anchor_heading_from_travel,
    anchor_poses,
    ate,
    column_prefix,
    drift_table,
    local_pose,
    motion_start_index,
    pairs_by_distance,
    pairs_by_time,
    path_length,
    rpe,
    source_metrics,
    transform_poses,
    umeyama,
)


def test_umeyama_worked_example_from_the_paper():
    """Umeyama (IEEE TPAMI 13(4):376, 1991), worked example.

    Inputs x = (0,0), (1,0), (0,2); y = (0,0), (-1,0), (0,2). Printed result, recalled
    "from memory" (not read from the paper here): R = [[0.832, 0.555], [-0.555, 0.832]],
    c = 0.721, t = (-0.800, 0.400). Closed forms R = [[3, 2], [-2, 3]] / sqrt(13),
    c = sqrt(13) / 5 and residual e^2 = 8/15 are recomputed by hand from eqs. (34)-(42).
    det(Sigma_xy) < 0 here, so without the sign correction the SVD gives a reflection.
    """
    x = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 2.0]])
    y = np.array([[0.0, 0.0], [-1.0, 0.0], [0.0, 2.0]])
    a = umeyama(x, y, with_scale=True)
    # printed values (from memory), to the printed three decimals
    assert_allclose(a.rotation, [[0.832, 0.555], [-0.555, 0.832]], atol=5e-4)
    assert a.scale == pytest.approx(0.721, abs=5e-4)
    assert_allclose(a.translation, [-0.8, 0.4], atol=5e-4)
    # exact closed forms
    assert_allclose(a.rotation, np.array([[3, 2], [-2, 3]]) / math.sqrt(13), atol=1e-12)
    assert a.scale == pytest.approx(math.sqrt(13) / 5, abs=1e-12)
    mse = a.rmse_m**2  # mean squared residual, the paper's e^2
    assert mse == pytest.approx(8 / 15, abs=1e-12)
    assert np.linalg.det(a.rotation) == pytest.approx(1.0)


def test_umeyama_rotation_matches_scipy_orthogonal_procrustes():
    """Rigid fit vs ``scipy.linalg.orthogonal_procrustes`` on centred points.

    SciPy solves min ||A R - B|| over orthogonal R (possibly a reflection); for points
    that are a noisy rotation of each other both must give the same rotation, with
    Umeyama's R being SciPy's R transposed (row-vector convention).
    """
    rng = np.random.default_rng(7)
    src = rng.uniform(-2, 2, (40, 2))
    th = 0.7
    rot = np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])
    dst = src @ rot.T + [0.3, -1.2] + rng.normal(0, 0.01, src.shape)
    a = umeyama(src, dst)
    r_sp, _ = orthogonal_procrustes(src - src.mean(0), dst - dst.mean(0))
    assert_allclose(a.rotation, r_sp.T, atol=1e-12)
    assert a.angle_rad == pytest.approx(th, abs=2e-3)
    assert_allclose(a.translation, [0.3, -1.2], atol=5e-3)
    assert a.scale == 1.0


def test_umeyama_degenerate_and_nan():
    """All points coinciding is no alignment; NaN rows are left out (common practice)."""
    with pytest.raises(MeasurementError, match="coincide"):
        umeyama([[1, 1], [1, 1], [1, 1]], [[0, 0], [1, 0], [0, 1]])
    with pytest.raises(MeasurementError, match="at least 2"):
        umeyama([[0, 0], [np.nan, 0]], [[0, 0], [1, 1]])
    a = umeyama([[0, 0], [1, 0], [np.nan, 5]], [[1, 1], [1, 2], [9, 9]])
    assert a.n_points == 2
    assert a.angle_rad == pytest.approx(math.pi / 2)


def test_ate_hand_computed():
    """ATE of a square against a shifted, rotated, partly perturbed copy.

    Truth: unit square corners (0,0), (1,0), (1,1), (0,1). Estimate: the same square
    rotated 90 deg and moved by (5, 5), then one corner pushed outwards by d along the
    diagonal. By hand: a rigid fit cannot remove a symmetric bulge; the best fit moves
    the square by d/4 towards the bulge (centroid shift) with no rotation (symmetry),
    leaving residuals 3d/4 at the moved corner and d/4 at each of the other three, so
    ATE = sqrt((9/16 + 3/16) d^2 / 4) = d * sqrt(3) / 4.
    """
    q = np.array([[0, 0], [1, 0], [1, 1], [0, 1]], dtype=float)
    d = 0.1
    p = q.copy()
    p[2] += d / math.sqrt(2) * np.array([1, 1])
    rot = np.array([[0, -1], [1, 0]])
    est = p @ rot.T + [5, 5]
    err, al = ate(q, est)
    assert err == pytest.approx(d * math.sqrt(3) / 4, rel=1e-9)
    assert al.angle_rad == pytest.approx(-math.pi / 2, abs=1e-12)


def test_rpe_time_and_distance_hand_computed():
    """RPE (Sturm et al., IROS 2012, eq. 1) on a straight line with a scale error.

    Truth moves along x at 1 m/s, sampled every 0.5 s for 3 s; the estimate reads 10 %
    long. Over any 1 s window the truth moves 1.0 m and the estimate 1.1 m, so every
    time-window RPE is 0.1 m and its RMSE is 0.1 m. Over 0.5 m of path the error is
    0.05 m. A heading error of 0 gives rotational RPE 0.
    """
    t = np.arange(0, 3.01, 0.5)
    q = np.column_stack([t, 0 * t, 0 * t])
    p = np.column_stack([1.1 * t, 0 * t, 0 * t])
    i, j = pairs_by_time(t, 1.0)
    assert list(zip(i, j, strict=True)) == [(0, 2), (1, 3), (2, 4), (3, 5), (4, 6)]
    tr, rot = rpe(q, p, i, j)
    assert_allclose(tr, 0.1, atol=1e-12)
    assert_allclose(rot, 0.0, atol=1e-12)
    s = path_length(q[:, :2])
    i, j = pairs_by_distance(s, 0.5)
    tr, _ = rpe(q, p, i, j)
    assert_allclose(tr, 0.05, atol=1e-12)


def test_rpe_heading_error_in_body_frame():
    """RPE is independent of a rigid change of the estimate's frame (Sturm et al. 2012).

    Same estimate placed anywhere on the floor gives the same RPE; by hand, a quarter
    circle of radius 1 estimated with 1 deg too much turn gives rotational RPE 1 deg
    over the whole arc.
    """
    th = np.linspace(0, math.pi / 2, 10)
    q = np.column_stack([np.sin(th), 1 - np.cos(th), th])
    k = 1 + math.radians(1) / (math.pi / 2)
    p = np.column_stack([np.sin(k * th) / k, (1 - np.cos(k * th)) / k, k * th])
    _, rot = rpe(q, p, [0], [9])
    assert rot[0] == pytest.approx(math.radians(1), abs=1e-12)
    moved = anchor_poses(p, (0, 0, 0), (3, -2, 1.0))
    a1 = rpe(q, p, [0, 2], [9, 7])
    a2 = rpe(q, moved, [0, 2], [9, 7])
    assert_allclose(a1[0], a2[0], atol=1e-12)
    assert_allclose(a1[1], a2[1], atol=1e-12)


def test_anchor_and_transform():
    """Anchoring puts the source pose on the truth pose (composition, Lynch & Park 3.2)."""
    p = np.array([[0, 0, 0], [1, 0, 0], [1, 1, math.pi / 2]], dtype=float)
    a = anchor_poses(p, p[0], (2.0, 3.0, math.pi / 2))
    assert_allclose(a, [[2, 3, math.pi / 2], [2, 4, math.pi / 2], [1, 4, math.pi]],
                    atol=1e-12)
    al = umeyama(p[:, :2], a[:, :2])
    assert_allclose(transform_poses(p, al), a, atol=1e-12)


def test_path_length_gate():
    """Standing still with noise adds nothing once the gate is 3 sigma (common practice)."""
    rng = np.random.default_rng(1)
    still = rng.normal(0, 0.002, (300, 2))
    assert path_length(still, gate_m=0.0)[-1] > 0.5  # noise alone makes 'travel'
    assert path_length(still, gate_m=6 * 0.002)[-1] < 0.05
    line = np.column_stack([np.linspace(0, 2, 201), np.zeros(201)])
    assert path_length(line, gate_m=0.006)[-1] == pytest.approx(2.0, abs=0.011)


def test_motion_start_index():
    """The last still sample before the robot leaves its start (by construction)."""
    x = np.concatenate([np.zeros(20), np.linspace(0, 1, 30)])
    xy = np.column_stack([x, np.zeros_like(x)])
    assert motion_start_index(xy, 0.001) in (19, 20)
    assert motion_start_index(np.zeros((10, 2)), 0.001) is None


def test_motion_start_counts_a_spin_in_place():
    """A run that starts by spinning in place starts moving when the heading changes.

    Constructed case: still for 20 samples, then turning 0.05 rad per sample without
    moving; the anchor must be the last still sample (index 19 or 20), not later.
    """
    xy = np.zeros((60, 2))
    h = np.concatenate([np.zeros(20), 0.05 * np.arange(1, 41)])
    assert motion_start_index(xy, 0.001) is None
    assert motion_start_index(xy, 0.001, heading_rad=h, sigma_heading_rad=0.002) in (19, 20)


def test_source_metrics_hand_built():
    """Figures of a drifting source on a 2 m straight line, computed by hand.

    Truth: x from 0 to 2 m in 2 s (1 m/s) sampled at 0.1 s, heading 0. Source: at time
    t it is at distance t along a ray turned by h = 0.01 t rad, with heading h. By hand:
    final error = |(2 cos 0.02 - 2, 2 sin 0.02)| = 2 * 2 sin(0.01) ~= 0.0400 m, drift
    = that / 2 m * 100 %, final heading error 0.02 rad, largest error at the end.
    """
    t = np.round(np.arange(0, 2.0001, 0.1), 10)
    q = np.column_stack([t, 0 * t, 0 * t])
    h = 0.01 * t
    p = np.column_stack([t * np.cos(h), t * np.sin(h), h])
    s = path_length(q[:, :2])
    m = source_metrics(t, q, p, s, MetricSettings(name="x"))
    final = math.hypot(2 * math.cos(0.02) - 2, 2 * math.sin(0.02))
    assert m.final_err_m == pytest.approx(final, rel=1e-12)
    assert m.drift_pct == pytest.approx(100 * final / 2.0, rel=1e-12)
    assert m.final_heading_err_rad == pytest.approx(0.02, abs=1e-12)
    assert m.max_err_t_s == pytest.approx(2.0)
    assert m.max_err_x_m == pytest.approx(2.0)
    assert m.heading_drift_deg_per_turn is None  # never turned: not measured
    assert any("heading drift per turn not measured" in w for w in m.warnings)
    assert m.path_length_m == pytest.approx(2.0)


def test_drift_table_columns_and_along_cross():
    """Along/cross split: a source 1 cm ahead and 2 cm left of truth moving along +y."""
    t = np.arange(5) * 0.1
    truth = pd.DataFrame({"t_s": t, "x_m": 0.0, "y_m": t, "heading_rad": math.pi / 2,
                          "sigma_xy_m": 0.001, "sigma_heading_rad": 0.001})
    src = np.column_stack([np.full(5, -0.02), t + 0.01, np.full(5, math.pi / 2)])
    df = drift_table(truth, {"tracking+imu": src}, t, np.full(5, math.pi / 2), ["a"] * 5)
    assert column_prefix("tracking+imu") == "tracking_imu"
    assert list(df.columns[:7]) == ["t_s", "truth_x_m", "truth_y_m", "truth_heading_rad",
                                    "truth_sigma_xy_m", "truth_sigma_heading_rad",
                                    "path_length_m"]
    assert_allclose(df["tracking_imu_along_m"], 0.01, atol=1e-12)
    assert_allclose(df["tracking_imu_cross_m"], 0.02, atol=1e-12)
    assert_allclose(df["tracking_imu_err_m"], math.hypot(0.01, 0.02), atol=1e-12)
    assert df.columns[-1] == "events"


def test_anchor_heading_from_travel_recovers_a_known_rotation():
    """A source anchored 1 deg off: the first metre of travel gives the rotation back.

    Truth: a 1 m straight run then a gentle arc; the anchored source is the exact path
    rotated by -1 deg about the start (a start heading 1 deg wrong). The least-squares
    rotation about the start point (Umeyama 1991, translation fixed) is +1 deg.
    """
    t = np.arange(0, 3, 1 / 30)
    s = np.clip(t - 0.5, 0, None)
    q = np.column_stack([s, 0.05 * s**2, np.arctan(0.1 * s)])
    a = anchor_poses(q, q[0], (0.0, 0.0, -math.radians(1)))
    dh, sig = anchor_heading_from_travel(t, q, a, 0, sigma_m=0.001)
    assert dh == pytest.approx(math.radians(1), abs=1e-9)
    assert 0 < sig < math.radians(0.5)
    # a stretch under 0.2 m says nothing
    assert anchor_heading_from_travel(t, q, a, 0, t_stop_s=0.6) == (None, None)


def test_anchor_heading_from_travel_sigma_holds_place_bound_errors():
    """The truth's errors that belong to the place in the image stay nearly constant
    over a metre of travel but differ between the anchor and the stretch; the fitted
    rotation then moves by (e_stretch - e_anchor) x sum(d) / sum(|d|^2) (first order of
    the least-squares rotation, Umeyama 1991 with the translation fixed).

    Reference: a simulation of that error model (anchor error and one stretch-wide
    error, independent, normal, 1-sigma per axis of the radial RMS over sqrt 2): the
    spread of the fitted rotation over 4000 draws matches the claimed 1-sigma within
    6 % (the Monte Carlo's own relative error is 1.1 %); the former sigma, which
    averaged every error over the stretch's samples, claimed a tenth of it."""
    t = np.arange(0.0, 2.0, 1 / 240)  # many samples: the averaging part is small
    s = 0.8 * np.clip(t - 0.2, 0, None)
    q = np.column_stack([s, np.zeros_like(s), np.zeros_like(s)])
    s_anchor, s_stretch = 0.0015, 0.0008
    sig = np.full(t.size, s_stretch)
    sig[0] = s_anchor
    # first order: a stretch-wide lateral error delta turns the fit by delta sum d / sum d^2
    moved = q.copy()
    moved[1:, 1] += 1e-5
    dh, sigma = anchor_heading_from_travel(t, moved, q, 0, sigma_m=sig)
    d = s[: int(np.argmax(s >= 1.0)) + 1]  # the stretch: up to the first metre
    assert dh == pytest.approx(1e-5 * d.sum() / np.sum(d**2), rel=1e-4)
    rng = np.random.default_rng(3)  # seed fixed for reproducibility
    draws = []
    for _ in range(4000):
        noisy = q.copy()
        noisy[0, :2] += rng.normal(0.0, s_anchor / np.sqrt(2), 2)
        noisy[1:, :2] += rng.normal(0.0, s_stretch / np.sqrt(2), 2)
        draws.append(anchor_heading_from_travel(t, noisy, q, 0, sigma_m=sig)[0])
    assert sigma == pytest.approx(np.std(draws), rel=0.06)



def test_anchor_heading_from_travel_shared_error():
    """An error the anchor and the stretch share does not turn the fit: a constant shift
    of the whole truth leaves every displacement from the anchor unchanged, so it adds
    nothing to the 1-sigma. A shared error that is itself a small rotation by delta
    about the anchor (e_i = delta x (q_i - q_0), a registration's yaw error seen from a
    camera above the anchor) turns the least-squares rotation by exactly delta (Umeyama
    1991, translation fixed): the claimed 1-sigma is |delta|, and the estimator's own
    response to that displacement (finite difference) agrees.

    Reference: the rotation of a rigid motion, and a finite difference of the estimator;
    were the shared mode drawn as an independent error at the anchor and along the
    stretch (the place-bound term), the constant shift would add its full sigma."""
    t = np.arange(0.0, 3.0, 1 / 30)
    s = np.clip(t - 0.5, 0, None)
    q = np.column_stack([s, 0.05 * s**2, np.zeros_like(s)])
    sig = np.full(t.size, 1e-7)
    _dh, base = anchor_heading_from_travel(t, q, q, 0, sigma_m=sig)
    shift = np.zeros((t.size, 1, 2))
    shift[:, 0] = (0.001, -0.002)
    _dh, with_shift = anchor_heading_from_travel(t, q, q, 0, sigma_m=sig, shared_m=shift)
    assert with_shift == pytest.approx(base, rel=1e-12)
    delta = 1e-4
    turn = np.zeros((t.size, 1, 2))
    turn[:, 0, 0] = -delta * (q[:, 1] - q[0, 1])
    turn[:, 0, 1] = delta * (q[:, 0] - q[0, 0])
    _dh, with_turn = anchor_heading_from_travel(t, q, q, 0, sigma_m=sig, shared_m=turn)
    assert with_turn == pytest.approx(delta, rel=1e-3)
    moved = q.copy()
    moved[:, :2] += turn[:, 0]
    dh, _ = anchor_heading_from_travel(t, moved, q, 0, sigma_m=sig)
    assert abs(dh) == pytest.approx(with_turn, rel=1e-3)
    # the place-bound term of the same 2.2 mm taken as independent at anchor and stretch
    _dh, indep = anchor_heading_from_travel(t, q, q, 0, sigma_m=np.full(t.size, 0.0022))
    assert indep > 10 * base

def test_local_pose_still_and_moving():
    """Still: the mean of the samples; moving: a quadratic fit (exact on a parabola)."""
    t = np.arange(0, 1, 0.05)
    rng = np.random.default_rng(0)
    still = np.column_stack([1 + rng.normal(0, 1e-3, t.size), 2 + rng.normal(0, 1e-3, t.size),
                             np.zeros(t.size)])
    assert_allclose(local_pose(t, still, 0.5, 1e-3), still[(t >= 0.2) & (t <= 0.8)].mean(0),
                    atol=1e-12)
    moving = np.column_stack([t**2, 3 * t, 0.1 * t])
    assert_allclose(local_pose(t, moving, 0.5, 1e-3), [0.25, 1.5, 0.05], atol=1e-9)


def test_similarity_scale_diagnostic():
    """A source reading 2 % long on a closed-free path: the Sim(2) scale is 1/1.02
    (Umeyama 1991, eq. 42, scale from source to truth)."""
    t = np.linspace(0, 4, 81)
    q = np.column_stack([np.sin(t), 1 - np.cos(t) + 0.2 * t, t])
    p = q.copy()
    p[:, :2] = (q[:, :2] - q[0, :2]) * 1.02 + q[0, :2]
    m = source_metrics(t, q, p, path_length(q[:, :2]), MetricSettings(name="x"))
    assert m.best_fit_scale == pytest.approx(1 / 1.02, rel=1e-9)
