"""Fit the robot profile's geometry to the truth track.

The truth track (video clock) gives the robot's body motion over short windows; the
log gives what each encoder and the IMU counted over the same windows. Through the
single wheel model (:mod:`vidodo.wheels`) each window predicts every wheel's rim travel
from the body increment, so the profile numbers follow by robust least squares over
many windows:

* per wheel: a radius scale ``k`` (true rim travel = ``k`` x profile rim travel) and a
  lever-arm correction ``dl`` (the wheel's offset perpendicular to the direction it
  reads: the lateral offset of a forward-rolling wheel, the forward offset of a
  sideways one);
* the IMU: a scale ``c`` on the logged heading change and, per run, a bias rate;
* per run: a correction to the clock offset and a small log-clock rate error, with
  ``t_video = t_log + offset_s + d_offset_s + rate * (t_log - t_mid)``.

Encoder (and IMU) sign errors are found first, from the cosine similarity between the
measured and the predicted travel over all windows, and flagged.

Residual for wheel ``i`` in window ``w`` (rim metres)::

    k_i * sign_i * metres_per_tick_i * dticks_i,w  -  (A_i + [0, 0, dl_i]) @ U_w

with ``U_w`` the truth body increment (exponential coordinates summed frame by frame)
and ``A_i`` the wheel's row of the wheel matrix; for the IMU (radians)::

    c * dpsi_w  -  bias * dt_w  -  dtheta_w.

The solve is iteratively reweighted least squares (Huber weights, a per-sensor noise
scale from the median absolute deviation; :func:`scipy.optimize.least_squares` for each
step), with a weak prior that holds every value at the profile when the data say
nothing. Standard errors come from the Jacobian: ``cov = s^2 (J^T J)^-1`` for
independent windows, widened to a sandwich form because adjacent windows share an end
frame (see :func:`_sandwich_cov`). A value whose standard error exceeds the wanted
precision (:data:`TOLERANCES`) is reported as not identifiable, with a motion that
would fix it, and held at the profile value while the rest is refitted (one at a time,
worst first, so a pair that only the two together cannot fix keeps one of them).

This module only estimates; grading a run before and after a correction and the
two-pass fit that leaves out events found with the corrected profile are wiring, in
:mod:`vidodo.tuning`.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.optimize import least_squares

from .errors import InputError, MeasurementError
from .outputs import atomic_file
from .profiles import RobotProfile, dump_toml, robot_to_dict
from .robust import median_abs_deviation
from .se2 import log_increment, relative_pose
from .wheels import wheel_rows

__all__ = [
    "FitRun",
    "ProfileFit",
    "TOLERANCES",
    "FitSettings",
    "fit_profile",
    "truth_increments",
    "write_profile",
    "with_clock",
]

TOLERANCES = {
    "radius": 1e-3,
    "lever": 0.5e-3,
    "imu_scale": 0.5e-3,
    "imu_bias": math.radians(0.01),
    "clock_offset": 2e-3,
    "clock_rate": 20e-6,
}
"""Wanted precision (one standard error) per kind of value: radius scale [-], lever arm
[m], IMU scale [-], IMU bias rate [rad/s], clock offset [s], clock rate [-]. A value is
'yes' (identifiable) when its standard error is within this, 'weak' within 5 times
this, else 'no'."""

_PRIOR_SIGMA = {
    "radius": 0.2,
    "lever": 0.05,
    "imu_scale": 0.2,
    "imu_bias": math.radians(2.0),
    "clock_offset": 0.2,
    "clock_rate": 2e-3,
}
"""Width of the weak prior that holds a value at the profile when the data carry no
information about it (one sigma, units as in :data:`TOLERANCES`)."""

SUGGESTIONS = {
    "radius": "drive straight lines of a few metres, forward and back",
    "radius_side": "drive (or push the robot) sideways a metre or two each way",
    "lever": "spin in place several full turns each way, then drive a square",
    "imu_scale": "spin in place several full turns each way",
    "imu_bias": "stand still for 5 s at the start and at the end, and drive for longer",
    "clock_offset": "start and stop sharply a few times",
    "clock_rate": "drive for longer, with sharp starts and stops near both ends",
}
"""The motion that would pin down each kind of value."""

_HUBER_K = 1.345
"""Huber tuning constant in units of the noise scale (95 % efficiency on Gaussian
noise; Huber 1964, common practice)."""


@dataclass(frozen=True)
class FitRun:
    """One graded run as the fit needs it.

    Attributes
    ----------
    name : str
        Label used in tables and warnings.
    truth : DataFrame
        Truth track on the video clock: ``t_s`` [s], ``x_m``, ``y_m`` [m],
        ``heading_rad`` (continuous) [rad]; optional ``detected`` and
        ``interpolated`` flags (windows touching an undetected or interpolated frame
        are dropped).
    log : DataFrame
        Log frame on the log clock: ``t_s`` [s], ``ticks_<wheel>`` (unwrapped counts,
        sign not applied), ``imu_heading_rad`` [rad] (profile scale and sign applied).
    offset_s : float
        Clock offset, ``t_video_s = t_log_s + offset_s + rate * (t_log_s - ref_log_s)``
        [s].
    exclude_windows : tuple of (float, float)
        Video-clock intervals ``(t_start_s, t_end_s)`` to leave out (events) [s].
    rate : float
        Log-clock rate error already known from the clock sync [-].
    ref_log_s : float
        Log time the rate term is referred to [s].
    """

    name: str
    truth: pd.DataFrame
    log: pd.DataFrame
    offset_s: float
    exclude_windows: tuple = ()
    rate: float = 0.0
    ref_log_s: float = 0.0


@dataclass(frozen=True)
class ProfileFit:
    """The fitted profile values and what they are worth.

    Attributes
    ----------
    table : DataFrame
        One row per value: ``parameter`` (e.g. ``wheel left y_m``), ``kind``,
        ``target`` (wheel name, ``imu`` or run name), ``unit`` (SI), ``profile``,
        ``estimate`` (NaN when not identifiable), ``std_error``, ``change``
        (estimate - profile), ``identifiable`` (``yes``, ``weak``, ``no``),
        ``written`` (the corrected profile carries the estimate) and ``suggestion``
        (a motion that would pin the value down, empty when identifiable).
    robot : RobotProfile
        The profile handed in.
    corrected_robot : RobotProfile
        The profile with every written estimate applied.
    inverted : tuple of str
        Wheels (and ``imu``) whose counts run against their profile sign.
    n_windows : dict
        Windows used per run.
    noise : dict
        Fitted noise scale per sensor (MAD of residuals): wheels [m], ``imu`` [rad].
    covariance : ndarray of shape (P, P)
        Covariance of the free parameters in the solver's units (see ``names``).
    names : tuple of str
        Solver parameter names, in covariance order.
    warnings : tuple of str
        Anything that makes a value uncertain.
    """

    table: pd.DataFrame
    robot: RobotProfile
    corrected_robot: RobotProfile
    inverted: tuple
    n_windows: dict
    noise: dict
    covariance: np.ndarray = field(repr=False)
    names: tuple = ()
    warnings: tuple = ()
    clocks: dict = field(default_factory=dict)
    """Per run: the clock with the fitted corrections, ``(offset_s, rate, ref_log_s)``
    in :class:`FitRun`'s terms (corrections the runs cannot pin down are left out)."""


