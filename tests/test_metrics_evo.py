"""Alignment, ATE and RPE against the independent ``evo`` evaluation package.

``evo`` (a test-only dependency) implements Umeyama's alignment (``evo.core.geometry.
umeyama_alignment``, with the sign rule of Umeyama 1991, eq. 43, from ``det(U) det(V)``),
the absolute pose error after alignment and the relative pose error with pairs chosen
over the reference path (``all_pairs=True, pairs_from_reference=True``). Planar poses
are embedded in SE(3) as rotations about z.
"""

import math

import numpy as np
import pytest

evo_geometry = pytest.importorskip("evo.core.geometry")
from evo.core import filters, metrics, trajectory  # noqa: E402

from vidodo.metrics import (  # noqa: E402
    anchor_poses,
    ate,
    pairs_by_distance,
    pairs_by_time,
    path_length,
    rpe,
    umeyama,
)
from vidodo.se2 import wrap_angle  # noqa: E402

REL = 1e-9  # agreement asked of every figure, relative


def _se3(poses):
    """Planar poses (x, y, heading) as evo's 4x4 SE(3) matrices."""
    out = []
    for x, y, h in np.asarray(poses, float):
        m = np.eye(4)
        c, s = math.cos(h), math.sin(h)
        m[:2, :2] = [[c, -s], [s, c]]
        m[:2, 3] = x, y
        out.append(m)
    return out


def _traj(t, poses):
    return trajectory.PoseTrajectory3D(poses_se3=_se3(poses), timestamps=np.asarray(t, float))


def _check_umeyama(src, dst):
    ours = umeyama(src, dst)
    # evo in two dimensions (an SE(3) embedding of collinear points has rank 1 < 3 - 1,
    # which evo rightly refuses)
    r, t, _c = evo_geometry.umeyama_alignment(np.asarray(src, float).T,
                                              np.asarray(dst, float).T)
    assert np.linalg.det(ours.rotation) == pytest.approx(1.0, abs=1e-12)  # no reflection
    assert np.linalg.det(r) == pytest.approx(1.0, abs=1e-12)
    scale = max(1.0, float(np.abs(dst).max()))
    assert np.abs(ours.rotation - r).max() <= REL
    assert np.abs(ours.translation - t).max() <= REL * scale
    return ours


def test_umeyama_random_points_agree_with_evo():
    """Random 2-D point sets and a random rigid motion plus noise."""
    rng = np.random.default_rng(1)
    for _ in range(50):
        src = rng.normal(size=(30, 2)) * rng.uniform(0.1, 5)
        a = rng.uniform(-math.pi, math.pi)
        rot = np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
        dst = src @ rot.T + rng.normal(size=2) + rng.normal(scale=0.01, size=src.shape)
        _check_umeyama(src, dst)


@pytest.mark.parametrize("n", [2, 3, 50])
def test_umeyama_collinear_and_two_point_cases_agree_with_evo(n):
    """Exactly collinear source points (a straight run, or two points): the covariance
    has rank 1 and its determinant is rounding noise; the rotation must still be the
    one evo finds from det(U) det(V), never a reflection."""
    rng = np.random.default_rng(n)
    for _ in range(200):
        d = rng.normal(size=2)
        d /= np.linalg.norm(d)
        s = np.sort(rng.uniform(0, 3, n))
        src = np.outer(s, d) + rng.normal(size=2)
        a = rng.uniform(-math.pi, math.pi)
        rot = np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
        dst = src @ rot.T + rng.normal(size=2) + rng.normal(scale=1e-3, size=src.shape)
        ours = _check_umeyama(src, dst)
        if n == 2:  # two points fit exactly: the angle is the one between the segments
            want = math.atan2(*(dst[1] - dst[0])[::-1]) - math.atan2(*(src[1] - src[0])[::-1])
            assert wrap_angle(ours.angle_rad - want) == pytest.approx(0.0, abs=1e-9)


