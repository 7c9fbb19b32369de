"""Rauch-Tung-Striebel smoothing of irregularly timed measurements.

Each signal (x, y, heading) is modelled as a constant-acceleration process driven by
white jerk of spectral density ``q`` (Bar-Shalom, Li & Kirubarajan, *Estimation with
Applications to Tracking and Navigation*, 2001, section 6.2.3). A forward Kalman filter
runs over the merged, sorted measurement and output times; the Rauch-Tung-Striebel
backward pass (Rauch, Tung & Striebel, AIAA J. 3(8):1445, 1965) gives the smoothed
value, rate and acceleration with their variances at every output time.

The jerk density and a factor on the measurement variances are chosen per signal by
maximum likelihood of the filter's innovations over a grid, so nothing is tuned to one
robot or one camera.

A robot that hits a wall or stalls changes its speed within a frame or two, far faster
than the jerk density fitted to the rest of the run allows: a smoother held to that
model rounds the stop off, overshoots and reads speed after the robot stood still. So
the model may *break* (:func:`find_breaks`): where the forward filter's normalised
innovations drift to one side over a few samples (a manoeuvre, Bar-Shalom, Li &
Kirubarajan 2001, sec. 11.2), the break instant is located by maximum likelihood over
the nearby samples, and the model breaks there (a jump in the state, Willsky & Jones,
IEEE TAC 21(1):108, 1976). Two kinds are tried: a *restart* (a hit or a stall within
one step: value, rate and acceleration released by what a change of up to twice the
speed can do, so the two sides are smoothed nearly as separate runs) and an
*acceleration change* (alone, or as a ramp: a pair of them, the start and end of a
braking or a drive-off at constant acceleration, value and rate continuous). A change
within a step cannot be placed inside it; times in the step get the mixture of both
sides' estimates with its variance (:func:`_break_mixture`); where rival placements
explain the data nearly as well, the estimate is their likelihood-weighted average
(:func:`_average_rivals`). A break is kept only if it raises the log-likelihood by more
than :data:`BREAK_MIN_GAIN`, so a run without such events is smoothed exactly as
before.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["SmoothedSignal", "SmoothSettings", "rts_smooth", "rts_smooth_signals",
           "find_breaks", "Q_GRID", "R_SCALE_GRID", "BREAK_MIN_GAIN"]

Q_GRID = np.logspace(-3, 4, 15)
"""Default jerk spectral densities tried [unit^2/s^5]."""
R_SCALE_GRID = 2.0 ** np.arange(0.0, 6.5, 0.5)
"""Default factors on the given measurement variances tried, 1 to 64 in steps of
sqrt(2) (never below 1: the given variances are taken as a lower bound)."""

BREAK_MIN_GAIN = 5.0
"""Log-likelihood gain a model break must bring to be kept [nats]. The gain is a log
Bayes factor: releasing rate and acceleration to their priors already costs several
nats where nothing happened (the Occam factor of the wider prediction), so a break
that gains 5 nats (2 ln B = 10) is "very strong" evidence on the scale of Kass &
Raftery (JASA 90:773, 1995)."""

BREAK_WINDOW = 5
"""Samples over which the normalised innovations are summed to flag a manoeuvre."""

BREAK_RAMP_STEPS = 8
"""Longest ramp tried as one pair of acceleration changes, in steps between samples
(0.27 s at 30 fps: a stall from 1.5 m/s at 15 m/s^2 takes 0.1 s, a drive-off to
0.8 m/s at 3 m/s^2 0.27 s)."""

BREAK_RIVAL_NATS = 4.6
"""Rival placements of a break within this many nats of the kept one's gain (posterior
odds above 1 %) are averaged with it (:func:`_average_rivals`)."""

BREAK_RIVAL_MARGIN = 30
"""Measurements either side of a break over which its rival placements are smoothed
(1 s at 30 fps, several times the filter's memory at the densities fitted to robot
runs)."""

RIVAL_BATCH_COLUMNS = 256
"""Placements of breaks and their rivals smoothed side by side in one batch
(:func:`_smooth_stretches`; bounds the memory: about 0.2 MB a column of 100 events)."""

BREAK_ROUNDS = 4
"""Rounds of the break search (each may add one break per flagged stretch)."""

BREAK_FLAG = 3.0
"""A window sum of normalised innovations beyond this many sigma flags a candidate."""

RESTART = 1
"""Break kind: the whole state restarts (value, rate and acceleration released, see
:func:`_release`): a hit or a stall within a step."""
ACCEL_CHANGE = 2
"""Break kind: only the acceleration is released (a jerk impulse): the start or end of
a hard braking or a motor's ramp, where the path and the speed stay continuous."""

BREAK_TRIAL_COLUMNS = 16384
"""Trial breaks filtered side by side in one batch (bounds the memory of long runs:
about 100 bytes a trial)."""

BREAK_REJOIN_TOL = 1e-6
"""A trial break's filter stops once its state equals the baseline filter's to this
fraction of the baseline's 1-sigma (mean) and of its variances (covariance): both
filters then see the same data from the same state, so the rest of the run changes the
likelihood difference by a negligible amount (about this fraction of a nat per
innovation, and falling as the filters forget)."""


