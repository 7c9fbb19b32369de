"""``vidodo render``: write a synthetic run folder from a scenario and a seed."""

from __future__ import annotations

import time
from pathlib import Path

from ..errors import InputError
from ..progress import progress_bar
from ..synth.scenario import load_scenario, scenario_names
from ._options import add_force

NAME = "render"
HELP = "render a synthetic run (video, log, profiles, truth) from a scenario"
DESCRIPTION = (
    "Render a run folder from a scenario file or a built-in scenario name: video.mp4, "
    "log.csv, robot/field/camera profiles, scenario.toml and the truth/ folder. The same "
    "scenario and seed give the same log and truth files. Exit 2 for a bad scenario."
)


def add_arguments(parser):
    parser.add_argument("scenario",
                        help="a scenario .toml file or a built-in name "
                             f"({', '.join(scenario_names())})")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("-o", "--out", type=Path, required=True, help="run folder to write")
    parser.add_argument("--width", type=int, default=None,
                        help="image width [px]; height follows the scenario's aspect ratio")
    parser.add_argument("--fps", type=float, default=None, help="nominal frame rate [1/s]")
    parser.add_argument("--set", action="append", default=[], metavar="TABLE.KEY=VALUE",
                        help="override a scenario value, e.g. --set video.codec=hevc "
                             "(repeatable; values in TOML syntax)")
    parser.add_argument("--no-video", action="store_true",
                        help="write everything except video.mp4 (fast)")
    add_force(parser)


def _overrides(args, base) -> dict:
    ov = {}
    for item in args.set:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise InputError(f"--set {item!r}: write it as TABLE.KEY=VALUE")
        ov[key.strip()] = value.strip()
    if args.width is not None:
        if args.width < 16:
            raise InputError(f"--width {args.width}: must be at least 16")
        w0, h0 = base.video.width_px, base.video.height_px
        ov["video.width_px"] = args.width - args.width % 2
        ov["video.height_px"] = max(16, int(round(args.width * h0 / w0 / 2)) * 2)
    if args.fps is not None:
        if args.fps <= 0:
            raise InputError(f"--fps {args.fps}: must be positive")
        ov["video.fps"] = args.fps
    return ov


def run(args) -> int:
    from ..outputs import staged_dir
    from ..synth.simulate import simulate_run

    base = load_scenario(args.scenario)
    sc = load_scenario(args.scenario, **_overrides(args, base)) if (
        args.set or args.width or args.fps) else base
    t0 = time.perf_counter()
    scenario_file = Path(args.scenario) if Path(args.scenario).is_file() else None
    with staged_dir(args.out, inputs=(scenario_file,), force=args.force,
                    command="vidodo render") as stage, \
            progress_bar(None, f"render {sc.name}", quiet=args.quiet) as bar:
        simulate_run(sc, args.seed, stage, progress=bar, video=not args.no_video)
    out = args.out
    if not args.quiet:
        print(f"rendered scenario '{sc.name}' (seed {args.seed}) in "
              f"{time.perf_counter() - t0:.1f} s -> {out}")
    return 0