# ----------------------------------------------------------------------- increments
def truth_increments(truth: pd.DataFrame) -> np.ndarray:
    """Cumulative body increments of a truth track, frame by frame.

    Parameters
    ----------
    truth : DataFrame
        Columns ``x_m``, ``y_m``, ``heading_rad``.

    Returns
    -------
    ndarray of shape (N, 3)
        Row ``j`` minus row ``i`` is the body motion ``(ux_m, uy_m, dtheta_rad)``
        from frame ``i`` to frame ``j``; row 0 is zero.
    """
    pose = truth[["x_m", "y_m", "heading_rad"]].to_numpy(float)
    rel = relative_pose(pose[:-1], pose[1:])
    u = log_increment(rel[:, 0], rel[:, 1], rel[:, 2])
    u = np.nan_to_num(u, nan=0.0)
    return np.vstack([np.zeros((1, 3)), np.cumsum(u, axis=0)])


# --------------------------------------------------------------------------- windows
@dataclass(frozen=True)
class _Windows:
    ta: np.ndarray
    tb: np.ndarray
    u: np.ndarray  # (W, 3) body increments
    dtheta: np.ndarray  # (W,) heading change [rad]


def _windows(run: FitRun, window_s, margin_s) -> _Windows:
    tr = run.truth
    for col in ("t_s", "x_m", "y_m", "heading_rad"):
        if col not in tr.columns:
            raise InputError(f"truth track of run {run.name!r}: missing column '{col}'")
    tr = tr.sort_values("t_s").reset_index(drop=True)
    t = tr["t_s"].to_numpy(float)
    ok = np.isfinite(tr[["x_m", "y_m", "heading_rad"]].to_numpy(float)).all(axis=1)
    if "detected" in tr.columns:
        ok &= tr["detected"].fillna(False).to_numpy(bool)
    if "interpolated" in tr.columns:
        ok &= ~tr["interpolated"].fillna(True).to_numpy(bool)
    cum = truth_increments(tr)
    lt = run.log["t_s"].to_numpy(float)
    lo = lt[0] + run.offset_s + run.rate * (lt[0] - run.ref_log_s) + 0.05
    hi = lt[-1] + run.offset_s + run.rate * (lt[-1] - run.ref_log_s) - 0.05
    ok &= (t >= lo) & (t <= hi)
    excl = [tuple(map(float, w)) for w in run.exclude_windows]
    starts, ends = [], []
    i = None
    for j in range(len(t)):
        if not ok[j]:
            i = None
            continue
        if i is None:
            i = j
            continue
        if t[j] - t[i] >= window_s:
            starts.append(i)
            ends.append(j)
            i = j
    ia, ib = np.asarray(starts, int), np.asarray(ends, int)
    keep = np.ones(len(ia), bool)
    for a, b in excl:
        keep &= ~((t[ia] < b + margin_s) & (t[ib] > a - margin_s))
    ia, ib = ia[keep], ib[keep]
    u = cum[ib] - cum[ia]
    return _Windows(t[ia], t[ib], u, u[:, 2].copy())


# ------------------------------------------------------------------------- the model
@dataclass
class _RunData:
    name: str
    win: _Windows
    log_t: np.ndarray
    ticks: list  # per fitted wheel: cumulative counts (sign not applied)
    psi: np.ndarray | None
    offset_s: float
    t_mid: float
    rate0: float = 0.0
    ref0: float = 0.0
    i_delta: int = -1
    i_rate: int = -1
    i_bias: int = -1


def _log_times(rd: _RunData, t_video, delta, rate):
    """Invert ``t_video = t_log + offset + rate0 (t_log - ref0) + delta + rate (t_log - mid)``."""
    return ((t_video - rd.offset_s - delta + rd.rate0 * rd.ref0 + rate * rd.t_mid)
            / (1.0 + rd.rate0 + rate))