@dataclass(frozen=True)
class SmoothSettings:
    """How :func:`rts_smooth` and :func:`rts_smooth_signals` model a signal."""

    q: float | None = None
    """Fixed jerk spectral density [unit^2/s^5]; None: chosen by maximum likelihood over
    ``q_grid``."""
    r_scale: float | None = None
    """Fixed factor on the measurement variances; None: chosen over ``r_scale_grid``."""
    q_grid: tuple = tuple(Q_GRID)
    """Jerk densities tried [unit^2/s^5]."""
    r_scale_grid: tuple = tuple(R_SCALE_GRID)
    """Measurement-variance factors tried."""
    prior_rate: float = 5.0
    """1-sigma of the initial rate [unit/s]."""
    prior_accel: float = 20.0
    """1-sigma of the initial acceleration [unit/s^2]; also released at a break."""
    breaks: bool = True
    """Let the model break at sudden changes (:func:`find_breaks`)."""


@dataclass(frozen=True)
class SmoothedSignal:
    """Smoothed value, rate and acceleration of one signal at the output times."""

    value: np.ndarray
    """Smoothed value at each output time [unit]."""
    rate: np.ndarray
    """First derivative [unit/s]."""
    accel: np.ndarray
    """Second derivative [unit/s^2]."""
    sigma_value: np.ndarray
    """1-sigma of ``value`` [unit]."""
    sigma_rate: np.ndarray
    """1-sigma of ``rate`` [unit/s]."""
    q: float
    """Jerk spectral density used [unit^2/s^5]."""
    r_scale: float
    """Factor applied to the measurement variances."""
    nis_mean: float
    """Mean normalised innovation squared y^2 / S of the forward filter with the chosen
    parameters; about 1 (the measurement dimension) when the model is consistent."""
    innovation_lag1: float
    """Lag-1 autocorrelation of the normalised innovations; about 0 (white) when the
    model is consistent, positive when the measurement errors persist between samples."""
    breaks_s: tuple = ()
    """Times where the model was allowed to break (sudden stop, impact) [s]."""


def _transition(dt, q):
    """F (B,3,3) and Q (B,3,3) of the constant-acceleration model for steps dt."""
    dt = np.asarray(dt, dtype=float)
    b = dt.shape[0]
    F = np.zeros((b, 3, 3))
    F[:, 0, 0] = F[:, 1, 1] = F[:, 2, 2] = 1.0
    F[:, 0, 1] = F[:, 1, 2] = dt
    F[:, 0, 2] = 0.5 * dt**2
    d2, d3, d4, d5 = dt**2, dt**3, dt**4, dt**5
    Q = np.empty((b, 3, 3))
    Q[:, 0, 0] = d5 / 20
    Q[:, 0, 1] = Q[:, 1, 0] = d4 / 8
    Q[:, 0, 2] = Q[:, 2, 0] = d3 / 6
    Q[:, 1, 1] = d3 / 3
    Q[:, 1, 2] = Q[:, 2, 1] = d2 / 2
    Q[:, 2, 2] = dt
    return F, Q * np.asarray(q, dtype=float)[:, None, None]


PREDICT_COMPONENTWISE_MIN = 64
"""From this many parallel states on, :func:`_predict` works on the rows and columns of
the covariances (a few operations on long arrays) rather than by stacked 3 x 3 matrix
products, which cost several times more per state there; below, the matrix products
cost fewer calls."""


def _predict(x, P, dt, F=None):
    """States (B, 3) and covariances (B, 3, 3) carried over steps ``dt`` (scalar or
    (B,)) by the constant-acceleration transition, before the process noise:
    F x and F P F^T (``F``: the transition matrices, (3, 3) or (B, 3, 3), when at hand).
    """
    if x.shape[0] < PREDICT_COMPONENTWISE_MIN:
        if F is None:
            F = _transition(np.atleast_1d(dt), np.zeros(1))[0]
        Ft = np.swapaxes(F, -1, -2)
        return x @ Ft if F.ndim == 2 else (F @ x[:, :, None])[:, :, 0], F @ P @ Ft
    dt = np.asarray(dt, float)
    half = 0.5 * dt * dt
    d, h = (dt, half) if dt.ndim == 0 else (dt[:, None], half[:, None])
    A = P.copy()
    A[:, 0] += d * P[:, 1] + h * P[:, 2]  # rows: F P
    A[:, 1] += d * P[:, 2]
    A[:, :, 0] += d * A[:, :, 1] + h * A[:, :, 2]  # columns: (F P) F^T
    A[:, :, 1] += d * A[:, :, 2]
    y = x.copy()
    y[:, 0] += dt * x[:, 1] + half * x[:, 2]
    y[:, 1] += dt * x[:, 2]
    return y, A


