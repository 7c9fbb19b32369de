"""After the video: the per-frame fixes become the truth track with its 1-sigma.

:func:`finish_track` runs these steps: check the marker was found at all; the run's corner
noise (split into a fresh and a persistent part); the registration error at the robot;
a Rauch-Tung-Striebel smoothing (:mod:`vidodo.tracking.smooth`) of each stretch of
detections onto the frame times, redone with the rolling-shutter readout estimated from
the marker shear when the camera profile gives none; the long gaps; the quality record;
the warnings.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import cv2
import numpy as np
import pandas as pd

from ..errors import TrackingError
from .detector import ROTATION_EXCESS, refine_bias_sigma_px
from .error_model import corner_bias_var_m2, registration_sigma_m, timing_var_m2
from .noise import (
    CornerNoise,
    estimate_corner_noise,
    local_corner_noise,
    readout_block_sigma,
    readout_from_terms,
    readout_terms,
)
from .pixel_lock import lock_attenuation, lock_floor_vars
from .registration_error import registration_pose_covs
from .result import REGISTRATION_COLUMNS, TRACK_COLUMNS, TrackResult
from .settings import TrackSettings
from .shared_error import shared_columns, shared_modes
from .smooth import rts_smooth_signals

__all__ = ["finish_track", "MIN_CELL_PX", "UNKNOWN_READOUT_MAX_S", "readout_sigma_s",
           "quality_readout_sigma_s"]

UNKNOWN_READOUT_MAX_S = 0.030
"""Longest sensor readout of a phone's video mode assumed when none is known [s] (a
phone's readout is 10-30 ms, from memory; the warning without one says so)."""

MIN_CELL_PX = 3.0
"""Marker cell width (square root of the marker's image area / cells across) below
which detection becomes unreliable [px] (common practice; with motion blur, markers of
24 px or less were mostly missed in our measurements, domain notes section 1)."""


def _camera_distance(reg, point_m, z_m):
    R, _ = cv2.Rodrigues(np.asarray(reg.rvec, float))
    centre = -R.T @ np.asarray(reg.tvec, float).reshape(3)
    return float(np.linalg.norm(centre - np.array([point_m[0], point_m[1], z_m]))), centre



def _segments(detected_idx, t, max_gap_s):
    """Split detected frame indices into runs whose gaps are at most ``max_gap_s``."""
    segs = []
    start = detected_idx[0]
    for a, b in zip(detected_idx[:-1], detected_idx[1:], strict=True):
        if t[b] - t[a] > max_gap_s:
            segs.append((start, a))
            start = b
    segs.append((start, detected_idx[-1]))
    return segs