class _Model:
    """Parameter layout and residuals of the fit."""

    def __init__(self, robot, wheels, m_per_tick, runs, use_imu, fit_clock):
        self.robot = robot
        self.wheels = wheels
        self.a = wheel_rows(wheels)
        self.mpt = np.asarray(m_per_tick, float)  # sign included
        self.runs = runs
        self.use_imu = use_imu
        names, kinds, centre = [], [], []

        def add(name, kind, c):
            names.append(name)
            kinds.append(kind)
            centre.append(c)
            return len(names) - 1

        self.i_k = [add(f"k:{w.name}", "radius", 1.0) for w in wheels]
        self.i_l = [add(f"dl:{w.name}", "lever", 0.0) for w in wheels]
        self.i_c = add("c:imu", "imu_scale", 1.0) if use_imu else -1
        for rd in runs:
            if fit_clock:
                rd.i_delta = add(f"delta:{rd.name}", "clock_offset", 0.0)
                rd.i_rate = add(f"rate:{rd.name}", "clock_rate", 0.0)
            if use_imu:
                rd.i_bias = add(f"bias:{rd.name}", "imu_bias", 0.0)
        self.names, self.kinds = names, kinds
        self.centre = np.asarray(centre, float)
        self.prior_sigma = np.array([_PRIOR_SIGMA[k] for k in kinds])
        # per data residual: its sensor group (wheel j -> j, imu -> len(wheels)) and its
        # window (numbered over all runs); windows sharing an end frame are adjacent
        groups, wins, adjacent = [], [], []
        base = 0
        for rd in runs:
            n = len(rd.win.ta)
            for j in range(len(wheels) + (1 if use_imu else 0)):
                groups.append(np.full(n, j))
                wins.append(base + np.arange(n))
            adjacent.append(base + np.flatnonzero(rd.win.tb[:-1] == rd.win.ta[1:]))
            base += n
        self.groups = np.concatenate(groups) if groups else np.zeros(0, int)
        self.row_window = np.concatenate(wins) if wins else np.zeros(0, int)
        self.adjacent = np.concatenate(adjacent) if adjacent else np.zeros(0, int)
        self.n_windows = base
        self.n_groups = len(wheels) + (1 if use_imu else 0)
        # noise floor per group: two count-quantisation errors per window for a wheel
        # (uniform, variance 1/12 count^2 each; common practice), 1e-5 rad for the IMU
        self.floor = np.array([abs(m) / math.sqrt(6.0) for m in self.mpt]
                              + ([1e-5] if use_imu else []))
        # how much each residual's sensor moved in its window, by the truth
        act = []
        for rd in runs:
            for j in range(len(wheels)):
                act.append(np.abs(rd.win.u @ self.a[j]))
            if use_imu:
                act.append(np.abs(rd.win.dtheta))
        self.active = (np.concatenate(act) > 3.0 * self.floor[self.groups]) if act else (
            np.zeros(0, bool))

    def noise_scale(self, raw, g):
        """Robust noise scale of group ``g``: MAD of the residuals of windows in which
        the sensor moved (windows at rest fit exactly in noise-free data and would drive
        the MAD to zero), never below the group's floor."""
        sel = self.groups == g
        moving = sel & self.active
        s = _robust_scale(raw[moving] if moving.sum() >= 5 else raw[sel])
        return max(s, self.floor[g]) if np.isfinite(s) else float(self.floor[g])

    def data_residuals(self, theta):
        out = []
        for rd in self.runs:
            delta = theta[rd.i_delta] if rd.i_delta >= 0 else 0.0
            rate = theta[rd.i_rate] if rd.i_rate >= 0 else 0.0
            la = _log_times(rd, rd.win.ta, delta, rate)
            lb = _log_times(rd, rd.win.tb, delta, rate)
            for j in range(len(self.wheels)):
                tk = rd.ticks[j]
                rim = self.mpt[j] * (np.interp(lb, rd.log_t, tk) - np.interp(la, rd.log_t, tk))
                pred = rd.win.u @ self.a[j] + theta[self.i_l[j]] * rd.win.u[:, 2]
                out.append(theta[self.i_k[j]] * rim - pred)
            if self.use_imu:
                dpsi = np.interp(lb, rd.log_t, rd.psi) - np.interp(la, rd.log_t, rd.psi)
                dt = rd.win.tb - rd.win.ta
                out.append(theta[self.i_c] * dpsi - theta[rd.i_bias] * dt - rd.win.dtheta)
        return np.concatenate(out) if out else np.zeros(0)


def _huber_weights(z, k=_HUBER_K):
    az = np.abs(z)
    return np.where(az <= k, 1.0, k / np.maximum(az, 1e-300))


def _robust_scale(r):
    """Normalised median absolute deviation about zero (common practice): residuals
    of a fit are centred on zero by construction, their median need not be."""
    r = r[np.isfinite(r)]
    if not r.size:
        return float("nan")
    return float(median_abs_deviation(r, center=_zero, scale="normal"))


def _zero(x, axis=None):
    """Centre for :func:`scipy.stats.median_abs_deviation`: zero."""
    return 0.0


