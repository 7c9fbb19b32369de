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

from vidodo.registration.grid import directions
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
    assert directions._perpendicular_deviation(vx, vy, _ctx(SimpleNamespace(matrix=K))) < 0.05
    # Without it, some focal length in the lens range makes them perpendicular
    # (900 px over 1280 px = 0.70, inside 0.25-4; sampled on a grid of focal lengths).
    assert directions._perpendicular_deviation(vx, vy, _ctx()) < 0.5


def test_oblique_floor_directions_deviate_by_their_angle():
    # Floor directions 60 deg apart deviate 30 deg from perpendicular (plain geometry).
    rvec, tvec = _pose()
    a = _vp([1.0, 0.0], rvec, tvec)
    b = _vp([math.cos(math.radians(60)), math.sin(math.radians(60))], rvec, tvec)
    dev = directions._perpendicular_deviation(a, b, _ctx(SimpleNamespace(matrix=K)))
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
    assert directions._below_horizon(cseg, fam_x, fam_y) == 1.0
    # A line through the floor (as the line through a floor direction's and the
    # vertical's vanishing points can be): the image row through the seams' median.
    m = float(np.median((cseg[:, 1] + cseg[:, 3]) / 2))
    fake_a = (np.array([1.0, 0.0, 0.0]), in_x, 1.0)  # at infinity along the rows
    fake_b = (np.array([0.0, m, 1.0]), ~in_x, 1.0)
    assert directions._below_horizon(cseg, fake_a, fake_b) < directions.BELOW_HORIZON_SHARE


def _cond(seg_px):
    """Pixel segments (N, 4) -> the lattice search's conditioned frame."""
    ctx = _ctx()
    s = np.asarray(seg_px, float).reshape(-1, 4)
    return np.column_stack([(s[:, :2] - ctx["centre"]) * ctx["scale"],
                            (s[:, 2:] - ctx["centre"]) * ctx["scale"]])


def _true_vp(axis, rvec):
    """The image of the floor direction ``axis`` (its vanishing point v = K r_axis;
    Hartley & Zisserman, *Multiple View Geometry*, 2nd ed., section 8.6), conditioned."""
    ctx = _ctx()
    rot = cv2.Rodrigues(np.asarray(rvec, float))[0]
    cond = np.array([[ctx["scale"], 0, -ctx["centre"][0] * ctx["scale"]],
                     [0, ctx["scale"], -ctx["centre"][1] * ctx["scale"]], [0, 0, 1]])
    v = cond @ K @ rot[:, axis]
    return v / np.linalg.norm(v)


def _angle_seen_deg(vp, true, cseg):
    """Largest angle at the segments' midpoints between the directions to two
    vanishing points [deg]."""
    mid = (cseg[:, :2] + cseg[:, 2:]) / 2

    def ang(v):
        d = v[:2][None, :] - mid * v[2]
        return np.arctan2(d[:, 1], d[:, 0])
    return float(np.degrees(np.max(np.abs(np.angle(np.exp(2j * (ang(vp) - ang(true))))) / 2)))


def _in_view(seg_px):
    s = np.asarray(seg_px, float).reshape(-1, 4)
    ok = np.all((s[:, 0::2] >= 0) & (s[:, 0::2] < W) & (s[:, 1::2] >= 0) & (s[:, 1::2] < H),
                axis=1)
    return s[ok]


def _tile_seams(rvec, tvec, n=6, tile=0.6):
    """Image segments of each seam of an n x n tile field, one per tile edge (OpenCV
    projection), per family: x-direction seams first."""
    fam = []
    for axis in (0, 1):
        rows = []
        for k in range(n + 1):
            for m in range(n):
                p0, p1 = np.zeros(2), np.zeros(2)
                p0[axis], p1[axis] = m * tile + 0.03, (m + 1) * tile - 0.03
                p0[1 - axis] = p1[1 - axis] = k * tile
                rows.append(_segment(p0, p1, rvec, tvec))
        fam.append(_in_view(rows))
    return fam


def test_perpendicular_partner_finds_weak_seams_beside_strong_tape():
    # Few short y seams; long tape lines 6 deg off the x axis outweigh the x seams. The
    # partner of the y direction must be the x seams' vanishing point (on the polar
    # line of the y point with respect to the image of the absolute conic), not the
    # tape's: the expected point is K r_x of the known camera (common practice).
    rvec, tvec = _pose()
    seam_x, seam_y = _tile_seams(rvec, tvec)
    seam_x = seam_x[::3]  # the x seams weak: a third of their tile edges seen
    ang = math.radians(6.0)
    tape = []
    for k in range(5):
        p0 = np.array([0.1, 0.5 + 0.7 * k])
        tape.append(_segment(p0, p0 + 3.4 * np.array([math.cos(ang), math.sin(ang)]), rvec,
                             tvec))
    tape = _in_view(tape)
    cseg = _cond(np.vstack([seam_y, seam_x, tape]))
    n_y = len(seam_y)
    fam_y = (_true_vp(1, rvec), np.arange(len(cseg)) < n_y, 1.0)
    ctx = _ctx(SimpleNamespace(matrix=K))
    found = directions.perpendicular_partner(cseg, fam_y, ctx, np.random.default_rng(1))
    assert found is not None
    on_x = slice(n_y, n_y + len(seam_x))
    assert _angle_seen_deg(found[0], _true_vp(0, rvec), cseg[on_x]) < 0.2
    assert found[1][on_x].all()
    assert not found[1][n_y + len(seam_x):].any()  # no tape line taken


