"""The part of the track's position error that one run's samples share.

Two terms of the track's 1-sigma (:mod:`vidodo.tracking.finish`) are not new in each
frame but one error for the whole run, seen through each frame's own geometry:

* the detector's common corner shift (:data:`~vidodo.tracking.detector.REFINE_BIAS_PX`,
  ``corner_bias_px``): one image shift ``(b_u, b_v)`` of every corner, the same in every
  frame of a run (a property of the refinement); sample ``i`` moves by ``J_i b`` with
  ``J_i`` the floor metres per image pixel at the marker
  (:func:`~vidodo.tracking.pixel_lock.marker_floor_jacobians`);
* the floor registration's parameter error, for a camera that stood still through the
  run (every registration is of the same view, so it makes the same error): sample
  ``i`` moves by ``G_i L z`` with ``G_i`` the pose fit's response to the parameters,
  ``L L^T`` their covariance and ``z`` one standard normal vector for the run
  (:func:`~vidodo.tracking.registration_error.registration_pose_loadings`). A moving
  camera's registrations are fitted frame by frame and are left to the per-sample part.

Both are linear in a short vector of standard normals common to the run, so the shared
error of all samples is ``A z`` with ``A`` (2 N x P) stacked from the per-sample
loadings, and the covariance between any two samples is read from it. A drift figure is
a difference from the anchor pose; what the two samples share cancels there, and only
this covariance says how much. ``A`` is stored as its first :data:`SHARED_MODES` left
singular vectors times the singular values (the best rank-k approximation of ``A A^T``
in the Frobenius norm, Eckart & Young, Psychometrika 1:211, 1936); the variance of the
modes left out stays in the per-sample part, so the total 1-sigma is unchanged.
"""

from __future__ import annotations

import numpy as np

from .pixel_lock import marker_floor_jacobians
from .registration_error import registration_pose_loadings
from .result import SHARED_PREFIX

__all__ = ["SHARED_MODES", "SHARED_COLUMNS", "shared_modes", "shared_columns"]

SHARED_MODES = 3
"""Modes of the shared error kept per track."""

SHARED_COLUMNS = [f"{SHARED_PREFIX}{k + 1}_{a}_m" for k in range(SHARED_MODES) for a in ("x", "y")]
"""Track columns of the modes: ``shared<k>_x_m, shared<k>_y_m`` is the floor
displacement of the sample [m] when the run's k-th shared standard normal is +1."""


def _loadings(inputs, bias_px, still):
    """Per frame the (2, P) loadings of its position on the run's shared normals."""
    frames = [(reg, corners, heights) for _fix, corners, heights, reg in inputs]
    shift = [np.mean(j, axis=0) * float(bias_px) for j in marker_floor_jacobians(frames)]
    reg = registration_pose_loadings(inputs) if still else [None] * len(inputs)
    sizes = {r.shape[1] for r in reg if r is not None}
    if len(sizes) != 1 or any(r is None for r in reg):
        reg = [np.zeros((3, 0))] * len(inputs)  # not one registration error for the run
    return np.array([np.hstack([s, r[:2]]) for s, r in zip(shift, reg, strict=True)])


def shared_modes(inputs, idx, n, bias_px, still):
    """The run's shared position error as :data:`SHARED_MODES` modes per frame.

    Parameters
    ----------
    inputs : list of (fix, corners, heights, reg)
        The detections' pose fits, corners [px], marker heights [m] and registrations,
        at frame indices ``idx``.
    idx : ndarray (M,) of int
        Their frame indices.
    n : int
        Frames in the run.
    bias_px : float
        1-sigma of the detector's common corner shift per image axis [px].
    still : bool
        The camera stood still through the run (one registration error).

    Returns
    -------
    ndarray (n, SHARED_MODES, 2)
        Floor displacement [m] of each frame per unit of each mode's standard normal,
        interpolated between detections; zeros without detections.
    """
    out = np.zeros((n, SHARED_MODES, 2))
    if not len(inputs):
        return out
    a = np.nan_to_num(_loadings(inputs, bias_px, still))  # (M, 2, P)
    m, _, p = a.shape
    u, s, _vt = np.linalg.svd(a.reshape(2 * m, p), full_matrices=False)
    k = min(SHARED_MODES, s.size)
    modes = (u[:, :k] * s[:k]).reshape(m, 2, k)
    grid = np.arange(n)
    for j in range(k):
        for axis in (0, 1):
            out[:, j, axis] = np.interp(grid, idx, modes[:, axis, j])
    return out


def shared_columns(modes):
    """The modes as track columns, dict of :data:`SHARED_COLUMNS` -> ndarray (n,)."""
    return {f"{SHARED_PREFIX}{k + 1}_{a}_m": modes[:, k, i] for k in range(SHARED_MODES)
            for i, a in enumerate(("x", "y"))}