def _smooth(t, idx, ok, segs, t_meas, x, y, th, cov_unit, reg_err, common, fresh_px,
            persistent_px, keep):
    """Smooth each segment of detections onto its frame times; NaN elsewhere.

    ``fresh_px`` and ``persistent_px`` are the corner noise parts of each fix [px];
    ``keep`` is the run's 1 - lag-1 correlation; ``common`` per frame the floor
    variance [m^2] of the markers' common corner shift from the refinement's bias, that
    of their pixel locking (u, v) and the markers' image motion (u, v) [px per frame]
    (:func:`_lock_var`).
    """
    bias_var, lock_var, step_px = common
    n = t.size
    out = {c: np.full(n, np.nan) for c in TRACK_COLUMNS}
    out["t_s"] = t
    interpolated = np.zeros(n, bool)
    fits = []
    for a, b in segs:
        m = (idx >= a) & (idx <= b)
        rows = np.arange(a, b + 1)
        # Fresh corner noise goes through the smoother (averaged over frames) ...
        unit = cov_unit[m]
        sx, sy, sh = rts_smooth_signals(
            t_meas[m], np.column_stack([x[m], y[m], th[m]]),
            fresh_px[m, None] * np.sqrt(np.diagonal(unit, axis1=1, axis2=2)), t[rows])
        fits.append((sx.q, sx.r_scale, sy.q, sy.r_scale, sh.q, sh.r_scale,
                     sx.innovation_lag1, sy.innovation_lag1, sh.innovation_lag1))
        out["x_m"][rows] = sx.value
        out["y_m"][rows] = sy.value
        out["heading_rad"][rows] = sh.value
        out["vx_mps"][rows] = sx.rate
        out["vy_mps"][rows] = sy.rate
        out["omega_radps"][rows] = sh.rate
        out["ax_mps2"][rows] = sx.accel
        out["ay_mps2"][rows] = sy.accel
        # ... the persistent part is not averaged: added per sample, independent per corner.
        # The innovations of each signal tell how much larger the noise in the pose
        # direction is than the fit residuals show (r_scale, maximum likelihood). Fed
        # only the fresh part, the innovations also carry the persistent part, which
        # alone makes r_scale = 1 / (1 - lag-1 correlation); only the excess beyond that
        # enlarges the persistent part.
        pv = persistent_px[m] ** 2 * np.diagonal(unit, axis1=1, axis2=2).T  # (3, M)
        vx = max(1.0, sx.r_scale * keep) * np.interp(rows, idx[m], pv[0])
        vy = max(1.0, sy.r_scale * keep) * np.interp(rows, idx[m], pv[1])
        reg_var = (np.nan_to_num(reg_err[rows]) ** 2 + bias_var[rows]
                   + np.sum(lock_var[rows] * _lock_share(
                       sx, sy, np.sqrt(np.diagonal(unit, axis1=1, axis2=2)), fresh_px[m],
                       np.interp(rows, idx[m], np.arange(m.sum())), step_px[rows]), axis=1))
        out["sigma_xy_m"][rows] = np.sqrt(sx.sigma_value**2 + sy.sigma_value**2 + vx + vy
                                          + reg_var)
        # The heading's persistent part turns the whole outline, which the residuals
        # understate (detector.ROTATION_EXCESS); the larger excess of the two is kept.
        hv = max(ROTATION_EXCESS**2, sh.r_scale * keep) * np.interp(rows, idx[m], pv[2])
        out["sigma_heading_rad"][rows] = np.sqrt(sh.sigma_value**2 + hv)
        interpolated[rows] = ~ok[rows]
    return out, interpolated, fits


