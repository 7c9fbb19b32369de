"""Shared fixtures: rendered runs, cached on disk between test sessions.

``rendered_run(name="default", seed=0, **overrides) -> Path`` renders a run folder
(video, log, profiles, truth) with :func:`vidodo.synth.simulate.simulate_run` and caches it
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

import os
import shutil
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CACHE = Path(os.environ.get("VIDODO_RUN_CACHE", ROOT / ".cache" / "runs"))
SMALL = {"video.width_px": 640, "video.height_px": 360}
def _render(name="default", seed=0, video=True, **overrides) -> Path:
    from vidodo.synth.scenario import load_scenario
    from vidodo.synth.simulate import run_cache_key, simulate_run

    ov = dict(SMALL)
    ov.update({k.replace("__", "."): v for k, v in overrides.items()})
    sc = load_scenario(name, **ov)
    key = run_cache_key(sc, seed, video=video)
    folder = CACHE / key
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
