# SPDX-License-Identifier: Apache-2.0
"""``adaptive-streamer replay``: offline replay, batch tables and live republishing.

    adaptive-streamer replay BAG [--params FILE] [--policy CARD|KIND] [--out DIR]
    adaptive-streamer replay BAG... --policy A --policy B [--jobs N | --scheduler ADDRESS]
                             [--out DIR]                                        # batch
    adaptive-streamer replay BAG --live [--rate 1.0] [--clock-rate HZ] [--topics T ...]

One bag and at most one policy: replay, compare with the recording and write the output
bag, ``summary.json``, ``report.md`` and plots into ``--out``. Several bags or policies:
a batch on Dask (a local cluster of one worker process per core, or the cluster of
``--scheduler``), ranked in ``batch.csv`` / ``batch.md``. ``--scenario FILE`` adds the
demo's lateral error (the real panel drawn from ``--seed`` or given with
``--panel-offset-mm``/``--panel-angle-deg``) and ranks by it. ``--live`` republishes the
bag's inputs with ``/clock`` instead of replaying offline.

Exit codes: 0 done, 2 bad input (the message names what is missing or wrong).
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from ..io.bag_io import BagError
from ..io.policy_kinds import POLICY_KINDS, kind_card

# the demo cell's lateral-error metric, loaded by name (replay does not import the demo)
SCENARIO_HOOK = "adaptive_streamer.demo.replay_metric:lateral_error_hook"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the replay options to ``parser``."""
    parser.add_argument("bags", nargs="+", metavar="BAG", help="rosbag2 folder or .mcap file")
    parser.add_argument("--params", metavar="FILE",
                        help="ROS 2 params file; its adapter section overrides the recorded "
                             "parameters")
    parser.add_argument("--policy", action="append", metavar="CARD|KIND",
                        help="policy card or kind instead of the recorded one: "
                             f"{', '.join(POLICY_KINDS)} (onnx, linear_feedback: the demo's "
                             "cards; tracker, hold: built in, for the recorded joints); "
                             "repeat for a batch")
    parser.add_argument("--out", default="replay_out", metavar="DIR",
                        help="output folder (default: replay_out)")
    parser.add_argument("--namespace", metavar="NS",
                        help="namespace of the adapter's topics (default: from the bag)")
    parser.add_argument("--no-plots", action="store_true", help="skip the PNG plots")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    parser.add_argument("--jobs", type=int, metavar="N", help="batch: worker processes of "
                        "the local Dask cluster (default: all cores; 1: in this process)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="batch: address of a running Dask scheduler (tcp://host:8786) "
                             "instead of a local cluster; bags and cards must be at the same "
                             "paths on its workers")
    parser.add_argument("--scenario", metavar="FILE",
                        help="demo scenario YAML: add the lateral error as the task metric")
    parser.add_argument("--seed", type=int, help="scenario run seed (placement)")
    parser.add_argument("--panel-offset-mm", type=float, help="real panel offset [mm]")
    parser.add_argument("--panel-angle-deg", type=float, help="real panel angle [deg]")
    parser.add_argument("--live", action="store_true",
                        help="republish the bag's inputs on DDS in real time with /clock")
    parser.add_argument("--rate", type=float, default=1.0,
                        help="live: speed factor (default 1.0)")
    parser.add_argument("--clock-rate", type=float, metavar="HZ",
                        help="live: /clock rate in bag time (default: the stream rate)")
    parser.add_argument("--topics", nargs="+", metavar="TOPIC",
                        help="live: topics to republish (default: the adapter's inputs)")


def _hook_options(args: argparse.Namespace) -> dict[str, object]:
    return {"scenario": args.scenario, "seed": args.seed, "offset_mm": args.panel_offset_mm,
            "angle_deg": args.panel_angle_deg}


def run(args: argparse.Namespace) -> int:
    """Run the replay command; returns the exit code."""
    from .batch import BatchError
    from .live import LiveReplayError
    from .run import ReplayError
    from ..io.run_info import RunInfoError
    from ..core.adapter_setup import SetupError
    try:
        if args.live:
            return _live(args)
        policies = [kind_card(p) for p in args.policy] if args.policy else [None]
        if len(args.bags) > 1 or len(policies) > 1 or args.scheduler:
            return _batch(args, policies)
        return _single(args, policies[0])
    except (BagError, ReplayError, SetupError, RunInfoError, LiveReplayError, BatchError,
            FileExistsError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


def _single(args: argparse.Namespace, policy: str | None) -> int:
    from .batch import load_hook
    from .compare import compare
    from .report import write_outputs
    from .run import replay

    result = replay(args.bags[0], args.params, policy, args.namespace, progress=not args.quiet)
    c, stream, recorded = compare(result)
    out = Path(args.out)
    facts = write_outputs(result, c, stream, recorded, out, with_plots=not args.no_plots)
    rate = result.cycles / result.elapsed if result.elapsed else float("nan")
    print(f"replayed {result.cycles} cycles of {result.bag} with {result.policy} "
          f"({result.mode}, {rate:.0f} cycles/s)")
    for note in result.notes:
        print(f"note: {note}")
    if result.partial:
        print(f"partial bag: {result.partial}")
    if c.compared:
        print("decisions: " + ("bit-identical to the records" if c.deterministic else
                               f"{c.identical}/{c.compared} identical, largest difference "
                               f"{c.max_difference:.3g} ({c.first_difference})"))
    task = c.task["replay"]
    print(f"RMS deviation from the reference {task['rms_deviation']:.4g} rad, "
          f"replay trips: {len(c.trips['replay'])}")
    if args.scenario:
        metrics = load_hook(SCENARIO_HOOK)(result, stream, **_hook_options(args))
        print("lateral error: " + ", ".join(f"{k} {v:.4g}" for k, v in metrics.items()))
    print(f"written: {out / 'report.md'}, {out / 'summary.json'}, {out / 'bag'}"
          + (f", {len(facts.get('plots', []))} plots" if facts.get("plots") else ""))
    return 0


def _batch(args: argparse.Namespace, policies: list[str | None]) -> int:
    from .batch import run_batch
    hook = SCENARIO_HOOK if args.scenario else None
    rows = run_batch(args.bags, policies, args.out, args.params, args.namespace, hook,
                     _hook_options(args) if hook else None, args.jobs, args.scheduler,
                     progress=not args.quiet)
    metric = "lateral_rms_mm" if hook else "rms_deviation"
    for r in rows:
        if r.get("error"):
            print(f"{r['rank']:3d}  failed: bag {r['bag']} with policy {r['policy']}: "
                  f"{r['error']}")
            continue
        print(f"{r['rank']:3d}  {Path(r['bag']).name}  {r['policy']}  "
              f"{metric} {r.get(metric, float('nan')):.4g}  trips {r.get('trips', '-')}")
    print(f"written: {Path(args.out) / 'batch.csv'}, {Path(args.out) / 'batch.md'}")
    return 0


def _live(args: argparse.Namespace) -> int:
    from .live import republish
    for bag in args.bags:
        stats = republish(bag, args.rate, args.topics, args.clock_rate)
        print(f"{bag}: republished {sum(stats.messages.values())} messages on "
              f"{len(stats.messages)} topics, {stats.clock_ticks} /clock ticks, "
              f"{stats.bag_seconds:.2f} s of bag in {stats.wall_seconds:.2f} s")
    return 0


def main(argv: list[str] | None = None) -> int:
    """Stand-alone entry point (the ``adaptive-streamer`` command calls `run`)."""
    parser = argparse.ArgumentParser(prog="adaptive-streamer replay",
                                     description=__doc__.split("\n")[0])
    add_arguments(parser)
    return run(parser.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())
