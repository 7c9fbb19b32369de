"""The registration's own error carried into the robot's pose of one frame.

Each marker corner is mapped to the floor through the frame's registration; an error
in the registration's parameters moves every corner (:func:`~vidodo.registration.
uncertainty.floor_point_covariance` gives each corner's derivative ``J_n`` with respect
to them). The rigid pose fit follows its corners: to first order its pose moves by
``G = (A^T A)^-1 sum_n A_n^T J_n`` per unit of the parameters (the least-squares step
of the unweighted rigid fit :func:`~vidodo.tracking.pose_fit.fit_pose` makes), so the pose
covariance from the registration is ``G C G^T`` (linear propagation, JCGM 100:2008
section 5.1.2). Unlike corner noise this error is the same for every corner of a frame,
so the fit's residuals never show it, and for a still camera it is the same in every
frame, so the smoother cannot average it.
"""

from __future__ import annotations

import numpy as np

from ..registration.uncertainty import floor_point_covariance

__all__ = ["registration_pose_cov", "registration_pose_covs", "registration_pose_loadings",
           "view_rate", "VIEW_RATE_MAX_DT_S"]

VIEW_RATE_MAX_DT_S = 0.2
"""Longest step between two registrations differenced for :func:`view_rate` [s]."""


def _jacobians(requests):
    """Floor-point derivatives for many ``(reg, [corners], [heights])`` requests, each
    as one (N, 2, P) array over its corners in order. The pixels of all requests that
    share a registration and a height are mapped in one call (a fixed camera's frames
    share one registration; mapping them frame by frame cost 1.5 ms a frame)."""
    groups = {}
    for r, (reg, corners, heights) in enumerate(requests):
        for s, (c, z) in enumerate(zip(corners, heights, strict=True)):
            groups.setdefault((id(reg), float(z)), (reg, []))[1].append((r, s, c))
    out = [[None] * len(req[1]) for req in requests]
    for (_, z), (reg, parts) in groups.items():
        jac = floor_point_covariance(reg, np.concatenate([c for _, _, c in parts]), z)[1]
        at = np.cumsum([0] + [len(c) for _, _, c in parts])
        for (r, s, _), a, b in zip(parts, at[:-1], at[1:], strict=True):
            out[r][s] = jac[a:b]
    return [np.concatenate(o) if o else np.zeros((0, 2, 0)) for o in out]


def _gain(fix, jac):
    """``G``: the rigid fit's pose (x, y, heading) per unit of the registration's
    parameters, (3, P)."""
    a = fix.jac
    return np.linalg.solve(np.einsum("nji,njk->ik", a, a), np.einsum("nji,njp->ip", a, jac))


def _through_fit(fix, jac, reg):
    """``G C G^T``: the registration's parameter covariance through the rigid fit."""
    cov = getattr(reg, "param_cov", None)
    if cov is None:
        return np.zeros((3, 3))
    if not np.all(np.isfinite(jac)):
        return np.full((3, 3), np.nan)
    g = _gain(fix, jac)
    return g @ np.asarray(cov, float) @ g.T


def _cov_root(cov):
    """``L`` with ``L L^T = cov`` for a symmetric positive semi-definite ``cov``
    (eigen-decomposition; negative rounding eigenvalues taken as 0)."""
    w, v = np.linalg.eigh(0.5 * (cov + cov.T))
    return v * np.sqrt(np.clip(w, 0.0, None))


def registration_pose_loadings(frames):
    """The registration's error in each frame's pose as loadings on its parameters'
    standard normal errors: ``G L`` with ``L L^T = C`` (so ``G C G^T`` is the
    covariance of :func:`registration_pose_covs` without a tied share), one (3, P)
    array per ``(fix, corners, heights, reg)`` frame, or None where the registration
    has no covariance or a derivative is not finite. Frames that share a registration
    error (a still camera) share the standard normals, so the loadings give the
    covariance between frames too: ``(G_i L) (G_j L)^T``."""
    jac = _jacobians([(reg, corners, heights) for _fix, corners, heights, reg in frames])
    out = []
    for (fix, _c, _h, reg), j in zip(frames, jac, strict=True):
        cov = getattr(reg, "param_cov", None)
        if cov is None or j.shape[2] == 0 or not np.all(np.isfinite(j)):
            out.append(None)
            continue
        out.append(_gain(fix, j) @ _cov_root(np.asarray(cov, float)))
    return out


