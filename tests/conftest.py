"""Shared fixtures: rendered runs, cached on disk between test sessions.

``rendered_run(name="default", seed=0, **overrides) -> Path`` renders a run folder
(video, log, profiles, truth) with :func:`vidodo.simulate.simulate_run` and caches it
under ``.cache/runs/<hash>/`` at the repository root. The hash covers the scenario
content after overrides, the seed, whether video is wanted, and the source of every
module that makes a run, so editing the renderer invalidates the cache.

Runs are small unless overrides say otherwise: 640x360 pixels, the scenario's own
length and frame rate. Override with dotted or double-underscore keys, e.g.
``rendered_run("default", 1, video__width_px=1280, video__height_px=720)`` or
``rendered_run(**{"video.max_duration_s": 4.0})``; ``video=False`` skips the footage.
Tests that ask for video should be marked ``@pytest.mark.slow``.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CACHE = Path(os.environ.get("VIDODO_RUN_CACHE", ROOT / ".cache" / "runs"))
SMALL = {"video.width_px": 640, "video.height_px": 360}
_RUN_MODULES = ("scenario", "motion", "sensors", "simulate", "render", "render_floor",
                "encode", "profiles", "se2", "wheels", "outputs")


def _code_hash() -> str:
    h = hashlib.sha256()
    pkg = ROOT / "vidodo"
    for name in _RUN_MODULES:
        p = pkg / f"{name}.py"
        if p.exists():
            h.update(name.encode() + p.read_bytes())
    for p in sorted((pkg / "scenarios").glob("*.toml")):
        h.update(p.name.encode() + p.read_bytes())
    return h.hexdigest()


def _render(name="default", seed=0, video=True, **overrides) -> Path:
    from vidodo.scenario import load_scenario
    from vidodo.simulate import simulate_run

    ov = dict(SMALL)
    ov.update({k.replace("__", "."): v for k, v in overrides.items()})
    sc = load_scenario(name, **ov)
    key = json.dumps({"data": sc.data, "seed": seed, "video": bool(video),
                      "code": _code_hash()}, sort_keys=True, default=str)
    folder = CACHE / hashlib.sha256(key.encode()).hexdigest()[:20]
    done = folder / ".complete"
    if done.exists():
        return folder
    if folder.exists():
        shutil.rmtree(folder)
    tmp = folder.with_name(folder.name + f".tmp{os.getpid()}")
    if tmp.exists():
        shutil.rmtree(tmp)
    simulate_run(sc, seed, tmp, video=video)
    (tmp / ".complete").write_text(key + "\n")
    try:
        tmp.rename(folder)
    except OSError:  # another process finished the same run first
        shutil.rmtree(tmp, ignore_errors=True)
    return folder


@pytest.fixture(scope="session")
def rendered_run():
    """Factory: ``rendered_run(name="default", seed=0, video=True, **overrides) -> Path``."""
    return _render