def _solve(model: _Model, theta0, free, *, max_iter=12):
    """IRLS: Huber weights and per-group noise scales around scipy's least squares."""
    theta = theta0.copy()
    free = np.asarray(free, bool)
    n_groups = model.n_groups
    sig = np.ones(n_groups)
    raw = model.data_residuals(theta)
    for g in range(n_groups):
        sig[g] = model.noise_scale(raw, g)
    w = np.ones_like(raw)

    def fun(x):
        th = theta.copy()
        th[free] = x
        r = model.data_residuals(th) / sig[model.groups] * np.sqrt(w)
        p = (th - model.centre) / model.prior_sigma
        return np.concatenate([r, p[free]])

    sol = None
    for _ in range(max_iter):
        sol = least_squares(fun, theta[free], x_scale="jac", method="trf",
                            xtol=1e-12, ftol=1e-12, gtol=1e-12)
        new = theta.copy()
        new[free] = sol.x
        raw = model.data_residuals(new)
        new_sig = sig.copy()
        for g in range(n_groups):
            new_sig[g] = model.noise_scale(raw, g)
        w = _huber_weights(raw / new_sig[model.groups])
        step = np.abs(new - theta)
        theta = new
        changed_sig = np.max(np.abs(np.log(new_sig / sig)))
        sig = new_sig
        if changed_sig < 0.01 and np.all(step <= 1e-9 + 1e-6 * np.abs(theta)):
            break
    # final Jacobian at the converged weights and scales
    sol = least_squares(fun, theta[free], x_scale="jac", method="trf",
                        xtol=1e-12, ftol=1e-12, gtol=1e-12)
    theta[free] = sol.x
    m_d = len(raw)
    jd, jp = sol.jac[:m_d], sol.jac[m_d:]
    cov = _sandwich_cov(model, jd, jp, sol.fun[:m_d], int(free.sum()))
    return theta, cov, sig, raw


def _sandwich_cov(model: _Model, jd, jp, z, n_free):
    """Covariance of the estimate with noise shared by adjacent windows.

    Adjacent windows share an end frame, so the truth noise at that frame enters both
    with opposite signs (and every sensor of a window sees the same truth noise). The
    residuals are therefore modelled as a vector moving average of order one across
    windows, with lag-0 and lag-1 covariance matrices ``G0``, ``G1`` (sensor by sensor)
    pooled over all windows. The covariance is the sandwich
    ``H^-1 (sum_t J_t' G0 J_t + sum_adj (J_t+1' G1 J_t + J_t' G1' J_t+1) + P) H^-1``
    with ``H = J'J + P`` and ``P`` the prior's information (Newey & West 1987, with the
    autocovariances from a pooled model rather than from single products; common
    practice for residuals that are differences of endpoint errors). Without
    correlation between windows it reduces to ``s^2 (J'J)^-1``.
    """
    n_t, n_g, n_p = model.n_windows, model.n_groups, jd.shape[1]
    zt = np.zeros((n_t, n_g))
    jt = np.zeros((n_t, n_g, n_p))
    zt[model.row_window, model.groups] = z
    jt[model.row_window, model.groups] = jd
    dof = max(len(z) - n_free, 1) / max(len(z), 1)
    g0 = zt.T @ zt / n_t / dof
    adj = model.adjacent
    g1 = zt[adj + 1].T @ zt[adj] / n_t / dof if adj.size else np.zeros((n_g, n_g))
    meat = np.einsum("tgp,gh,thq->pq", jt, g0, jt)
    if adj.size:
        cross = np.einsum("tgp,gh,thq->pq", jt[adj + 1], g1, jt[adj])
        meat += cross + cross.T
    # a pooled estimate can be slightly indefinite: keep its non-negative part
    ev, vec = np.linalg.eigh(0.5 * (meat + meat.T))
    meat = (vec * np.clip(ev, 0.0, None)) @ vec.T
    prior = jp.T @ jp
    h_inv = np.linalg.pinv(jd.T @ jd + prior)
    return h_inv @ (meat + prior) @ h_inv


# --------------------------------------------------------------------- sign checks
_SIGN_TROUBLE = {
    "broken": "its readings are not finite in every window",
    "still": "the runs barely move it",
    "unrelated": "its readings do not follow the motion; check its column, position, "
                 "direction and unit in the profile",
}


def _window_change(rd: _RunData, series):
    """Change of a log series over each window, on the run's clock as given."""
    la, lb = _log_times(rd, rd.win.ta, 0.0, 0.0), _log_times(rd, rd.win.tb, 0.0, 0.0)
    return np.interp(lb, rd.log_t, series) - np.interp(la, rd.log_t, series)


def _sign_check(meas, pred, min_pred_sq):
    """Classify a sensor by the cosine similarity of its readings with the truth.

    Returns
    -------
    tuple of (str, float)
        ``ok``, ``inverted`` (similarity below -0.5), ``unrelated`` (between),
        ``still`` (the truth barely moves it) or ``broken`` (non-finite readings), and
        the similarity.
    """
    if not np.all(np.isfinite(meas)):
        return "broken", float("nan")
    den = math.sqrt(float(meas @ meas) * float(pred @ pred))
    sim = float(meas @ pred) / den if den > 0 else float("nan")
    if not np.isfinite(sim) or float(pred @ pred) < min_pred_sq:
        return "still", sim
    if sim < -0.5:
        return "inverted", sim
    return ("unrelated", sim) if sim < 0.5 else ("ok", sim)


# ----------------------------------------------------------------------------- fit
@dataclass(frozen=True)
class FitSettings:
    """How the profile fit runs."""

    window_s: float = 0.4
    """Length of each fitting window [s]."""
    exclude_margin_s: float = 0.25
    """Margin added around every excluded interval (events) [s]."""
    fit_clock: bool = True
    """Fit a clock-offset correction and a log-clock rate error per run."""
    fit_imu: bool = True
    """Fit the IMU scale and per-run bias rate (when the log has IMU heading)."""
    tolerances: dict | None = None
    """Overrides of :data:`TOLERANCES` (wanted precision per kind of value)."""
    max_iter: int = 12
    """Reweighting iterations."""


