"""The frame loop: per frame, register the floor when due, find the robot's markers in a
window around where they are predicted (falling back to the whole frame), and fit the
robot's pose. Only per-frame numbers are kept (:class:`FrameRecords`), no images.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import cv2
import numpy as np

from ..profiles import marker_corners_local
from ..timings import StageTimes
from ..video import readout_fraction
from .detector import MarkerDetector, _area
from .pose_fit import PoseFix, fit_pose
from .registration_error import view_rate
from .registration_policy import RegistrationPolicy
from .settings import TrackSettings

__all__ = ["FrameRecords", "track_frames"]

WINDOW_SIDE_FRAC = 0.2
WINDOW_PAD_PX = 8.0
"""Search window around the predicted marker: this share of its side plus this many
pixels on every side (plus 1.5 x the last frame-to-frame step): two cells of quiet
zone and threshold context for a 10-cell tag. The AprilTag quad search costs about
three times less than with 0.3 x side + 12 px at 1080p (floor texture makes quads)."""

CONTEXT_SIDE_FRAC = 0.3
CONTEXT_PAD_PX = 12.0
"""The wider window of the SUBPIX pass (on its own thread): its adaptive threshold
wants context around the outline."""

SHRINK_PER_FRAME = 0.5
"""In a window search, outlines shorter than this share of the last detection's side are
not examined: a marker does not halve its apparent size between nearby frames."""


# ------------------------------------------------------------------ the tracking
@dataclass
class FrameRecords:
    """Per-frame numbers gathered while streaming (no images)."""

    t: list = field(default_factory=list)
    fix: list = field(default_factory=list)  # PoseFix or None per frame
    frac: list = field(default_factory=list)  # readout fraction of the detection
    cell: list = field(default_factory=list)  # min cell width seen in the frame [px]
    reg_ok: list = field(default_factory=list)
    reg_rms_px: list = field(default_factory=list)
    reg_pred_px: list = field(default_factory=list)
    reg_n: list = field(default_factory=list)
    reg_rms_m: list = field(default_factory=list)
    reg_fresh: list = field(default_factory=list)
    n_markers: list = field(default_factory=list)
    rejected: int = 0
    full_searches: int = 0
    window_searches: int = 0
    repeated: int = 0
    unrefined: int = 0
    upscaled: int = 0
    corner_frac: dict = field(default_factory=dict)  # frame index -> (N,) fractions
    reg_inputs: dict = field(default_factory=dict)  # frame index -> (fix, corners,
    # heights, registration): what registration_error.registration_pose_covs needs, for
    # all frames at once when the track is finished (off the per-frame path)
    view_rate: dict = field(default_factory=dict)  # frame index -> (2,) [m/s]: how fast
    # the floor point under the marker's pixel moves with the camera (0 when still)
    last_reg: tuple = (None, math.nan)  # the registration of the previous frame, its time
    predicted_cells: list = field(default_factory=list)
    times: StageTimes = field(default_factory=StageTimes)


def _roi(last, prev, frame_shape, gap_frames, side_frac=None, pad_px=None):
    """Search window around the corners predicted from the last two detections."""
    if last is None:
        return None
    if prev is not None and prev.shape != last.shape:
        prev = None
    # Called two or three times a frame on a handful of corners: few NumPy calls.
    lo, hi = last.min(axis=0), last.max(axis=0)
    side = float((hi - lo).max())
    step = 0.0
    if prev is not None:
        moved = last - prev
        step = float(np.abs(moved).max())
        if gap_frames <= 3:
            pred = last + moved * gap_frames
            lo, hi = np.minimum(lo, pred.min(axis=0)), np.maximum(hi, pred.max(axis=0))
    side_frac = WINDOW_SIDE_FRAC if side_frac is None else side_frac
    pad_px = WINDOW_PAD_PX if pad_px is None else pad_px
    margin = side_frac * side + pad_px + 1.5 * step * gap_frames
    h, w = frame_shape[:2]
    u0, v0 = max(math.floor(lo[0] - margin), 0), max(math.floor(lo[1] - margin), 0)
    u1, v1 = min(math.ceil(hi[0] + margin), w), min(math.ceil(hi[1] + margin), h)
    if u1 - u0 < 16 or v1 - v0 < 16 or (u1 - u0) * (v1 - v0) > 0.5 * w * h:
        return None
    return (int(u0), int(v0), int(u1), int(v1))


def _far_field_cells(reg, markers, field_profile, cells_across):
    """Predicted cell width [px] of each marker at the field's corners and centre."""
    K = getattr(reg, "camera_matrix", None)
    rvec = getattr(reg, "rvec", None)
    tvec = getattr(reg, "tvec", None)
    if K is None or rvec is None or tvec is None:
        return None
    dist = getattr(reg, "dist_coeffs", None)
    dist = np.zeros(5) if dist is None else np.asarray(dist, float)
    fx, fy = field_profile.size_m
    spots = np.array([[0, 0], [fx, 0], [fx, fy], [0, fy], [fx / 2, fy / 2]], float)
    out = []
    for i, m in enumerate(markers):
        loc = marker_corners_local(m.size_m)
        pts = np.concatenate([
            np.column_stack([loc + s, np.full(4, m.z_m)]) for s in spots
        ])
        img, _ = cv2.projectPoints(pts, np.asarray(rvec, float), np.asarray(tvec, float),
                                   np.asarray(K, float), dist)
        img = img.reshape(-1, 4, 2)
        d1, d2 = img[:, 2] - img[:, 0], img[:, 3] - img[:, 1]
        area = 0.5 * np.abs(d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0])
        out.append(np.sqrt(area) / cells_across(i))
    return np.array(out)  # (markers, spots)




