"""Floor registration: every frame's pixels mapped to floor metres, and back.

A frame is registered when the camera's intrinsics ``K``, its distortion and its pose
relative to the floor (``rvec, tvec``, floor -> camera, OpenCV convention, floor z up)
are known. Then :meth:`FrameRegistration.image_to_floor` undistorts a pixel, casts its
ray and meets the plane ``z = height_m`` (so a marker raised above the floor is placed
where it really is), and :meth:`FrameRegistration.floor_to_image` projects back.

The reference registration comes from one of three sources:

* ``markers``: fiducials lying flat on the floor at the positions in the field profile,
  found with ``cv2.aruco.ArucoDetector``;
* ``points``: a CSV of pixel-to-floor correspondences for the reference frame (columns
  ``u_px, v_px, x_m, y_m``), e.g. tile corners picked in an image viewer;
* ``grid``: the tile seams found automatically and the field's N x M grid fitted to
  them (:mod:`vidodo.registration.grid`); which corner is the origin comes from the profile's
  ``origin_hint`` or from one floor fiducial.

Markers and points give an initial fit that is then sharpened on the tile seams when
they are visible. The pose comes from the homography ``H ~ K [r1 r2 t]`` (Zhang, IEEE
PAMI 22(11), 2000, section 3.1) and is refined by Levenberg-Marquardt on all
observations. Without a camera profile the focal length is estimated from the
homography (square pixels, principal point at the image centre; Hartley & Zisserman,
*Multiple View Geometry*, 2nd ed., section 8.8), and radial distortion from the
straightness of the tile seams (grid observations only); otherwise it is set to none
and the quality report says so.

Later frames (:class:`FloorRegistrar`) are re-registered to the reference: a cheap
patch check first (a tripod that has not moved keeps the reference registration), then
floor corners tracked from the reference (:mod:`vidodo.floor_features`), floor
fiducials where visible, and feature matching with RANSAC as the last resort. A frame
that cannot be registered comes back with ``ok=False`` and a reason; no exception is
raised per frame. While the camera moves, the tile seams of some later frames are fitted
as well and the tracked corners' floor positions averaged over them, so the reference
frame's own error does not stay in every later frame.
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace

import cv2
import numpy as np

from .. import floor_features
from ..errors import CalibrationError, InputError, RegistrationRefused
from ..profiles import CameraProfile, FieldProfile
from . import grid, selfcheck
from .camera_fit import (
    FitOptions,
    check_correspondences,
    fit_camera,
    fit_to_registration,
    pose_fit_points,
    pose_from_homography,
    read_points_csv,
)
from .floor_markers import detect_floor_markers
from .frame import FrameRegistration, failed, floor_usable, project_rows
from .selfcheck import CheckLimits
from .uncertainty import held_out_excess_px

__all__ = ["FloorRegistrar", "RegistrarSettings", "RegistrationQuality", "summarise", "METHODS"]

METHODS = ("auto", "markers", "points", "grid")
#: Floor markers are located precisely, so two markers far apart (a long thin spread)
#: still fix the plane; hand-picked points must be spread more (0.05, the default).
MARKER_MIN_SPREAD = 0.02
#: Fewest seam samples for a moving frame's seam fit to count (see ``anchor_every_s``).
ANCHOR_MIN_SAMPLES = 40
#: Moving frames right after the reference that are all used for seam fits (the mean of
#: the floor positions is least certain then); later ones every ``anchor_every_s``.
ANCHOR_EAGER = 6
#: Anchors whose disagreement with the tracked pose makes a tracked frame's prediction
#: error (about 2 s at one anchor every 0.25 s): recent, as tracked corners drift.
ANCHOR_GAPS_KEPT = 8
#: Frames whose one-pose fits give the rolling-shutter rate, and their time span [s].
#: Two (this frame and the last): a line through more frames is less noisy but lags,
#: and on the rendered hand-held runs the lag cost more than the noise.
RATE_FRAMES = 2
RATE_WINDOW_S = 0.2


# ---------------------------------------------------------------------- registrar
@dataclass(frozen=True)
class RegistrarSettings:
    """How :class:`FloorRegistrar` registers frames and what it accepts."""

    refine_on_seams: bool = True
    """Sharpen marker or point fits on the tile seams when seams are visible."""
    max_rms_px: float = 3.0
    """A frame whose residual is above this is refused [px]."""
    static_tolerance_px: float = 0.1
    """Median patch shift below which the view counts as unchanged [px]."""
    seam_every_frame: bool = False
    """Re-fit on the tile seams in every moved frame as well (slower; on the rendered
    hand-held run it was not more accurate than the tracked corners)."""
    min_tracked: int = 12
    """Fewest floor corners found again for a moved frame to be registered."""
    readout_s: float | None = None
    """Rolling-shutter readout time [s] (default: the camera profile's, else 0). When
    non-zero, a moving camera's pose is modelled as changing linearly while the rows are
    read, at the rate seen between consecutive frames."""
    reference_retry_s: float = 0.5
    """After a frame fails to become the reference, frames in the next this many seconds
    are flagged without a new (costly) attempt [s]."""
    anchor_every_s: float | None = 0.25
    """A moving camera: every this many seconds (and in the first few moving frames) the
    tile seams of the frame are fitted too, and the floor positions of the tracked
    corners become the mean over these fits and the reference's [s]. None: never."""
    self_check: bool = True
    """Check the reference registration against evidence it was not fitted to (see
    :mod:`vidodo.registration.selfcheck`) and refuse it when the check fails."""
    limits: CheckLimits = CheckLimits()
    """What the self-check accepts, with the user's approximate camera height."""
    relative_ok: bool = False
    """Accept a grid whose place in the tile pattern the view does not fix (it might be
    shifted by whole tiles): the caller fixes it from the start tile or states which
    visible corner positions are relative to (:func:`selfcheck.place_track`)."""
    start_tile: tuple[int, int] | None = None
    """The tile the robot starts on (default: the field profile's ``start_tile``)."""


class FloorRegistrar:
    """Register the frames of one video to the floor.

    Parameters
    ----------
    field : FieldProfile
        Tile grid and floor fiducials.
    camera : CameraProfile, optional
        Lens intrinsics and distortion; without one they are estimated.
    method : {'auto', 'markers', 'points', 'grid'}
        How the reference frame is registered ('auto': markers if visible, else grid).
    points_csv : path-like, optional
        Correspondences for the reference frame (method 'points').
    settings : RegistrarSettings
        Limits and policies (residual limit, seam refinement, rolling shutter, ...).

    Notes
    -----
    The first frame given to :meth:`register` that can be registered becomes the
    reference. Call :meth:`register_reference` to get a :class:`CalibrationError`
    instead of an ``ok=False`` result when it cannot.
    """

    def __init__(self, field: FieldProfile, camera: CameraProfile | None = None, *,
                 method="auto", points_csv=None,
                 settings: RegistrarSettings = RegistrarSettings()):
        if method not in METHODS:
            raise InputError(f"registration method {method!r}: use one of {METHODS}")
        if method == "points" and points_csv is None:
            raise InputError("method 'points' needs a points CSV (columns u_px, v_px, "
                             "x_m, y_m)")
        if method == "markers" and not field.floor_markers:
            raise InputError(f"{field.path or 'field profile'}: method 'markers' needs "
                             "[[floor_marker]] entries in the field profile")
        self.field = field
        self.camera = camera
        self.method = method
        self.points = None
        if points_csv is not None:
            px, fl = read_points_csv(points_csv)
            check_correspondences(px, fl, where=str(points_csv))
            self.points = (px, fl)
            if method == "auto":
                self.method = "points"
        self.settings = settings
        self.refine_on_seams = settings.refine_on_seams
        self.max_rms_px = float(settings.max_rms_px)
        self.static_tolerance_px = float(settings.static_tolerance_px)
        self.seam_every_frame = settings.seam_every_frame
        self.min_tracked = int(settings.min_tracked)
        readout_s = settings.readout_s
        if readout_s is None:
            readout_s = camera.readout_s if camera is not None else 0.0
        self.readout_s = float(readout_s)
        self.reference_retry_s = float(settings.reference_retry_s)
        anchor = settings.anchor_every_s
        self.anchor_every_s = None if anchor is None else float(anchor)
        self._anchor_sum = self._anchor_n = None
        self._anchor_t = -math.inf
        self._anchor_tries = 0
        self._anchor_gaps = []  # tracked vs seam-fit disagreement of recent anchors [px]
        self._retry = None  # (t_s, reason) of the next reference attempt after a failure
        self._rate = None  # (rvec_rate, tvec_rate) of the last moving frame
        self._global_prev = None  # (t_s, rvec, tvec) one-pose fit of the last frame
        self._global_hist = []  # the same for the last few moving frames
        self._global_now = None  # (rvec, tvec) one-pose fit of this frame
        self._rate_used = False  # whether this frame's fit used self._rate
        self._rs_reference_done = False
        self.reference: FrameRegistration | None = None
        self.reference_grey = None
        self._tracker = None
        self._floor_ref = None
        self._last_found = None
        self._last: FrameRegistration | None = None
        self._detectors: dict = {}
        self.grid_result = None
        self.check_report = None

    # -- reference -----------------------------------------------------------
    def register_reference(self, frame_bgr, t_s=0.0, mask=None) -> FrameRegistration:
        """Register one frame from scratch and make it the reference.

        Raises
        ------
        CalibrationError
            Naming the cause (too few or degenerate points, mirrored fit, no grid
            found, error above the threshold).
        """

        grey = floor_features.to_grey(frame_bgr)
        size = (grey.shape[1], grey.shape[0])
        ignore = None if mask is None else np.asarray(mask, bool)
        method = self.method
        init_fit = None
        used = method
        extra = []
        if method in ("auto", "markers") and self.field.floor_markers:
            px, fl, seen = detect_floor_markers(grey, self.field, detectors=self._detectors,
                                                ignore=ignore)
            if len(px) >= 4:
                try:
                    check_correspondences(px, fl, where=f"floor markers {seen}",
                                          min_spread=MARKER_MIN_SPREAD)
                    init_fit = fit_camera(size, points=(px, fl), camera=self.camera,
                                          options=FitOptions(outlier_px=5.0))
                    used = "markers"
                except CalibrationError as exc:
                    if method == "markers":
                        raise
                    extra.append(f"floor markers not used for the fit: {exc}")
            elif method == "markers":
                raise CalibrationError("no floor marker of the field profile is visible in "
                                       "the reference frame; check ids and family")
        if method == "points":
            px, fl = self.points
            init_fit = fit_camera(size, points=(px, fl), camera=self.camera)
            used = "points"
        if init_fit is None:  # the automatic grid
            g = grid.find_grid(grey, self.field, camera=self.camera, ignore=ignore,
                               detectors=self._detectors, frame_bgr=frame_bgr)
            self.grid_result = g
            fit = g.fit
            used = "grid"
            extra += list(g.warnings)
        else:
            fit = init_fit
            if self.refine_on_seams:
                try:
                    fit2 = grid.refine_fit(grey, self.field, fit, camera=self.camera,
                                           ignore=ignore)
                except CalibrationError as exc:
                    extra.append(f"tile seams not used: {exc}")
                else:
                    if fit2 is not None:
                        fit = fit2
                        used += "+seams"
        if fit.rms_px > self.max_rms_px:
            raise CalibrationError(
                f"{used}: residual {fit.rms_px:.2f} px RMS is above the {self.max_rms_px} px "
                "limit; the observations do not fit one floor plane - check them")
        reg = fit_to_registration(t_s, fit, used, extra)
        if self.settings.self_check:
            reg = self._self_check(frame_bgr, grey, reg, ignore)
            if used == "points+seams":
                reg = self._seam_prediction(reg, init_fit)
        self._set_reference(grey, reg, ignore)
        return reg

    def _self_check(self, frame_bgr, grey, reg, ignore):
        """Refuse (:class:`RegistrationRefused`) a reference that fails the self-check."""
        facts = selfcheck.ReferenceFacts(
            reg.method, self.camera is not None,
            points=self.points if reg.method.startswith("points") else None,
            relative_ok=self.settings.relative_ok,
            position_fixed=bool(self.grid_result is not None
                                and self.grid_result.origin_from == "floor marker"))
        report = selfcheck.check_reference(grey, self.field, reg, facts,
                                           limits=self.settings.limits, ignore=ignore)
        report = self._tiling_beyond(report, facts)
        self.check_report = report
        if report.reason:
            selfcheck.refuse(report.reason, frame_bgr, reg, self.field)
        pred = report.figures.get("prediction_px", math.nan)
        return replace(reg, prediction_px=pred) if math.isfinite(pred) else reg

    def _seam_prediction(self, reg, points_fit):
        """The seam-refined registration's error at the clicked points, click noise removed.

        The seam fit did not use the clicks, so each click's residual against it is the
        click's own error plus the mapping's: mean squares add. The click noise comes
        from the points-only fit: its residual sum of squares over ``2n - p`` degrees of
        freedom estimates the variance per axis (Draper & Smith, *Applied Regression
        Analysis*, 3rd ed., section 2.6), ``2 s^2`` per click. The held-out figure of
        the self-check (a pose fitted to the other clicks) holds the click noise too,
        which this registration does not carry. The difference is kept only where the
        clicks show it beyond its own noise (``uncertainty.held_out_excess_px``).
        """
        report = self.check_report
        click_px = float(report.figures.get("click_rms_px", math.nan)) if report else math.nan
        pred = held_out_excess_px(click_px, points_fit.rms_px, len(self.points[0]),
                                  6 + len(points_fit.free) - 2)
        return replace(reg, prediction_px=pred) if math.isfinite(pred) else reg

    def _tiling_beyond(self, report, facts):
        """The grid saw more tiles than the field has (the tiling continues beyond it):
        where the tiles end is then no evidence of where the field ends, so its place
        in the tiling is unknown, whatever the seams at the field's edges show."""
        g = self.grid_result
        if (report.reason or not report.field_position_known or g is None
                or facts.position_fixed or grid.TILING_CONTINUES not in g.warnings):
            return report
        if facts.relative_ok:
            return replace(report, field_position_known=False)
        return replace(report, reason=(
            "the field's place in the tile pattern cannot be told (" + grid.TILING_CONTINUES
            + "): a grid shifted by whole tiles fits as well; give the start tile "
            "(--start-tile)"))

    def _set_reference(self, grey, reg, ignore):
        self.reference = reg
        self.reference_grey = grey
        self._last = reg
        usable = floor_usable(reg, self.field, grey.shape, ignore, margin_m=0.0)
        self._tracker = floor_features.FloorPatchTracker(grey, usable)
        self._floor_ref = reg.image_to_floor(self._tracker.ref_px)
        self._anchor_start(reg.t_s)
        self._last_found = self._tracker.ref_px.copy()
        self._global_prev = (reg.t_s, np.asarray(reg.rvec, float), np.asarray(reg.tvec, float))
        self._global_hist = [self._global_prev]

    # -- per frame -----------------------------------------------------------
    def register(self, frame_bgr, t_s, mask=None) -> FrameRegistration:
        """Register one frame; never raises for a frame that cannot be registered.

        Parameters
        ----------
        frame_bgr : ndarray of shape (H, W, 3) or (H, W)
        t_s : float
            Frame time [s].
        mask : ndarray of bool, shape (H, W), optional
            Pixels to ignore (the robot).

        Returns
        -------
        FrameRegistration
            ``ok=False`` with a reason when the frame could not be registered.
        """
        try:
            if self.reference is None:
                if self._retry is not None and t_s < self._retry[0]:
                    return failed(t_s, f"no reference yet: {self._retry[1]}")
                return self.register_reference(frame_bgr, t_s, mask)
            reg = self._register_follow(frame_bgr, t_s, mask)
            if reg.ok and reg.prediction_px < self.reference.prediction_px:
                # Later frames map through the reference's floor positions: its error stays.
                reg = replace(reg, prediction_px=self.reference.prediction_px)
            return reg
        except RegistrationRefused:
            raise
        except (CalibrationError, cv2.error, np.linalg.LinAlgError, ValueError) as exc:
            k = None if self.reference is None else self.reference.camera_matrix
            d = None if self.reference is None else self.reference.dist_coeffs
            reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            if self.reference is None:  # a full attempt is costly: wait a little
                self._retry = (float(t_s) + self.reference_retry_s, reason)
            return failed(t_s, reason, k, d)

    def _register_follow(self, frame_bgr, t_s, mask):

        grey = floor_features.to_grey(frame_bgr)
        ignore = None if mask is None else np.asarray(mask, bool)
        ref = self.reference
        if grey.shape != self.reference_grey.shape:
            return failed(t_s, f"frame size {grey.shape[::-1]} differs from the reference "
                          f"{self.reference_grey.shape[::-1]}", ref.camera_matrix,
                          ref.dist_coeffs)
        last = self._last if self._last is not None and self._last.ok else ref
        tr = self._tracker
        # Cheap check first: the view has not moved since the last registered frame. It
        # runs on a second thread while the corners are tracked (OpenCV releases the GIL
        # in both), whose result is dropped when the view has not moved.
        prev_px = tr.ref_px if last is ref else self._last_found
        still = None if prev_px is None else _still_pool().submit(
            tr.is_unmoved, grey, prev_px, tolerance_px=self.static_tolerance_px)
        try:
            found, ok = self._track_corners(grey, last, ignore)
            failure = None
        except Exception as exc:  # noqa: BLE001 - raised below unless the view is still
            failure = exc
        if still is not None and still.result():
            reg = replace(last, t_s=float(t_s), method="static", rvec_rate=None,
                          tvec_rate=None)
            self._last = reg
            self._rate = None
            self._global_prev = (float(t_s), np.asarray(last.rvec, float),
                                 np.asarray(last.tvec, float))
            self._global_hist = [self._global_prev]
            return reg
        if failure is not None:
            raise failure
        ok &= np.all(np.isfinite(self._floor_ref), axis=1)
        source = "tracked"
        if ok.sum() < self.min_tracked:
            # Lost: try the floor fiducials, then feature matching.
            reg = self._reacquire(grey, t_s, ignore)
            if reg is not None:
                self._last = reg
                self._last_found = np.full_like(tr.ref_px, np.nan)
                return reg
            return failed(t_s, f"only {int(ok.sum())} floor corners found again and no "
                          "floor marker or feature match; view moved too far",
                          ref.camera_matrix, ref.dist_coeffs)
        fl = self._floor_ref[ok]
        px = found[ok]
        try:
            fit = self._pose_fit(grey.shape, px, fl, last, t_s=float(t_s))
        except CalibrationError as exc:
            return failed(t_s, f"{source}: {exc}", ref.camera_matrix, ref.dist_coeffs)
        if self._seams_each_frame():
            try:
                fit2 = grid.refine_fit(grey, self.field, fit, camera=self._fixed_camera(),
                                       ignore=ignore)
                if fit2 is not None:
                    fit = fit2
                    source += "+seams"
            except CalibrationError:
                pass
        reg = self._tied(fit_to_registration(t_s, fit, source, ()))
        if reg.rms_px > self.max_rms_px:
            return failed(t_s, f"{source}: residual {reg.rms_px:.2f} px RMS above the "
                          f"{self.max_rms_px} px limit", ref.camera_matrix, ref.dist_coeffs)
        reg = self._with_rates(reg, last)
        self._last = reg
        self._last_found = found
        if self.anchor_every_s is not None and (
                float(t_s) - self._anchor_t >= self.anchor_every_s
                or self._anchor_tries < ANCHOR_EAGER):
            self._anchor_tries += 1
            self._anchor_t = float(t_s)
            self._anchor_on_seams(grey, reg, ignore)
        return reg

    def _track_corners(self, grey, last, ignore):
        """The reference corners found in ``grey`` (see ``FloorPatchTracker.locate``),
        starting from where the last registration predicts them."""
        tr = self._tracker
        pred = last.floor_to_image(self._floor_ref)
        ok_pred = np.all(np.isfinite(pred), axis=1)
        h_guess = None
        if last is not self.reference and ok_pred.sum() >= 8:
            h_guess, _ = cv2.findHomography(tr.ref_px[ok_pred], pred[ok_pred], 0)
        return tr.locate(grey, h_guess, ignore=ignore, quick=h_guess is not None)

    def _anchor_start(self, t_s):
        """Start the running mean of the tracked corners' floor positions."""
        ok = np.all(np.isfinite(self._floor_ref), axis=1)
        self._anchor_sum = np.where(ok[:, None], self._floor_ref, 0.0)
        self._anchor_n = ok.astype(float)
        self._anchor_t = float(t_s)
        self._anchor_tries = 0

    def _anchor_on_seams(self, grey, reg, ignore):
        """Average the tracked corners' floor positions over seam fits of later frames.

        The floor positions of the tracked corners come from the reference frame's
        registration, so its error is carried into every tracked frame. Each later
        frame's tile seams give an independent registration: a pose fitted on the seams
        (started from the tracked pose, one narrow search) maps the pixels where the
        tracked pose puts the corners back to the floor, and these positions are averaged
        with the reference's. With a rolling shutter the seam samples are moved to where
        the top-row pose would see them, at the tracked frame's rate (the same rate for
        both poses, so an error in it largely cancels). A seam fit that fails, or that
        disagrees with the tracked pose by more than ``max_rms_px``, is not used.
        """

        h, w = grey.shape
        k, d = reg.camera_matrix, reg.dist_coeffs
        half_width_px = 4.0 * float(np.clip(math.hypot(w, h) / 1469.0, 0.5, 1.5))
        q, ax, val = grid.seam_samples(grey, self.field, reg, ignore=ignore,
                                       search=grid.SeamSearch(half_width_px=half_width_px))
        if len(q) < ANCHOR_MIN_SAMPLES:
            return
        if reg.rolling:
            fl = reg.image_to_floor(q)
            good = np.all(np.isfinite(fl), axis=1)
            q, ax, val, fl = q[good], ax[good], val[good], fl[good]
            fl[np.arange(len(fl)), ax] = val
            obj = np.column_stack([fl, np.zeros(len(fl))])
            top = cv2.projectPoints(obj, reg.rvec, reg.tvec, k, d)[0].reshape(-1, 2)
            rowed = project_rows(obj, (reg.rvec, reg.tvec), (reg.rvec_rate, reg.tvec_rate),
                                 reg._row_dt(q[:, 1]), k, d)
            q = q - (rowed - top)
        try:
            fit = fit_camera((w, h), seams=(q, ax, val), camera=self._fixed_camera(),
                             init=(k, d, reg.rvec, reg.tvec),
                             options=FitOptions(outlier_px=1.5, loss_px=0.5))
        except (CalibrationError, cv2.error, np.linalg.LinAlgError, ValueError):
            return
        if not fit.rms_px <= self.max_rms_px:
            return
        seam_reg = replace(reg, rvec=fit.rvec, tvec=fit.tvec)
        px = reg.floor_to_image(self._floor_ref)
        shift = seam_reg.floor_to_image(self._floor_ref) - px
        gap_px = float(np.sqrt(np.nanmean(np.sum(shift ** 2, axis=1))))
        if not gap_px <= self.max_rms_px:
            return
        self._anchor_gaps = (self._anchor_gaps + [gap_px])[-ANCHOR_GAPS_KEPT:]
        moved = seam_reg.image_to_floor(px)
        ok = np.all(np.isfinite(moved), axis=1)
        self._anchor_sum[ok] += moved[ok]
        self._anchor_n += ok
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = self._anchor_sum / self._anchor_n[:, None]
        self._floor_ref = np.where((self._anchor_n > 0)[:, None], mean, np.nan)

    def _with_rates(self, reg, last):
        """Attach the pose rate of this frame (rolling shutter).

        The rate is the one :meth:`_pose_fit` used: from the one-pose-per-frame fits of
        this frame and the previous one (they do not depend on any assumed rate, so
        errors cannot feed back).
        """
        now = getattr(self, "_global_now", None)
        if self.readout_s <= 0 or now is None:
            return reg
        self._global_prev = (reg.t_s, now[0], now[1])
        self._global_hist = (self._global_hist + [self._global_prev])[-RATE_FRAMES:]
        rate = self._rate
        if rate is None:
            return reg
        if not self._rs_reference_done:
            self._rs_reference_done = True
            self._rolling_reference(rate)
        if not self._rate_used:  # fitted without a rate: top pose from mid pose
            half = 0.5 * self.readout_s
            reg = replace(reg, rvec=np.asarray(reg.rvec) - half * rate[0],
                          tvec=np.asarray(reg.tvec) - half * rate[1])
        return replace(reg, readout_s=self.readout_s, rvec_rate=rate[0], tvec_rate=rate[1])

    def _rate_since_previous(self, t_s, rvec, tvec):
        """Pose rate from the one-pose fits of the last few frames and this one, or None.

        The slope of a least-squares line through the one-pose fits of up to
        ``RATE_FRAMES`` frames (this one included) within ``RATE_WINDOW_S``: two frames
        give the plain difference; more average out the fits' noise, which a difference
        divided by one frame interval would otherwise carry into every row's pose.
        """
        if t_s is None:
            return None
        hist = [h for h in self._global_hist if 0 < t_s - h[0] <= RATE_WINDOW_S]
        if not hist:
            return None
        t = np.array([h[0] for h in hist] + [t_s])
        rv = np.vstack([h[1] for h in hist] + [np.asarray(rvec, float)])
        tv = np.vstack([h[2] for h in hist] + [np.asarray(tvec, float)])
        dt = t - t.mean()
        den = float(dt @ dt)
        return (dt @ (rv - rv.mean(axis=0))) / den, (dt @ (tv - tv.mean(axis=0))) / den

    def _rolling_reference(self, rate):
        """Re-read the reference frame as a rolling-shutter frame once a rate is known.

        The reference was fitted as if every row saw one pose; that pose is close to the
        one at mid-readout. It becomes the top-row pose minus half a readout of motion,
        and the floor positions of the tracked corners are recomputed row by row.
        """
        ref = self.reference
        half = 0.5 * self.readout_s
        rolled = replace(ref, rvec=np.asarray(ref.rvec) - half * rate[0],
                         tvec=np.asarray(ref.tvec) - half * rate[1],
                         readout_s=self.readout_s, rvec_rate=rate[0], tvec_rate=rate[1])
        self.reference = rolled
        self._floor_ref = rolled.image_to_floor(self._tracker.ref_px)
        self._anchor_start(ref.t_s)

    def _seams_each_frame(self):
        return bool(self.seam_every_frame)

    def _fixed_camera(self):
        """The reference intrinsics as a profile, held fixed in later frames."""
        ref = self.reference
        h, w = self.reference_grey.shape
        k = ref.camera_matrix
        return CameraProfile(w, h, float(k[0, 0]), float(k[1, 1]), float(k[0, 2]),
                             float(k[1, 2]), tuple(float(v) for v in ref.dist_coeffs))

    def _pose_fit(self, shape, px, fl, last, t_s=None):
        """Pose with the reference intrinsics, RANSAC on the floor plane, then LM."""
        ref = self.reference
        k, d = ref.camera_matrix, ref.dist_coeffs
        und = cv2.undistortPoints(px.reshape(-1, 1, 2), k, d, P=k).reshape(-1, 2)
        hmg, inl = cv2.findHomography(fl, und, cv2.RANSAC, 1.5, maxIters=2000)
        if hmg is None:
            raise CalibrationError("tracked corners do not agree on one floor plane")
        inl = inl.ravel().astype(bool)
        if inl.sum() < self.min_tracked:
            raise CalibrationError(f"only {int(inl.sum())} tracked corners agree on the "
                                   "floor plane")
        rv, tv = (last.rvec, last.tvec) if last.ok else pose_from_homography(hmg, k)
        px, fl = px[inl], fl[inl]
        fit = pose_fit_points(px, fl, k, d, (rv, tv))
        self._global_now = (fit.rvec.copy(), fit.tvec.copy())
        self._rate_used = False
        if self.readout_s > 0:
            self._rate = self._rate_since_previous(t_s, fit.rvec, fit.tvec)
        if self.readout_s > 0 and self._rate is not None:
            self._rate_used = True
            # Rolling shutter: move each observation to where the top-row pose would have
            # seen it, using the rate of the previous frames, and fit again (twice). The
            # move is smooth over the view, so the one-pose fit's outliers stay outliers:
            # the refits start from its inliers and drop outliers once more.
            px, fl = px[fit.inliers], fl[fit.inliers]
            obj = np.column_stack([fl, np.zeros(len(fl))])
            dt = np.clip(px[:, 1] / shape[0], 0, 1) * self.readout_s
            for _ in range(2):
                top = cv2.projectPoints(obj, fit.rvec, fit.tvec, k, d)[0].reshape(-1, 2)
                rowed = project_rows(obj, (fit.rvec, fit.tvec), self._rate,
                                     dt, k, d)
                fit = pose_fit_points(px - (rowed - top), fl, k, d, (fit.rvec, fit.tvec),
                                      rounds=1)
        return fit

    def _reacquire(self, grey, t_s, ignore):
        ref = self.reference
        if self.field.floor_markers:
            px, fl, seen = detect_floor_markers(grey, self.field, detectors=self._detectors,
                                                ignore=ignore)
            if len(px) >= 4:
                try:
                    check_correspondences(px, fl, where="floor markers",
                                          min_spread=MARKER_MIN_SPREAD)
                    fit = fit_camera((grey.shape[1], grey.shape[0]), points=(px, fl),
                                     camera=self._fixed_camera(),
                                     options=FitOptions(outlier_px=5.0))
                    return fit_to_registration(t_s, fit, "markers")
                except CalibrationError:
                    pass
        usable_ref = floor_usable(ref, self.field, grey.shape)
        m = floor_features.match_homography(self.reference_grey, grey,
                                            floor_features.MatchSettings(detector="orb"),
                                            ignore_a=~usable_ref, ignore_b=ignore)
        if m.H is None:
            return None
        m = floor_features.refine_homography(self.reference_grey, grey, m.H,
                                             ignore_b=ignore, tracker=self._tracker)
        if m.H is None:
            return None
        pred = cv2.perspectiveTransform(self._tracker.ref_px.reshape(-1, 1, 2),
                                        m.H).reshape(-1, 2)
        good = np.all(np.isfinite(self._floor_ref), axis=1)
        try:
            fit = self._pose_fit(grey.shape, pred[good], self._floor_ref[good], ref)
        except CalibrationError:
            return None
        return self._tied(fit_to_registration(t_s, fit, "features"))

    def _tied(self, reg):
        """A frame fitted to the tracked corners' floor positions keeps their error: the
        reference's, averaged over the seam fits of later frames (independent fits, so
        the variance of the mean of n falls as 1 / n; n averaged over the corners)."""
        n = self._anchor_n[np.all(np.isfinite(self._floor_ref), axis=1)]
        share = 1.0 / max(float(n.mean()), 1.0) if n.size else 1.0
        # The tracked pose against the seam fits of recent frames (evidence it was not
        # fitted to): their RMS disagreement holds what the tracked corners share and
        # the fit's residuals cannot show (corners drifting together, floor positions
        # off), and the seam fit's own error.
        gaps = np.asarray(self._anchor_gaps, float)
        pred = float(np.sqrt(np.mean(gaps ** 2))) if gaps.size else 0.0
        return replace(reg, tied_to=self.reference, tied_share=share,
                       prediction_px=max(reg.prediction_px, pred))


_POOL: list = []


def _still_pool() -> ThreadPoolExecutor:
    """One worker thread for the still-view checks of every registrar (made on first use)."""
    if not _POOL:
        _POOL.append(ThreadPoolExecutor(max_workers=1, thread_name_prefix="vidodo-still"))
    return _POOL[0]


@dataclass(frozen=True)
class RegistrationQuality:
    """Summary of the per-frame registrations of one video."""

    n_frames: int
    n_ok: int
    rms_px_median: float
    rms_px_max: float
    rms_floor_mm_median: float
    rms_floor_mm_max: float
    methods: dict = field(default_factory=dict)
    failed: tuple[tuple[float, str], ...] = ()
    """(t_s, reason) of every frame that could not be registered."""


def summarise(regs) -> RegistrationQuality:
    """Quality numbers over a list of :class:`FrameRegistration`."""
    regs = list(regs)
    ok = [r for r in regs if r.ok]
    px = np.array([r.rms_px for r in ok]) if ok else np.array([math.nan])
    mm = np.array([r.rms_floor_m * 1e3 for r in ok]) if ok else np.array([math.nan])
    if not ok:
        return RegistrationQuality(len(regs), 0, math.nan, math.nan, math.nan, math.nan,
                                   {"failed": len(regs)},
                                   tuple((r.t_s, r.reason) for r in regs))
    methods: dict = {}
    for r in regs:
        methods[r.method or "failed"] = methods.get(r.method or "failed", 0) + 1
    return RegistrationQuality(len(regs), len(ok), float(np.nanmedian(px)),
                               float(np.nanmax(px)), float(np.nanmedian(mm)),
                               float(np.nanmax(mm)), methods,
                               tuple((r.t_s, r.reason) for r in regs if not r.ok))
