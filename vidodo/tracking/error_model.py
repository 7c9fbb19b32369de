"""Terms of the track's position 1-sigma that do not depend on the smoother.

Shared by the tracker (:mod:`vidodo.tracking.finish`) and the placement planner
(:mod:`vidodo.planner`), so that the planner's map is the track's own model. All
variances here are radial (the sum over the two floor axes) [m^2].
"""

from __future__ import annotations

import numpy as np

__all__ = ["REGISTRATION_PARAMS", "registration_sigma_m", "corner_bias_var_m2",
           "timing_var_m2"]

REGISTRATION_PARAMS = 8
"""Parameters of a floor registration (a homography's 8) for the fallback term of
:func:`registration_sigma_m`."""


def registration_sigma_m(var_xy_m2, m_per_px, rms_px, n_points, *, rms_m=np.nan,
                         prediction_px=0.0):
    """The registration's error at the robot, radial 1-sigma [m].

    The registration's own parameter error carried through the pose fit
    (:func:`~vidodo.tracking.registration_error.registration_pose_covs`: ``var_xy_m2``,
    the trace of its x, y block) where the registration has a covariance; else its mean
    prediction error: a least-squares fit of p parameters to n observations with
    residual sigma predicts with mean variance sigma^2 p / n (the trace of the hat
    matrix; Draper & Smith, *Applied Regression Analysis*, 3rd ed., section 8.1),
    carried to the floor through the image scale at the marker (``rms_m`` where that
    is not finite). Then, where larger, the error the registration showed at clicked
    points it was not fitted to (``prediction_px``): it holds the lens and pose error
    its covariance does not (an unmodelled lens is a systematic error).

    Parameters
    ----------
    var_xy_m2 : array_like (N,)
        Trace of the pose's x, y covariance from the registration [m^2]; NaN or 0 where
        not known.
    m_per_px : array_like (N,)
        Floor metres per image px at the marker [m/px].
    rms_px, n_points : float or array_like (N,)
        The registration's RMS residual [px] and observation count.
    rms_m : float or array_like (N,)
        Its RMS residual on the floor [m], used where the px term is not finite.
    prediction_px : float or array_like (N,)
        Its held-out prediction error [px] (0: not measured).

    Returns
    -------
    ndarray (N,)
    """
    var_xy = np.asarray(var_xy_m2, float)
    mpp = np.asarray(m_per_px, float)
    n = np.maximum(np.asarray(n_points, float), REGISTRATION_PARAMS)
    with np.errstate(invalid="ignore", divide="ignore"):
        err = np.asarray(rms_px, float) * np.sqrt(REGISTRATION_PARAMS / n) * mpp
    err = np.where(np.isfinite(err), err, np.asarray(rms_m, float))
    known = np.isfinite(var_xy) & (var_xy > 0)
    err = np.where(known, np.sqrt(np.where(known, var_xy, 0.0)), err)
    return np.fmax(err, np.asarray(prediction_px, float) * mpp)


def corner_bias_var_m2(corner_bias_px, m_per_px):
    """Radial variance of a shift common to all corners of a marker [m^2]:
    ``corner_bias_px`` per image axis through the floor scale ``m_per_px``; the fit's
    residuals cannot show it and the smoother cannot average it."""
    return 2.0 * (float(corner_bias_px) * np.asarray(m_per_px, float)) ** 2


def timing_var_m2(speed_mps, row_frac, readout_sigma_s):
    """Radial variance of a detection timed off by ``row_frac * readout_sigma_s`` (the
    marker's rolling-shutter row over a readout known to ``readout_sigma_s``) at
    ``speed_mps``, along the motion [m^2]."""
    dt = np.nan_to_num(np.asarray(row_frac, float)) * float(readout_sigma_s)
    return np.nan_to_num(np.asarray(speed_mps, float) * dt) ** 2