@dataclass
class _Last:
    """What the loop keeps of the last detections."""

    corners: np.ndarray | None = None
    """All corners of the last detection, (N, 2) [px]."""
    prev: np.ndarray | None = None
    """Those of the one before, when it was at most 3 frames earlier."""
    index: int = -1
    fix: PoseFix | None = None
    fix_t: float = -math.inf
    cell: float = math.inf
    side: float = 0.0


def track_frames(frames, robot, field_profile, registrar, settings=None, *, video_info=None,
                 repeated=None, progress=None):
    """Detect and fit the robot pose in a stream of frames (the streaming part).

    Parameters
    ----------
    frames : iterable of (int, float, ndarray)
        ``(index, t_s, frame_bgr)``.
    robot : profiles.RobotProfile
    field_profile : profiles.FieldProfile
    registrar : object with ``register(frame_bgr, t_s)`` -> FrameRegistration
    settings : TrackSettings, optional
        Refinement, detector, window search, registration policy, jump limits.
    video_info : video.VideoInfo, optional
        Used for the rolling-shutter scan axis (image height otherwise) and the frame
        count handed to ``progress``.
    repeated : callable, optional
        Returns True when the frame just received repeats the previous image.
    progress : callable, optional
        ``progress(frames_done, frames_total)``.

    Returns
    -------
    FrameRecords
        Per-frame fixes and statistics (see :func:`~vidodo.tracking.finish.finish_track`).
    """
    records = FrameRecords()
    _track_into(records, frames, robot, field_profile, registrar, settings, video_info,
                repeated, progress)
    return records