def _run(t, z, var_z, is_meas, q, r_scale, prior_rate, prior_accel, smooth=True,
         jump=None, filtered=False):
    """Filter (and smooth) B parallel models over one event sequence.

    Parameters
    ----------
    t : ndarray (T,) or (T, B)
        Event times, sorted; (T, B) when each model has its own events (then
        ``is_meas`` is (T, B) too; a column may end in events at its last time that are
        not measurements, which change nothing).
    z, var_z : ndarray (T,) or (T, B)
        Measurement and its variance (ignored where ``is_meas`` is False); one column
        per parallel model when 2-D.
    is_meas : ndarray of bool (T,) or (T, B)
    q, r_scale : ndarray (B,)
        Model parameters of the B parallel filters.
    jump : ndarray of int (T, B), optional
        A model break at the start of the step to that event (somewhere in the step
        between the measurements around it), :data:`RESTART` or
        :data:`ACCEL_CHANGE` (see :func:`_release`); 0: none.

    filtered : bool
        Return the forward filter's states after each event (and its log-likelihood
        per event) in place of the smoothed ones (the break search's baseline).

    Returns
    -------
    loglik : ndarray (B,)
        Log-likelihood [nats]; per event, (T, B), when ``filtered``.
    nis : ndarray (B,)
        Sum of the normalised innovations squared.
    nu : ndarray (T, B)
        Normalised innovations (NaN where no measurement).
    xs, Ps : ndarray (T, B, 3), (T, B, 3, 3)
        Smoothed (``smooth``) or filtered (``filtered``) states; None otherwise.
    """
    T = t.shape[0]
    B = q.size
    own = t.ndim == 2  # each model its own events
    if own:
        first = np.argmax(is_meas, axis=0)
        z0, v0 = z[first, np.arange(B)], var_z[first, np.arange(B)]
    else:
        first = int(np.flatnonzero(is_meas)[0])
        z0, v0 = z[first], var_z[first]
    x = np.zeros((B, 3))
    x[:, 0] = z0
    P = np.zeros((B, 3, 3))
    P[:, 0, 0] = v0 * r_scale * 1e4 + 1e-12
    P[:, 1, 1] = prior_rate**2
    P[:, 2, 2] = prior_accel**2
    loglik = np.zeros(B)
    nis = np.zeros(B)
    nu = np.full((T, B), np.nan)  # normalised innovations y / sqrt(S)
    ll_k = np.zeros((T, B)) if filtered else None
    keep = smooth or filtered
    if keep:
        xf = np.empty((T, B, 3))
        Pf = np.empty((T, B, 3, 3))
        xp_all = np.empty((T, B, 3))
        Pp_all = np.empty((T, B, 3, 3))
    dts = np.diff(t, axis=0, prepend=t[:1])
    F_all, Q_all = _transition(dts.ravel(), np.ones(dts.size))
    if own:
        F_all, Q_all = F_all.reshape(T, B, 3, 3), Q_all.reshape(T, B, 3, 3)
    # Per-event flags as Python bools: the loop tests them once per event. With own
    # events, a model whose step is 0 is carried over it unchanged (F = 1, Q = 0).
    released = (np.zeros(T, bool) if jump is None else jump.any(axis=1)).tolist()
    if jump is not None:
        step = (np.column_stack([_break_step(t[:, c], is_meas[:, c]) for c in range(B)])
                if own else _break_step(t, is_meas))
    moves, meas_k = dts > 0, np.asarray(is_meas, bool)
    if own:
        moves, meas_k = moves.any(axis=1), meas_k.any(axis=1)
    for k, (moved, measured) in enumerate(zip(moves.tolist(), meas_k.tolist(),
                                              strict=True)):
        if released[k]:
            P = _release(x, P, jump[k], step[k], prior_accel)
        if moved:
            x, P = _predict(x, P, dts[k], F_all[k])
            P = P + q[:, None, None] * Q_all[k]
        if smooth:
            xp_all[k] = x
            Pp_all[k] = P
        if measured:
            xn, Pn, ll, nu_k = _update(x, P, z[k], var_z[k] * r_scale)
            if own:  # only the models measured at this event
                m = is_meas[k]
                xn, Pn = np.where(m[:, None], xn, x), np.where(m[:, None, None], Pn, P)
                ll, nu_k = np.where(m, ll, 0.0), np.where(m, nu_k, np.nan)
            x, P, nu[k] = xn, Pn, nu_k
            loglik += ll
            nis += np.nan_to_num(nu_k) ** 2 if own else nu_k**2
            if filtered:
                ll_k[k] = ll
        if keep:
            xf[k] = x
            Pf[k] = P
    if filtered:
        return ll_k, nis, nu, xf, Pf
    if not smooth:
        return loglik, nis, nu, None, None
    xs = np.empty_like(xf)
    Ps = np.empty_like(Pf)
    xs[-1] = xf[-1]
    Ps[-1] = Pf[-1]
    # The gains C = Pf F^T Ppn^-1 depend on the filter alone: all at once, by a solve
    # (Ppn C^T = F Pf); the recursion then only applies them.
    Cs = np.linalg.solve(Pp_all[1:], np.einsum("tbij,tbjk->tbik" if own else
                                               "tij,tbjk->tbik", F_all[1:], Pf[:-1]))
    Cs = Cs.transpose(0, 1, 3, 2)
    for k in range(T - 2, -1, -1):
        C = Cs[k]
        xs[k] = xf[k] + np.einsum("bij,bj->bi", C, xs[k + 1] - xp_all[k + 1])
        Ps[k] = Pf[k] + C @ (Ps[k + 1] - Pp_all[k + 1]) @ C.transpose(0, 2, 1)
    return loglik, nis, nu, xs, Ps


