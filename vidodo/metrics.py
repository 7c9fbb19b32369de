"""Alignment of odometry to the truth track, trajectory errors and the drift table.

Two ways of placing an odometry source (which starts at (0, 0, 0) in its own frame) on
the floor:

* **anchored**: the source is moved rigidly so that its pose at motion start equals the
  truth pose there (:func:`anchor_poses`). Its error afterwards is the *anchored drift*,
  what the team experiences when the robot starts from a known spot.
* **best fit**: the rigid SE(2) motion (rotation and translation, no scale) that brings
  the source's positions closest to the truth positions in the least-squares sense
  (Umeyama, IEEE TPAMI 13(4):376, 1991; :func:`umeyama`). The RMS of what is left is
  the absolute trajectory error (ATE, Sturm et al., IROS 2012).

Relative pose error (RPE, Sturm et al. 2012) compares the motion between two instants:
``E_ij = (Q_i^-1 Q_j)^-1 (P_i^-1 P_j)`` where Q is truth and P the source; it is
independent of the alignment. Pairs follow the common rule (:data:`RPE_PAIRS_RULE`: the
TUM benchmark tools, Sturm et al. 2012, and evo's RPE over all pairs taken from the
reference): for every i, j is the later sample whose time (or truth path length) from i
is nearest to the delta, kept only within 10 % of it.

Path length is accumulated only over steps longer than a gate set by the truth track's
1-sigma (:func:`path_length`), so that position noise on a robot standing still does
not add up to metres of imaginary travel.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .errors import MeasurementError
from .outputs import column_prefix
from .se2 import relative_pose, rotate, wrap_angle

__all__ = [
    "Alignment",
    "SourceMetrics",
    "umeyama",
    "transform_poses",
    "anchor_poses",
    "anchor_heading_from_travel",
    "TravelStretch",
    "local_pose",
    "path_length",
    "motion_start_index",
    "travel_direction",
    "along_cross",
    "pairs_by_time",
    "pairs_by_distance",
    "rpe",
    "rpe_key",
    "sigma_key",
    "RPE_PAIRS_RULE",
    "ate",
    "MetricSettings",
    "source_metrics",
    "drift_table",
    "column_prefix",
]


@dataclass(frozen=True)
class Alignment:
    """A similarity transform ``dst ~= scale * rotation @ src + translation``."""

    rotation: np.ndarray
    """Rotation matrix, ndarray of shape (d, d)."""
    translation: np.ndarray
    """Translation, ndarray of shape (d,) [m]."""
    scale: float
    """Scale factor (1.0 for a rigid alignment)."""
    rmse_m: float
    """RMS distance between aligned source points and destination points [m]."""
    n_points: int
    """Number of point pairs used."""

    @property
    def angle_rad(self) -> float:
        """Rotation angle of a planar alignment, counter-clockwise [rad]."""
        return math.atan2(self.rotation[1, 0], self.rotation[0, 0])

    def apply(self, points):
        """Map points, ndarray of shape (N, d), with this transform."""
        p = np.asarray(points, dtype=float)
        return self.scale * p @ self.rotation.T + self.translation


def umeyama(src, dst, *, with_scale=False) -> Alignment:
    """Least-squares rigid (or similarity) transform from ``src`` to ``dst``.

    Follows Umeyama (IEEE TPAMI 13(4):376, 1991), eqs. (34)-(43): with
    ``Sigma_xy = (1/n) sum (y_i - mu_y)(x_i - mu_x)^T = U D V^T``, ``R = U S V^T``,
    ``c = tr(D S) / sigma_x^2`` and ``t = mu_y - c R mu_x``. ``S = diag(1,..,-1)``
    is chosen by the rank-aware rule of eq. (43) (:func:`_umeyama_sign`): from
    ``det(Sigma_xy)`` at full rank, from ``det(U) det(V)`` at rank d - 1 (collinear
    points: a straight run, two points). R is always a rotation, never a reflection.

    Parameters
    ----------
    src, dst : ndarray of shape (N, d)
        Corresponding points; rows with any NaN in either are left out.
    with_scale : bool
        Also fit the scale ``c`` (a similarity); otherwise ``c = 1``.

    Returns
    -------
    Alignment

    Raises
    ------
    MeasurementError
        Fewer than two usable pairs, or all source points coincide.

    Examples
    --------
    >>> a = umeyama([[0, 0], [1, 0]], [[1, 1], [1, 2]])
    >>> round(a.angle_rad, 6), a.translation.round(6).tolist()
    (1.570796, [1.0, 1.0])
    """
    x = np.asarray(src, dtype=float)
    y = np.asarray(dst, dtype=float)
    if x.shape != y.shape or x.ndim != 2:
        raise ValueError(f"src and dst must have the same (N, d) shape, got {x.shape}, {y.shape}")
    ok = np.isfinite(x).all(axis=1) & np.isfinite(y).all(axis=1)
    x, y = x[ok], y[ok]
    n, d = x.shape
    if n < 2:
        raise MeasurementError(f"alignment needs at least 2 point pairs, got {n}")
    mu_x, mu_y = x.mean(axis=0), y.mean(axis=0)
    xc, yc = x - mu_x, y - mu_y
    var_x = float((xc**2).sum() / n)
    if var_x <= 1e-18:
        raise MeasurementError("alignment is undefined: all source points coincide")
    cov = yc.T @ xc / n
    u, dvals, vt = np.linalg.svd(cov)
    s = np.ones(d)
    s[-1] = _umeyama_sign(cov, u, dvals, vt)
    rot = u @ np.diag(s) @ vt
    c = float((dvals * s).sum() / var_x) if with_scale else 1.0
    t = mu_y - c * rot @ mu_x
    resid = y - (c * x @ rot.T + t)
    rmse = float(np.sqrt((resid**2).sum(axis=1).mean()))
    return Alignment(rotation=rot, translation=t, scale=c, rmse_m=rmse, n_points=int(n))


def _umeyama_sign(cov, u, dvals, vt) -> float:
    """Last diagonal entry of Umeyama's S (1991, eq. 43), rank first.

    The rank is counted with the tolerance of ``numpy.linalg.matrix_rank`` (largest
    singular value x d x machine epsilon). Full rank: S's sign is that of
    ``det(Sigma_xy)``. Rank d - 1 (collinear source or destination points, e.g. a
    straight run or two points): ``det(Sigma_xy)`` is rounding noise and the sign is
    ``det(U) det(V)``. Lower rank (no unique rotation in eq. 43): the same product,
    which still gives a proper rotation.
    """
    d = cov.shape[0]
    tol = float(dvals.max(initial=0.0)) * d * np.finfo(float).eps
    rank = int((dvals > tol).sum())
    if rank == d:
        return -1.0 if np.linalg.det(cov) < 0 else 1.0
    return -1.0 if np.linalg.det(u) * np.linalg.det(vt) < 0 else 1.0


def transform_poses(poses, alignment: Alignment):
    """Apply a planar alignment to poses ``(x_m, y_m, heading_rad)``, ndarray (N, 3)."""
    p = np.asarray(poses, dtype=float).reshape(-1, 3)
    xy = alignment.apply(p[:, :2])
    return np.column_stack([xy, p[:, 2] + alignment.angle_rad])


def anchor_poses(poses, source_pose, truth_pose):
    """Move poses rigidly so that ``source_pose`` lands on ``truth_pose``.

    The transform is ``T = Q_a P_a^-1`` applied on the left of every pose (Lynch & Park,
    *Modern Robotics*, 2017, sec. 3.2 composition of planar rigid motions).

    Parameters
    ----------
    poses : ndarray of shape (N, 3)
        Source poses in the source's own frame.
    source_pose, truth_pose : sequence of 3 float
        The source's and the truth's pose at the anchor instant.

    Returns
    -------
    ndarray of shape (N, 3)
        Poses in the floor frame; heading continuous.
    """
    p = np.asarray(poses, dtype=float).reshape(-1, 3)
    px, py, ph = (float(v) for v in source_pose)
    qx, qy, qh = (float(v) for v in truth_pose)
    dh = qh - ph
    rx, ry = rotate(p[:, 0] - px, p[:, 1] - py, dh)
    return np.column_stack([qx + rx, qy + ry, p[:, 2] + dh])


@dataclass(frozen=True)
class TravelStretch:
    """The first stretch of travel :func:`anchor_heading_from_travel` uses."""

    length_m: float = 1.0
    """Truth path length of the stretch [m]."""
    max_s: float = 2.0
    """Longest duration of the stretch [s]."""
    corr_samples: int = 5
    """Samples over which truth errors are taken as correlated (a smoothed track)."""


def anchor_heading_from_travel(t_s, truth_poses, anchored_poses, k0, *, sigma_m=None,
                               t_stop_s=None, stretch=None, shared_m=None):
    """Heading correction at the anchor from the first stretch of travel.

    A marker's heading is often less certain than its position. Over the first
    ``stretch.length_m`` of truth path after sample ``k0`` (at most ``stretch.max_s``),
    the rotation about
    the anchor point that best lays the anchored source's positions onto the truth's
    (least squares, Umeyama 1991 with the translation fixed) is a second measurement of
    the start heading; odometry over so short a stretch has hardly drifted.

    Its 1-sigma has two parts, added in quadrature. The truth's fresh noise averages
    over the stretch's samples (independent in blocks of ``stretch.corr_samples``):
    ``sigma / rms(d) * sqrt(corr_samples / n)``. The errors that belong to the place in
    the image (the floor registration's, the marker's perspective and lens errors) do
    not: over a stretch of a metre they change little from sample to sample, yet the
    anchor point's error and the stretch's differ. To first order the fitted rotation
    moves by ``(e_stretch - e_anchor) x sum(d) / sum(|d|^2)`` (``d`` the truth's
    displacements from the anchor, the cross product in the plane); with the two
    errors independent, each with its own 1-sigma per axis (``sigma / sqrt 2``, the
    track's sigma being the radial RMS), that term is
    ``sqrt(s_a^2 + s_stretch^2) / sqrt(2) * |sum(d)| / sum(|d|^2)``. An error the
    anchor and the stretch share (``shared_m``: the track's shared-error modes, e.g. one
    registration error seen at both places) is not independent between them: its
    difference is known per mode, and each mode turns the fit by
    ``sum(d x (m_i - m_anchor)) / sum(|d|^2)``; those add in quadrature over the modes
    (independent standard normals) and to the two parts above, which then take
    ``sigma_m`` as the error not shared.

    Parameters
    ----------
    t_s : ndarray of shape (N,)
    truth_poses, anchored_poses : ndarray of shape (N, 3)
        Truth and the source anchored at sample ``k0``.
    k0 : int
        Anchor sample.
    sigma_m : float or ndarray of shape (N,), optional
        Truth position 1-sigma (radial RMS), one value or per sample [m]; 2 mm when
        not given.
    t_stop_s : float, optional
        End the stretch here (e.g. before the first slip or lift event) [s].
    stretch : TravelStretch, optional
        Length, longest duration and correlated samples of the stretch (defaults: 1 m,
        2 s, 5 samples).
    shared_m : ndarray of shape (N, K, 2), optional
        The truth's shared position error as modes [m per unit standard normal]; with
        it ``sigma_m`` is the rest of the 1-sigma.

    Returns
    -------
    tuple
        ``(dheading_rad, sigma_rad)``, or ``(None, None)`` when the stretch is too short
        (under 0.2 m) or too few samples.
    """
    stretch = TravelStretch() if stretch is None else stretch
    length_m, max_s, corr_samples = stretch.length_m, stretch.max_s, stretch.corr_samples
    t = np.asarray(t_s, dtype=float)
    q = np.asarray(truth_poses, dtype=float).reshape(-1, 3)
    p = np.asarray(anchored_poses, dtype=float).reshape(-1, 3)
    if not 0 <= k0 < len(t) or not (np.isfinite(q[k0]).all() and np.isfinite(p[k0]).all()):
        return None, None
    t_end = t[k0] + max_s if t_stop_s is None else min(t[k0] + max_s, t_stop_s)
    sel = (t >= t[k0]) & (t <= t_end) & np.isfinite(q).all(axis=1) \
        & np.isfinite(p).all(axis=1)
    idx = np.flatnonzero(sel)
    dq = q[idx, :2] - q[k0, :2]
    dp = p[idx, :2] - p[k0, :2]
    dist = np.hypot(dq[:, 0], dq[:, 1])
    far = np.flatnonzero(dist >= length_m)
    if far.size:
        idx, dq, dp, dist = idx[: far[0] + 1], dq[: far[0] + 1], dp[: far[0] + 1], \
            dist[: far[0] + 1]
    if idx.size < 5 or dist.max() < 0.2:
        return None, None
    cross = float(np.sum(dp[:, 0] * dq[:, 1] - dp[:, 1] * dq[:, 0]))
    dot = float(np.sum(dp[:, 0] * dq[:, 0] + dp[:, 1] * dq[:, 1]))
    dh = math.atan2(cross, dot)
    rms = float(np.sqrt(np.mean(np.sum(dp**2, axis=1))))
    if rms < 1e-6:  # the source did not move over the stretch: no heading from it
        return None, None
    sig = np.broadcast_to(np.asarray(0.002 if sigma_m is None else sigma_m, dtype=float),
                          t.shape)
    s_stretch = float(np.sqrt(np.nanmean(sig[idx] ** 2)))
    s_anchor = float(sig[k0]) if np.isfinite(sig[k0]) else s_stretch
    fresh = s_stretch / rms * math.sqrt(corr_samples / idx.size)
    lever = float(np.hypot(*dq.sum(axis=0)) / np.sum(dq**2))
    place = math.hypot(s_anchor, s_stretch) / math.sqrt(2.0) * lever
    shared = 0.0
    if shared_m is not None:
        e = np.nan_to_num(np.asarray(shared_m, float).reshape(len(t), -1, 2))
        e = e[idx] - e[k0]
        turn = np.sum(dq[:, 0, None] * e[:, :, 1] - dq[:, 1, None] * e[:, :, 0], axis=0)
        shared = float(np.sqrt(np.sum(turn**2))) / float(np.sum(dq**2))
    return dh, math.sqrt(fresh**2 + place**2 + shared**2)


def local_pose(t_s, poses, t0_s, sigma_m, *, half_s=0.3):
    """Truth pose at ``t0_s`` with less noise than one sample.

    Over the samples within ``half_s`` of ``t0_s``: their mean if the robot stood still
    (positions spread less than 3 sigma), else a quadratic fit in time evaluated at
    ``t0_s`` (the Savitzky-Golay idea; common practice). Heading must be continuous.

    Returns
    -------
    tuple of float
        ``(x_m, y_m, heading_rad)``.
    """
    t = np.asarray(t_s, dtype=float)
    q = np.asarray(poses, dtype=float).reshape(-1, 3)
    m = (t >= t0_s - half_s) & (t <= t0_s + half_s) & np.isfinite(q).all(axis=1)
    if m.sum() < 5:
        k = int(np.nanargmin(np.where(np.isfinite(q).all(axis=1), np.abs(t - t0_s), np.inf)))
        return tuple(float(v) for v in q[k])
    sub = q[m]
    spread = float(np.max(np.hypot(sub[:, 0] - sub[:, 0].mean(), sub[:, 1] - sub[:, 1].mean())))
    if spread < 3.0 * sigma_m:
        return tuple(float(v) for v in sub.mean(axis=0))
    dt = t[m] - t0_s
    return tuple(float(np.polyval(np.polyfit(dt, sub[:, i], 2), 0.0)) for i in range(3))


def path_length(xy, gate_m=0.0):
    """Cumulative path length with steps shorter than ``gate_m`` held back.

    A step is added only once the position has moved at least ``gate_m`` from the
    last counted point, so noise of a standing robot does not accumulate. With
    ``gate_m`` = 3 sigma of the position noise the chord error on a curve of radius R
    is about ``gate_m^2 / (24 R^2)`` of the length, negligible for any real path.

    Parameters
    ----------
    xy : ndarray of shape (N, 2)
        Positions [m]; NaN rows are skipped (the length holds over them).
    gate_m : float
        Minimum counted step [m].

    Returns
    -------
    ndarray of shape (N,)
        Cumulative length at each sample [m], 0 at the first.
    """
    p = np.asarray(xy, dtype=float).reshape(-1, 2)
    out = np.zeros(len(p))
    total = 0.0
    last = None
    for i in range(len(p)):
        if np.isfinite(p[i]).all():
            if last is None:
                last = p[i]
            else:
                step = math.hypot(p[i, 0] - last[0], p[i, 1] - last[1])
                if step >= gate_m:
                    total += step
                    last = p[i]
        out[i] = total
    return out


def motion_start_index(xy, sigma_m, *, min_move_m=0.01, heading_rad=None,
                       sigma_heading_rad=0.0, min_turn_rad=0.017453292519943295):
    """Index of the last sample at rest before the robot first moves or turns.

    The robot has moved once it is more than ``max(5 * sigma_m, min_move_m)`` from its
    first position, or (when ``heading_rad`` is given) has turned more than
    ``max(5 * sigma_heading_rad, min_turn_rad)`` (default 1 degree) from its first
    heading, so a run that
    starts by spinning in place is anchored before the spin. The start is the last
    sample before that within ``max(2 * sigma_m, min_move_m / 4)`` of the first
    position (and within ``max(2 * sigma_heading_rad, min_turn_rad / 4)`` of the first
    heading).

    Returns
    -------
    int or None
        None when the robot never moves or turns that far.
    """
    p = np.asarray(xy, dtype=float).reshape(-1, 2)
    good = np.flatnonzero(np.isfinite(p).all(axis=1))
    if good.size < 2:
        return None
    p0 = p[good[0]]
    d = np.hypot(p[:, 0] - p0[0], p[:, 1] - p0[1])
    moved_mask = d > max(5.0 * sigma_m, min_move_m)
    near_mask = d <= max(2.0 * sigma_m, min_move_m / 4)
    if heading_rad is not None:
        h = np.asarray(heading_rad, dtype=float).reshape(-1)
        dh = np.abs(np.angle(np.exp(1j * (h - h[good[0]]))))
        dh = np.where(np.isfinite(dh), dh, 0.0)
        moved_mask |= dh > max(5.0 * sigma_heading_rad, min_turn_rad)
        near_mask &= dh <= max(2.0 * sigma_heading_rad, min_turn_rad / 4)
    moved = np.flatnonzero(moved_mask)
    if moved.size == 0:
        return None
    first = moved[0]
    near = good[(good < first) & near_mask[good]]
    return int(near[-1]) if near.size else int(good[0])


def travel_direction(xy, heading_rad, *, min_step_m):
    """Direction of travel along the truth path, held while the robot stands.

    The direction of the displacement over the smallest centred window that spans at
    least ``min_step_m``; before the first such displacement the heading is used.

    Returns
    -------
    ndarray of shape (N,)
        Direction [rad].
    """
    p = np.asarray(xy, dtype=float).reshape(-1, 2)
    h = np.asarray(heading_rad, dtype=float)
    n = len(p)
    out = np.full(n, np.nan)
    # forward and backward neighbours by cumulative path length
    s = path_length(p, gate_m=0.0)
    last = np.nan
    j_lo = 0
    j_hi = 0
    for i in range(n):
        while j_hi < n - 1 and s[j_hi] - s[i] < min_step_m / 2:
            j_hi += 1
        while j_lo < i and s[i] - s[j_lo + 1] >= min_step_m / 2:
            j_lo += 1
        d = p[j_hi] - p[j_lo]
        if np.isfinite(d).all() and math.hypot(*d) >= min_step_m * 0.5:
            last = math.atan2(d[1], d[0])
        out[i] = last
    first = np.flatnonzero(np.isfinite(out))
    if first.size:
        out[: first[0]] = h[: first[0]]
    else:
        out = h.copy()
    return out


def along_cross(err_xy, direction_rad):
    """Split floor-frame errors into along-track and cross-track (left) components."""
    e = np.asarray(err_xy, dtype=float).reshape(-1, 2)
    return rotate(e[:, 0], e[:, 1], -np.asarray(direction_rad, dtype=float))


RPE_PAIRS_RULE = (
    "RPE pairs: for every truth sample i, j is the later sample whose time (or truth path "
    "length) from i is nearest to the delta, kept within 10 % of the delta (common "
    "practice: the TUM benchmark tools; evo's RPE with all pairs from the reference)")
"""How RPE pairs are chosen, as stated in the summary."""

RPE_REL_TOL = 0.1
"""Largest accepted deviation of a pair's span from the delta, relative to the delta
(evo's default ``rel_delta_tol``, common practice)."""


def pairs_by_time(t_s, delta_s, rel_tol=RPE_REL_TOL):
    """Index pairs ``(i, j)``: j the later sample nearest to ``t_i + delta_s``.

    Only pairs within ``rel_tol * delta_s`` of the delta are kept (see
    :data:`RPE_PAIRS_RULE`).
    """
    return _nearest_pairs(t_s, delta_s, rel_tol)


def pairs_by_distance(cum_length_m, delta_m, rel_tol=RPE_REL_TOL):
    """Index pairs ``(i, j)``: j the later sample whose path length from i is nearest to
    ``delta_m``, kept within ``rel_tol * delta_m`` (see :data:`RPE_PAIRS_RULE`)."""
    return _nearest_pairs(cum_length_m, delta_m, rel_tol)


def _nearest_pairs(values, delta, rel_tol):
    """For every i, the j > i with ``values[j] - values[i]`` nearest to ``delta``.

    ``values`` never decreases. Ties and flat stretches go to the lowest index, as an
    argmin over ``j > i`` does (evo's ``filter_pairs_by_path`` with all pairs).
    """
    v = np.asarray(values, dtype=float)
    n = v.size
    if n < 2 or not delta > 0:
        return np.zeros(0, int), np.zeros(0, int)
    i = np.arange(n - 1)
    target = v[i] + delta
    hi = np.searchsorted(v, target, side="left")  # first j with v_j >= target (> i)
    lo = np.maximum(np.searchsorted(v, v[np.maximum(hi - 1, 0)], side="left"), i + 1)
    has_lo = hi - 1 > i
    has_hi = hi < n
    hi_c = np.minimum(hi, n - 1)
    d_lo = np.where(has_lo, np.abs(v[np.minimum(lo, n - 1)] - target), np.inf)
    d_hi = np.where(has_hi, np.abs(v[hi_c] - target), np.inf)
    j = np.where(d_lo <= d_hi, lo, hi_c)
    keep = np.minimum(d_lo, d_hi) <= rel_tol * delta
    return i[keep], j[keep]


def sigma_key(figure: str) -> str:
    """Summary key of a figure's 1-sigma: ``final_err_m`` -> ``final_err_sigma_m``,
    ``heading_drift_deg_per_turn`` -> ``heading_drift_sigma_deg_per_turn``."""
    if figure.endswith("_deg_per_turn"):
        return figure[: -len("_deg_per_turn")] + "_sigma_deg_per_turn"
    base, unit = figure.rsplit("_", 1)
    return f"{base}_sigma_{unit}"


def rpe_key(delta, unit):
    """Summary key of an RPE figure named by its delta, e.g. ``rpe_0p5m_rmse_m``.

    Parameters
    ----------
    delta : float
        The delta in its unit.
    unit : {'m', 's'}
    """
    text = f"{float(delta):g}".replace(".", "p").replace("-", "m")
    return f"rpe_{text}{unit}_rmse_m"


def rpe(truth_poses, est_poses, i, j):
    """Relative pose errors over the pairs ``(i, j)`` (Sturm et al., IROS 2012, eq. 1).

    Returns
    -------
    tuple of ndarray
        Translational error [m] and absolute rotational error [rad] per pair with both
        ends finite.
    """
    q = np.asarray(truth_poses, dtype=float).reshape(-1, 3)
    p = np.asarray(est_poses, dtype=float).reshape(-1, 3)
    i = np.asarray(i, dtype=int)
    j = np.asarray(j, dtype=int)
    dq = relative_pose(q[i], q[j])
    dp = relative_pose(p[i], p[j])
    e = relative_pose(dq, dp)
    ok = np.isfinite(e).all(axis=1)
    return np.hypot(e[ok, 0], e[ok, 1]), np.abs(e[ok, 2])


def _rmse(v):
    v = np.asarray(v, dtype=float)
    return float(np.sqrt(np.mean(v**2))) if v.size else None


def ate(truth_xy, est_xy):
    """Absolute trajectory error after a rigid SE(2) fit (Sturm et al., IROS 2012).

    Returns
    -------
    tuple of (float, Alignment)
        RMSE [m] and the fitted alignment (source -> floor).
    """
    al = umeyama(est_xy, truth_xy, with_scale=False)
    return al.rmse_m, al


@dataclass(frozen=True)
class SourceMetrics:
    """Figures of one odometry source against the truth track (anchored unless said)."""

    ate_rmse_m: float | None
    """RMS position error after the best-fit SE(2) alignment [m]."""
    rpe_path_rmse_m: float | None
    """RMS translational relative error over ``rpe_delta_m`` of truth path [m]; written
    to the summary under a key named by the delta (:func:`rpe_key`)."""
    rpe_time_rmse_m: float | None
    """RMS translational relative error over ``rpe_delta_s`` of time [m]."""
    final_err_m: float | None
    """Anchored position error at the last sample both cover [m]."""
    final_heading_err_rad: float | None
    """Anchored heading error (source minus truth) at that sample [rad]."""
    drift_pct: float | None
    """Final anchored position error as a percentage of truth path length [%]."""
    heading_drift_deg_per_turn: float | None
    """Final heading error per full turn the robot made [deg/turn]."""
    max_err_m: float | None
    """Largest anchored position error [m]."""
    max_err_t_s: float | None
    """Video time of the largest error [s]."""
    max_err_x_m: float | None
    """Truth floor position at the largest error, x [m]."""
    max_err_y_m: float | None
    """Truth floor position at the largest error, y [m]."""
    path_length_m: float | None
    """Truth path length over the samples this source covers [m]."""
    coverage_s: float
    """Duration over which both the truth and this source have poses [s]."""
    best_fit_angle_rad: float | None
    """Rotation of the best-fit alignment (source frame -> floor) [rad]."""
    warnings: tuple[str, ...] = ()
    """What could not be measured for this source, and why."""
    best_fit_scale: float | None = None
    """Scale of a similarity (Sim(2)) fit of the source onto truth: a diagnostic of
    a length error (wheel radius), not used for ATE [-]."""
    rpe_delta_m: float = 0.5
    """Path length over which ``rpe_path_rmse_m`` is taken [m]."""
    rpe_delta_s: float = 1.0
    """Time over which ``rpe_time_rmse_m`` is taken [s]."""
    sigma: dict | None = None
    """1-sigma of the figures, propagated from the truth track's and the clock's sigma
    (:mod:`vidodo.drift_sigma`): figure name -> sigma in its unit, or None."""

    def to_dict(self) -> dict:
        """Plain dict for JSON (None for figures that could not be measured); the RPE
        figures are keyed by their delta (``rpe_0p5m_rmse_m``, ``rpe_1s_rmse_m``), and
        each figure with a 1-sigma is followed by it (``final_err_sigma_m``)."""
        out = {}
        sig = self.sigma or {}
        for k, v in self.__dict__.items():
            if k == "sigma":
                continue
            name = k
            if k == "rpe_path_rmse_m":
                name = rpe_key(self.rpe_delta_m, "m")
            elif k == "rpe_time_rmse_m":
                name = rpe_key(self.rpe_delta_s, "s")
            out[name] = list(v) if isinstance(v, tuple) else v
            if k in sig:
                out[sigma_key(name)] = sig[k] if v is not None else None
        return out


@dataclass(frozen=True)
class MetricSettings:
    """How :func:`source_metrics` measures one source."""

    sigma_heading_rad: float = 0.0
    """Typical truth heading 1-sigma [rad]: turning is accumulated only in steps of at
    least 3 sigma, so heading noise of a still robot does not count as turns."""
    sigma_m: float = 0.0
    """Typical truth position 1-sigma [m]; the final error is taken against the truth
    pose averaged (or fitted) over +-0.3 s (:func:`local_pose`)."""
    min_path_m: float = 0.25
    """Below this path length drift in percent is not reported [m]."""
    min_turn_rad: float = math.pi / 2
    """Below this total turning heading drift per turn is not reported [rad]."""
    rpe_delta_m: float = 0.5
    """RPE distance delta [m]."""
    rpe_delta_s: float = 1.0
    """RPE time delta [s]."""
    name: str = "source"
    """The source's name, for messages."""


def source_metrics(t_s, truth_poses, anchored_poses, cum_length_m,
                   settings=MetricSettings()) -> SourceMetrics:
    """Compute every per-source figure from anchored poses on the truth time grid.

    Parameters
    ----------
    t_s : ndarray of shape (N,)
        Video time of each truth sample [s].
    truth_poses, anchored_poses : ndarray of shape (N, 3)
        Truth and anchored source poses (NaN where missing).
    cum_length_m : ndarray of shape (N,)
        Truth path length (see :func:`path_length`) [m].
    settings : MetricSettings
        Truth sigmas, reporting thresholds, RPE deltas, the source's name.

    Returns
    -------
    SourceMetrics
    """
    c = settings
    name, sigma_m, rpe_delta_m, rpe_delta_s = c.name, c.sigma_m, c.rpe_delta_m, c.rpe_delta_s
    min_path_m, min_turn_rad = c.min_path_m, c.min_turn_rad
    t = np.asarray(t_s, dtype=float)
    q = np.asarray(truth_poses, dtype=float).reshape(-1, 3)
    p = np.asarray(anchored_poses, dtype=float).reshape(-1, 3)
    s = np.asarray(cum_length_m, dtype=float)
    warn = []
    both = np.isfinite(q).all(axis=1) & np.isfinite(p).all(axis=1)
    idx = np.flatnonzero(both)
    if idx.size < 2:
        raise MeasurementError(
            f"source {name!r}: fewer than 2 samples overlap the truth track; "
            "check the clock offset and that the log covers the video"
        )
    err = np.hypot(p[:, 0] - q[:, 0], p[:, 1] - q[:, 1])
    last = idx[-1]
    # the final error against the truth pose with its noise reduced (local_pose)
    qf = local_pose(t, q, float(t[last]), sigma_m, half_s=0.3)
    final_err = math.hypot(p[last, 0] - qf[0], p[last, 1] - qf[1])
    final_herr = float(wrap_angle(p[last, 2] - qf[2]))
    kmax = idx[int(np.argmax(err[idx]))]
    plen = float(s[last] - s[idx[0]])
    try:
        ate_m, al = ate(q[idx, :2], p[idx, :2])
        angle = al.angle_rad
        scale = umeyama(p[idx, :2], q[idx, :2], with_scale=True).scale
    except MeasurementError as exc:
        ate_m, angle, scale = None, None, None
        warn.append(f"{name}: ATE not measured ({exc})")
    sub_t, sub_q, sub_p, sub_s = t[idx], q[idx], p[idx], s[idx]
    i, j = pairs_by_distance(sub_s, rpe_delta_m)
    rpe_m = _rmse(rpe(sub_q, sub_p, i, j)[0])
    if rpe_m is None:
        warn.append(f"{name}: RPE over {rpe_delta_m} m not measured (no pair of samples "
                    "that far apart along the path)")
    i, j = pairs_by_time(sub_t, rpe_delta_s)
    rpe_s = _rmse(rpe(sub_q, sub_p, i, j)[0])
    if rpe_s is None:
        warn.append(f"{name}: RPE over {rpe_delta_s} s not measured (no pair of samples "
                    "that far apart in time)")
    drift = None
    if plen >= min_path_m:
        drift = 100.0 * final_err / plen
    else:
        warn.append(f"{name}: drift % not measured (truth path {plen:.2f} m < {min_path_m} m)")
    turned = _gated_turn(sub_q[:, 2], 3.0 * c.sigma_heading_rad)
    per_turn = None
    if turned >= min_turn_rad:
        per_turn = math.degrees(final_herr) / (turned / (2.0 * math.pi))
    else:
        warn.append(f"{name}: heading drift per turn not measured (robot turned "
                    f"{math.degrees(turned):.0f} deg < {math.degrees(min_turn_rad):.0f} deg)")
    return SourceMetrics(
        ate_rmse_m=ate_m,
        rpe_path_rmse_m=rpe_m,
        rpe_time_rmse_m=rpe_s,
        final_err_m=final_err,
        final_heading_err_rad=final_herr,
        drift_pct=drift,
        heading_drift_deg_per_turn=per_turn,
        max_err_m=float(err[kmax]),
        max_err_t_s=float(t[kmax]),
        max_err_x_m=float(q[kmax, 0]),
        max_err_y_m=float(q[kmax, 1]),
        path_length_m=plen,
        coverage_s=float(t[last] - t[idx[0]]),
        best_fit_angle_rad=angle,
        warnings=tuple(warn),
        best_fit_scale=scale,
        rpe_delta_m=float(rpe_delta_m),
        rpe_delta_s=float(rpe_delta_s),
    )


def _gated_turn(heading_rad, gate_rad):
    """Total absolute turning, counting a change only once it exceeds ``gate_rad``."""
    h = np.unwrap(np.asarray(heading_rad, dtype=float))
    total, last = 0.0, h[0]
    for v in h[1:]:
        d = abs(v - last)
        if d >= gate_rad:
            total += d
            last = v
    return total


def drift_table(truth: pd.DataFrame, anchored: dict, cum_length_m, direction_rad,
                event_flags=None) -> pd.DataFrame:
    """The drift table: one row per truth sample (format in DEVELOPERS.md).

    Parameters
    ----------
    truth : DataFrame
        Truth track (``t_s, x_m, y_m, heading_rad, sigma_xy_m, sigma_heading_rad``).
    anchored : dict of str -> ndarray of shape (N, 3)
        Anchored poses per source on the truth time grid.
    cum_length_m : ndarray of shape (N,)
        Truth path length [m].
    direction_rad : ndarray of shape (N,)
        Direction of travel used for along/cross-track [rad].
    event_flags : sequence of str, optional
        Per sample, the active event kinds joined with ';'.

    Returns
    -------
    DataFrame
    """
    n = len(truth)
    cols = {
        "t_s": truth["t_s"].to_numpy(float),
        "truth_x_m": truth["x_m"].to_numpy(float),
        "truth_y_m": truth["y_m"].to_numpy(float),
        "truth_heading_rad": truth["heading_rad"].to_numpy(float),
        "truth_sigma_xy_m": truth["sigma_xy_m"].to_numpy(float),
        "truth_sigma_heading_rad": truth["sigma_heading_rad"].to_numpy(float),
        "path_length_m": np.asarray(cum_length_m, dtype=float),
    }
    q = np.column_stack([cols["truth_x_m"], cols["truth_y_m"], cols["truth_heading_rad"]])
    for name, poses in anchored.items():
        pre = column_prefix(name)
        p = np.asarray(poses, dtype=float).reshape(-1, 3)
        ex, ey = p[:, 0] - q[:, 0], p[:, 1] - q[:, 1]
        along, cross = along_cross(np.column_stack([ex, ey]), direction_rad)
        cols[f"{pre}_x_m"] = p[:, 0]
        cols[f"{pre}_y_m"] = p[:, 1]
        cols[f"{pre}_heading_rad"] = p[:, 2]
        cols[f"{pre}_err_m"] = np.hypot(ex, ey)
        cols[f"{pre}_along_m"] = along
        cols[f"{pre}_cross_m"] = cross
        cols[f"{pre}_heading_err_rad"] = wrap_angle(p[:, 2] - q[:, 2])
    cols["events"] = list(event_flags) if event_flags is not None else [""] * n
    return pd.DataFrame(cols)
