"""Scenario + seed -> a complete run folder (see DEVELOPERS.md, "Run folder").

Beyond the files DEVELOPERS.md lists, ``truth/camera_poses.csv`` holds the camera pose
at every frame (``t_s, rvec_0..2, tvec_0_m..tvec_2_m``, floor -> camera, OpenCV),
which moves for a hand-held camera.

The log, profiles and truth files are computed here from :mod:`vidodo.synth.motion` and
:mod:`vidodo.synth.sensors`; the footage comes from :mod:`vidodo.synth.render` and
:mod:`vidodo.encode`. Everything is written through :func:`vidodo.outputs.staged_dir`,
so a failure leaves the target folder as it was. The same scenario and seed give
byte-identical log and truth files.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import cv2
import numpy as np

from .. import __version__
from ..outputs import staged_dir
from ..profiles import camera_to_dict, dump_toml, field_to_dict, robot_to_dict
from .motion import EVENT_UNITS, Motion, camera_base_pose, camera_pose_fn, simulate_motion
from .scenario import Scenario, load_scenario
from .sensors import format_log_csv, synthesize_log

__all__ = ["simulate_run", "frame_times", "marker_visible", "TIMEBASE_HZ"]

TIMEBASE_HZ = 90000
"""Frame times are multiples of 1/90000 s, the common MPEG clock of the container."""


def frame_times(sc: Scenario, duration_s: float, seed: int = 0) -> np.ndarray:
    """Presentation time of every frame on the video clock.

    Nominal times are ``k / fps``. With ``variable_timing`` each frame is shifted by
    Gaussian jitter (clipped to 0.3 of a period) and frame slots are dropped with
    ``drop_probability``, as phones do under load. Times are rounded to the 90 kHz
    container clock.

    Returns
    -------
    ndarray of shape (N,)
        Strictly increasing times starting at 0 [s].
    """
    v = sc.video
    n = int(math.floor(duration_s * v.fps - 1e-9)) + 1
    t = np.arange(n) / v.fps
    if v.variable_timing:
        rng = np.random.default_rng([seed, 5])
        jit = np.clip(rng.normal(0.0, v.timing_jitter_s, n), -0.3 / v.fps, 0.3 / v.fps)
        keep = rng.random(n) >= v.drop_probability
        jit[0], keep[0] = 0.0, True
        t = (t + jit)[keep]
    t = np.round(t * TIMEBASE_HZ) / TIMEBASE_HZ
    return t[np.concatenate([[True], np.diff(t) > 0])]


def marker_visible(sc: Scenario, poses, t_s, camera_pose_at) -> np.ndarray:
    """True where all corners of at least one robot marker project inside the image.

    Projection through the true lens with ``cv2.projectPoints``; a corner behind the
    camera counts as outside.
    """
    from ..profiles import marker_corners_local

    cam = sc.camera_profile()
    poses = np.asarray(poses, float)
    out = np.zeros(len(poses), bool)
    corners_b = []
    for mk in sc.robot.markers:
        loc = marker_corners_local(mk.size_m)
        c, s = math.cos(mk.yaw_rad), math.sin(mk.yaw_rad)
        xy = loc @ np.array([[c, -s], [s, c]]).T + [mk.x_m, mk.y_m]
        corners_b.append(np.column_stack([xy, np.full(4, mk.z_m)]))
    for i, (pose, t) in enumerate(zip(poses, t_s, strict=True)):
        rvec, tvec = camera_pose_at(float(t))
        rot = cv2.Rodrigues(np.asarray(rvec, float))[0]
        c, s = math.cos(pose[2]), math.sin(pose[2])
        for cb in corners_b:
            pts = np.column_stack([pose[0] + c * cb[:, 0] - s * cb[:, 1],
                                   pose[1] + s * cb[:, 0] + c * cb[:, 1], cb[:, 2]])
            z = (pts @ rot.T + np.asarray(tvec, float))[:, 2]
            if np.any(z <= 1e-6):
                continue
            uv, _ = cv2.projectPoints(pts, np.asarray(rvec, float), np.asarray(tvec, float),
                                      cam.matrix, cam.dist_coeffs)
            uv = uv.reshape(-1, 2)
            if np.all((uv[:, 0] >= 0) & (uv[:, 0] <= cam.width_px - 1)
                      & (uv[:, 1] >= 0) & (uv[:, 1] <= cam.height_px - 1)):
                out[i] = True
                break
    return out


def _f(values, digits):
    return np.char.mod(f"%.{digits}f", np.asarray(values, float))


def _csv(header, columns) -> str:
    rows = [",".join(r) for r in zip(*columns, strict=True)]
    return ",".join(header) + "\n" + "\n".join(rows) + "\n"


def _truth_csv(sc, m: Motion, t_frames, camera_pose_at) -> str:
    pose = m.pose_at(t_frames)
    tw = m.twist_at(t_frames)
    vis = marker_visible(sc, pose, t_frames, camera_pose_at)
    return _csv(
        ["t_s", "x_m", "y_m", "heading_rad", "vx_mps", "vy_mps", "omega_radps",
         "marker_visible"],
        [_f(t_frames, 6), _f(pose[:, 0], 7), _f(pose[:, 1], 7), _f(pose[:, 2], 7),
         _f(tw[:, 0], 6), _f(tw[:, 1], 6), _f(tw[:, 2], 6),
         np.where(vis, "true", "false")],
    )


def _camera_csv(t_frames, camera_pose_at) -> str:
    """Floor -> camera pose (OpenCV rvec, tvec) at each frame's top-row time."""
    poses = [camera_pose_at(float(t)) for t in t_frames]
    r = np.array([np.asarray(p[0], float).ravel() for p in poses])
    tv = np.array([np.asarray(p[1], float).ravel() for p in poses])
    return _csv(["t_s", "rvec_0", "rvec_1", "rvec_2", "tvec_0_m", "tvec_1_m", "tvec_2_m"],
                [_f(t_frames, 6)] + [_f(r[:, j], 9) for j in range(3)]
                + [_f(tv[:, j], 9) for j in range(3)])


