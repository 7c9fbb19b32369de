"""Check a floor registration against evidence it was not fitted to, and refuse it.

A registration fitted to the tile seams always explains the seams it was fitted to; a
wrong lattice (wrong spacing, wrong phase, wrong place in the tiling) can still show a
sub-pixel residual. The checks here use what the fit did not:

* **pose**: the camera between :attr:`CheckLimits.height_range_m` above the floor, a
  focal length a real lens has, the height the user gave (if any);
* **seams** (the tile grid, and floor markers sharpened on the seams): at every
  predicted tile edge in view (each tile side on its own, the field's
  border included) a seam must be found within a narrow band, and far less often half a
  tile away (in the middle of the tiles): a lattice of the wrong spacing or phase puts
  its edges on tile interiors;
* **subsets**: the seams of the left and the right half of the image (and of the top and
  the bottom half) each fitted alone must place the tile corners in view where the
  whole fit does;
* **field position**: a lattice that is right but shifted by whole tiles matches every
  seam; the field's place in the tiling is known only where a field edge is in view and
  the tiling visibly ends there, or from floor markers or a start tile (clicked points'
  floor positions may be counted from any visible corner: they fix the lattice, and the
  field's place only where the tiles visibly end at the field edges they imply);
* **held-out points**: each clicked point predicted from the others, and all of them
  near the final registration (the seams must not pull it off the clicks);
* after tracking (:func:`check_track`): the marker's measured size against the robot
  profile, and the truth path against the field outline.

A failed check raises :class:`vidodo.errors.RegistrationRefused` (exit 3), carrying the
preview image; the command line writes only that.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import cv2
import numpy as np

from ..errors import CalibrationError, RegistrationRefused
from ..profiles import FieldProfile
from .camera_fit import FitOptions, fit_camera
from .frame import FrameRegistration
from .grid import draw_registration
from .grid.directions import FOCAL_RANGE
from .grid.evidence import edge_rates, edge_samples, row_rates, search_half_width_px, tiles_end

__all__ = ["CheckLimits", "CheckReport", "ReferenceFacts", "check_reference", "check_track",
           "place_track", "refuse", "seam_evidence"]


#: Below this larger image side [px] a refusal for missing seams names the image size:
#: at 640 x 360 the hand-held benchmark scenes' registrations were 8 mm to metres off at
#: the corners in view (tile seams about a pixel wide at 1280 x 720 vanish), at
#: 1280 x 720 within 2.3 mm (``benchmarks/registration_accuracy.py``). Below it, a
#: registration on the seams without a lens profile is refused: the lens estimated on
#: the seams alone was 9 mm off at the corners (k1 0.01 for a true -0.05) on a
#: 540 x 960 picture that passed every other check (``registration_robustness.py``,
#: seed 239).
SMALL_IMAGE_PX = 1280


@dataclass(frozen=True)
class CheckLimits:
    """What a registration must satisfy (and what the user told about the scene)."""

    height_range_m: tuple[float, float] = (0.5, 4.0)
    """Camera height above the floor a filming set-up has [m]."""
    focal_range: tuple[float, float] = FOCAL_RANGE
    """Estimated focal length over the larger image side (default
    :data:`vidodo.registration.grid.directions.FOCAL_RANGE`, the seam search's own)."""
    camera_height_m: float | None = None
    """The camera's approximate height, if the user gave it [m]."""
    camera_height_tolerance: float = 0.25
    """Relative tolerance on ``camera_height_m``."""
    min_edge_support: float = 0.3
    """Fewest predicted tile edges in view (as a fraction of their image length) on which
    a seam is found (far seams thinner than a pixel are not seen even on a right grid)."""
    weak_support: float = 0.65
    """Below this support, the lines half a tile off must show a seam on at most
    :attr:`weak_offset_ratio` as much (weak evidence needs a clear contrast; the grid
    only: floor markers fix the lattice's phase themselves)."""
    weak_offset_ratio: float = 0.2
    max_offset_ratio: float = 0.5
    """Most tile edges half a tile off that show a seam, as a fraction of the supported
    predicted edges."""
    min_edges: int = 6
    """Fewest tile edges in view for the seam check to be possible at all."""
    max_subset_tiles: float = 0.025
    """Largest disagreement of the half-image fits at the corners in view [tiles]."""
    max_subset_m: float = 0.015
    """... but never refused below this [m]."""
    max_subset_tiles_no_lens: float = 0.1
    """The same without a lens profile: focal length and distortion estimated on the
    seams leave each half's extrapolation less certain [tiles]."""
    max_holdout_tiles: float = 0.1
    """Largest error of a clicked point predicted from the others [tiles]."""
    max_click_rms_px: float = 3.0
    """Largest RMS distance of the clicked points from the final registration [px]: a
    careful click lands within about a pixel of a seam crossing (from memory), so more
    means the seams pulled the fit off the clicks or the points are inconsistent."""
    max_marker_scale_error: float = 0.1
    """Largest relative error of the marker's measured size against the profile."""
    max_outside_fraction: float = 0.2
    """Largest share of the truth path more than half a tile outside the field."""


@dataclass(frozen=True)
class CheckReport:
    """What the reference check measured; ``reason`` is empty when it passed."""

    reason: str = ""
    figures: dict = field(default_factory=dict)
    field_position_known: bool = True
    """False when the field's place in the tiling could not be told (whole tiles)."""


# ------------------------------------------------------------------ seam evidence
def seam_evidence(grey, field_profile: FieldProfile, reg: FrameRegistration, *, ignore=None):
    """Seam evidence on the predicted tile edges of the field and half a tile off.

    Returns
    -------
    dict
        ``edges`` (tile edges in view), ``supported`` (fraction of them with a seam
        found on at least a third of their samples), ``offset_supported`` (the same half
        a tile off), ``on_rate`` / ``off_rate`` (fraction of samples with a seam), and
        ``samples`` (located seam pixels, axis, value: for the subset check).
    """
    hw = search_half_width_px(grey.shape)
    s = field_profile.tile_size_m
    on_samples = edge_samples(field_profile, 0.0)
    on = edge_rates(grey, reg, on_samples, s, ignore, hw)
    off_samples = edge_samples(field_profile, 0.5)
    # Half a tile off: only the lines inside the field (the last one is outside it).
    inside = np.all((off_samples[0] > 0) & (off_samples[0] < np.array(field_profile.size_m)),
                    axis=1)
    off_samples = tuple(a[inside] for a in off_samples)
    off = edge_rates(grey, reg, off_samples, s, ignore, hw)
    out = {}
    for name, (n_looked, n_hit, _q, _any), smp in (("", on, on_samples),
                                                    ("offset_", off, off_samples)):
        seen = n_looked >= 3
        frac = np.where(seen, n_hit / np.maximum(n_looked, 1), 0.0)
        # Each edge weighted by its length in the picture: the floor area in view counts,
        # not the number of far tiles whose seams are thinner than a pixel.
        weight = _edge_lengths_px(reg, smp) * seen
        out[name + "edges"] = int(seen.sum())
        out[name + "supported"] = (float(weight @ (frac >= 1 / 3) / weight.sum())
                                   if weight.sum() > 0 else 0.0)
        out[name + "rate"] = float(n_hit.sum() / max(n_looked.sum(), 1))
    out["samples"] = on[2]
    return out


def _edge_lengths_px(reg, samples):
    """Image length of each tile edge between its first and last sample [px]."""
    fl, _axis, _val, _nrm, eid = samples
    n_e = int(eid.max()) + 1 if len(eid) else 0
    if n_e == 0:
        return np.zeros(0)
    first = np.clip(np.searchsorted(eid, np.arange(n_e)), 0, len(eid) - 1)
    last = np.clip(np.searchsorted(eid, np.arange(n_e), side="right") - 1, 0, len(eid) - 1)
    ends = reg.floor_to_image(np.vstack([fl[first], fl[last]]))
    length = np.linalg.norm(ends[:n_e] - ends[n_e:], axis=1)
    return np.nan_to_num(length, nan=0.0, posinf=0.0)


# ------------------------------------------------------------------ field position
def field_position_known(grey, field_profile: FieldProfile, reg: FrameRegistration, *,
                         ignore=None):
    """Whether the field's place in the tiling is fixed by what is in view.

    A field edge fixes it in its direction when the seams running across that edge
    (between the edge tiles) are found where predicted in the tile row just inside the
    edge and not in the row just outside: the tiling ends there. A lattice shifted by a
    tile inwards would see seams on both sides, one shifted outwards on neither. Where
    the tiles continue beyond the field, or no field edge is in view, a lattice shifted
    by whole tiles would fit every seam as well.

    Returns
    -------
    (bool, str)
        Known in both directions, and a description of what was seen.
    """
    nx, ny = field_profile.tiles_x, field_profile.tiles_y
    rates = row_rates(grey, field_profile, reg, 1, ignore=ignore)
    found = [tiles_end(rates, ax, 0, -1) or tiles_end(rates, ax, n - 1, n)
             for ax, n in ((0, nx), (1, ny))]
    seen = ("a field edge is in view and the tiles end there",
            "no field edge where the tiles end is in view")
    what = ", ".join(f"{'xy'[ax]}: {seen[0] if ok else seen[1]}" for ax, ok in enumerate(found))
    return all(found), what


# ------------------------------------------------------------------------ subsets
def subset_disagreement_m(image_size, field_profile: FieldProfile, reg: FrameRegistration,
                          samples):
    """Largest RMS floor disagreement at the tile corners in view between the whole fit
    and fits to the seams of one image half alone (left, right, top, bottom) [m].

    The halves are fitted with the whole fit's intrinsics (pose only), started from the
    whole fit. NaN when a half has too few seams to fit.
    """
    q, ax, val = samples
    w, h = image_size
    corners = field_profile.tile_corners_m()
    px = reg.floor_to_image(corners)
    inside = (np.all(np.isfinite(px), axis=1) & (px[:, 0] >= 0) & (px[:, 0] < w)
              & (px[:, 1] >= 0) & (px[:, 1] < h))
    if inside.sum() < 4 or len(q) < 40:
        return math.nan
    k, d = reg.camera_matrix, reg.dist_coeffs
    worst = 0.0
    for coord, size in ((0, w), (1, h)):
        for half in (q[:, coord] < size / 2, q[:, coord] >= size / 2):
            if half.sum() < 20:
                continue
            try:
                fit = fit_camera((w, h), seams=(q[half], ax[half], val[half]),
                                 init=(k, d, reg.rvec, reg.tvec),
                                 options=FitOptions(fit_focal=False, fit_k1=False,
                                                    fit_k2=False, outlier_px=1.5,
                                                    loss_px=0.5))
            except CalibrationError:
                continue
            sub = FrameRegistration(0.0, True, fit.camera_matrix, fit.dist_coeffs, fit.rvec,
                                    fit.tvec, fit.rms_px, fit.rms_floor_m, fit.n_points, "")
            err = sub.image_to_floor(px[inside]) - corners[inside]
            worst = max(worst, float(np.sqrt(np.nanmean(np.sum(err ** 2, axis=1)))))
    return worst


# --------------------------------------------------------------------------- pose
def pose_problem(reg: FrameRegistration, image_size, limits: CheckLimits, *,
                 lens_known: bool) -> str:
    """Why the camera pose or lens of ``reg`` is implausible, or ''."""
    c = reg.camera_centre_m
    lo, hi = limits.height_range_m
    if not lo <= c[2] <= hi:
        return (f"the fit puts the camera {c[2]:.2f} m above the floor (a filming set-up "
                f"is {lo:g}-{hi:g} m)")
    if limits.camera_height_m is not None:
        rel = abs(c[2] - limits.camera_height_m) / limits.camera_height_m
        if rel > limits.camera_height_tolerance:
            return (f"the fit puts the camera {c[2]:.2f} m above the floor, the given "
                    f"height is {limits.camera_height_m:.2f} m")
    if not lens_known:
        f_rel = float(reg.camera_matrix[0, 0]) / max(image_size)
        lo_f, hi_f = limits.focal_range
        if not lo_f <= f_rel <= hi_f:
            return (f"the fitted focal length is {f_rel:.2f} x the image size (a lens has "
                    f"{lo_f:g}-{hi_f:g})")
        if abs(float(reg.dist_coeffs[0])) > 1.0:
            return f"the fitted lens distortion k1 = {float(reg.dist_coeffs[0]):.2f} is not a lens"
    return ""


def holdout_errors(points, reg: FrameRegistration, image_size):
    """Each clicked point predicted by a pose fitted to all the others (intrinsics held).

    Returns
    -------
    (ndarray (N,), ndarray (N,))
        Floor error [m] and image error [px] of each point; empty with fewer than 6.
    """
    px, fl = (np.asarray(a, float).reshape(-1, 2) for a in points)
    if len(px) < 6:
        return np.zeros(0), np.zeros(0)
    k, d = reg.camera_matrix, reg.dist_coeffs
    err = np.full(len(px), np.nan)
    err_px = np.full(len(px), np.nan)
    for i in range(len(px)):
        rest = np.arange(len(px)) != i
        try:
            fit = fit_camera(image_size, points=(px[rest], fl[rest]),
                             init=(k, d, reg.rvec, reg.tvec),
                             options=FitOptions(fit_focal=False, fit_k1=False, fit_k2=False))
        except CalibrationError:
            continue
        one = FrameRegistration(0.0, True, k, d, fit.rvec, fit.tvec, 0.0, 0.0, 0, "")
        err[i] = float(np.linalg.norm(one.image_to_floor(px[i:i + 1])[0] - fl[i]))
        err_px[i] = float(np.linalg.norm(one.floor_to_image(fl[i:i + 1])[0] - px[i]))
    return err, err_px


def _holdout_problem(points, err, tile_size_m, limits: CheckLimits) -> str:
    if not np.isfinite(err).any():
        return ""
    at = int(np.nanargmax(err))
    if err[at] > limits.max_holdout_tiles * tile_size_m:
        px = np.asarray(points[0], float).reshape(-1, 2)
        return (f"point {at + 1} (u {px[at, 0]:.0f}, v {px[at, 1]:.0f} px) is {err[at]:.3f} m "
                "from where the other points put it; check that row")
    return ""


# ------------------------------------------------------------------------ checks
@dataclass(frozen=True)
class ReferenceFacts:
    """How a reference registration was made, for :func:`check_reference`."""

    method: str
    """'grid', 'markers' or 'points', with '+seams' when refined on the seams."""
    lens_known: bool
    """A camera profile gave the intrinsics."""
    points: tuple | None = None
    """Clicked points (pixels [px], floor [m]) for the held-out check."""
    relative_ok: bool = False
    """Accept a grid whose place in the tile pattern is not fixed by the view (the
    caller fixes or states it); the report says so."""
    position_fixed: bool = False
    """A floor marker fixed the field's place (no whole-tile check needed)."""


def check_reference(grey, field_profile: FieldProfile, reg: FrameRegistration,
                    facts: ReferenceFacts, *, limits: CheckLimits = CheckLimits(),
                    ignore=None) -> CheckReport:
    """Check the reference registration of ``grey`` (see the module notes).

    Returns
    -------
    CheckReport
        ``reason`` is empty when every check passed.
    """
    h, w = grey.shape
    figures = {"camera_height_m": float(reg.camera_centre_m[2]),
               "focal_px": float(reg.camera_matrix[0, 0])}
    reason = pose_problem(reg, (w, h), limits, lens_known=facts.lens_known)
    if not reason and facts.points is not None:
        err, err_px = holdout_errors(facts.points, reg, (w, h))
        if np.isfinite(err_px).any():
            # Prediction error beyond the residual: held-out residuals carry the point's
            # own noise plus the model's error at a point it did not see.
            loo2 = float(np.nanmean(err_px ** 2))
            figures["holdout_rms_px"] = math.sqrt(loo2)
            figures["prediction_px"] = math.sqrt(max(loo2 - reg.rms_px ** 2, 0.0))
        reason = _holdout_problem(facts.points, err, field_profile.tile_size_m, limits)
        px, fl = (np.asarray(a, float).reshape(-1, 2) for a in facts.points)
        click_px = float(np.sqrt(np.mean(np.sum((reg.floor_to_image(fl) - px) ** 2, axis=1))))
        figures["click_rms_px"] = click_px
        if not reason and not click_px <= limits.max_click_rms_px:
            reason = (f"the clicked points lie {click_px:.1f} px RMS from the registration "
                      f"fitted to them and the tile seams (a click is good to about a pixel)"
                      f"; check the points{'' if facts.lens_known else ' or give a lens profile'}")
        if not reason:
            # Clicked floor positions may be counted from any visible corner (the picker
            # and --points allow it): they fix the lattice, and the field's place only
            # where a field edge in view shows the tiles ending where they put it.
            known, what = field_position_known(grey, field_profile, reg, ignore=ignore)
            figures["field_position"] = what
            return CheckReport("", figures, known)
    # Seam evidence for every registration that used the seams: the grid, and floor
    # markers sharpened on the seams (small or far markers can put the seams' fit on
    # the wrong lattice). Markers alone (a floor without visible seams) are not checked
    # on seams; markers fix the field's place.
    seamed = facts.method.startswith("grid") or (facts.method.startswith("markers")
                                                  and facts.method.endswith("+seams"))
    if reason or not seamed:
        return CheckReport(reason, figures)
    if not facts.lens_known and max(w, h) < SMALL_IMAGE_PX:
        # The lens (focal length, distortion) then comes from the seams alone; at this
        # size their bending is a pixel or two across the frame, and a biased lens
        # moves the floor by millimetres that no other check here resolves.
        return CheckReport(
            f"without a lens profile the lens is estimated on the tile seams, which at "
            f"{w} x {h} px do not fix it (give a camera profile, or film at 1280 x 720 "
            "or more)", figures)
    ev = seam_evidence(grey, field_profile, reg, ignore=ignore)
    samples = ev.pop("samples")
    figures.update(ev)
    if ev["edges"] < limits.min_edges:
        return CheckReport(f"only {ev['edges']} tile edges of the field are in view", figures)
    if ev["offset_supported"] >= 0.3 and (
            ev["offset_supported"] > limits.max_offset_ratio * ev["supported"]):
        return CheckReport(
            f"seams show half a tile off the grid as often as on it ({ev['offset_supported']:.0%}"
            f" against {ev['supported']:.0%} of the edges)", figures)
    # Weak support needs a clear contrast to the lines half a tile off where the grid
    # chose the lattice's phase itself (floor markers fix it independently).
    weak = ev["supported"] < limits.weak_support and facts.method.startswith("grid")
    if ev["supported"] < limits.min_edge_support or (
            weak and ev["offset_supported"] > limits.weak_offset_ratio * ev["supported"]):
        small = (f" at {w} x {h} px, where seams thinner than a pixel are lost (film or "
                 "export at 1280 x 720 or more)") if max(w, h) < SMALL_IMAGE_PX else ""
        return CheckReport(
            f"seams were found on only {ev['supported']:.0%} of the tile edges the grid "
            f"predicts ({ev['offset_supported']:.0%} half a tile off){small}", figures)
    sub = subset_disagreement_m((w, h), field_profile, reg, samples)
    figures["subset_disagreement_m"] = sub
    tiles = limits.max_subset_tiles if facts.lens_known else limits.max_subset_tiles_no_lens
    limit = max(limits.max_subset_m, tiles * field_profile.tile_size_m)
    if sub > limit:
        return CheckReport(
            f"the left/right and top/bottom halves of the image disagree by {1000 * sub:.0f} "
            f"mm on the tile corners", figures)
    if facts.position_fixed or facts.method.startswith("markers"):
        return CheckReport("", figures, True)
    known, what = field_position_known(grey, field_profile, reg, ignore=ignore)
    figures["field_position"] = what
    if not known and not facts.relative_ok:
        return CheckReport(
            "the field's place in the tile pattern cannot be told (" + what + "): a grid "
            "shifted by whole tiles fits as well; give the start tile (--start-tile)",
            figures, False)
    return CheckReport("", figures, known)


def check_track(track, quality: dict, field_profile: FieldProfile,
                limits: CheckLimits = CheckLimits(), *, outline=True) -> str:
    """Why a truth track shows that the registration was wrong, or ''.

    Parameters
    ----------
    track : DataFrame
        The truth track (``x_m``, ``y_m``).
    quality : dict
        The tracker's quality figures (``marker_scale_median``).
    outline : bool
        Check the path against the field outline (only when the field's place is known).
    """
    scale = quality.get("marker_scale_median", math.nan)
    if math.isfinite(scale) and abs(scale - 1.0) > limits.max_marker_scale_error:
        return (f"the robot's marker measures {100 * scale:.0f}% of its size in the robot "
                "profile (check size_m and z_m there if the floor grid in the preview is "
                "right)")
    xy = np.column_stack([track["x_m"], track["y_m"]])
    xy = xy[np.all(np.isfinite(xy), axis=1)]
    if len(xy) and outline:
        m = 0.5 * field_profile.tile_size_m
        sx, sy = field_profile.size_m
        out = ((xy[:, 0] < -m) | (xy[:, 0] > sx + m) | (xy[:, 1] < -m) | (xy[:, 1] > sy + m))
        if out.mean() > limits.max_outside_fraction:
            return (f"{out.mean():.0%} of the robot's path lies outside the field "
                    f"({sx:.2f} x {sy:.2f} m)")
    return ""


def refuse(reason: str, frame_bgr=None, reg: FrameRegistration | None = None,
           field_profile: FieldProfile | None = None):
    """Raise :class:`RegistrationRefused` with the preview of ``reg`` over the frame."""
    preview = None
    if frame_bgr is not None:
        preview = frame_bgr if reg is None or field_profile is None else draw_registration(
            frame_bgr, reg, field_profile)
    raise RegistrationRefused(reason, preview)


# ------------------------------------------------------------------ after tracking
def _corner_statement(registrar) -> str:
    """Which visible tile corner the positions are relative to (reference frame)."""
    ref = registrar.reference
    grey = registrar.reference_grey
    field_profile = registrar.field
    corners = field_profile.tile_corners_m()
    px = ref.floor_to_image(corners)
    h, w = grey.shape[:2]
    d = np.hypot(px[:, 0] - w / 2, px[:, 1] - h / 2)
    d[~np.all(np.isfinite(px), axis=1)] = np.inf
    k = int(np.argmin(d))
    return (f"the tile corner at pixel ({px[k, 0]:.0f}, {px[k, 1]:.0f}) of the reference "
            f"frame (t = {ref.t_s:.2f} s), taken as x {corners[k, 0]:.3f} m, "
            f"y {corners[k, 1]:.3f} m")


def place_track(track, quality: dict, registrar):
    """Fix the field's place from the start tile, then check the truth track.

    With a start tile (``registrar.settings.start_tile``) the track is moved by the
    whole tiles that put its first position on that tile; when the registration had
    fixed the field's place itself, a start off that tile is refused instead. Without
    either, the statement returned says which visible corner positions are relative to.
    Then :func:`check_track`.

    Parameters
    ----------
    track : DataFrame
        Truth track (``x_m``, ``y_m``, ``detected``).
    quality : dict
        Tracker quality figures.
    registrar : FloorRegistrar
        The registrar used (anything without ``settings`` is left alone).

    Returns
    -------
    (DataFrame, str)
        The track (moved or not) and what positions are relative to.

    Raises
    ------
    RegistrationRefused
        The start tile contradicts the registration, or :func:`check_track` fails.
    """
    settings = getattr(registrar, "settings", None)
    if settings is None or not settings.self_check or registrar.reference is None:
        return track, ""
    field_profile = registrar.field
    report = registrar.check_report
    known = report is None or report.field_position_known
    statement = "the field origin (registered)" if known else _corner_statement(registrar)
    start = settings.start_tile or field_profile.start_tile
    xy = np.column_stack([track["x_m"], track["y_m"]])
    valid = np.all(np.isfinite(xy), axis=1)
    if start is not None and valid.any():
        s = field_profile.tile_size_m
        p0 = xy[np.argmax(valid)]
        shift = np.round((np.array([start[0] + 0.5, start[1] + 0.5]) * s - p0) / s)
        if known and np.any(shift != 0):
            at = np.floor(p0 / s).astype(int)
            _refuse_with_reference(
                f"the robot starts on tile ({at[0]}, {at[1]}) of the registered field, not "
                f"on the start tile ({start[0]}, {start[1]}) given", registrar)
        if np.any(shift != 0):
            track = track.copy()
            track["x_m"] = track["x_m"] + shift[0] * s
            track["y_m"] = track["y_m"] + shift[1] * s
        statement = f"the field origin (placed by the start tile {start[0]}, {start[1]})"
        known = True
    reason = check_track(track, quality, field_profile, settings.limits, outline=known)
    if reason:
        _refuse_with_reference(reason, registrar)
    return track, statement


def _refuse_with_reference(reason, registrar):
    grey = registrar.reference_grey
    frame = cv2.cvtColor(grey, cv2.COLOR_GRAY2BGR) if grey.ndim == 2 else grey
    refuse(reason, frame, registrar.reference, registrar.field)
