"""Registrations saved beside a track and read back (vidodo.tracking.floor_poses).

Reference: OpenCV's ``cv2.projectPoints`` with the camera written, so the saved file is
checked against the projection it must reproduce, not against itself.
"""

from __future__ import annotations

import cv2
import numpy as np
import pytest
from numpy.testing import assert_allclose

from vidodo.errors import InputError
from vidodo.registration.frame import FrameRegistration, failed
from vidodo.tracking.floor_poses import (
    FloorPoses,
    RecordingRegistrar,
    floor_poses_path,
    read_floor_poses,
    write_floor_poses,
)

K = np.array([[800.0, 0, 639.5], [0, 800.0, 359.5], [0, 0, 1]])
DIST = np.array([0.06, -0.12, 0.0005, -0.0004, 0.02])


def _reg(t_s, shift_m=0.0, method="tracked"):
    rvec = np.array([2.0, 0.15, -0.1])
    tvec = np.array([-2.1 + shift_m, 0.65, 2.5])
    return FrameRegistration(t_s, True, K, DIST, rvec, tvec, 0.3, 0.001, 50, method)


def test_round_trip_projects_as_opencv(tmp_path):
    regs = [_reg(0.0, method="grid+seams"), failed(0.033, "no floor"), _reg(0.066, 0.01)]
    path = write_floor_poses(regs, tmp_path / "track.floor.csv", detection_readout_s=0.02)
    poses = read_floor_poses(path)
    assert len(poses) == 3 and poses.detection_readout_s == pytest.approx(0.02)
    floor = np.array([[0.5, 0.5, 0.0], [2.0, 3.0, 0.0], [3.4, 1.2, 0.0]])
    for r_in, r_out in zip(regs, poses.registrations, strict=True):
        assert r_out.ok == r_in.ok and r_out.method == r_in.method
        if r_in.ok:
            exp = cv2.projectPoints(floor, r_in.rvec, r_in.tvec, K, DIST)[0].reshape(-1, 2)
            assert_allclose(r_out.floor_to_image(floor), exp, atol=1e-6)


def test_in_effect_is_the_last_good_one_made_before():
    poses = FloorPoses((_reg(0.0), failed(0.5, "lost"), _reg(1.0, 0.01)))
    assert poses.at(-0.1) is None
    assert poses.at(0.0).t_s == 0.0
    assert poses.at(0.7).t_s == 0.0  # the failed one at 0.5 is not used
    assert poses.at(1.0).t_s == 1.0 and poses.at(9.0).t_s == 1.0


def test_recording_registrar_keeps_every_result():
    class Fake:
        reference = "kept"

        def register(self, frame, t_s, mask=None):
            return _reg(t_s)

    rec = RecordingRegistrar(Fake())
    rec.register(None, 0.0)
    rec.register(None, 0.1, mask=np.zeros((2, 2), bool))
    assert [r.t_s for r in rec.records] == [0.0, 0.1]
    assert rec.reference == "kept"


def test_bad_file_names_the_column(tmp_path):
    p = tmp_path / "x.floor.csv"
    p.write_text("t_s,ok\n0,true\n")
    with pytest.raises(InputError, match="column"):
        read_floor_poses(p)
    assert floor_poses_path(tmp_path / "track.csv").name == "track.floor.csv"