def _release(x, P, jump, step, prior_accel):
    """Covariances (B, 3, 3) after the breaks ``jump`` (B,) (0: none) at the start of a
    step of ``step`` seconds, for states ``x`` (B, 3).

    A restart (a hit or a stall at an unknown instant in the step) changes the rate by
    up to about twice its value (a stop, or a bounce back): the rate variance is raised
    by (2 rate)^2 plus its own variance, the value's by that times the step squared
    (where in the step the change came is unknown), the acceleration's by the prior's.
    The two sides are then tied only loosely. An acceleration change (the ends of a
    braking or a drive-off at constant acceleration) releases the acceleration alone:
    value and rate stay continuous.
    """
    P = P.copy()
    restart = jump == RESTART
    dv_var = restart * (4.0 * x[:, 1] ** 2 + P[:, 1, 1])
    P[:, 0, 0] += dv_var * step**2
    P[:, 1, 1] += dv_var
    P[:, 2, 2] += (jump > 0) * prior_accel**2
    return P


def _update(x, P, z, r):
    """Kalman update of B states (B, 3), (B, 3, 3) by a measurement of the value.

    Returns the updated state and covariance, the log-likelihood of the measurement
    [nats] and its normalised innovation y / sqrt(S), each (B,)."""
    S = P[:, 0, 0] + r
    y = z - x[:, 0]
    K = P[:, :, 0] / S[:, None]
    x = x + K * y[:, None]
    P = P - K[:, :, None] * P[:, 0, :][:, None, :]
    P = 0.5 * (P + P.transpose(0, 2, 1))
    return x, P, -0.5 * (np.log(2 * np.pi * S) + y * y / S), y / np.sqrt(S)


def _break_step(t, is_meas):
    """Time between the measurements before and at-or-after each event [s] (the
    step a break at that event falls in)."""
    tm = t[is_meas]
    i = np.searchsorted(tm, t, side="left")
    nxt = tm[np.minimum(i, tm.size - 1)]
    prv = tm[np.maximum(np.searchsorted(tm, t, side="left") - 1, 0)]
    step = nxt - prv
    return np.where(step > 0, step, np.median(np.diff(tm)) if tm.size > 1 else 1.0)


def rts_smooth(t_meas_s, z, sigma_z, t_out_s, settings=SmoothSettings()):
    """Smooth one signal measured at irregular times and evaluate it at other times.

    Parameters
    ----------
    t_meas_s : array_like (M,)
        Measurement times [s]; need not be sorted or on the output grid.
    z : array_like (M,)
        Measurements [unit].
    sigma_z : array_like (M,)
        1-sigma of each measurement [unit].
    t_out_s : array_like (N,)
        Times at which to report the smoothed signal [s].
    settings : SmoothSettings
        Fixed or searched model parameters, priors, model breaks.

    Returns
    -------
    SmoothedSignal
    """
    z = np.asarray(z, dtype=float)
    return rts_smooth_signals(t_meas_s, z[:, None], np.asarray(sigma_z, float)[:, None],
                              t_out_s, settings)[0]