def fit_profile(runs, robot: RobotProfile, settings: FitSettings | None = None) -> ProfileFit:
    """Fit wheel radii, lever arms, IMU scale and bias, and clock terms to truth.

    The steps: cut every run into windows outside its events (:func:`_fit_windows`),
    check each encoder's and the IMU's sign against the truth (:func:`_sign_checks`),
    solve (:func:`_solve_holding`), tabulate (:func:`_fit_table`) and carry the clock
    corrections over (:func:`_fitted_clocks`).

    Parameters
    ----------
    runs : sequence of FitRun
        Graded runs of the same robot; each run's ``exclude_windows`` are left out.
    robot : RobotProfile
        The profile the logs were read with (the one to correct).
    settings : FitSettings, optional
        Window length [s], margins [s], what to fit, wanted precision.

    Returns
    -------
    ProfileFit

    Raises
    ------
    InputError
        A run lacks a column the fit needs.
    MeasurementError
        Too few usable windows to fit anything.
    """
    st = settings or FitSettings()
    tol = {**TOLERANCES, **(st.tolerances or {})}
    runs = list(runs)
    warnings: list[str] = []
    wins, n_win = _fit_windows(runs, st)
    wheels = []
    for w in robot.wheels:  # wheels with a ticks column in every run
        col = f"ticks_{w.name}"
        if all(col in run.log.columns for run in runs):
            wheels.append(w)
        else:
            warnings.append(f"wheel {w.name}: no '{col}' column in every log; not fitted")
    use_imu = st.fit_imu and robot.imu is not None and all(
        "imu_heading_rad" in run.log.columns for run in runs)
    rundata = []
    for run, win in zip(runs, wins, strict=True):
        lt = run.log["t_s"].to_numpy(float)
        ticks = [run.log[f"ticks_{w.name}"].to_numpy(float) for w in wheels]
        psi = run.log["imu_heading_rad"].to_numpy(float) if use_imu else None
        rundata.append(_RunData(run.name, win, lt, ticks, psi, float(run.offset_s),
                                float(0.5 * (lt[0] + lt[-1])), float(run.rate),
                                float(run.ref_log_s)))
    signs = _sign_checks(robot, wheels, rundata, use_imu, warnings)
    model = _Model(robot, signs.wheels, signs.metres_per_tick, rundata, signs.use_imu,
                   st.fit_clock)
    theta, cov, se, status, sig = _solve_holding(model, model.centre.copy(), tol, st.max_iter)
    _held_value_warnings(model, signs.wheels, status, warnings)
    noise = {w.name: float(sig[g]) for g, w in enumerate(signs.wheels)}
    if signs.use_imu:
        noise["imu"] = float(sig[len(signs.wheels)])
    table, corrected = _fit_table(robot, model, _Solution(theta, se, cov, status),
                                  signs, tol, warnings)
    own = table[~table["parameter"].str.startswith("run ")  # the profile's values
                & (table["kind"] != "sign")]
    if len(own) and (own["identifiable"] == "no").all():
        warnings.insert(0, _why_nothing_fitted(runs, sum(n_win.values()), st.window_s))
    clocks = _fitted_clocks(runs, rundata, theta, se, status, warnings)
    return ProfileFit(table=table, robot=robot, corrected_robot=corrected,
                      inverted=signs.inverted, n_windows=n_win, noise=noise,
                      covariance=cov, names=tuple(model.names), warnings=tuple(warnings),
                      clocks=clocks)


def _fit_windows(runs, st: FitSettings):
    """Windows of every run outside its events; refuses too few."""
    if not runs:
        raise InputError("fit_profile: no runs given; pass at least one graded run")
    names = [r.name for r in runs]
    if len(set(names)) != len(names):
        raise InputError(f"fit_profile: run names must be unique, got {names}")
    wins = []
    for run in runs:
        if "t_s" not in run.log.columns:
            raise InputError(f"log of run {run.name!r}: missing column 't_s'")
        wins.append(_windows(run, st.window_s, st.exclude_margin_s))
    n_win = {run.name: len(w.ta) for run, w in zip(runs, wins, strict=True)}
    total = sum(n_win.values())
    if total < 10:
        raise MeasurementError(
            f"fit_profile: only {total} usable {st.window_s} s windows outside events; "
            "film a longer run with the marker in view"
        )
    return wins, n_win


@dataclass(frozen=True)
class _Signs:
    """Sensors the fit uses after the sign check, signs corrected."""

    wheels: list
    metres_per_tick: np.ndarray
    """Signed metres per count of each wheel in ``wheels`` [m]."""
    use_imu: bool
    imu_flip: float
    inverted: tuple


@dataclass(frozen=True)
class _Solution:
    theta: np.ndarray
    se: np.ndarray
    cov: np.ndarray
    status: list