def test_straight_anchored_runs_never_reflect():
    """Nearly collinear points, where a sign rule can reflect: straight odometry
    anchored at the truth start against a straight truth track with 1 mm noise; evo's
    rotation is the reference, and the best-fit angle stays near zero (the odometry is
    exact)."""
    rng = np.random.default_rng(15)
    for _ in range(1000):
        n = int(rng.integers(20, 200))
        h = rng.uniform(-math.pi, math.pi)
        s = np.linspace(0, rng.uniform(0.5, 3), n)
        x0, y0 = rng.uniform(0, 3, 2)
        truth = np.column_stack([x0 + s * math.cos(h), y0 + s * math.sin(h), np.full(n, h)])
        odo = np.column_stack([s, np.zeros(n), np.zeros(n)])
        anchored = anchor_poses(odo, odo[0], truth[0])
        noisy = truth[:, :2] + rng.normal(scale=1e-3, size=(n, 2))
        ours = _check_umeyama(anchored[:, :2], noisy)
        assert abs(ours.angle_rad) < 0.05


def test_ate_agrees_with_evo_ape():
    """ATE: evo aligns with Umeyama (no scale) and takes the RMSE of the translation
    part of the absolute pose error."""
    rng = np.random.default_rng(7)
    t = np.arange(300) / 30.0
    truth = np.column_stack([np.cos(t / 3), np.sin(t / 2), t / 4])
    for kind in ("curved", "straight"):
        q = truth if kind == "curved" else np.column_stack([t / 5, 0 * t + 1, 0 * t])
        est = q + np.column_stack([np.cumsum(rng.normal(scale=2e-3, size=(len(t), 2)), 0),
                                   np.cumsum(rng.normal(scale=1e-3, size=len(t)))])
        a = 0.7
        rot = np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
        est_xy = est[:, :2] @ rot.T + [2.0, -1.0]
        est = np.column_stack([est_xy, est[:, 2] + a])
        ours, _al = ate(q[:, :2], est[:, :2])
        # evo's own alignment, in the plane (a straight run has rank 1 in SE(3))
        r, tr, _c = evo_geometry.umeyama_alignment(est[:, :2].T, q[:, :2].T)
        moved = np.column_stack([est[:, :2] @ r.T + tr, est[:, 2] + math.atan2(r[1, 0], r[0, 0])])
        ref, e = _traj(t, q), _traj(t, moved)
        ape = metrics.APE(metrics.PoseRelation.translation_part)
        ape.process_data((ref, e))
        theirs = ape.get_statistic(metrics.StatisticsType.rmse)
        assert ours == pytest.approx(theirs, rel=REL)


def test_rpe_by_distance_agrees_with_evo():
    """RPE over 0.5 m of reference path: evo pairs every i with the later sample whose
    path length from i is nearest to 0.5 m, within 10 % (``rel_delta_tol``)."""
    rng = np.random.default_rng(3)
    t = np.arange(600) / 30.0
    speed = 0.3 + 0.25 * np.sin(t / 2) ** 2  # 0.3-0.55 m/s: spans in frames vary
    s = np.cumsum(speed) / 30.0
    q = np.column_stack([np.cos(s), np.sin(1.3 * s), s * 0.8])
    p = q + np.column_stack([np.cumsum(rng.normal(scale=1e-3, size=(len(t), 3)), 0)])
    cum = path_length(q[:, :2])
    for delta in (0.5, 1.3):
        i, j = pairs_by_distance(cum, delta)
        ours = float(np.sqrt(np.mean(rpe(q, p, i, j)[0] ** 2)))
        r = metrics.RPE(metrics.PoseRelation.translation_part, delta=delta,
                        delta_unit=metrics.Unit.meters, rel_delta_tol=0.1, all_pairs=True,
                        pairs_from_reference=True)
        r.process_data((_traj(t, q), _traj(t, p)))
        assert ours == pytest.approx(r.get_statistic(metrics.StatisticsType.rmse), rel=REL)
        assert len(i) == len(r.error)


def test_rpe_time_pairs_follow_evo_nearest_rule():
    """Pairs over 1 s on uneven frame times equal evo's nearest-within-10 % pairs taken
    over a path whose length is the time itself (a straight line at 1 m/s)."""
    rng = np.random.default_rng(4)
    t = np.cumsum(rng.uniform(0.02, 0.05, 400))
    i, j = pairs_by_time(t, 1.0)
    line = np.column_stack([t, 0 * t, 0 * t])
    theirs = filters.filter_pairs_by_path(_se3(line), 1.0, 0.1, all_pairs=True)
    assert list(zip(i.tolist(), j.tolist(), strict=True)) == theirs