def finish_track(records, robot, field_profile, settings=None, *, readout_source="given",
                 video_info=None, timing=None, warnings=None) -> TrackResult:
    """Smooth the per-frame fixes into the truth track and gather the quality.

    Parameters
    ----------
    records : FrameRecords
        From :func:`~vidodo.tracking.frame_loop.track_frames`.
    robot : profiles.RobotProfile
    field_profile : profiles.FieldProfile
    settings : TrackSettings, optional
        ``readout_s`` (None counts as 0), ``max_gap_s``, ``corner_sigma_px``,
        ``corner_bias_px`` are used here.
    readout_source : {'camera profile', 'given', 'none'}
        Where ``settings.readout_s`` came from; with 'none' the readout is estimated
        from the marker shear when that estimate is usable.
    video_info : video.VideoInfo, optional
    timing : video.FrameTiming, optional
        Frame times (the records' own otherwise), dropped and duplicated frames.
    warnings : list of str, optional
        Warnings gathered so far; extended in place and returned in the result.

    Returns
    -------
    TrackResult
        Without ``timings_s``.

    Raises
    ------
    TrackingError
        The marker was never found (the message lists the IDs that were seen).
    """
    settings = TrackSettings() if settings is None else settings
    warnings = [] if warnings is None else warnings
    acc = records
    n = len(acc.t)
    t = np.asarray(timing.t_s if timing is not None else acc.t, dtype=float)[:n]
    ok = np.array([f is not None for f in acc.fix], dtype=bool)
    seen = {f"{fam}:{i}": c for (fam, i), c in sorted(acc.detector.ids_seen.items())}
    _check_found(acc, robot, ok, seen)
    idx = np.flatnonzero(ok)
    fixes = [acc.fix[i] for i in idx]
    noise, noise_parts = _corner_noise(fixes, idx, settings.corner_sigma_px)
    mpp, reg_err, reg_heading = _registration_error(acc, fixes, idx, n)
    common = (corner_bias_var_m2(_corner_bias_px(settings), mpp),
              *_lock_var(acc, idx, n, settings.refine))
    run = _Run(t, idx, ok, _segments(idx, t, settings.max_gap_s), fixes, reg_err, mpp,
               common, reg_heading)
    readout_s = float(settings.readout_s or 0.0)
    frac = np.nan_to_num(np.asarray(acc.frac, float)[idx])
    first = _smooth_run(run, t[idx] + frac * readout_s, noise_parts, noise)
    readout = _readout(acc, run, first[0], noise.sigma_px, readout_s, readout_source)
    if readout.refit:
        first = _smooth_run(run, t[idx] + frac * readout.readout_s, noise_parts, noise)
    out, interpolated, fits = first
    _add_timing_sigma(out, np.interp(np.arange(n), idx, frac), readout_sigma_s(readout),
                      _view_timing(acc, idx, n, frac, readout))
    gaps = _long_gaps(run.segs, t, n)
    # Heading continuous across long gaps: keep each segment's unwrapped value.
    out["speed_mps"] = np.hypot(out["vx_mps"], out["vy_mps"])
    track = pd.DataFrame(out, columns=TRACK_COLUMNS)
    track["detected"] = ok.copy()
    track["interpolated"] = interpolated
    for name, v in shared_columns(_shared(acc, idx, n, settings, out["sigma_xy_m"])).items():
        track[name] = v
    quality = _quality(acc, run, noise, readout, settings, gaps, interpolated, fits, seen,
                       timing)
    if video_info is not None:
        quality["orientation_deg"] = video_info.orientation_deg
        quality["size_px"] = [video_info.width_px, video_info.height_px]
    if timing is not None:
        warnings.extend(timing.warnings)
    _size_warnings(acc, robot, field_profile, quality, warnings)
    _quality_warnings(ok, gaps, settings.max_gap_s, quality, readout, warnings)
    return TrackResult(
        track=track,
        quality=quality,
        warnings=warnings,
        registrations=pd.DataFrame({
            "t_s": t, "ok": np.asarray(acc.reg_ok, bool),
            "rms_px": np.asarray(acc.reg_rms_px, float),
            "rms_floor_m": np.asarray(acc.reg_rms_m, float),
            "fresh": np.asarray(acc.reg_fresh, bool),
        }, columns=REGISTRATION_COLUMNS),
    )


@dataclass(frozen=True)
class _Run:
    """The detections of a run, ready to smooth."""

    t: np.ndarray
    idx: np.ndarray
    ok: np.ndarray
    segs: list
    fixes: list
    reg_err: np.ndarray
    mpp: np.ndarray
    common: tuple
    reg_heading: np.ndarray


@dataclass(frozen=True)
class _Readout:
    """The readout time used, where from, and the estimate from the marker shear."""

    readout_s: float
    source: str
    estimate_s: float
    sigma_s: float
    frames: int
    usable: bool
    refit: bool


def _check_found(acc, robot, ok, seen):
    """Refuse a run in which the robot's marker was never found."""
    if ok.any():
        return
    wanted = ", ".join(f"{m.family} id {m.id}" for m in robot.markers)
    why = ""
    if not any(acc.reg_ok):
        why = (" and the floor could not be registered in any frame ("
               + "; ".join(acc.policy.failures) + ")")
    raise TrackingError(
        f"the robot's marker ({wanted}) was never found in {len(acc.t)} frames{why}; "
        f"IDs seen: {', '.join(seen) if seen else 'none'} - check the marker id and "
        "family in the robot profile"
    )