def _sign_checks(robot, wheels, rundata, use_imu, warnings) -> _Signs:
    """Each encoder's and the IMU's counts against the truth motion on the profile
    geometry: flip inverted ones, drop those that do not follow it."""
    a0 = wheel_rows(wheels)
    mpt = np.array([w.sign * w.metres_per_tick for w in wheels])
    inverted = []
    flip = np.ones(len(wheels))
    usable = np.ones(len(wheels), bool)
    for j, w in enumerate(wheels):
        meas = np.concatenate([mpt[j] * _window_change(rd, rd.ticks[j]) for rd in rundata])
        pred = np.concatenate([rd.win.u @ a0[j] for rd in rundata])
        verdict, sim = _sign_check(meas, pred, (10 * w.metres_per_tick) ** 2)
        usable[j] = verdict in ("ok", "inverted")
        if verdict == "inverted":
            flip[j] = -1.0
            inverted.append(w.name)
            warnings.append(
                f"wheel {w.name}: counts run against its rolling direction (similarity "
                f"{sim:+.2f}); the corrected profile sets sign = {-w.sign}")
        elif verdict != "ok":
            warnings.append(f"wheel {w.name}: {_SIGN_TROUBLE[verdict]}; not fitted")
    imu_flip = 1.0
    if use_imu:
        meas = np.concatenate([_window_change(rd, rd.psi) for rd in rundata])
        pred = np.concatenate([rd.win.dtheta for rd in rundata])
        verdict, sim = _sign_check(meas, pred, 1e-4)
        use_imu = verdict in ("ok", "inverted")
        if verdict == "inverted":
            imu_flip = -1.0
            inverted.append("imu")
            warnings.append(f"imu: heading runs clockwise-positive (similarity {sim:+.2f}); "
                            f"the corrected profile sets sign = {-robot.imu.sign}")
        elif verdict != "ok":
            warnings.append(f"imu: {_SIGN_TROUBLE[verdict]}; not fitted")
    if use_imu:
        for rd in rundata:
            rd.psi = imu_flip * rd.psi
    keep = [j for j in range(len(wheels)) if usable[j]]
    for rd in rundata:
        rd.ticks = [rd.ticks[j] for j in keep]
    if not keep and not use_imu:
        raise MeasurementError("fit_profile: no wheel or IMU follows the truth track; "
                               "check the profile's columns and wheel directions")
    return _Signs([wheels[j] for j in keep], mpt[keep] * flip[keep], use_imu, imu_flip,
                  tuple(inverted))


def _held_value_warnings(model, wheels, status, warnings) -> None:
    """A value held while its partner stays free: say what it was fitted under."""
    for j, w in enumerate(wheels):
        ik, il = model.i_k[j], model.i_l[j]
        for held, free_i, what in ((ik, il, "radius_m"), (il, ik, "its offset")):
            if status[held] == "no" and status[free_i] != "no":
                other = "radius_m" if free_i == ik else "its offset"
                warnings.append(f"wheel {w.name}: {other} fitted with {what} held at the "
                                "profile value (these runs cannot separate the two)")


def _fitted_clocks(runs, rundata, theta, se, status, warnings) -> dict:
    """Per run: the clock with the fitted corrections, ``(offset_s, rate, ref_log_s)``."""
    for rd in rundata:
        if rd.i_rate >= 0 and status[rd.i_rate] == "yes":
            r = theta[rd.i_rate]
            if abs(r) > 5 * se[rd.i_rate]:
                warnings.append(f"run {rd.name}: the log clock runs {r * 1e6:+.0f} ppm "
                                "against the video clock")
    clocks = {}
    for run, rd in zip(runs, rundata, strict=True):
        off, rate = run.offset_s, run.rate
        if rd.i_delta >= 0 and status[rd.i_delta] != "no":
            off += theta[rd.i_delta]
        if rd.i_rate >= 0 and status[rd.i_rate] != "no":
            # delta + rho (t - mid) = rho (t - ref) + rho (ref - mid)
            rate += theta[rd.i_rate]
            off += theta[rd.i_rate] * (run.ref_log_s - rd.t_mid)
        clocks[run.name] = (float(off), float(rate), float(run.ref_log_s))
    return clocks


def _why_nothing_fitted(runs, n_windows, window_s) -> str:
    """One line saying why no value could be fitted: how much the runs offered."""
    dist = turn = 0.0
    for run in runs:
        tr = run.truth
        xy = tr[["x_m", "y_m"]].to_numpy(float)
        ok = np.isfinite(xy).all(axis=1)
        dist += float(np.sum(np.hypot(*np.diff(xy[ok], axis=0).T)))
        h = tr["heading_rad"].to_numpy(float)
        turn += float(np.sum(np.abs(np.diff(np.unwrap(h[np.isfinite(h)])))))
    return (f"no value could be fitted: these runs give {n_windows} usable {window_s} s "
            f"windows outside events, {dist:.2f} m of travel and {math.degrees(turn):.0f} "
            "deg of turning, too little to tell any value from its profile figure; each "
            "row's suggestion says what motion would identify it")


def _solve_holding(model: _Model, theta0, tol, max_iter):
    """Solve, then hold unidentifiable values at the profile one at a time.

    The value with the largest standard error relative to its wanted precision is held
    first and the rest refitted, so a value that is unidentifiable only jointly with
    another (a sideways wheel's radius and offset on a robot that never slides
    sideways) is fitted once its partner is held.

    Returns
    -------
    theta, cov (full size, zero for held values), se, status, noise scales
    """
    n = len(theta0)
    tol_vec = np.array([tol[k] for k in model.kinds])
    fixed = np.zeros(n, bool)
    se = np.full(n, np.nan)
    while True:
        theta, cov_f, sig, _raw = _solve(model, np.where(fixed, model.centre, theta0),
                                         ~fixed, max_iter=max_iter)
        se[~fixed] = np.sqrt(np.clip(np.diag(cov_f), 0, None))
        status = _status(se, model.kinds, tol)
        status[fixed] = "no"
        cand = np.flatnonzero((status == "no") & ~fixed)
        if cand.size == 0:
            break
        fixed[cand[np.argmax(se[cand] / tol_vec[cand])]] = True
    theta = np.where(fixed, model.centre, theta)
    cov = np.zeros((n, n))
    idx = np.flatnonzero(~fixed)
    cov[np.ix_(idx, idx)] = cov_f
    return theta, cov, se, status, sig


