"""Rendered runs for the benchmarks, cached under ``.cache/bench`` (full size).

The cache key is the scenario name, seed and overrides; set ``VIDODO_BENCH_RERENDER=1``
to render again after the renderer or a scenario changed.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CACHE = ROOT / ".cache" / "bench"


def rendered(name: str, seed: int = 0, **overrides) -> Path:
    """Render (or reuse) scenario ``name`` with ``overrides`` (dotted keys)."""
    from vidodo.synth.scenario import load_scenario
    from vidodo.synth.simulate import simulate_run

    key = json.dumps({"name": name, "seed": seed, "overrides": overrides}, sort_keys=True,
                     default=str)
    folder = CACHE / f"{name}-{seed}-{hashlib.sha256(key.encode()).hexdigest()[:8]}"
    if (folder / ".complete").exists() and not os.environ.get("VIDODO_BENCH_RERENDER"):
        return folder
    sc = load_scenario(name, **overrides)
    if folder.exists():
        shutil.rmtree(folder)
    simulate_run(sc, seed, folder)
    (folder / ".complete").write_text(key)
    return folder


def looped(name: str, seconds: float, seed: int = 0, **overrides) -> Path:
    """Scenario ``name`` driven round again and again, cut to ``seconds`` of video.

    Each lap is the scenario's own path, then a drive back to the start and a turn to
    the start heading; faults stay in the first lap. For benchmarks that need clips
    of the lengths users film (the 9 s ``fullhd60`` run is mostly fixed costs).
    """
    from vidodo.profiles import read_toml
    from vidodo.synth.scenario import _locate

    data, _ = read_toml(_locate(name))
    robot = data.get("robot", {})
    back = [{"kind": "drive", "x_m": robot.get("start_x_m", 0.0),
             "y_m": robot.get("start_y_m", 0.0)},
            {"kind": "turn", "heading_deg": robot.get("start_heading_deg", 0.0)}]
    laps = max(int(seconds / 4.0), 1)  # a lap lasts well over 4 s
    return rendered(name, seed, segment=(list(data["segment"]) + back) * laps,
                    **{"video.max_duration_s": float(seconds)}, **overrides)