def _corner_noise(fixes, idx, corner_sigma_px):
    """The run's corner noise, and per fix its fresh and persistent part [px].

    From the rigid fits' residuals (chi^2 / dof), split into a fresh and a persistent
    part by the residuals' frame-to-frame correlation; a given sigma is split likewise.
    """
    noise = estimate_corner_noise(fixes, idx)
    given = corner_sigma_px is not None
    if given:
        g = float(corner_sigma_px)
        noise = CornerNoise(g, g * math.sqrt(1.0 - noise.lag1_corr),
                            g * math.sqrt(noise.lag1_corr), noise.lag1_corr, noise.dof,
                            noise.pairs)
    sigma_px = noise.sigma_px
    # The corner noise and its persistent share change along a run: per fix, from the
    # fits around it (a given sigma is kept as given).
    scale, rho = local_corner_noise(fixes, idx, noise)
    if given:
        scale = np.ones_like(scale)
    fresh_px = np.maximum(sigma_px * np.sqrt(scale * (1.0 - rho)), 1e-3 * sigma_px)
    persistent_px = sigma_px * np.sqrt(scale * rho)
    return noise, (fresh_px, persistent_px, "given" if given else "fit residuals")


def _registration_error(acc, fixes, idx, n):
    """Floor metres per pixel at the robot, and the registration's error there.

    Returns ``(mpp, reg_err, reg_heading)``: [m/px], radial RMS [m] and heading [rad].
    """
    mpp = np.interp(np.arange(n), idx, [f.m_per_px for f in fixes])
    # The registration's own parameter error carried through the pose fit
    # (registration_error.registration_pose_covs), where the registration has a
    # covariance; else its mean prediction error; or, where larger, its held-out
    # prediction error (error_model.registration_sigma_m, shared with the planner).
    held = [int(i) for i in idx if int(i) in acc.reg_inputs]
    by_frame = dict(zip(held, registration_pose_covs([acc.reg_inputs[i] for i in held]),
                        strict=True))
    cov = np.array([by_frame.get(int(i), np.full((3, 3), np.nan)) for i in idx])
    var_xy = np.interp(np.arange(n), idx, cov[:, 0, 0] + cov[:, 1, 1])
    var_h = np.interp(np.arange(n), idx, cov[:, 2, 2])
    reg_err = registration_sigma_m(var_xy, mpp, acc.reg_rms_px, acc.reg_n,
                                   rms_m=acc.reg_rms_m, prediction_px=acc.reg_pred_px)
    return mpp, reg_err, np.sqrt(np.where(np.isfinite(var_h), var_h, 0.0))


def _lock_var(acc, idx, n, refine):
    """Per frame, the floor variance of the markers' pixel locking of u and of v [m^2]
    (:mod:`vidodo.tracking.pixel_lock`) and the markers' image motion along u and v
    [px per frame] (mean corner, between detections); both (n, 2), interpolated
    between detections."""
    held = [int(i) for i in idx if int(i) in acc.reg_inputs]
    if not held:
        return np.zeros((n, 2)), np.zeros((n, 2))
    inputs = [acc.reg_inputs[i] for i in held]
    frames = [(reg, corners, heights) for _fix, corners, heights, reg in inputs]
    mid = np.array([np.vstack(corners).mean(axis=0) for _f, corners, _h, _r in inputs])
    step = np.zeros((len(held), 2))
    if len(held) > 1:
        step[1:] = np.abs(np.diff(mid, axis=0)) / np.diff(held)[:, None]
        step[0] = step[1]
    grid = np.arange(n)
    lock = lock_floor_vars(frames, refine)
    return (np.column_stack([np.interp(grid, held, lock[:, k]) for k in (0, 1)]),
            np.column_stack([np.interp(grid, held, step[:, k]) for k in (0, 1)]))


