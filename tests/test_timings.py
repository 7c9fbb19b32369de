"""Stage times (vidodo/timings.py): sums per stage, from several threads, merged tables."""

from __future__ import annotations

import threading
import time

import pytest

from vidodo.timings import STAGES, StageTimes, merged


def test_stage_sums_and_order():
    times = StageTimes()
    times.add("events", 0.25)
    times.add("decode", 1.0)
    times.add("decode", 0.5)
    with pytest.raises(RuntimeError), times.stage("sync"):
        time.sleep(0.01)
        raise RuntimeError  # a stage that fails still counts
    out = times.as_dict()
    assert list(out) == list(STAGES)  # every stage, in order; None where not run
    assert out["decode"] == 1.5 and out["events"] == 0.25 and out["register"] is None
    # time.perf_counter spans: at least the 10 ms slept (its resolution is far finer)
    assert out["sync"] >= 0.01


def test_threads_add_without_losing_time():
    times = StageTimes()

    def work():
        for _ in range(1000):
            times.add("detect", 0.001)

    threads = [threading.Thread(target=work) for _ in range(4)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    assert times.as_dict()["detect"] == pytest.approx(4.0)


def test_merged_keeps_figures_and_extra_stages():
    a = {"decode": 2.0, "register": 1.0, "pictures": None}
    b = {"decode": None, "pictures": 3.0, "upload": 0.5}
    out = merged(a, b)
    assert out["decode"] == 2.0 and out["register"] == 1.0 and out["pictures"] == 3.0
    assert out["replay"] is None and out["upload"] == 0.5
    assert list(out)[:len(STAGES)] == list(STAGES)
