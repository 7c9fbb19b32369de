"""Renderer and encoder speed: ms per frame for a tripod and a hand-held camera.

Run: .venv/bin/python benchmarks/render_speed.py [--frames N]

Renders the same 6 x 6 tile field and moving robot (1.2 m/s on a circle, marker on a
mast, 1/120 s exposure, 25 ms readout, noise sigma 2) at 1280x720 and 1920x1080, with
the camera on a tripod (floor drawn once, only the robot redrawn) and hand-held (slow
sway: the floor is redrawn every frame), then encodes the 720p tripod frames with
libx264. Prints set-up time (rays, texture, first floor) and per-frame CPU and wall
times side by side. CPU time is this process's (all threads); wall time suffers when
the machine is shared.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from pathlib import Path

import cv2
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from vidodo.encode import write_video  # noqa: E402
from vidodo.profiles import CameraProfile, FieldProfile, Marker, RobotProfile  # noqa: E402
from vidodo.synth.motion import look_at_pose  # noqa: E402
from vidodo.synth.render import RenderSettings, render_frames  # noqa: E402

FIELD = FieldProfile(6, 6, 0.6096)
ROBOT = RobotProfile("bench", 0.45, 0.45, 0.30,
                     (Marker(3, "DICT_4X4_50", 0.15, 0.0, 0.0, 0.40, 0.0),), (), "t")


def look_at(centre, target):
    rot, t = look_at_pose(centre, target)
    return cv2.Rodrigues(rot)[0].ravel(), t


def pose_at(t):
    t = np.asarray(t, float)
    a = 1.2 / 1.0 * t  # 1.2 m/s on a 1 m radius circle
    return np.column_stack([1.83 + np.cos(a), 1.83 + np.sin(a), a + math.pi / 2])


def camera(width, height):
    return CameraProfile(width, height, 0.8 * width, 0.8 * width, width / 2, height / 2,
                         (-0.08, 0.02, 0.0, 0.0, 0.0), readout_s=0.025)


TRIPOD = look_at(np.array([1.83, -0.5, 1.8]), [1.83, 1.9, 0.0])


def hand_held(t):
    centre = np.array([1.83 + 0.05 * math.sin(0.7 * t), -0.5 + 0.03 * math.sin(1.1 * t),
                       1.6 + 0.02 * math.sin(0.9 * t)])
    target = np.array([1.83 + 0.15 * math.sin(0.5 * t), 1.9 + 0.1 * math.cos(0.4 * t), 0.0])
    return look_at(centre, target)


def run(width, height, camera_pose_at, n_frames):
    cam = camera(width, height)
    times = np.arange(n_frames + 1) / 30.0
    frames = render_frames(FIELD, ROBOT, cam, frame_times_s=times, pose_at=pose_at,
                           camera_pose_at=camera_pose_at,
                           settings=RenderSettings(exposure_s=1 / 120, noise_sigma=2.0, seed=1,
                                                   floor_seed=3))
    c0, w0 = time.process_time(), time.perf_counter()
    next(frames)
    c1, w1 = time.process_time(), time.perf_counter()
    kept = [f for f in frames]
    c2, w2 = time.process_time(), time.perf_counter()
    return (c1 - c0, w1 - w0, (c2 - c1) / n_frames * 1e3, (w2 - w1) / n_frames * 1e3), kept


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=30)
    args = ap.parse_args()
    print(f"{'case':<22}{'setup cpu s':>12}{'setup wall s':>13}{'cpu ms/frame':>14}"
          f"{'wall ms/frame':>15}")
    results = {}
    clip = None
    for (w, h) in ((1280, 720), (1920, 1080)):
        for name, pose in (("tripod", lambda t: TRIPOD), ("hand-held", hand_held)):
            r, frames = run(w, h, pose, args.frames)
            results[(h, name)] = r
            if (h, name) == (720, "tripod"):
                clip = frames
            print(f"{f'{h}p {name}':<22}{r[0]:>12.2f}{r[1]:>13.2f}{r[2]:>14.1f}{r[3]:>15.1f}")
    for h in (720, 1080):
        ratio = results[(h, "hand-held")][2] / results[(h, "tripod")][2]
        print(f"{h}p hand-held / tripod CPU time per frame: {ratio:.2f}")
    with tempfile.TemporaryDirectory() as tmp:
        c0, w0 = time.process_time(), time.perf_counter()
        write_video(Path(tmp) / "b.mp4", iter(clip), np.arange(len(clip)) / 30.0)
        c1, w1 = time.process_time(), time.perf_counter()
    # ffmpeg runs in a child process: its CPU time is not in process_time
    print(f"720p h264 encode (veryfast, crf 18): wall {(w1 - w0) / len(clip) * 1e3:.1f} "
          f"ms/frame, this process {(c1 - c0) / len(clip) * 1e3:.1f} ms/frame")


if __name__ == "__main__":
    main()