def _lock_share(sx, sy, unit_sd, fresh_px, pos, step_px):
    """Share of the pixel-locking variance of u and of v a smoothed sample keeps [-].

    Locking of v changes with the marker's sub-pixel place in v (of u, in u): a marker
    that moves that way lets the smoother average it over the frames it spans, as an
    edge averages it over the phases it crosses (``lock_attenuation`` of the image
    motion over the smoother's window). The window in frames is the ratio of a
    fix's measurement variance to the smoothed variance (``n`` equal measurements
    averaged have ``1 / n`` of the variance), at least 1.

    Parameters
    ----------
    sx, sy : SmoothedSignal
    unit_sd : ndarray (M, 3)
        Square root of the diagonal of the fixes' unit covariances.
    fresh_px : ndarray (M,)
    pos : ndarray (R,)
        Each sample's place among the fixes (fractional index).
    step_px : ndarray (R, 2)
        Image motion along u and v [px per frame].

    Returns
    -------
    ndarray (R, 2)
    """
    meas = (sx.r_scale * (fresh_px * unit_sd[:, 0]) ** 2
            + sy.r_scale * (fresh_px * unit_sd[:, 1]) ** 2)
    smoothed = sx.sigma_value ** 2 + sy.sigma_value ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        frames = np.maximum(np.interp(pos, np.arange(len(meas)), meas) / smoothed, 1.0)
    return np.nan_to_num(lock_attenuation(step_px * frames[:, None]), nan=1.0) ** 2


def _shared(acc, idx, n, settings, sigma_xy_m):
    """The run's shared position error as modes (:mod:`vidodo.tracking.shared_error`),
    (n, SHARED_MODES, 2) [m]; scaled down where the modes hold more variance than the
    sample's whole 1-sigma (the track's terms use the image scale, the modes the full
    image-to-floor derivative), zero where the track is NaN."""
    held = [int(i) for i in idx if int(i) in acc.reg_inputs]
    still = bool(acc.policy.still) and acc.policy.moved_count == 0
    modes = shared_modes([acc.reg_inputs[i] for i in held], np.array(held, int), n,
                         _corner_bias_px(settings), still)
    var = np.sum(modes**2, axis=(1, 2))
    total = np.nan_to_num(np.asarray(sigma_xy_m, float)) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(var > total, np.sqrt(total / var), 1.0)
    return modes * np.nan_to_num(scale)[:, None, None]


def _corner_bias_px(settings) -> float:
    """The common corner shift's 1-sigma the track carries [px]: the given one, else
    the refinement's own."""
    if settings.corner_bias_px is not None:
        return float(settings.corner_bias_px)
    return refine_bias_sigma_px(settings.refine)


def _smooth_run(run, t_meas, noise_parts, noise):
    """:func:`_smooth` of the run's fixes measured at ``t_meas``."""
    fixes = run.fixes
    x = np.array([f.x_m for f in fixes])
    y = np.array([f.y_m for f in fixes])
    th = np.unwrap(np.array([f.heading_rad for f in fixes]))
    cov_unit = np.array([f.cov_unit for f in fixes])
    fresh_px, persistent_px, _ = noise_parts
    out, interpolated, fits = _smooth(run.t, run.idx, run.ok, run.segs, t_meas, x, y, th,
                                      cov_unit, run.reg_err, run.common, fresh_px,
                                      persistent_px, 1.0 - noise.lag1_corr)
    # The registration's heading error, like its position error, is the same in
    # neighbouring frames: added per sample, not smoothed.
    out["sigma_heading_rad"] = np.hypot(out["sigma_heading_rad"], run.reg_heading)
    return out, interpolated, fits