def _track_into(acc, frames, robot, field_profile, registrar, settings, video_info, repeated,
                progress):
    """:func:`track_frames` into the given records (kept when the stream breaks off)."""
    settings = TrackSettings() if settings is None else settings
    det = MarkerDetector(robot.markers, refine=settings.refine, detector=settings.detector)
    # A reader handing out raw luma (VideoReader(luma_raw=True)): its grey mapping is
    # applied to the detection windows and to the frames registered, nowhere else.
    lut = det.lut = getattr(frames, "raw_lut", None)
    policy = RegistrationPolicy(registrar, field_profile, settings.register_every)
    acc.detector = det
    acc.policy = policy
    total = None if video_info is None else (video_info.frame_count or None)
    last = _Last()
    stream = iter(frames)
    coming = next(stream, None)
    while coming is not None:
        index, t_s, frame = coming
        coming = next(stream, None)
        acc.t.append(float(t_s))
        with acc.times.stage("register"):
            seen = cv2.LUT(frame, lut) if lut is not None and policy.due(index, t_s) \
                else frame
            reg, fresh = policy.update(
                seen, index, t_s,
                lambda f=last.fix, shp=frame.shape: _robot_mask(robot, f, policy.current, shp))
        t_detect = time.perf_counter()
        _record_registration(acc, reg, fresh, robot, field_profile)
        fix, frac, cell, nm = None, np.nan, np.nan, 0
        if repeated is not None and repeated():
            acc.repeated += 1
        elif reg is not None:
            fix, frac, cell, nm = _frame_fix(acc, frame, index, t_s, reg, robot, settings,
                                             video_info, last)
        acc.last_reg = (reg, float(t_s))
        acc.fix.append(fix)
        acc.frac.append(frac)
        acc.cell.append(cell)
        acc.n_markers.append(nm)
        if progress is not None:
            progress(index + 1, total)
        if settings.window and coming is not None and last.corners is not None \
                and det.refine == "hybrid":
            # Start the next frame's SUBPIX pass while this thread moves on.
            gap = coming[0] - last.index
            det.prefetch(coming[2], _context_roi(last.corners, last.prev, coming[2].shape, gap),
                         SHRINK_PER_FRAME * last.side if gap <= 3 else None)
        acc.times.add("detect", time.perf_counter() - t_detect)
    return acc


def _record_registration(acc, reg, fresh, robot, field_profile):
    """Note the registration in effect for this frame (and the far-field cell sizes)."""
    if fresh and not acc.predicted_cells:
        cells = _far_field_cells(reg, robot.markers, field_profile, acc.detector.cells_across)
        if cells is not None:
            acc.predicted_cells.append(cells)
            acc.first_registration = reg
    acc.reg_ok.append(bool(reg is not None))
    acc.reg_rms_px.append(float(getattr(reg, "rms_px", np.nan)) if reg else np.nan)
    acc.reg_n.append(int(getattr(reg, "n_points", 0) or 0) if reg else 0)
    acc.reg_rms_m.append(float(getattr(reg, "rms_floor_m", np.nan)) if reg else np.nan)
    acc.reg_pred_px.append(float(getattr(reg, "prediction_px", 0.0)) if reg else 0.0)
    acc.reg_fresh.append(fresh)


def _find_markers(acc, frame, index, last, window):
    """The robot's markers in this frame: in the predicted window first, then anywhere."""
    det = acc.detector
    dets = []
    roi = _roi(last.corners, last.prev, frame.shape, index - last.index) if window else None
    if roi is not None:
        acc.window_searches += 1
        least = SHRINK_PER_FRAME * last.side if index - last.index <= 3 else None
        wide = (_context_roi(last.corners, last.prev, frame.shape, index - last.index)
                if det.refine == "hybrid" else None)  # only its SUBPIX pass uses it
        dets = det.detect(frame, roi, min_side_px=least, context_roi=wide)
        if not dets and last.cell < 4.0:  # small marker: try a 2x enlarged window
            dets = det.detect(frame, roi, upscale=2, min_side_px=least, context_roi=wide)
            acc.upscaled += bool(dets)
    if not dets:
        acc.full_searches += 1
        found = det.detect(frame, coarse=True)
        if found:
            around = np.vstack([d.corners_px for d in found])
            roi = _roi(around, None, frame.shape, 1)
            dets = det.detect(frame, roi) if roi is not None else det.detect(frame)
            if not dets:  # refinement failed (tiny or blurred marker): keep coarse
                dets = found
                acc.unrefined += 1
    return dets


def _implausible(fix, t_s, last, settings):
    """True when the fix jumps or turns faster than the limits since the last one."""
    if last.fix is None:
        return False
    dt = t_s - last.fix_t
    jump = math.hypot(fix.x_m - last.fix.x_m, fix.y_m - last.fix.y_m)
    turn = abs(math.remainder(fix.heading_rad - last.fix.heading_rad, math.tau))
    return dt < 0.5 and (jump > settings.max_speed_mps * dt + 0.05
                         or turn > settings.max_omega_radps * dt + 0.3)