def _status(se, kinds, tol):
    out = []
    for s, k in zip(se, kinds, strict=True):
        t = tol[k]
        out.append("yes" if s <= t else ("weak" if s <= 5 * t else "no"))
    return np.asarray(out, dtype=object)


# ------------------------------------------------------------------------ tabulate
def _lever_display(w):
    """How a wheel's lever arm maps onto its profile keys.

    Returns (key, profile value, d value / d lever, position step per unit lever).
    """
    e = wheel_rows([w])[0]
    ex, ey = e[0], e[1]
    n = ex * ex + ey * ey
    step = np.array([ey, -ex]) / n
    step[np.abs(step) < 1e-12] = 0.0  # cos(90 deg) is 6e-17, not 0
    if abs(ey) < 1e-9:
        return "y_m", w.y_m, -1.0 / ex, step
    if abs(ex) < 1e-9:
        return "x_m", w.x_m, 1.0 / ey, step
    return "lever_m", float(e[2]), 1.0, step


class _TableRows:
    """The rows of :attr:`ProfileFit.table`, collected value by value."""

    def __init__(self):
        self.rows: list[dict] = []

    def add(self, parameter, kind, target, unit, prof, fit, written, sugg_kind=None):
        """One row: ``fit`` is (estimate, standard error, identifiable 'yes'/'weak'/'no')
        in the unit of ``prof``, the profile's value."""
        est, s, st = fit
        sugg = "" if st == "yes" else SUGGESTIONS[sugg_kind or kind]
        self.rows.append(dict(parameter=parameter, kind=kind, target=target, unit=unit,
                              profile=prof, estimate=est if st != "no" else float("nan"),
                              std_error=s,
                              change=(est - prof) if st != "no" else float("nan"),
                              identifiable=st, written=written, suggestion=sugg))


def _fit_table(robot, model, sol: _Solution, signs: _Signs, tol, warnings):
    """The table of every value (:attr:`ProfileFit.table`) and the corrected profile."""
    out = _TableRows()
    new_wheels = _wheel_values(robot, model, sol, signs, out)
    _track_width_values(robot, model, sol, new_wheels, tol, out)
    new_imu = _imu_values(robot, model, sol, signs, tol, out)
    for rd in model.runs:
        th, se, status = sol.theta, sol.se, sol.status
        if rd.i_bias >= 0:
            i = rd.i_bias
            out.add(f"run {rd.name} imu bias_radps", "imu_bias", rd.name, "rad/s", 0.0,
                    (th[i], se[i], status[i]), False)
        if rd.i_delta >= 0:
            i = rd.i_delta
            out.add(f"run {rd.name} clock offset_s", "clock_offset", rd.name, "s",
                    rd.offset_s, (rd.offset_s + th[i], se[i], status[i]), False)
            i = rd.i_rate
            out.add(f"run {rd.name} clock rate", "clock_rate", rd.name, "", 0.0,
                    (th[i], se[i], status[i]), False)
    for r in out.rows:
        if r["identifiable"] == "no":
            warnings.append(f"{r['parameter']}: not identifiable from these runs "
                            f"(standard error {r['std_error']:.3g} {r['unit']}); "
                            f"to fix it: {r['suggestion']}")
    corrected = dataclasses.replace(
        robot, wheels=tuple(new_wheels[w.name] for w in robot.wheels), imu=new_imu,
        path=None)
    return pd.DataFrame(out.rows), corrected


def _worth_writing(model, sol: _Solution, i) -> bool:
    """Identifiable, or weakly so but more than three standard errors off the profile."""
    if sol.status[i] == "yes":
        return True
    return sol.status[i] == "weak" and abs(sol.theta[i] - model.centre[i]) > 3 * sol.se[i]


def _wheel_values(robot, model, sol: _Solution, signs: _Signs, out: _TableRows) -> dict:
    """Radius, lever arm and sign of every wheel; the corrected wheels by name."""
    th, se, status = sol.theta, sol.se, sol.status
    new_wheels = {w.name: w for w in robot.wheels}
    for j, w in enumerate(model.wheels):
        ik, il = model.i_k[j], model.i_l[j]
        sign = -w.sign if w.name in signs.inverted else w.sign
        side = abs(wheel_rows([w])[0][0]) < 1e-9
        r_est = w.radius_m * th[ik]
        wr = _worth_writing(model, sol, ik)
        out.add(f"wheel {w.name} radius_m", "radius", w.name, "m", w.radius_m,
                (r_est, w.radius_m * se[ik], status[ik]), wr, "radius_side" if side else None)
        key, prof, dv, step = _lever_display(w)
        lw = _worth_writing(model, sol, il)
        out.add(f"wheel {w.name} {key}", "lever", w.name, "m", prof,
                (prof + dv * th[il], abs(dv) * se[il], status[il]), lw)
        out.add(f"wheel {w.name} sign", "sign", w.name, "", float(w.sign),
                (float(sign), 0.0, "yes"), w.name in signs.inverted)
        changes = {"sign": sign}
        if wr:
            changes["radius_m"] = float(r_est)
        if lw:
            changes["x_m"] = float(w.x_m + step[0] * th[il])
            changes["y_m"] = float(w.y_m + step[1] * th[il])
        new_wheels[w.name] = dataclasses.replace(w, **changes)
    # wheels left out of the fit (no column, never moved, or not following the motion)
    fitted = {w.name for w in model.wheels}
    nan = float("nan")
    for w in robot.wheels:
        if w.name in fitted:
            continue
        side = abs(wheel_rows([w])[0][0]) < 1e-9
        key, prof, _dv, _step = _lever_display(w)
        out.add(f"wheel {w.name} radius_m", "radius", w.name, "m", w.radius_m,
                (nan, nan, "no"), False, "radius_side" if side else None)
        out.add(f"wheel {w.name} {key}", "lever", w.name, "m", prof, (nan, nan, "no"), False)
    return new_wheels


