"""``vidodo demo``: render a run of our own, grade it, fit the profile, show everything.

The demo scenario is ours (a made-up robot on a 6 x 6 tile floor); its numbers are
demo numbers. The rendered run is cached in ``OUT/run`` and reused while the scenario,
seed and vidodo version are unchanged.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

from ._options import add_out, add_switch, add_units

NAME = "demo"
HELP = "render a run of our own, grade it, fit the robot profile, write every output"

def add_arguments(parser):
    add_out(parser, "output folder (default: %(default)s)", default="vidodo-demo")
    parser.add_argument("--scenario", default="default", help="scenario name or TOML file")
    parser.add_argument("--seed", type=int, default=0, help="random seed of the render")
    add_units(parser)
    add_switch(parser, "replay", True, "write the annotated replay")
    parser.add_argument("--rerender", action="store_true", help="ignore the cached run")


def _ensure_run(args, out: Path, progress) -> Path:
    from vidodo.synth.scenario import load_scenario
    from vidodo.synth.simulate import run_cache_key, simulate_run

    scenario = load_scenario(args.scenario)
    key = run_cache_key(scenario, args.seed)
    run = out / "run"
    stamp = out / ".vidodo-run-cache"  # beside the run: the run folder holds only its set
    if not args.rerender and stamp.is_file() and stamp.read_text().strip() == key:
        return run
    simulate_run(scenario, args.seed, run, progress=progress)
    stamp.write_text(key + "\n")
    return run


def _print_fit(folder: Path, most: int = 5) -> None:
    """The profile values the fit moved by more than twice their standard error."""
    import pandas as pd

    table = folder / "fit.csv"
    if not table.is_file():
        return
    fit = pd.read_csv(table)
    moved = fit[fit["written"].astype(bool) & (fit["change"].abs() > 2 * fit["std_error"])]
    moved = moved.reindex(moved["change"].abs().sort_values(ascending=False).index)
    if moved.empty:
        print(f"profile fit: no value needs changing ({folder / 'robot.toml'})")
        return
    parts = [f"{r.parameter} {r.profile:g} -> {r.estimate:.5g} (+-{r.std_error:.2g})"
             for r in moved.head(most).itertuples()]
    print(f"profile fit ({len(moved)} value(s) changed, corrected profile in "
          f"{folder / 'robot.toml'}):")
    for part in parts:
        print(f"  {part}")


def run(args) -> int:
    from vidodo.batch import grade_run_folder
    from vidodo.commands.grade import verdict_lines
    from vidodo.progress import progress_factory

    out = Path(args.out)
    progress = progress_factory(quiet=args.quiet)
    t0 = time.perf_counter()
    run_dir = _ensure_run(args, out, progress)
    t_render = time.perf_counter() - t0
    result = grade_run_folder(
        run_dir, out / "grade", progress=progress, replay=args.replay, units=args.units,
        tune=True,
    )
    t_total = time.perf_counter() - t0
    if not args.quiet:
        for line in verdict_lines(result, units=args.units):
            print(line)
        truth_events = run_dir / "truth" / "events.csv"
        if truth_events.is_file():
            import pandas as pd

            injected = pd.read_csv(truth_events)
            print(f"injected in the demo (known truth): {len(injected)} faults: "
                  + ", ".join(f"{k} at {t:.1f} s" for k, t in
                              zip(injected["kind"], injected["t_start_s"], strict=True)))
        _print_fit(out / "grade" / "tune")
        print(f"run folder: {run_dir}  (rendered in {t_render:.1f} s)")
        print(f"outputs:    {out / 'grade'}  (open report.html)")
        print(f"total time: {t_total:.1f} s")
    from vidodo.outputs import atomic_file

    meta = {"render_s": round(t_render, 2), "total_s": round(t_total, 2)}
    with atomic_file(out / "timing.json", signature=b'{\n "render_s"') as tmp:
        tmp.write_text(json.dumps(meta, indent=1) + "\n")
    return 0