def _events_csv(m: Motion) -> str:
    ev = m.faults
    return _csv(
        ["kind", "t_start_s", "t_end_s", "x_m", "y_m", "magnitude", "sources"],
        [np.array([e.kind for e in ev], dtype=object).astype(str),
         _f([e.t_start_s for e in ev], 6), _f([e.t_end_s for e in ev], 6),
         _f([e.x_m for e in ev], 6), _f([e.y_m for e in ev], 6),
         _f([e.magnitude for e in ev], 6),
         np.array([";".join(e.sources) for e in ev], dtype=object).astype(str)],
    ) if ev else "kind,t_start_s,t_end_s,x_m,y_m,magnitude,sources\n"


def _odometry_csv(df) -> str:
    cols = list(df.columns)
    return _csv(cols, [_f(df[c], 6) if c == "t_log_s" else _f(df[c], 9) for c in cols])


def _meta(sc: Scenario, seed, m: Motion, t_frames, log_meta, video_written) -> dict:
    rot, tvec = camera_base_pose(sc.camera)
    cam = sc.camera_profile()
    return {
        "vidodo_version": __version__,
        "scenario": sc.name,
        "seed": int(seed),
        "duration_s": m.duration_s,
        "video": {
            "written": bool(video_written), "n_frames": int(len(t_frames)),
            "fps_nominal": sc.video.fps, "variable_timing": sc.video.variable_timing,
            "first_frame_t_s": float(t_frames[0]), "last_frame_t_s": float(t_frames[-1]),
            "timebase_hz": TIMEBASE_HZ, "codec": sc.video.codec,
            "exposure_s": sc.video.exposure_s, "noise_sigma": sc.video.noise_sigma,
            "render_seed": _render_seed(seed),
        },
        **log_meta,
        "camera": {
            "mount": sc.camera.mount, "position_m": list(sc.camera.position_m),
            "look_at_m": list(sc.camera.look_at_m),
            "rvec": cv2.Rodrigues(rot)[0].ravel().tolist(), "tvec": tvec.tolist(),
            "camera_matrix": cam.matrix.tolist(), "distortion": list(cam.distortion),
            "readout_s": cam.readout_s,
            "sway_deg": math.degrees(sc.camera.sway_rad) if sc.camera.mount == "handheld"
            else 0.0,
            "sway_m": sc.camera.sway_m if sc.camera.mount == "handheld" else 0.0,
        },
        "robot": {"start_pose": list(sc.start_pose), "path_start_s": m.path_start_s,
                  "path_end_s": m.path_end_s, "segment_start_s": list(m.segment_start_s)},
        "event_magnitude_units": EVENT_UNITS,
        "profile_errors": [{"key": k, "true": a, "written": b} for k, a, b in sc.profile_errors],
    }


def _render_seed(seed: int) -> int:
    return int(np.random.default_rng([seed, 6]).integers(0, 2**31 - 1))


