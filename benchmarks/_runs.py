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