def registration_pose_covs(frames):
    """:func:`registration_pose_cov` of many frames at once, ``(fix, corners, heights,
    reg)`` each (``corners``: one (4, 2) array [px] per detection the fit used, in its
    order; ``heights``: their markers' heights [m]); a list of (3, 3) arrays."""
    own, tied, tied_at = [], [], []
    for k, (fix, corners, heights, reg) in enumerate(frames):
        own.append((reg, corners, heights))
        earlier = getattr(reg, "tied_to", None)
        if earlier is not None and getattr(reg, "tied_share", 0.0) > 0:
            # The same floor corners as the earlier registration saw them.
            floor = np.asarray(fix.floor_m, float)
            at = np.cumsum([0] + [len(c) for c in corners])
            seen = [earlier.floor_to_image(np.column_stack([floor[a:b], np.full(b - a, z)]))
                    for a, b, z in zip(at[:-1], at[1:], heights, strict=True)]
            tied.append((earlier, seen, heights))
            tied_at.append(k)
    fixes = [f[0] for f in frames]
    out = _through_fits(fixes, _jacobians(own), [f[3] for f in frames])
    tied_covs = _through_fits([fixes[k] for k in tied_at], _jacobians(tied),
                              [frames[k][3].tied_to for k in tied_at])
    for k, cov in zip(tied_at, tied_covs, strict=True):
        out[k] = out[k] + float(frames[k][3].tied_share) * cov
    return out


def _through_fits(fixes, jacs, regs):
    """:func:`_through_fit` of many frames; those sharing a registration and the shapes
    of their Jacobians in one batch."""
    out = [None] * len(fixes)
    groups: dict = {}
    for k, (fix, jac, reg) in enumerate(zip(fixes, jacs, regs, strict=True)):
        if getattr(reg, "param_cov", None) is None or not np.all(np.isfinite(jac)):
            out[k] = _through_fit(fix, jac, reg)
        else:
            groups.setdefault((id(reg), fix.jac.shape, jac.shape), (reg, []))[1].append(k)
    for reg, ks in groups.values():
        a = np.stack([fixes[k].jac for k in ks])
        jac = np.stack([jacs[k] for k in ks])
        g = np.linalg.solve(np.einsum("mnji,mnjk->mik", a, a),
                            np.einsum("mnji,mnjp->mip", a, jac))
        covs = g @ np.asarray(reg.param_cov, float) @ g.transpose(0, 2, 1)
        for k, cov in zip(ks, covs, strict=True):
            out[k] = cov
    return out


def registration_pose_cov(fix, detections, markers, reg):
    """Covariance of the fitted pose (x, y, heading) from the registration's error.

    Parameters
    ----------
    fix : PoseFix
        The frame's pose fit (its ``jac`` and ``floor_m``).
    detections : list of Detection
        The detections the fit used, in its order.
    markers : sequence of profiles.Marker
    reg : FrameRegistration
        The registration the corners were mapped through; with ``tied_to`` (tracked
        corners' floor positions from an earlier registration) that one's error is
        added, scaled by ``tied_share``.

    Returns
    -------
    ndarray (3, 3)
        [m^2, m rad, rad^2]; zeros when no covariance is known.
    """
    corners = [np.asarray(d.corners_px, float) for d in detections]
    heights = [markers[d.marker_index].z_m for d in detections]
    return registration_pose_covs([(fix, corners, heights, reg)])[0]


def view_rate(reg, previous, t_s, pixel_px, height_m):
    """How fast the floor point seen at one pixel moves with the camera [m/s], (2,).

    The pixel mapped through this frame's registration and the previous frame's, the
    difference over their time step: zero for a still camera (the same registration).
    A hand-held camera's registration holds for one instant of the frame; a marker read
    earlier or later in the rolling-shutter readout sees the floor moved by this rate
    times the time between (see ``finish._add_timing_sigma``).

    Parameters
    ----------
    reg : FrameRegistration
    previous : (FrameRegistration or None, float)
        The previous frame's registration and its time [s].
    t_s : float
    pixel_px : array_like (2,)
    height_m : float

    Returns
    -------
    ndarray (2,)
        Zeros without a previous registration within :data:`VIEW_RATE_MAX_DT_S`.
    """
    prev, t_prev = previous
    dt = float(t_s) - float(t_prev)
    if prev is None or prev is reg or not 0 < dt <= VIEW_RATE_MAX_DT_S:
        return np.zeros(2)
    px = np.asarray(pixel_px, float).reshape(1, 2)
    move = (reg.image_to_floor(px, height_m) - prev.image_to_floor(px, height_m))[0] / dt
    return move if np.all(np.isfinite(move)) else np.zeros(2)