def test_perpendicular_partner_without_lens_profile():
    # Without the lens, focal lengths over the lens range are tried (900 px lies inside).
    rvec, tvec = _pose()
    seam_x, seam_y = _tile_seams(rvec, tvec)
    cseg = _cond(np.vstack([seam_y, seam_x]))
    fam_y = (_true_vp(1, rvec), np.arange(len(cseg)) < len(seam_y), 1.0)
    found = directions.perpendicular_partner(cseg, fam_y, _ctx(), np.random.default_rng(2))
    assert _angle_seen_deg(found[0], _true_vp(0, rvec), cseg[len(seam_y):]) < 0.2


def test_candidate_pairs_put_the_floor_axes_first_despite_tape_lines():
    # Long tape lines 6 deg off the x seams (more segment length than those seams):
    # with the lens known no pair with them can be perpendicular on the floor, and the
    # first pair offered is the two floor axes (K r_x, K r_y of the known camera).
    rvec, tvec = _pose()
    seam_x, seam_y = _tile_seams(rvec, tvec)
    seam_x = seam_x[::3]
    ang = math.radians(6.0)
    tape = _in_view([_segment(np.array([0.1, 0.5 + 0.7 * k]),
                              np.array([0.1, 0.5 + 0.7 * k])
                              + 3.4 * np.array([math.cos(ang), math.sin(ang)]), rvec, tvec)
                     for k in range(5)])
    cseg = _cond(np.vstack([seam_x, seam_y, tape]))
    pairs, _fallback = directions.candidate_pairs(cseg, _ctx(SimpleNamespace(matrix=K)),
                                                  np.random.default_rng(3))
    (vp_a, _ia), (vp_b, _ib) = pairs[0]
    on_x, on_y = cseg[:len(seam_x)], cseg[len(seam_x):len(seam_x) + len(seam_y)]
    true_x, true_y = _true_vp(0, rvec), _true_vp(1, rvec)
    errs = min(max(_angle_seen_deg(vp_a, true_x, on_x), _angle_seen_deg(vp_b, true_y, on_y)),
               max(_angle_seen_deg(vp_b, true_x, on_x), _angle_seen_deg(vp_a, true_y, on_y)))
    assert errs < 0.2


def test_near_edge_from_points_in_front_when_near_corners_are_behind_the_camera():
    # Camera 1.0 m up, standing over the field's near part and looking across it: a
    # corner is behind it (its "image position" is mirrored through the centre).
    # The near edge is the one whose points in front of the camera lie lowest in the
    # picture (DEVELOPERS.md, origin_hint), computed here with OpenCV's projection.
    from vidodo.profiles import FieldProfile
    from vidodo.registration.grid import lattice

    tile, n = 0.6, 6
    r, t = look_at_pose(np.array([1.5, 0.5, 1.0]), np.array([2.6, 2.8, 0.0]))
    rvec, tvec = cv2.Rodrigues(r)[0].ravel(), np.asarray(t, float)
    rot = cv2.Rodrigues(rvec)[0]
    hom = K @ np.column_stack([rot[:, 0], rot[:, 1], tvec])  # floor (x, y, 1) -> pixels
    size = n * tile
    corners = np.array([[0, 0], [size, 0], [size, size], [0, size]], float)
    assert (corners @ rot[2, :2] + tvec[2] < 0).sum() >= 1  # a corner behind
    view = lattice.edge_views(hom, corners)
    a = np.linspace(0, 1, 41)
    rows = []
    for k in range(4):
        pts = corners[k] + a[:, None] * (corners[(k + 1) % 4] - corners[k])
        obj = np.column_stack([pts, np.zeros(len(pts))])
        front = obj[(obj @ rot.T + tvec)[:, 2] > 0]
        uv = cv2.projectPoints(front, rvec, tvec, K, None)[0].reshape(-1, 2)
        rows.append(uv[:, 1].mean() if len(uv) else -np.inf)
    np.testing.assert_allclose(view[:4], rows, rtol=1e-9)
    near = int(np.argmax(rows))
    # The lattice as the search would hand it over: corner (i, j) at the image of the
    # floor point (i, j) * tile, behind-camera corners included (mirrored).
    ii, jj = np.meshgrid(np.arange(n + 1), np.arange(n + 1), indexing="ij")
    flo = np.stack([ii, jj], axis=-1) * tile
    obj = np.column_stack([flo.reshape(-1, 2), np.zeros((n + 1) ** 2)])
    hp = obj[:, :3] @ np.column_stack([rot[:, 0], rot[:, 1], tvec]).T @ K.T
    hp[:, 2] = np.where(np.abs(hp[:, 2]) < 1e-9, 1e-9, hp[:, 2])
    lat = (hp[:, :2] / hp[:, 2:]).reshape(n + 1, n + 1, 2)
    field = FieldProfile(n, n, tile, origin_hint="near-left")
    out = lattice.orient(lat, field, "near-left", view)
    # Expected from the rule alone: the origin is the end c of the near edge whose
    # frame (x toward the edge's other end e, y toward c's other neighbour f) is
    # right-handed on the floor (x cross y = +z), z up.
    idx = [(0, 0), (n, 0), (n, n), (0, n)]
    ends = (near, (near + 1) % 4)
    for c_k, e_k in (ends, ends[::-1]):
        f_k = [k for k in ((c_k + 1) % 4, (c_k + 3) % 4) if k != e_k][0]
        ex, fy = corners[e_k] - corners[c_k], corners[f_k] - corners[c_k]
        if ex[0] * fy[1] - ex[1] * fy[0] > 0:
            break
    np.testing.assert_allclose(out[idx[c_k]], [0.0, 0.0], atol=1e-12)
    np.testing.assert_allclose(out[idx[e_k]], [size, 0.0], atol=1e-12)
    np.testing.assert_allclose(out[idx[f_k]], [0.0, size], atol=1e-12)