def rts_smooth_signals(t_meas_s, z, sigma_z, t_out_s, settings=SmoothSettings()):
    """Smooth S independent signals measured at the same times, in one batched pass.

    Each signal gets its own maximum-likelihood jerk density and variance factor, exactly
    as :func:`rts_smooth` would give it; only the work is shared.

    Parameters
    ----------
    t_meas_s : array_like (M,)
        Measurement times [s].
    z, sigma_z : array_like (M, S)
        Measurements and their 1-sigma [unit of each signal].
    t_out_s : array_like (N,)
        Output times [s].
    settings : SmoothSettings
        As in :func:`rts_smooth`, shared by all signals (breaks are found per signal).

    Returns
    -------
    list of SmoothedSignal
        One per column of ``z``.
    """
    tm = np.asarray(t_meas_s, dtype=float)
    zm = np.asarray(z, dtype=float)
    vm = np.asarray(sigma_z, dtype=float) ** 2
    to = np.asarray(t_out_s, dtype=float)
    if tm.size == 0:
        raise ValueError("rts_smooth: no measurements")
    if zm.ndim != 2 or zm.shape != vm.shape or zm.shape[0] != tm.size:
        raise ValueError("rts_smooth_signals: z and sigma_z must be (M, S) with M times")
    n_sig = zm.shape[1]
    t = np.concatenate([tm, to])
    zz = np.vstack([zm, np.zeros((to.size, n_sig))])
    vv = np.vstack([vm, np.ones((to.size, n_sig))])
    meas = np.concatenate([np.ones(tm.size, bool), np.zeros(to.size, bool)])
    order = np.lexsort((~meas, t))  # measurements first when times tie
    t, zz, vv, meas = t[order], zz[order], vv[order], meas[order]
    cfg = settings
    prior_rate, prior_accel = cfg.prior_rate, cfg.prior_accel
    qs = np.atleast_1d(cfg.q_grid if cfg.q is None else cfg.q).astype(float)
    rs = np.atleast_1d(cfg.r_scale_grid if cfg.r_scale is None else cfg.r_scale).astype(float)
    priors = (prior_rate, prior_accel)
    tz = (t[meas], zz[meas], vv[meas])
    q_best, r_best = _grid_ml(tz, qs, rs, priors, None)
    jump_m = np.zeros((tm.size, n_sig), np.int8)
    alts = []
    if cfg.breaks and tm.size > 4 * BREAK_WINDOW:
        jump_m, alts = _search_breaks(*tz, (q_best, r_best, *priors))
        if jump_m.any():  # the rest of the run, freed from the events, may want less q
            q_best, r_best = _grid_ml(tz, qs, rs, priors, jump_m)
            jump_m, alts = _search_breaks(*tz, (q_best, r_best, *priors))
    ev = (t, zz, vv, meas)
    _, nis, nu, xs, Ps = _run(t, zz, vv, meas, q_best, r_best, *priors, smooth=True,
                              jump=_event_jumps(meas, jump_m))
    where = np.empty(order.size, dtype=int)
    where[order] = np.arange(order.size)
    out_pos = where[tm.size:]
    vr, vr_var = _break_mixture(t, meas, jump_m, xs, Ps, q_best)
    _average_rivals(ev, jump_m, alts, (q_best, r_best, *priors), vr, vr_var)
    out = []
    for s in range(n_sig):
        x = xs[out_pos, s]
        out.append(SmoothedSignal(
            value=vr[out_pos, s, 0], rate=vr[out_pos, s, 1], accel=x[:, 2],
            sigma_value=np.sqrt(vr_var[out_pos, s, 0]),
            sigma_rate=np.sqrt(vr_var[out_pos, s, 1]),
            q=float(q_best[s]), r_scale=float(r_best[s]), nis_mean=float(nis[s]) / tm.size,
            innovation_lag1=_lag1(nu[meas, s]),
            breaks_s=tuple(float(v) for v in t[meas][jump_m[:, s] > 0]),
        ))
    return out


def _event_jumps(meas, jump_m):
    """Breaks per merged event (T, B) from breaks per measurement (M, B): a break before
    measurement m is released right after measurement m - 1, so that output times
    between the two already see it."""
    jump = np.zeros((meas.size, jump_m.shape[1]), np.int8)
    pos_m = np.flatnonzero(meas)
    for r in np.flatnonzero(jump_m.any(axis=1)):
        at = pos_m[r - 1] + 1 if r > 0 else pos_m[r]
        jump[at] = np.maximum(jump[at], jump_m[r])
    return jump


def _average_rivals(ev, jump_m, alts, model, vr, vr_var):
    """Average each kept break with its rivals, weighted by their likelihoods (in place,
    in the order of ``alts``).

    Where the change lies (which step, one restart or a ramp) is itself uncertain
    when rival placements explain the data nearly as well: the estimate near the break
    is the average over the placements, each weighted by exp(gain) (their posterior
    odds under equal prior odds, Hoeting et al., Statist. Sci. 14(4):382, 1999), with
    the mixture's variance. Each placement is smoothed over :data:`BREAK_RIVAL_MARGIN`
    measurements either side of the break only; its difference from the kept
    placement over that stretch, smoothed the same way, is added to the whole run's
    estimate. The stretches of all breaks are smoothed side by side
    (:func:`_smooth_stretches`).
    """
    pos_m = np.flatnonzero(ev[3])
    stretches = [_rival_stretch(pos_m, jump_m, alt) for alt in alts if alt[4]]
    for (lo, hi, s, _jm, gains), (mean_l, var_l) in zip(
            stretches, _smooth_stretches(ev, stretches, model), strict=True):
        w = np.exp(gains - gains.max())
        w /= w.sum()
        m_i = vr[lo:hi, s][:, None, :] + mean_l - mean_l[:, :1]  # (T, B, 2)
        v_i = np.maximum(vr_var[lo:hi, s][:, None, :] + var_l - var_l[:, :1], 0.0)
        mean = np.einsum("b,tbk->tk", w, m_i)
        vr_var[lo:hi, s] = np.einsum("b,tbk->tk", w, v_i + (m_i - mean[:, None, :]) ** 2)
        vr[lo:hi, s] = mean


def _rival_stretch(pos_m, jump_m, alt):
    """The events ``lo:hi`` around a kept break and its rivals, its signal, the breaks
    per measurement there of each placement (kept first), (M_i, b), and their gains."""
    s, rows, _kind, g_best, rivals = alt
    lo_m = max(min(min(r[0]) for r in rivals + [(rows,)]) - BREAK_RIVAL_MARGIN, 0)
    hi_m = min(max(max(r[0]) for r in rivals + [(rows,)]) + BREAK_RIVAL_MARGIN,
               pos_m.size - 1)
    local = jump_m[lo_m:hi_m + 1, s]
    cols = [local.copy()]
    for r_rows, r_kind, _g in rivals:
        c = local.copy()
        c[np.asarray(rows) - lo_m] = 0
        c[np.asarray(r_rows) - lo_m] = r_kind
        cols.append(c)
    gains = np.array([g_best] + [g for _r, _k, g in rivals])
    return pos_m[lo_m], pos_m[hi_m] + 1, s, np.column_stack(cols), gains