def simulate_run(scenario, seed: int, out_dir, *, progress=None, video: bool = True) -> Path:
    """Write a complete run folder for a scenario and seed.

    Parameters
    ----------
    scenario : Scenario, str or Path
        A loaded scenario, a scenario file or a built-in name.
    seed : int
        Seeds every random part (log jitter, IMU errors, sway, frame timing, noise).
    out_dir : str or Path
        The run folder to write (created; files already there are replaced).
    progress : callable, optional
        ``progress(frames_done, total)`` while the video is rendered.
    video : bool
        False skips rendering the footage (everything else is still written).

    Returns
    -------
    Path
        ``out_dir``.
    """
    sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    out_dir = Path(out_dir)
    m = simulate_motion(sc, seed)
    logs = synthesize_log(sc, m, seed)
    t_frames = frame_times(sc, m.duration_s, seed)
    cam_pose = camera_pose_fn(sc, seed)
    with staged_dir(out_dir) as stage:
        (stage / "truth").mkdir()
        (stage / "log.csv").write_text(format_log_csv(sc.robot, logs.log))
        (stage / "robot.toml").write_text(dump_toml(
            robot_to_dict(sc.written_robot),
            header=f"robot profile for scenario '{sc.name}'"))
        (stage / "field.toml").write_text(dump_toml(field_to_dict(sc.field),
                                                    header="field profile"))
        (stage / "camera.toml").write_text(dump_toml(
            camera_to_dict(sc.camera_profile()), header="the true lens of the rendered camera"))
        (stage / "scenario.toml").write_text(sc.to_toml())
        (stage / "truth" / "truth.csv").write_text(_truth_csv(sc, m, t_frames, cam_pose))
        (stage / "truth" / "events.csv").write_text(_events_csv(m))
        (stage / "truth" / "camera_poses.csv").write_text(_camera_csv(t_frames, cam_pose))
        (stage / "truth" / "odometry_ideal.csv").write_text(_odometry_csv(logs.odometry_ideal))
        (stage / "truth" / "meta.json").write_text(json.dumps(
            _meta(sc, seed, m, t_frames, logs.meta, video), indent=2, sort_keys=True) + "\n")
        if video:
            _write_video(sc, seed, m, t_frames, cam_pose, stage / "video.mp4", progress)
    return out_dir


def _write_video(sc, seed, m: Motion, t_frames, cam_pose, path, progress):
    from .. import encode
    from . import render

    frames = render.render_frames(
        sc.field, sc.robot, sc.camera_profile(), frame_times_s=t_frames, pose_at=m.pose_at,
        camera_pose_at=cam_pose,
        settings=render.RenderSettings(exposure_s=sc.video.exposure_s,
                                       noise_sigma=sc.video.noise_sigma,
                                       seed=_render_seed(seed), floor_seed=sc.texture_seed))
    total = len(t_frames)
    if progress is not None:
        progress(0, total)

    def counted():
        for i, frame in enumerate(frames):
            yield frame
            if progress is not None:
                progress(i + 1, total)

    encode.write_video(path, counted(), t_frames, codec=sc.video.codec, crf=sc.video.crf,
                       fps_nominal=sc.video.fps)


# Modules whose source decides what a rendered run looks like; a change to any of them
# invalidates cached runs (the demo's and the tests').
RUN_MODULES = ("scenario", "motion", "sensors", "simulate", "render", "render_floor",
               "render_robot", "encode", "profiles", "se2", "wheels", "outputs")


def run_cache_key(sc: Scenario, seed: int, *, video: bool = True) -> str:
    """A short hash of everything that decides a rendered run's bytes.

    Covers the scenario after overrides, the seed, whether video is wanted, and the
    source of every module in :data:`RUN_MODULES` plus the shipped scenarios.
    """
    import hashlib

    h = hashlib.sha256()
    pkg = Path(__file__).resolve().parent
    for name in RUN_MODULES:
        for p in (pkg / f"{name}.py", pkg.parent / f"{name}.py"):
            if p.exists():
                h.update(name.encode() + p.read_bytes())
    for p in sorted((pkg / "scenarios").glob("*.toml")):
        h.update(p.name.encode() + p.read_bytes())
    key = json.dumps({"data": sc.data, "seed": seed, "video": bool(video),
                      "code": h.hexdigest()}, sort_keys=True, default=str)
    return hashlib.sha256(key.encode()).hexdigest()[:20]