def _track_width_values(robot, model, sol: _Solution, new_wheels, tol, out) -> None:
    """Derived track width per source of forward-rolling wheels on both sides."""
    seen = set()
    for src in robot.resolved_sources():
        idx = [j for j, w in enumerate(model.wheels) if w.name in src.wheels
               and abs(wheel_rows([w])[0][1]) < 1e-9 and abs(w.direction_rad) < 1e-9]
        left = [j for j in idx if model.wheels[j].y_m > 0]
        right = [j for j in idx if model.wheels[j].y_m < 0]
        if not left or not right or tuple(idx) in seen:
            continue
        seen.add(tuple(idx))
        grad = np.zeros(len(sol.theta))
        prof = (np.mean([model.wheels[j].y_m for j in left])
                - np.mean([model.wheels[j].y_m for j in right]))
        est = prof
        for group, sgn in ((left, 1.0), (right, -1.0)):
            for j in group:
                # y = y_profile - dl / ex with ex = 1 for a forward-rolling plain wheel
                ex = wheel_rows([model.wheels[j]])[0][0]
                g = -sgn / ex / len(group)
                grad[model.i_l[j]] += g
                est += g * sol.theta[model.i_l[j]]
        held = any(sol.status[model.i_l[j]] == "no" for j in left + right)
        if held:  # from the offsets' own errors before they were held (no correlation)
            s = float(math.sqrt(np.nansum((grad * sol.se) ** 2)))
        else:
            s = float(math.sqrt(max(grad @ sol.cov @ grad, 0.0)))
        st = "no" if held else _status([s], ["lever"], tol)[0]
        written = all(new_wheels[model.wheels[j].name].y_m != model.wheels[j].y_m
                      for j in left + right)
        out.add(f"source {src.name} track_width_m", "lever", src.name, "m", prof, (est, s, st),
                written)


def _imu_values(robot, model, sol: _Solution, signs: _Signs, tol, out: _TableRows):
    """IMU scale, sign and bias; the corrected IMU."""
    new_imu = robot.imu
    flipped = signs.imu_flip < 0
    if model.use_imu:
        ic = model.i_c
        scale = robot.imu.scale * sol.theta[ic]
        iw = _worth_writing(model, sol, ic)
        out.add("imu scale", "imu_scale", "imu", "", robot.imu.scale,
                (scale, robot.imu.scale * sol.se[ic], sol.status[ic]), iw)
        sign = -robot.imu.sign if flipped else robot.imu.sign
        out.add("imu sign", "sign", "imu", "", float(robot.imu.sign), (float(sign), 0.0, "yes"),
                flipped)
        new_imu = dataclasses.replace(robot.imu, sign=sign,
                                      scale=float(scale) if iw else robot.imu.scale)
        new_imu = _imu_bias_row(model, sol.theta, sol.se, tol, robot.imu, new_imu, out.add)
    elif robot.imu is not None:
        nan = float("nan")
        out.add("imu scale", "imu_scale", "imu", "", robot.imu.scale, (nan, nan, "no"), False)
        if flipped:
            new_imu = dataclasses.replace(robot.imu, sign=-robot.imu.sign)
    return new_imu


def _imu_bias_row(model, theta, se, tol, imu, new_imu, row):
    """The profile's IMU bias: the fitted per-run drift rates (on top of the profile's
    own, scaled by the fitted scale) averaged over the runs, written when that mean is
    identifiable ("yes" against the imu_bias tolerance)."""
    idx = [rd.i_bias for rd in model.runs if rd.i_bias >= 0]
    if not idx:
        return new_imu
    c = theta[model.i_c]
    est = c * imu.bias_radps + float(np.mean(theta[idx]))
    sd = float(np.sqrt(np.sum(np.asarray(se)[idx] ** 2))) / len(idx)
    st = _status([sd], ["imu_bias"], tol)[0]
    # written as the other values are (write_ok): identifiable, or weakly so but more
    # than 3 standard errors from the profile's figure
    ok = st == "yes" or (st == "weak" and abs(est - imu.bias_radps) > 3 * sd)
    row("imu bias_radps", "imu_bias", "imu", "rad/s", imu.bias_radps, (est, sd, st), ok)
    return dataclasses.replace(new_imu, bias_radps=float(est)) if ok else new_imu


def write_profile(fit: ProfileFit, path) -> None:
    """Write the corrected robot profile as TOML, with a header naming what changed.

    Parameters
    ----------
    fit : ProfileFit
    path : str or Path
        Target file; written atomically.
    """
    changed = fit.table[fit.table["written"].astype(bool)]
    lines = ["Robot profile corrected by vidodo's profile fit.", "Changed values:"]
    for r in changed.itertuples():
        lines.append(f"  {r.parameter}: {r.profile:.6g} -> {r.estimate:.6g}")
    if changed.empty:
        lines.append("  none")
    text = dump_toml(robot_to_dict(fit.corrected_robot), header="\n".join(lines))
    with atomic_file(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


# ------------------------------------------------------------------------ clock
def with_clock(run: FitRun, clock) -> FitRun:
    """``run`` with the clock ``(offset_s, rate, ref_log_s)`` (None: unchanged)."""
    if clock is None:
        return run
    off, rate, ref = clock
    return dataclasses.replace(run, offset_s=off, rate=rate, ref_log_s=ref)
