"""Putting the robot's log clock on the video clock.

The mapping is ``t_video_s = t_log_s + offset_s + rate * (t_log_s - ref_log_s)``; the
rate term (a log clock running fast or slow, parts per million) is estimated only when
the run is long enough to tell it from noise, and is zero otherwise.

Method
------
1. *Coarse*: both the truth track and each odometry source are resampled to a uniform
   grid (10 ms). Two signals that do not depend on the unknown start alignment are
   formed from poses: speed and yaw rate (from central differences over 0.1 s, so both
   sides are differentiated the same way). Their Pearson correlation over the overlap
   (scale-free: mean removed and divided by the spread, over the overlapping part
   only), averaged over the two signals, is maximised over the lag
   (FFT cross-correlations, as ``scipy.signal.correlate``; lags as its
   ``correlation_lags``). Lags are compared by
   Fisher's z of that correlation times the square root of the overlap, so a long
   overlap that fits well beats a short one that fits by chance; lags where the two
   overlap for less than 30 % of the shorter record are not considered. A parabola
   through the peak refines it.
2. *Source*: the coarse lag is found for every source; sources are grouped by
   agreeing lag (within 0.1 s) and the group with the largest summed correlation is
   kept, so a source whose lag disagrees (a slipping drive, a lifted pod) is set
   aside; of the rest the preferred one is used: IMU heading, tracking wheels, others.
3. *Fine*: the offset (and rate) minimise the pose residual between truth and source:
   the run is cut into windows of ``window_s``; in each the source is moved onto truth
   (rotation by the mean heading difference, translation by the centroid difference,
   and a free scale on both positions and heading change, so a wrong wheel radius or
   track width does not pull the timing) and the remaining position and heading
   errors, weighted by the truth track's 1-sigma, are summed. Windows keep slow drift
   out of the residual, so the minimum sits at the timing that makes the *shapes*
   agree, which resolves the offset to well below one frame.
4. *Uncertainty*: ``sigma_s`` is the larger of the residual's curvature at its minimum
   (scaled by the reduced chi-square so model errors widen it, common practice in
   weighted least squares) and the delete-one-window jackknife of the offset, which
   also sees the truth errors' correlation over neighbouring frames. ``confidence`` is
   the normalised correlation at the coarse peak, reduced when another peak more than
   0.5 s away is nearly as high (periodic motion makes the offset ambiguous).

Too little motion (the robot stands still, or only moves for a moment) raises
:class:`~vidodo.errors.SyncError` with what to do (pass a manual offset).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from .errors import InputError, SyncError

__all__ = ["ClockSync", "estimate_clock", "manual_clock", "source_preference", "map_to_video"]

GRID_DT_S = 0.01
"""Resampling step of the coarse search [s]."""
MIN_OVERLAP = 0.3
"""Least overlap of log and video, as a fraction of the shorter of the two."""
MIN_CORRELATION = 0.3
"""Below this normalised correlation the log is taken not to match the video."""


@dataclass(frozen=True)
class ClockSync:
    """Log clock -> video clock: ``t_video_s = t_log_s + offset_s + rate*(t_log_s-ref)``."""

    offset_s: float
    """Video time minus log time at ``ref_log_s`` [s]."""
    sigma_s: float | None
    """1-sigma of ``offset_s`` [s]; None for a manual offset."""
    confidence: float | None
    """0..1: normalised correlation at the coarse peak, lowered when ambiguous."""
    method: str
    """'auto' or 'manual'."""
    source: str | None = None
    """Odometry source the offset was measured with."""
    rate: float = 0.0
    """Log clock rate error (dimensionless; 1e-6 = 1 ppm)."""
    ref_log_s: float = 0.0
    """Log time the rate term is referred to [s]."""
    coarse_offset_s: dict = field(default_factory=dict)
    """Coarse offset per source [s] (diagnostic)."""
    warnings: tuple[str, ...] = ()
    """Anything that makes the offset doubtful."""

    def to_video(self, t_log_s):
        """Map log times [s] to video times [s]."""
        t = np.asarray(t_log_s, dtype=float)
        return t + self.offset_s + self.rate * (t - self.ref_log_s)


def source_preference(name: str) -> int:
    """Rank of a source for clock sync: lower is preferred (least affected by slip)."""
    n = name.lower()
    if "imu" in n:
        return 0
    if "track" in n or "pod" in n or "dead" in n:
        return 1
    if "logged" in n:
        return 3
    return 2


def map_to_video(frame, clock: ClockSync):
    """Copy of an odometry DataFrame with ``t_s`` mapped from log to video clock."""
    out = frame.copy()
    out["t_s"] = clock.to_video(frame["t_s"].to_numpy(float))
    return out


# ------------------------------------------------------------------ signals
def _poses(df):
    t = df["t_s"].to_numpy(float)
    p = np.column_stack([df["x_m"].to_numpy(float), df["y_m"].to_numpy(float),
                         df["heading_rad"].to_numpy(float)])
    return t, p


def _usable_truth(truth):
    t, p = _poses(truth)
    ok = np.isfinite(p).all(axis=1) & np.isfinite(t)
    if "detected" in truth:
        det = truth["detected"].to_numpy(bool)
        interp = truth["interpolated"].to_numpy(bool) if "interpolated" in truth else det * 0
        ok &= det | interp.astype(bool)
    t, p = t[ok], p[ok]
    p[:, 2] = np.unwrap(p[:, 2])
    return t, p


def _grid_signals(t, p, t0, n, dt, max_gap_s):
    """Speed and yaw rate on the grid ``t0 + k*dt``; NaN where the record has gaps."""
    g = t0 + dt * np.arange(n)
    x = np.interp(g, t, p[:, 0])
    y = np.interp(g, t, p[:, 1])
    h = np.interp(g, t, p[:, 2])
    # mask grid points in gaps or outside the record
    idx = np.clip(np.searchsorted(t, g), 1, len(t) - 1)
    gap = (t[idx] - t[idx - 1]) > max_gap_s
    outside = (g < t[0]) | (g > t[-1])
    half = max(1, int(round(0.05 / dt)))
    vx = np.full(n, np.nan)
    vy = np.full(n, np.nan)
    om = np.full(n, np.nan)
    span = 2 * half * dt
    vx[half:-half] = (x[2 * half:] - x[:-2 * half]) / span
    vy[half:-half] = (y[2 * half:] - y[:-2 * half]) / span
    om[half:-half] = (h[2 * half:] - h[:-2 * half]) / span
    bad = gap | outside
    bad = np.convolve(bad.astype(float), np.ones(2 * half + 1), mode="same") > 0
    speed = np.hypot(vx, vy)
    speed[bad] = np.nan
    om[bad] = np.nan
    return speed, om


def _normalise(v):
    m = np.isfinite(v)
    out = np.zeros_like(v)
    if m.sum() < 3:
        return out, m
    sd = float(np.std(v[m]))
    if sd <= 0:
        return out, m
    out[m] = (v[m] - v[m].mean()) / sd
    return out, m


def _ncc(a_sigs, b_sigs, min_overlap):
    """Pearson correlation over the overlap at every lag, averaged over the signals.

    Means and variances are those of the overlapping part only (sums of products
    from FFT correlations), so a short log is not biased by the rest of the video.
    Lags follow SciPy's convention (``correlation_lags``).
    """
    from scipy import fft  # not scipy.signal: that pulls in scipy.stats (~0.6 s CPU)

    size = len(a_sigs[0]) + len(b_sigs[0]) - 1
    nfft = fft.next_fast_len(size, real=True)

    def xc(u, v):
        """Full cross-correlation, as ``scipy.signal.correlate(u, v, 'full')``."""
        return fft.irfft(fft.rfft(u, nfft) * fft.rfft(v[::-1], nfft), nfft)[:size]

    total = None
    count = None
    for a, b in zip(a_sigs, b_sigs, strict=True):
        an, am = _normalise(a)
        bn, bm = _normalise(b)
        am, bm = am.astype(float), bm.astype(float)
        n = np.rint(xc(am, bm))
        sa, sb = xc(an, bm), xc(am, bn)
        sab = xc(an, bn)
        saa, sbb = xc(an**2, bm), xc(am, bn**2)
        with np.errstate(invalid="ignore", divide="ignore"):
            cov = sab - sa * sb / n
            va = saa - sa**2 / n
            vb = sbb - sb**2 / n
            c = np.where((n >= min_overlap) & (va > 1e-9 * n) & (vb > 1e-9 * n),
                         cov / np.sqrt(np.clip(va * vb, 1e-300, None)), np.nan)
        total = c if total is None else total + c
        count = n if count is None else np.minimum(count, n)
    lags = np.arange(-(len(b_sigs[0]) - 1), len(a_sigs[0]))  # correlation_lags, 'full'
    return total / len(a_sigs), lags, count


def _moving_time(speed, omega, dt, v_min, w_min):
    moving = (np.nan_to_num(speed) > v_min) | (np.abs(np.nan_to_num(omega)) > w_min)
    return float(moving.sum() * dt)


def _truth_moving_time(tt, pt, sig_xy, sig_h, dt, span_s=0.5):
    """Time the truth shows motion: displacement or turn over ``span_s`` beyond noise.

    Motion over half a second must exceed 3 sigma of the difference of two truth poses
    and 25 mm (0.05 m/s) or 0.1 rad, so a still robot with a noisy track never counts.
    """
    g = np.arange(tt[0], tt[-1], dt)
    if g.size < 2:
        return 0.0
    x, y, h = (np.interp(g, tt, pt[:, i]) for i in range(3))
    k = max(1, int(round(span_s / dt)))
    if g.size <= k:
        return 0.0
    d = np.hypot(x[k:] - x[:-k], y[k:] - y[:-k])
    dh = np.abs(h[k:] - h[:-k])
    lim_d = max(3.0 * math.sqrt(2.0) * sig_xy, 0.05 * span_s)
    lim_h = max(3.0 * math.sqrt(2.0) * sig_h, 0.1)
    return float(((d > lim_d) | (dh > lim_h)).sum() * dt)


def _coarse(tt, pt, ts, ps, dt, min_overlap_s, max_gap_s):
    t0a, t0b = tt[0], ts[0]
    na = int((tt[-1] - t0a) / dt) + 1
    nb = int((ts[-1] - t0b) / dt) + 1
    sa, wa = _grid_signals(tt, pt, t0a, na, dt, max_gap_s)
    sb, wb = _grid_signals(ts, ps, t0b, nb, dt, max_gap_s)
    min_ov = max(int(min_overlap_s / dt), 10)
    r, lags, n = _ncc([sa, wa], [sb, wb], min_ov)
    if not np.isfinite(r).any():
        return None
    # evidence of a lag: Fisher's z of the correlation times the square root of the
    # overlap (common practice for comparing correlations over different sample
    # sizes), so a short chance overlap cannot beat a long good one
    c = np.arctanh(np.clip(r, -0.999, 0.999)) * np.sqrt(np.clip(n, 0, None) * dt)
    k = int(np.nanargmax(c))
    peak = float(r[k])
    frac = 0.0
    if 0 < k < len(c) - 1 and np.isfinite(c[k - 1]) and np.isfinite(c[k + 1]):
        den = c[k - 1] - 2 * c[k] + c[k + 1]
        if den < 0:
            frac = float(np.clip(0.5 * (c[k - 1] - c[k + 1]) / den, -0.5, 0.5))
    far = np.abs(lags - lags[k]) * dt > 0.5
    second = float(np.nanmax(c[far]) / c[k]) * peak if np.isfinite(c[far]).any() else -1.0
    offset = t0a - t0b + (lags[k] + frac) * dt
    return offset, peak, second


# ------------------------------------------------------------------ fine
def _window_residual(tt, pt, wt, ts, ps, tau, rate, ref, window_s, sig_xy, sig_h, keep=None):
    """Normalised squared residuals after per-window alignment.

    Returns the total, the number of residual terms, and the cost per window (dict of
    window index -> (cost, terms)). Windows are cut on the truth clock, so the same
    window holds the same truth samples for every offset tried.
    """
    # source time for each truth sample: invert t_v = t_l + tau + rate (t_l - ref)
    tl = (tt - tau + rate * ref) / (1.0 + rate)
    ok = (tl >= ts[0]) & (tl <= ts[-1])
    bins_all = np.floor((tt - tt[0]) / window_s).astype(int)
    if ok.sum() < 10:
        return np.inf, 0, {}
    tl, q, w, bins = tl[ok], pt[ok], wt[ok], bins_all[ok]
    px = np.interp(tl, ts, ps[:, 0])
    py = np.interp(tl, ts, ps[:, 1])
    ph = np.interp(tl, ts, ps[:, 2])
    total, count, per = 0.0, 0, {}
    for b in np.unique(bins):
        if keep is not None and b not in keep:
            continue
        m = bins == b
        if m.sum() < 5:
            continue
        src = np.column_stack([px[m], py[m]])
        dst = q[m, :2]
        dh = float(np.mean(q[m, 2] - ph[m]))
        c, s = math.cos(dh), math.sin(dh)
        rs = src @ np.array([[c, s], [-s, c]])
        rs = rs - rs.mean(axis=0)
        dc = dst - dst.mean(axis=0)
        # scale free: a wrong wheel radius must not pull the offset
        ss = float((rs**2).sum())
        k = float((rs * dc).sum()) / ss if ss > 1e-12 else 1.0
        r = dc - k * rs
        cost = float(np.sum(w[m] * (r**2).sum(axis=1)) / sig_xy**2)
        hs = ph[m] - ph[m].mean()
        hq = q[m, 2] - q[m, 2].mean()
        sh = float((hs**2).sum())
        kh = float((hs * hq).sum()) / sh if sh > 1e-12 else 1.0
        hr = hq - kh * hs
        cost += float(np.sum(w[m] * hr**2) / sig_h**2)
        per[int(b)] = (cost, int(3 * m.sum()))
        total += cost
        count += int(3 * m.sum())
    return total, count, per


def _jackknife_sigma(per0, per_p, per_m, h):
    """Delete-one-window jackknife 1-sigma of the offset [s], or None.

    The residual's curvature alone treats every truth sample as independent, but the
    smoothed track's errors persist over neighbouring frames, so it claims too little
    (issue 15: 0.5 ms claimed, 0.9 ms off). Dropping window b moves the minimum by
    about ``g_b / (H - H_b)`` (one Newton step; ``g_b``, ``H_b`` that window's slope and
    curvature); the spread of these moves is the delete-one-group jackknife variance
    (Efron, *The Jackknife, the Bootstrap and Other Resampling Plans*, SIAM 1982; for
    dependent data in blocks, Kuensch, Ann. Stat. 17(3):1217, 1989).
    """
    common = [b for b in per0 if b in per_p and b in per_m]
    if len(common) < 4:
        return None
    g = np.array([(per_p[b][0] - per_m[b][0]) / (2 * h) for b in common])
    hb = np.array([(per_p[b][0] - 2 * per0[b][0] + per_m[b][0]) / h**2 for b in common])
    rest = hb.sum() - hb
    if np.any(rest <= 0):
        return None
    d = g / rest
    n = d.size
    return float(math.sqrt((n - 1) / n * np.sum((d - d.mean()) ** 2)))


def _refine(tt, pt, wt, ts, ps, tau0, half_width_s, window_s, sig_xy, sig_h, fit_rate):
    ref = float(np.median(ts))
    # windows where the source disagrees with the truth for reasons other than timing
    # (a slip, a lifted pod, an IMU jump) are set aside: their residual would pull the
    # offset towards whatever hides the fault best
    _, _, per = _window_residual(tt, pt, wt, ts, ps, tau0, 0.0, ref, window_s, sig_xy, sig_h)
    if not per:
        return None
    norm = {b: c / max(n, 1) for b, (c, n) in per.items()}
    med = float(np.median(list(norm.values())))
    keep = {b for b, v in norm.items() if v <= 4.0 * med}
    dropped = len(per) - len(keep)

    def cost(tau, rate=0.0):
        return _window_residual(tt, pt, wt, ts, ps, tau, rate, ref, window_s, sig_xy,
                                sig_h, keep)[0]

    # scan then bounded minimisation: the residual is smooth near the minimum
    taus = tau0 + np.linspace(-half_width_s, half_width_s, 41)
    vals = np.array([cost(t) for t in taus])
    if not np.isfinite(vals).any():
        return None
    k = int(np.argmin(vals))
    lo = taus[max(k - 1, 0)]
    hi = taus[min(k + 1, len(taus) - 1)]
    res = optimize.minimize_scalar(cost, bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-6})
    tau, rate = float(res.x), 0.0
    if fit_rate:
        r2 = optimize.minimize(lambda v: cost(v[0], v[1] * 1e-6), x0=[tau, 0.0],
                               method="Nelder-Mead",
                               options={"xatol": 1e-7, "fatol": 1e-6, "initial_simplex":
                                        [[tau, 0.0], [tau + 1e-3, 0.0], [tau, 100.0]]})
        if r2.fun < res.fun:
            tau, rate = float(r2.x[0]), float(r2.x[1]) * 1e-6
    jmin, n, per0 = _window_residual(tt, pt, wt, ts, ps, tau, rate, ref, window_s, sig_xy,
                                     sig_h, keep)
    h = 5e-4
    _, _, per_p = _window_residual(tt, pt, wt, ts, ps, tau + h, rate, ref, window_s,
                                   sig_xy, sig_h, keep)
    _, _, per_m = _window_residual(tt, pt, wt, ts, ps, tau - h, rate, ref, window_s,
                                   sig_xy, sig_h, keep)
    jp = sum(c for c, _n in per_p.values())
    jm = sum(c for c, _n in per_m.values())
    curv = (jp - 2 * jmin + jm) / h**2
    red = max(1.0, jmin / max(n - 1, 1))
    sigma = math.sqrt(2.0 * red / curv) if curv > 0 else None
    jack = _jackknife_sigma(per0, per_p, per_m, h)
    if sigma is not None and jack is not None:
        sigma = max(sigma, jack)
    edge = abs(tau - tau0) > 0.95 * half_width_s
    return tau, rate, ref, sigma, edge, dropped, len(per)


# ------------------------------------------------------------------ public
def _check_overlap(tt, ts_video, what):
    lo, hi = max(tt[0], ts_video[0]), min(tt[-1], ts_video[-1])
    if hi - lo <= 0:
        raise SyncError(
            f"{what}: the log (video time {ts_video[0]:.2f}..{ts_video[-1]:.2f} s) and the "
            f"truth track ({tt[0]:.2f}..{tt[-1]:.2f} s) do not overlap; check the clock "
            "offset and that the log belongs to this video"
        )
    return hi - lo


def manual_clock(truth_track, odometry, offset_s, *, rate=0.0) -> ClockSync:
    """A user-given offset, checked for overlap with the truth track."""
    tt, _ = _usable_truth(truth_track)
    if len(tt) < 2:
        raise SyncError("truth track has fewer than 2 usable samples; nothing to line up")
    warn = []
    for name, df in odometry.items():
        t = df["t_s"].to_numpy(float) + offset_s
        ov = _check_overlap(tt, t, f"manual offset {offset_s:+.3f} s, source {name!r}")
        if ov < 0.5 * min(tt[-1] - tt[0], t[-1] - t[0]):
            warn.append(f"with the manual offset the log overlaps the video for only "
                        f"{ov:.1f} s")
            break
    warn += _manual_offset_check(truth_track, odometry, offset_s)
    return ClockSync(offset_s=float(offset_s), sigma_s=None, confidence=None,
                     method="manual", rate=float(rate), warnings=tuple(warn))


def _travel(t_s, xy, t0, t1, gate_m=0.0):
    """Path length between t0 and t1, steps under ``gate_m`` held back (noise)."""
    from .metrics import path_length

    sel = (t_s >= t0) & (t_s <= t1) & np.isfinite(xy).all(axis=1)
    p = xy[sel]
    return float(path_length(p, gate_m=gate_m)[-1]) if len(p) > 1 else 0.0


def _manual_offset_check(truth_track, odometry, offset_s) -> list[str]:
    """Refuse a manual offset under which the log and the video disagree on motion.

    Over the overlap, the truth's path length (steps under 3 sigma held back) and each
    source's are compared: the robot cannot travel metres in the video while every
    odometry source stands still (or the reverse). Typical cause: the offset's sign (it
    is video time minus log time). Also compares with the automatic estimate and warns
    when they differ.

    Raises
    ------
    SyncError
        When the travel differs by more than a factor of 4 for every source.
    """
    t_tr = truth_track["t_s"].to_numpy(float)
    xy_tr = truth_track[["x_m", "y_m"]].to_numpy(float)
    sig = truth_track["sigma_xy_m"].to_numpy(float) if "sigma_xy_m" in truth_track else []
    gate = 3.0 * float(np.nanmedian(sig)) if np.isfinite(sig).any() else 0.006
    ratios = []
    for df in odometry.values():
        t = df["t_s"].to_numpy(float) + offset_s
        t0, t1 = max(t[0], t_tr[0]), min(t[-1], t_tr[-1])
        truth_m = _travel(t_tr, xy_tr, t0, t1, gate_m=gate)
        src_m = _travel(t, df[["x_m", "y_m"]].to_numpy(float), t0, t1)
        if truth_m >= 0.3:  # a still video is left to the no-motion warnings
            ratios.append((truth_m, src_m))
    if ratios and all(max(a, b) > 4.0 * min(a, b) for a, b in ratios):
        a, b = ratios[0]
        raise SyncError(
            f"with --clock-offset {offset_s:+.3f} s the log shows {b:.2f} m of travel "
            f"where the video shows {a:.2f} m; the offset is video time minus log time "
            f"(check its sign: {-offset_s:+.3f}?), or leave it out to find it automatically")
    try:
        auto = estimate_clock(truth_track, odometry)
    except (SyncError, InputError, ValueError):
        return []
    if auto.confidence is not None and auto.confidence >= 0.5 and \
            abs(auto.offset_s - offset_s) > max(0.25, 5.0 * (auto.sigma_s or 0.0)):
        return [f"clock: the manual offset {offset_s:+.3f} s differs from the one the "
                f"motion gives ({auto.offset_s:+.3f} s, confidence {auto.confidence:.2f}); "
                "check --clock-offset"]
    return []


def estimate_clock(truth_track, odometry, *, source=None, window_s=1.0, fit_rate=None,
                   min_motion_s=1.0, max_gap_s=0.3, grid_dt_s=GRID_DT_S) -> ClockSync:
    """Find the log -> video clock offset automatically.

    Parameters
    ----------
    truth_track : DataFrame
        Truth track (video clock) with ``t_s, x_m, y_m, heading_rad, sigma_xy_m,
        sigma_heading_rad`` and optionally ``detected, interpolated``.
    odometry : dict of str -> DataFrame
        Odometry sources on the log clock (``t_s, x_m, y_m, heading_rad``).
    source : str, optional
        Force the source used for the fine step.
    window_s : float
        Length of the windows of the fine residual [s].
    fit_rate : bool, optional
        Estimate a clock rate error too; default when the overlap exceeds 20 s.
    min_motion_s : float
        Least time the robot must be seen moving for a sync [s].
    max_gap_s : float
        Gaps in either record longer than this are left out of the correlation [s].

    Returns
    -------
    ClockSync

    Raises
    ------
    SyncError
        Too little motion, no overlap, or no usable source.
    """
    if not odometry:
        raise SyncError("no odometry source to synchronise; check the robot profile")
    tt, pt = _usable_truth(truth_track)
    if len(tt) < 10:
        raise SyncError(f"truth track has only {len(tt)} usable "
                        f"sample{'' if len(tt) == 1 else 's'}; nothing to line up")
    sig_xy = _typical(truth_track, "sigma_xy_m", 0.002)
    sig_h = _typical(truth_track, "sigma_heading_rad", math.radians(0.5))
    # motion in the truth track
    dt = grid_dt_s
    moving = _truth_moving_time(tt, pt, sig_xy, sig_h, dt)
    if moving < min_motion_s:
        raise SyncError(
            f"truth track shows the robot moving for only {moving:.1f} s (< {min_motion_s} s); "
            "too little motion to find the clock offset: give it with --clock-offset-s"
        )
    warn = []
    coarse, scores, prepared = _coarse_offsets(tt, pt, odometry, dt, min_motion_s, max_gap_s,
                                               warn)
    if not coarse:
        raise SyncError(
            "no odometry source overlaps the truth track with enough motion to find the "
            "clock offset; check that the log belongs to this video or give --clock-offset-s"
        )
    use, confidence = _choose_source(coarse, scores, source, warn)
    ts, ps = prepared[use]
    tv = ts + coarse[use]
    ov = _check_overlap(tt, tv, f"source {use!r}")
    if fit_rate is None:
        fit_rate = ov >= 20.0
    wt = np.ones(len(tt))
    if "sigma_xy_m" in truth_track:
        # weight per sample by the truth track's own variance (relative to typical)
        s = np.interp(tt, truth_track["t_s"].to_numpy(float),
                      truth_track["sigma_xy_m"].to_numpy(float))
        s = np.where(np.isfinite(s) & (s > 0), s, sig_xy)
        wt = (sig_xy / s) ** 2
    fine = _refine(tt, pt, wt, ts, ps, coarse[use], max(0.05, 3 * dt), window_s, sig_xy,
                   sig_h, fit_rate)
    if fine is None:
        raise SyncError(f"source {use!r}: pose residual undefined near the coarse offset")
    tau, rate, ref, sigma, edge, dropped, n_windows = fine
    if dropped:
        warn.append(f"clock sync: {dropped} of {n_windows} windows of {use!r} disagree with "
                    "the truth beyond timing (slip, lifted wheel or IMU jump) and were left "
                    "out of the fine step")
    if edge:
        warn.append("clock sync: the fine offset sits at the edge of its search range; "
                    "the coarse peak may be wrong")
    if sigma is None:
        warn.append("clock sync: residual is flat near the optimum; offset uncertainty "
                    "unknown")
    log_span = ts[-1] - ts[0]
    vid_span = tt[-1] - tt[0]
    if log_span < 0.5 * vid_span:
        warn.append(f"the log covers {log_span:.1f} s of a {vid_span:.1f} s video; only "
                    "the overlap is graded")
    return ClockSync(offset_s=tau, sigma_s=sigma, confidence=confidence, method="auto",
                     source=use, rate=rate, ref_log_s=ref if rate else 0.0,
                     coarse_offset_s=dict(coarse), warnings=tuple(warn))


def _coarse_offsets(tt, pt, odometry, dt, min_motion_s, max_gap_s, warn):
    """Per usable source: the coarse offset [s], its correlation scores (peak, best
    other peak more than 0.5 s away) and its poses on the log clock."""
    coarse = {}
    scores = {}
    prepared = {}
    for name, df in odometry.items():
        ts, ps = _poses(df)
        ok = np.isfinite(ps).all(axis=1) & np.isfinite(ts)
        ts, ps = ts[ok], ps[ok].copy()
        if len(ts) < 10:
            warn.append(f"source {name!r}: fewer than 10 samples, not used for sync")
            continue
        if np.any(np.diff(ts) <= 0):
            raise InputError(f"odometry source {name!r}: t_s is not strictly increasing")
        ps[:, 2] = np.unwrap(ps[:, 2])
        nb = int((ts[-1] - ts[0]) / dt) + 1
        sb, wb = _grid_signals(ts, ps, ts[0], nb, dt, max_gap_s)
        if _moving_time(sb, wb, dt, 0.05, 0.2) < min_motion_s:
            warn.append(f"source {name!r} reports almost no motion; not used for sync")
            continue
        shorter = min(tt[-1] - tt[0], ts[-1] - ts[0])
        res = _coarse(tt, pt, ts, ps, dt, max(MIN_OVERLAP * shorter, 2.0), max_gap_s)
        if res is None:
            warn.append(f"source {name!r}: no lag with enough overlap")
            continue
        coarse[name] = res[0]
        scores[name] = (res[1], res[2])
        prepared[name] = (ts, ps)
    return coarse, scores, prepared


def _choose_source(coarse, scores, source, warn):
    """The source for the fine step and the confidence of its coarse peak (0..1)."""
    # group sources whose coarse offsets agree within 0.1 s; the group with the most
    # correlation in total wins (a slipping drive or a lifted pod stands apart)
    groups = {n: [m for m in coarse if abs(coarse[m] - coarse[n]) <= 0.1] for n in coarse}
    best = max(groups, key=lambda n: (sum(max(scores[m][0], 0) for m in groups[n]),
                                      -source_preference(n)))
    agree = groups[best]
    med = float(np.median([coarse[n] for n in agree]))
    for n in coarse:
        if n not in agree:
            warn.append(f"source {n!r}: coarse offset {coarse[n]:+.3f} s disagrees with the "
                        f"others ({med:+.3f} s); not used for sync")
    if source is not None:
        if source not in coarse:
            raise SyncError(f"source {source!r} cannot be used for sync; sources usable: "
                            f"{sorted(coarse)}")
        use = source
    else:
        pool = agree or list(coarse)
        use = min(pool, key=lambda n: (source_preference(n), -scores[n][0]))
    peak, second = scores[use]
    confidence = float(max(0.0, min(1.0, peak)) * min(1.0, 2.0 * (1.0 - max(second, 0) / peak))
                       ) if peak > 0 else 0.0
    if peak < MIN_CORRELATION:
        raise SyncError(
            f"the motion in the log ({use!r}) does not match the motion in the video "
            f"(best correlation {peak:.2f} < {MIN_CORRELATION}); check that the log belongs "
            "to this video, or give --clock-offset-s"
        )
    if peak < 0.5:
        warn.append(f"clock sync: weak correlation ({peak:.2f}) between truth and {use!r}")
    if second > 0.9 * peak:
        warn.append("clock sync: another offset more than 0.5 s away fits almost as well "
                    "(repetitive motion); check the offset or give --clock-offset-s")
    return use, confidence


def _typical(df, col, default):
    if col not in df:
        return default
    v = df[col].to_numpy(float)
    v = v[np.isfinite(v) & (v > 0)]
    return float(np.median(v)) if v.size else default