def _smooth_stretches(ev, stretches, model):
    """Each stretch's placements smoothed over its events, value and rate with their
    variances as :func:`_break_mixture` gives them, ``(T_i, b_i, 2)`` twice per stretch.

    Stretches run side by side as the columns of one :func:`_run` with its own events
    per column (at most :data:`RIVAL_BATCH_COLUMNS` columns a batch), a shorter
    stretch held at its last time to the batch's length."""
    t, zz, vv, meas = ev
    q, r_scale, prior_rate, prior_accel = model
    out = []
    batch: list = []
    for k, st in enumerate(stretches):
        batch.append(st)
        wide = sum(b[3].shape[1] for b in batch)
        nxt = stretches[k + 1][3].shape[1] if k + 1 < len(stretches) else None
        if nxt is not None and wide + nxt <= RIVAL_BATCH_COLUMNS:
            continue
        n_ev = max(hi - lo for lo, hi, *_ in batch)
        tt, zc, vc = np.empty((n_ev, wide)), np.zeros((n_ev, wide)), np.ones((n_ev, wide))
        mc, jc = np.zeros((n_ev, wide), bool), np.zeros((n_ev, wide), np.int8)
        qc, rc = np.empty(wide), np.empty(wide)
        c0 = 0
        for lo, hi, s, jm, _g in batch:
            n, c1 = hi - lo, c0 + jm.shape[1]
            tt[:n, c0:c1], tt[n:, c0:c1] = t[lo:hi, None], t[hi - 1]
            zc[:n, c0:c1], vc[:n, c0:c1] = zz[lo:hi, s, None], vv[lo:hi, s, None]
            mc[:n, c0:c1] = meas[lo:hi, None]
            jc[:n, c0:c1] = _event_jumps(meas[lo:hi], jm)
            qc[c0:c1], rc[c0:c1] = q[s], r_scale[s]
            c0 = c1
        _, _, _, xl, Pl = _run(tt, zc, vc, mc, qc, rc, prior_rate, prior_accel,
                               smooth=True, jump=jc)
        c0 = 0
        for lo, hi, _s, jm, _g in batch:
            n, c1 = hi - lo, c0 + jm.shape[1]
            out.append(_break_mixture(t[lo:hi], meas[lo:hi], jm, xl[:n, c0:c1],
                                      Pl[:n, c0:c1], qc[c0:c1]))
            c0 = c1
        batch = []
    return out


def _break_mixture(t, meas, jump_m, xs, Ps, q):
    """Value, rate and their variances at the events inside each break's step.

    The model restarts at the start of a break's step, so the smoother gives the events
    in the step the *after* side's estimate, extrapolated back. The change happened at
    an unknown instant in the step, taken as uniform: an event a fraction ``u`` into
    the step lies after it with probability ``u``. Its estimate is the mixture of the
    after side's and of the before side's (the smoothed state at the measurement
    before the step, propagated by the model), with the mixture's variance: the
    weighted variances plus ``u (1 - u)`` times the squared gap between the sides
    (so the sigma near a break grows with what is not known, rather than hiding it).

    Returns
    -------
    xs, var : ndarray (T, S, 2)
        Value and rate, and their variances, per merged event and signal.
    """
    out = xs[:, :, :2].copy()
    var = np.stack([Ps[:, :, 0, 0], Ps[:, :, 1, 1]], axis=-1).copy()
    pos = np.flatnonzero(meas)
    r, s = np.nonzero(jump_m)
    keep = r > 0
    r, s = r[keep], s[keep]
    a, b = pos[r - 1], pos[r]
    keep = (b - a >= 2) & (t[b] > t[a])
    a, b, s = a[keep], b[keep], s[keep]
    if a.size == 0:
        return out, np.maximum(var, 0.0)
    # Every event inside every break's step at once: its step's before-state a, signal s.
    n_in = b - a - 1
    ev = np.concatenate([np.arange(i + 1, j) for i, j in zip(a.tolist(), b.tolist(),
                                                                strict=True)])
    a_e, b_e, s_e = np.repeat(a, n_in), np.repeat(b, n_in), np.repeat(s, n_in)
    h = t[ev] - t[a_e]
    F, Q = _transition(h, q[s_e])
    before = (F @ xs[a_e, s_e][:, :, None])[:, :, 0]
    Pb = F @ Ps[a_e, s_e] @ F.transpose(0, 2, 1) + Q
    u = (h / (t[b_e] - t[a_e]))[:, None]
    after = xs[ev, s_e, :2]
    va = var[ev, s_e]
    vb = np.stack([Pb[:, 0, 0], Pb[:, 1, 1]], axis=-1)
    gap = after - before[:, :2]
    out[ev, s_e] = u * after + (1.0 - u) * before[:, :2]
    var[ev, s_e] = u * va + (1.0 - u) * vb + u * (1.0 - u) * gap**2
    return out, np.maximum(var, 0.0)


