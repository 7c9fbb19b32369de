"""Where the time of a grade goes: seconds per stage, for ``summary.json`` (``timings_s``).

A :class:`StageTimes` adds up wall-clock seconds per named stage. Stages may overlap:
decoding runs in a background thread while the tracker registers and detects, so the
``decode`` figure is the time the decoder itself was busy, and the stages together can
exceed the wall time of the grade. A stage that did not run (e.g. ``decode`` when the
track was given) is ``None`` in :meth:`StageTimes.as_dict`.
"""

from __future__ import annotations

import threading
import time
from contextlib import contextmanager

__all__ = ["STAGES", "StageTimes", "merged"]

STAGES = ("decode", "register", "detect", "smooth", "sync", "events", "pictures", "replay")
"""The stages of a grade, in the order they run."""


class StageTimes:
    """Seconds spent per stage (thread-safe sums of ``time.perf_counter`` spans)."""

    def __init__(self):
        self._s: dict[str, float] = {}
        self._lock = threading.Lock()

    def add(self, stage: str, seconds: float) -> None:
        """Add ``seconds`` [s] to ``stage``."""
        with self._lock:
            self._s[stage] = self._s.get(stage, 0.0) + float(seconds)

    @contextmanager
    def stage(self, stage: str):
        """Time the ``with`` block and add it to ``stage`` (also when it raises)."""
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.add(stage, time.perf_counter() - t0)

    def as_dict(self) -> dict:
        """``{stage: seconds or None}``: every stage of :data:`STAGES` in order (None
        where it did not run), then any other stage timed, rounded to a millisecond."""
        with self._lock:
            s = dict(self._s)
        out = {k: (round(s.pop(k), 3) if k in s else None) for k in STAGES}
        out.update({k: round(v, 3) for k, v in s.items()})
        return out


def merged(*tables: dict | None) -> dict:
    """Stage tables combined: a later table's figure replaces an earlier one's unless it
    is None; stages of :data:`STAGES` first, in order."""
    out = {k: None for k in STAGES}
    for table in tables:
        for k, v in (table or {}).items():
            if v is not None or k not in out:
                out[k] = v
    return out