def _readout(acc, run, first, sigma_px, readout_s, readout_source):
    """The readout estimated from the marker shear, and whether it replaces none."""
    idx = run.idx
    motion = (run.fixes, [acc.corner_frac.get(int(i), np.zeros(0)) for i in idx],
              first["vx_mps"][idx], first["vy_mps"][idx], first["omega_radps"][idx])
    terms = readout_terms(*motion)  # per moving frame, used twice below
    est, est_sigma, est_frames = readout_from_terms(*terms, sigma_px)
    usable = (math.isfinite(est) and est_sigma < 0.004 and est > 3 * est_sigma
              and est < 0.1)
    # The estimate's spread over blocks of frames, where larger than the regression's
    # own sigma, is how far it may be off (the choice to use it stays with the latter).
    spread = readout_block_sigma(*terms)
    honest = float(np.fmax(est_sigma, spread))
    if readout_source == "none" and usable:
        return _Readout(est, "estimated", est, honest, est_frames, usable, True)
    return _Readout(readout_s, readout_source, est, honest, est_frames, usable, False)


def readout_sigma_s(readout) -> float:
    """How far the readout time used may be off [s] (1-sigma).

    From a camera profile or the command line: taken as right (0; the marker shear
    warns when it disagrees). Estimated from the marker shear: that estimate's sigma.
    Unknown (none used): detections are timed as if read at the frame time, off by the
    true readout: a phone's readout of up to :data:`UNKNOWN_READOUT_MAX_S` (RMS of a
    uniform spread over 0 to that), or the shear estimate (its value and sigma) where
    that says more (an estimate too uncertain to be used is not trusted to say less).
    """
    if readout.source == "estimated":
        return float(readout.sigma_s)
    if readout.source != "none":
        return 0.0
    prior = UNKNOWN_READOUT_MAX_S / math.sqrt(3.0)
    est, sigma = readout.estimate_s, readout.sigma_s
    if math.isfinite(est) and math.isfinite(sigma):
        return max(prior, math.hypot(min(max(est, 0.0), UNKNOWN_READOUT_MAX_S), sigma))
    return prior


def quality_readout_sigma_s(quality) -> float:
    """:func:`readout_sigma_s` of a finished track, from its quality record (the
    ``readout_*`` entries of :attr:`TrackResult.quality`) [s]."""
    def number(key):
        v = quality.get(key)
        return float(v) if isinstance(v, int | float) else math.nan

    return readout_sigma_s(_Readout(number("readout_s"), str(quality.get("readout_source", "none")),
                                    number("readout_estimate_s"),
                                    number("readout_estimate_sigma_s"), 0, False, False))


def _view_timing(acc, idx, n, frac, readout):
    """Per frame, the floor displacement per second of readout error from the camera's
    own motion [m/s], (n, 2).

    A registration of a moving camera without a known readout (none in the camera
    profile: the registrar then fits one pose per frame, for the instant the floor
    corners it used were read, about mid-frame) places a marker read a fraction ``f`` of
    the readout after the frame start with the floor as it was ``(f - 1/2)`` readouts
    earlier: off by the view's rate (``registration_error.view_rate``) times that. The
    readout's uncertainty is the unknown one's (:func:`readout_sigma_s` for none known)
    whether or not the track was retimed by an estimate: the registration was not.
    """
    if readout.source not in ("none", "estimated"):
        return np.zeros((n, 2))
    rate = np.array([acc.view_rate.get(int(i), np.zeros(2)) for i in idx]).reshape(-1, 2)
    lever = (frac - 0.5)[:, None] * rate
    sigma = readout_sigma_s(replace(readout, source="none"))
    return np.column_stack([np.interp(np.arange(n), idx, lever[:, k]) * sigma
                            for k in (0, 1)])


