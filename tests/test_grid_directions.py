"""Choice of the two seam directions: perpendicular on the floor, one side of the horizon.

The vanishing points are made from OpenCV's projection of floor lines
(``cv2.projectPoints``) through a known camera, so the check is against OpenCV's
pinhole model and plain geometry (the angle between two floor directions), not against
the project's own projection.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import cv2
import numpy as np

from vidodo.registration.grid import lattice
from vidodo.synth.motion import look_at_pose

W, H = 1280, 720
K = np.array([[900.0, 0, 639.5], [0, 900.0, 359.5], [0, 0, 1]])


def _pose():
    r, t = look_at_pose(np.array([-0.4, -1.5, 1.6]), np.array([1.2, 1.4, 0.0]))
    return cv2.Rodrigues(r)[0].ravel(), t


def _ctx(camera=None):
    scale = 2.0 / math.hypot(W, H)
    return dict(scale=scale, centre=np.array([W / 2, H / 2]), camera=camera, shape=(H, W))


def _segment(p0, p1, rvec, tvec):
    """Image segment (u0, v0, u1, v1) of the floor segment p0 -> p1 (OpenCV projection)."""
    obj = np.array([[*p0, 0.0], [*p1, 0.0]])
    uv = cv2.projectPoints(obj, rvec, tvec, K, None)[0].reshape(-1)
    return uv


def _vp(direction, rvec, tvec):
    """Vanishing point of a floor direction in the lattice search's conditioned frame,
    from two parallel floor lines projected by OpenCV."""
    ctx = _ctx()
    d = np.asarray(direction, float)
    lines = []
    for off in (np.zeros(2), np.array([-d[1], d[0]]) * 0.6):
        s = _segment(off + np.array([0.6, 0.6]), off + np.array([0.6, 0.6]) + d, rvec, tvec)
        c = np.concatenate([(s[:2] - ctx["centre"]) * ctx["scale"],
                            (s[2:] - ctx["centre"]) * ctx["scale"]])
        lines.append(np.cross([*c[:2], 1.0], [*c[2:], 1.0]))
    vp = np.cross(lines[0], lines[1])
    return vp / np.linalg.norm(vp)


def test_perpendicular_floor_directions_deviate_zero():
    rvec, tvec = _pose()
    vx, vy = _vp([1.0, 0.0], rvec, tvec), _vp([0.0, 1.0], rvec, tvec)
    # With the lens known: exactly perpendicular (floating point only).
    assert lattice._perpendicular_deviation(vx, vy, _ctx(SimpleNamespace(matrix=K))) < 0.05
    # Without it, some focal length in the lens range makes them perpendicular
    # (900 px over 1280 px = 0.70, inside 0.25-4; sampled on a grid of focal lengths).
    assert lattice._perpendicular_deviation(vx, vy, _ctx()) < 0.5


def test_oblique_floor_directions_deviate_by_their_angle():
    # Floor directions 60 deg apart deviate 30 deg from perpendicular (plain geometry).
    rvec, tvec = _pose()
    a = _vp([1.0, 0.0], rvec, tvec)
    b = _vp([math.cos(math.radians(60)), math.sin(math.radians(60))], rvec, tvec)
    dev = lattice._perpendicular_deviation(a, b, _ctx(SimpleNamespace(matrix=K)))
    assert abs(dev - 30.0) < 0.05


def test_floor_seams_lie_on_one_side_of_their_horizon():
    rvec, tvec = _pose()
    ctx = _ctx()
    segs = []
    for d in ([1.0, 0.0], [0.0, 1.0]):
        rows = []
        for k in range(5):
            off = np.array([-d[1], d[0]]) * 0.6 * k
            s = _segment(off, off + np.asarray(d) * 2.4, rvec, tvec)
            rows.append(np.concatenate([(s[:2] - ctx["centre"]) * ctx["scale"],
                                        (s[2:] - ctx["centre"]) * ctx["scale"]]))
        segs.append(np.array(rows))
    cseg = np.vstack(segs)
    in_x = np.arange(len(cseg)) < 5
    fam_x = (_vp([1.0, 0.0], rvec, tvec), in_x, 1.0)
    fam_y = (_vp([0.0, 1.0], rvec, tvec), ~in_x, 1.0)
    assert lattice._below_horizon(cseg, fam_x, fam_y) == 1.0
    # A line through the floor (as the line through a floor direction's and the
    # vertical's vanishing points can be): the image row through the seams' median.
    m = float(np.median((cseg[:, 1] + cseg[:, 3]) / 2))
    fake_a = (np.array([1.0, 0.0, 0.0]), in_x, 1.0)  # at infinity along the rows
    fake_b = (np.array([0.0, m, 1.0]), ~in_x, 1.0)
    assert lattice._below_horizon(cseg, fake_a, fake_b) < lattice.BELOW_HORIZON_SHARE