def _grid_ml(tz, qs, rs, priors, jump_m):
    """Maximum-likelihood (q, r_scale) per signal over the grid; ``tz`` = (t, z, var)
    of the measurements, ``jump_m`` (M, S) the model breaks or None."""
    t, z, v = tz
    n_sig = z.shape[1]
    if qs.size * rs.size == 1:
        return np.full(n_sig, qs[0]), np.full(n_sig, rs[0])
    gq, gr = (g.ravel() for g in np.meshgrid(qs, rs, indexing="ij"))
    g = gq.size
    # Column s * g + j: signal s with grid point j.
    ll, _, _, _, _ = _run(t, np.repeat(z, g, axis=1), np.repeat(v, g, axis=1),
                          np.ones(t.size, bool), np.tile(gq, n_sig), np.tile(gr, n_sig),
                          *priors, smooth=False,
                          jump=None if jump_m is None else np.repeat(jump_m, g, axis=1))
    best = np.argmax(ll.reshape(n_sig, g), axis=1)
    return gq[best], gr[best]


def find_breaks(t_s, z, var_z, q, r_scale, *, prior_rate=5.0, prior_accel=20.0):
    """Instants where each signal's constant-acceleration model must break.

    The forward filter's normalised innovations are summed over :data:`BREAK_WINDOW`
    samples; a sum beyond :data:`BREAK_FLAG` sigma flags a manoeuvre. Around the start
    of each flagged stretch every instant is tried as a restart, as an acceleration
    change and as the start of a ramp (:func:`_trials`, :func:`_release`); the one of
    highest likelihood is kept if it gains more than :data:`BREAK_MIN_GAIN`. Repeated
    until nothing is gained (at most :data:`BREAK_ROUNDS` times). ``prior_rate`` and
    ``prior_accel`` are the filter's initial 1-sigma of rate and acceleration
    (:class:`SmoothSettings`); a restart releases the rate by the state's own speed
    instead (:func:`_release`).

    Parameters
    ----------
    t_s : ndarray (M,)
        Measurement times, sorted [s].
    z, var_z : ndarray (M, S)
        Measurements and their variances.
    q, r_scale : ndarray (S,)
        Each signal's model.

    Returns
    -------
    ndarray of int8 (M, S)
        At the measurement before which the model breaks: :data:`RESTART` or
        :data:`ACCEL_CHANGE`; 0 elsewhere.
    """
    return _search_breaks(t_s, z, var_z, (q, r_scale, prior_rate, prior_accel))[0]


def _search_breaks(t_s, z, var_z, model):
    """:func:`find_breaks` with, for each break kept, its rivals: the other trials of
    its stretch within :data:`BREAK_RIVAL_NATS` of its gain."""
    q, r_scale, prior_rate, prior_accel = model
    m, n_sig = z.shape
    ones = np.ones(m, bool)
    w = BREAK_WINDOW
    jump = np.zeros((m, n_sig), np.int8)
    alts = []  # per break kept: signal, rows, kind, gain, rivals (rows, kind, gain)
    base = _run(t_s, z, var_z, ones, *model, smooth=False, jump=jump, filtered=True)
    for _round in range(BREAK_ROUNDS):
        cols = []  # (signal, stretch, positions)
        for s in range(n_sig):
            u = np.nan_to_num(base[2][:, s])
            score = np.abs(np.convolve(u, np.ones(w), "valid")) / np.sqrt(w)
            for n_run, i0 in enumerate(_flagged_starts(score > BREAK_FLAG)):
                for pos in range(max(i0 - w, 1), min(i0 + 2 * w, m)):
                    if not jump[pos, s]:
                        cols += [(s, n_run, rows, kind) for rows, kind in _trials(pos, m)]
        if not cols:
            break
        gain = _trial_gain(t_s, z, var_z, jump, base, cols, model)
        best: dict = {}
        stretch: dict = {}  # (signal, stretch) -> its trials with their gains
        for c, gval in zip(cols, gain.tolist(), strict=True):
            key = c[:2]
            stretch.setdefault(key, []).append((c[2], c[3], gval))
            if gval > BREAK_MIN_GAIN and gval > best.get(key, (-np.inf, 0))[0]:
                best[key] = (gval, c[2:])
        if not best:
            break
        for (s, n_run), (g_best, (pos, kind)) in best.items():
            if jump[pos[0], s]:
                continue  # the same break kept for an overlapping stretch
            jump[list(pos), s] = kind
            rivals = [(r_pos, r_kind, gval) for r_pos, r_kind, gval in stretch[s, n_run]
                      if gval >= g_best - BREAK_RIVAL_NATS and (r_pos, r_kind) != (pos, kind)]
            alts.append((s, pos, kind, g_best, rivals))
        base = _run(t_s, z, var_z, ones, *model, smooth=False, jump=jump, filtered=True)
    return jump, alts