def _add_timing_sigma(out, frac, sigma_readout_s, view=None):
    """Add to the 1-sigma the timing error of each sample: read a fraction ``frac`` of
    the readout after the frame time, a readout off by ``sigma_readout_s`` moves the
    position by velocity x frac x that, the heading by turn rate x frac x that; plus
    ``view`` (n, 2) [m], the camera's own motion over its readout error (see
    :func:`_view_timing`; in quadrature: the two readout errors differ when the track
    was retimed by an estimate and the registration was not)."""
    view = np.zeros((len(frac), 2)) if view is None else np.nan_to_num(view)
    if not sigma_readout_s > 0 and not np.any(view):
        return
    dt = np.nan_to_num(frac) * sigma_readout_s
    speed = np.hypot(out["vx_mps"], out["vy_mps"])
    out["sigma_xy_m"] = np.sqrt(out["sigma_xy_m"] ** 2
                                + timing_var_m2(speed, frac, sigma_readout_s)
                                + np.sum(view ** 2, axis=1))
    out["sigma_heading_rad"] = np.hypot(out["sigma_heading_rad"],
                                        np.abs(out["omega_radps"]) * dt)


def _long_gaps(segs, t, n):
    """Long gaps: between segments and at the ends."""
    gaps = []
    bounds = [(-1, segs[0][0])] + [(segs[k][1], segs[k + 1][0]) for k in range(len(segs) - 1)]
    bounds.append((segs[-1][1], n))
    for a, b in bounds:
        if b - a > 1:
            t0 = t[a] if a >= 0 else t[0]
            t1 = t[b] if b < n else t[-1]
            gaps.append({"first_frame": a + 1, "last_frame": b - 1,
                         "t_start_s": float(t0), "t_end_s": float(t1)})
    return gaps


def _quality(acc, run, noise, readout, settings, gaps, interpolated, fits, seen, timing):
    """The quality record of the track (see :attr:`TrackResult.quality`)."""
    ok, n = run.ok, len(run.ok)
    cells = np.asarray(acc.cell, float)[run.idx]
    cells = cells[np.isfinite(cells)]
    return {
        "frames": n,
        "detected_frames": int(ok.sum()),
        "detected_fraction": float(ok.mean()),
        "interpolated_frames": int(interpolated.sum()),
        "long_gaps": gaps,
        "short_gap_max_s": settings.max_gap_s,
        "marker_cell_px_min": float(cells.min()) if cells.size else float("nan"),
        "marker_cell_px_median": float(np.median(cells)) if cells.size else float("nan"),
        "marker_scale_median": float(np.median([f.scale for f in run.fixes])),
        "corner_sigma_px": noise.sigma_px,
        "corner_sigma_source": "given" if settings.corner_sigma_px is not None
        else "fit residuals",
        "corner_bias_px": _corner_bias_px(settings),
        "corner_fresh_px": noise.fresh_px,
        "corner_persistent_px": noise.persistent_px,
        "corner_lag1_corr": noise.lag1_corr,
        "corner_noise_pairs": noise.pairs,
        "readout_s": readout.readout_s,
        "readout_source": readout.source,
        "readout_estimate_s": readout.estimate_s,
        "readout_estimate_sigma_s": readout.sigma_s,
        "readout_estimate_frames": readout.frames,
        "rejected_jumps": acc.rejected,
        "window_searches": acc.window_searches,
        "full_frame_searches": acc.full_searches,
        "unrefined_detections": acc.unrefined,
        "upscaled_window_detections": acc.upscaled,
        "ids_seen": seen,
        "smoother": [dict(zip(("q_x", "r_x", "q_y", "r_y", "q_heading", "r_heading",
                                         "innovation_lag1_x", "innovation_lag1_y",
                                         "innovation_lag1_heading"), f,
                              strict=True)) for f in fits],
        "dropped_frames": [] if timing is None else [list(d) for d in timing.dropped],
        "duplicated_frames": [] if timing is None else list(timing.duplicated),
        "repeated_images_skipped": acc.repeated,
        "frame_interval_s": None if timing is None else timing.interval_s,
        "registration": {
            "registered_frames": acc.policy.registered,
            "frames_with_registration": int(np.sum(acc.reg_ok)),
            "rms_px_median": _nanmedian(acc.reg_rms_px),
            "rms_floor_m_median": _nanmedian(acc.reg_rms_m),
            "camera_still": bool(acc.policy.still),
            "camera_moved_count": acc.policy.moved_count,
            "failures": dict(acc.policy.failures),
        },
    }