def _frame_fix(acc, frame, index, t_s, reg, robot, settings, video_info, last):
    """Find, fit and check the robot's pose in one frame; remember it in ``last``.

    Returns ``(fix or None, readout fraction, smallest cell [px], markers used)``.
    """
    det = acc.detector
    dets = _find_markers(acc, frame, index, last, settings.window)
    fix = fit_pose(dets, robot.markers, reg) if dets else None
    if fix is not None and len(dets) > 2:
        fix, dets = _drop_outlier_marker(fix, dets, robot.markers, reg)
    if fix is not None and _implausible(fix, t_s, last, settings):
        acc.rejected += 1
        fix = None
    if fix is None:
        return None, np.nan, np.nan, 0
    allc = np.vstack([d.corners_px for d in dets])
    h = frame.shape[0]
    if video_info is not None:
        cfrac = readout_fraction(allc[:, 0], allc[:, 1], video_info)
    else:
        cfrac = allc[:, 1] / h
    frac = float(np.mean(cfrac))
    acc.corner_frac[index] = np.asarray(cfrac, float)
    acc.reg_inputs[index] = (fix, [d.corners_px for d in dets],
                             [robot.markers[d.marker_index].z_m for d in dets], reg)
    acc.view_rate[index] = view_rate(reg, acc.last_reg, t_s, allc.mean(axis=0),
                                     robot.markers[dets[0].marker_index].z_m)
    cell = min(math.sqrt(_area(d.corners_px)) / det.cells_across(d.marker_index)
               for d in dets)
    last.cell = cell
    last.side = min(math.sqrt(_area(d.corners_px)) for d in dets)
    last.prev = last.corners if index - last.index <= 3 else None
    last.corners = allc
    last.index = index
    last.fix, last.fix_t = fix, t_s
    return fix, frac, cell, len(dets)


def _context_roi(last, prev, frame_shape, gap_frames):
    """The wider window of the SUBPIX pass (see :data:`CONTEXT_SIDE_FRAC`)."""
    return _roi(last, prev, frame_shape, gap_frames, CONTEXT_SIDE_FRAC, CONTEXT_PAD_PX)


def _robot_mask(robot, fix, reg, shape):
    """Pixels the robot may cover (to keep it out of the floor registration), or None.

    The robot's box (profile length, width, height, grown by the marker offsets and
    20%) at its last pose is projected through the registration in effect.
    """
    if fix is None or reg is None or getattr(reg, "rvec", None) is None:
        return None
    reach = max(robot.length_m, robot.width_m) / 2.0 + max(
        math.hypot(m.x_m, m.y_m) + m.size_m for m in robot.markers)
    reach *= 1.2
    top = max([robot.height_m] + [m.z_m for m in robot.markers]) + 0.05
    sq = np.array([[-1, -1], [1, -1], [1, 1], [-1, 1]], float) * reach + (fix.x_m, fix.y_m)
    pts = np.vstack([np.column_stack([sq, np.zeros(4)]), np.column_stack([sq, np.full(4, top)])])
    try:
        dist = getattr(reg, "dist_coeffs", None)
        img, _ = cv2.projectPoints(pts, np.asarray(reg.rvec, float), np.asarray(reg.tvec, float),
                                   np.asarray(reg.camera_matrix, float),
                                   None if dist is None else np.asarray(dist, float))
    except cv2.error:
        return None
    img = img.reshape(-1, 2)
    if not np.all(np.isfinite(img)):
        return None
    h, w = shape[:2]
    img = np.clip(img, -4 * w, 4 * w)
    mask = np.zeros((h, w), np.uint8)
    cv2.fillConvexPoly(mask, cv2.convexHull(np.round(img).astype(np.int32)), 1)
    return mask.astype(bool)


def _drop_outlier_marker(fix, dets, markers, reg):
    """With three or more markers, drop one whose removal cuts the misfit sharply."""
    best = (fix, dets)
    for k in range(len(dets)):
        sub = dets[:k] + dets[k + 1:]
        f = fit_pose(sub, markers, reg)
        if f is not None and f.dof > 0 and fix.dof > 0 and \
                f.chi2_unit / f.dof < 0.1 * fix.chi2_unit / fix.dof and \
                fix.chi2_unit / fix.dof > 25.0:
            best = (f, sub)
    return best