def _trial_gain(t_s, z, var_z, jump, base, cols, model):
    """Log-likelihood gain of each trial break in ``cols`` over the current ``jump``.

    A trial filter equals the baseline (``base``: :func:`_run` with ``filtered``) up to
    the measurement before its first break, so each starts from the baseline's state
    there and runs forward only until its state has rejoined the baseline's
    (:func:`_rejoined`): from then on both filters see the same data from the same
    state, and the rest of the run adds nothing to the difference. The gain is the
    difference of the two log-likelihoods over that window. The trials run side by
    side, each at its own measurement (a batch holds at most
    :data:`BREAK_TRIAL_COLUMNS`); a trial's breaks are kept as its rows and kind, not
    as a column of the whole run.
    """
    q, r_scale, prior_rate, prior_accel = model
    ll_k, _, _, xf, Pf = base
    m = t_s.size
    dts = np.diff(t_s, prepend=t_s[0])
    F_all, Q_all = _transition(dts, np.ones(m))
    step = _break_step(t_s, np.ones(m, bool))
    gain = np.zeros(len(cols))
    for lo in range(0, len(cols), BREAK_TRIAL_COLUMNS):
        part = cols[lo:lo + BREAK_TRIAL_COLUMNS]
        sig = np.array([c[0] for c in part])
        first = np.array([c[2][0] for c in part])
        last = np.array([c[2][-1] for c in part])
        kind = np.array([c[3] for c in part], np.int8)
        x, P = xf[first - 1, sig], Pf[first - 1, sig]
        # Columns still running (in the batch's order) and where each stands.
        live, k = np.arange(sig.size), first.copy()
        g = np.zeros(sig.size)
        while live.size:
            s = sig[live]
            own = (k == first[live]) | (k == last[live])
            Pl = _release(x, P, np.where(own, kind[live], jump[k, s]), step[k], prior_accel)
            x, Pl = _predict(x, Pl, dts[k], F_all[k])
            Pl = Pl + q[s, None, None] * Q_all[k]
            x, P, ll, _ = _update(x, Pl, z[k, s], var_z[k, s] * r_scale[s])
            g[live] += ll - ll_k[k, s]
            done = (k + 1 >= m) | ((k >= last[live]) & _rejoined(x, P, xf[k, s], Pf[k, s]))
            k += 1
            if done.any():
                going = ~done
                live, k, x, P = live[going], k[going], x[going], P[going]
        gain[lo:lo + len(part)] = g
    return gain


def _trial_gain_whole_run(t_s, z, var_z, jump, base, cols, model):
    """:func:`_trial_gain` by its definition: each trial filtered over the whole run
    (the search before the windows; the reference of the tests and of
    ``benchmarks/break_search_speed.py``)."""
    q, r_scale, prior_rate, prior_accel = model
    sig = np.array([c[0] for c in cols])
    trial = jump[:, sig].copy()
    for col, c in enumerate(cols):
        trial[list(c[2]), col] = c[3]
    ll, _, _, _, _ = _run(t_s, z[:, sig], var_z[:, sig], np.ones(t_s.size, bool), q[sig],
                          r_scale[sig], prior_rate, prior_accel, smooth=False, jump=trial)
    return ll - base[0][:, sig].sum(axis=0)


def _rejoined(x, P, xb, Pb, tol=BREAK_REJOIN_TOL):
    """Whether trial states (B, 3), (B, 3, 3) equal the baseline's to ``tol``: every
    mean component within ``tol`` of the baseline's 1-sigma, every covariance entry
    within ``tol`` of sqrt(Pb_ii Pb_jj)."""
    sd = np.sqrt(np.maximum(np.diagonal(Pb, axis1=1, axis2=2), 1e-300))
    dx = np.abs(x - xb) / sd
    dP = np.abs(P - Pb) / (sd[:, :, None] * sd[:, None, :])
    return (dx.max(axis=1) < tol) & (dP.max(axis=(1, 2)) < tol)


def _trials(pos, m):
    """The trial breaks starting at measurement ``pos`` of ``m``: (rows, kind) pairs.

    A restart within the step (a hit, or a stall that takes less than a frame); an
    acceleration change alone (the start of a braking or a drive-off), or a ramp: one
    at ``pos`` and one up to :data:`BREAK_RAMP_STEPS` steps later (a braking or
    drive-off at constant acceleration from its start to its end).
    """
    out = [((pos,), RESTART), ((pos,), ACCEL_CHANGE)]
    out += [((pos, pos + k), ACCEL_CHANGE)
            for k in range(1, min(BREAK_RAMP_STEPS, m - pos - 1) + 1)]
    return out


def _flagged_starts(flags):
    """First index of every run of True in ``flags``."""
    f = np.asarray(flags, bool)
    if not f.any():
        return []
    starts = np.flatnonzero(f & ~np.concatenate([[False], f[:-1]]))
    return starts.tolist()


def _lag1(u):
    """Lag-1 autocorrelation of a sequence (0 when too short) [-]."""
    u = u[np.isfinite(u)]
    den = float(np.sum(u * u))
    if u.size < 3 or den <= 0.0:
        return 0.0
    return float(np.sum(u[:-1] * u[1:]) / den)