def _quality_warnings(ok, gaps, max_gap_s, quality, readout, warnings):
    """Warnings about gaps, marker size and the readout time."""
    n = ok.size
    est, est_sigma, readout_s = readout.estimate_s, readout.sigma_s, readout.readout_s
    if ok.mean() < 0.9 or gaps:
        listed = ", ".join(f"{g['t_start_s']:.2f}-{g['t_end_s']:.2f} s" for g in gaps[:10])
        more = f" (+{len(gaps) - 10} more)" if len(gaps) > 10 else ""
        warnings.append(
            f"marker found in {ok.sum()} of {n} frames ({100 * ok.mean():.1f}%); "
            f"untracked gaps longer than {max_gap_s:.2f} s: {listed or 'none'}{more}"
        )
    if abs(quality["marker_scale_median"] - 1.0) > 0.01:
        warnings.append(
            f"the marker measures {100 * quality['marker_scale_median']:.1f}% of the size "
            "in the robot profile (with the marker height as given); check size_m and z_m"
        )
    if readout.source == "estimated":
        warnings.append(
            f"rolling-shutter readout estimated from the marker shear: {1000 * est:.1f} "
            f"+- {1000 * est_sigma:.1f} ms (none in the camera profile); put the right value "
            "in the camera profile (readout_s) if known"
        )
    elif (readout.source != "none" and readout.usable
          and abs(est - readout_s) > 4 * est_sigma + 0.003):
        warnings.append(
            f"the marker shear suggests a readout of {1000 * est:.1f} +- {1000 * est_sigma:.1f}"
            f" ms, not the {1000 * readout_s:.1f} ms used; check readout_s"
        )
    if readout.source == "none":
        warnings.append(
            "no rolling-shutter readout time known (camera profile readout_s = 0): detection "
            "times are the frame times; a phone's readout of 10-30 ms shifts fast motion"
        )


def _nanmedian(values):
    a = np.asarray(values, float)
    return float(np.nanmedian(a)) if np.isfinite(a).any() else float("nan")


def _size_warnings(acc, robot, field_profile, quality, warnings):
    """Warn when marker cells get too small to detect, with what would fix it."""
    measured = quality["marker_cell_px_min"]
    pred = acc.predicted_cells[0] if acc.predicted_cells else None
    worst = measured
    where = "where the robot drove"
    if pred is not None:
        quality["marker_cell_px_field_min"] = float(np.min(pred))
        quality["marker_cell_px_field"] = {
            f"{m.family}:{m.id}": [float(v) for v in pred[i]]
            for i, m in enumerate(robot.markers)
        }
        if float(np.min(pred)) < worst or not math.isfinite(worst):
            worst = float(np.min(pred))
            where = "at the far side of the field"
    if not math.isfinite(worst) or worst >= MIN_CELL_PX:
        return
    ratio = MIN_CELL_PX / worst
    m = min(robot.markers, key=lambda mk: mk.size_m)
    advice = (f"use a marker of at least {m.size_m * ratio * 1000:.0f} mm "
              f"(now {m.size_m * 1000:.0f} mm)")
    reg = getattr(acc, "first_registration", None)
    if reg is not None and pred is not None:
        fx, fy = field_profile.size_m
        spots = np.array([[0, 0], [fx, 0], [fx, fy], [0, fy], [fx / 2, fy / 2]], float)
        k = int(np.argmin(pred.min(axis=0)))
        dist, centre = _camera_distance(reg, spots[k], m.z_m)
        advice += (f", or bring the camera within {dist / ratio:.2f} m of that spot (now "
                   f"{dist:.2f} m; camera {centre[2]:.2f} m above the floor)")
    warnings.append(
        f"marker cells are only {worst:.1f} px wide {where} (measured minimum "
        f"{measured:.1f} px over the run; detection needs about {MIN_CELL_PX:.0f} px): {advice}"
    )
