# SPDX-License-Identifier: Apache-2.0
"""The ``adaptive-streamer`` command.

    adaptive-streamer demo [--duration S] [--policy CARD|KIND] [--limits FILE] [--record DIR]
                           [--report DIR] [--inject FAULT@SECONDS] [--seed N]
    adaptive-streamer bringup --params FILE [--one-process] [--record DIR]
    adaptive-streamer replay BAG... [--params FILE] [--policy ...] [--out DIR]
    adaptive-streamer check-policy CARD_OR_MODEL
    adaptive-streamer preflight --params FILE [--timeout S]
    adaptive-streamer dataset BAG... --card CARD --out FILE.npz
    adaptive-streamer repair-bag CUT_BAG OUT_DIR [--compression none|zstd|lz4]
"""
from __future__ import annotations

import argparse
import sys


def _bringup(args: argparse.Namespace) -> int:
    from .bringup import BringupError, bringup
    try:
        return bringup(args.params, one_process=args.one_process, record=args.record)
    except BringupError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2


def _demo(args: argparse.Namespace) -> int:
    from .demo.run import DemoError, run_demo
    try:
        return run_demo(args)
    except DemoError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2


def _replay(args: argparse.Namespace) -> int:
    from .replay import cli_replay
    return cli_replay.run(args)


def _check_policy(args: argparse.Namespace) -> int:
    from .check_policy import run
    return run(args)


def _preflight(args: argparse.Namespace) -> int:
    from .preflight.run import PreflightError, run
    try:
        return run(args)
    except PreflightError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2


def _dataset(args: argparse.Namespace) -> int:
    from .core.policies import PolicyError
    from .training.dataset import DatasetError, write_table
    try:
        table = write_table(args.bags, args.card, args.out)
    except (DatasetError, PolicyError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    print(f"{args.out}: {table.rows} decisions from {len(args.bags)} bag(s)")
    return 0


def _repair_bag(args: argparse.Namespace) -> int:
    from .io.bag_io import BagError, repair_bag
    try:
        bag = repair_bag(args.bag, args.out, compression=args.compression)
    except (BagError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    print(f"{args.bag} -> {args.out}: {bag.recovered or 'the bag was complete'}")
    for name, data in sorted(bag.topics.items()):
        print(f"  {len(data):8d}  {name}  ({data.msgtype})")
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand."""
    parser = argparse.ArgumentParser(
        prog="adaptive-streamer",
        description="Jerk-bounded streaming of policy-adapted joint setpoints (ROS 2).")
    sub = parser.add_subparsers(dest="command", required=True)

    demo = sub.add_parser("demo", help="run the simulated bead-dispensing cell end to end")
    from .demo.options import add_arguments as demo_arguments
    demo_arguments(demo)
    demo.set_defaults(func=_demo)

    bring = sub.add_parser("bringup", help="start the nodes of a params file until Ctrl-C")
    bring.add_argument("--params", required=True, help="ROS 2 params file (node: ros__parameters)")
    bring.add_argument("--one-process", action="store_true",
                       help="run every node in this process (small machines)")
    bring.add_argument("--record", metavar="DIR", help="record every stack topic to a bag in DIR")
    bring.set_defaults(func=_bringup)

    replay = sub.add_parser("replay", help="run an adapter cycle offline on recorded bags")
    from .replay import cli_replay
    cli_replay.add_arguments(replay)
    replay.set_defaults(func=_replay)

    check = sub.add_parser("check-policy", help="validate a policy card and its model")
    from .check_policy import add_arguments as check_arguments
    check_arguments(check)
    check.set_defaults(func=_check_policy)

    pre = sub.add_parser("preflight", help="check a cell before a pass (nothing moves)")
    from .preflight.options import add_arguments as preflight_arguments
    preflight_arguments(pre)
    pre.set_defaults(func=_preflight)

    data = sub.add_parser("dataset", help="turn recorded bags into a training table (NPZ)")
    data.add_argument("bags", nargs="+", metavar="BAG", help="recorded bag folders or files")
    data.add_argument("--card", required=True,
                      help="policy card whose observation layout the table uses")
    data.add_argument("--out", required=True, metavar="FILE.npz", help="table to write")
    data.set_defaults(func=_dataset)

    fix = sub.add_parser("repair-bag", help="rewrite a bag cut by a crash as a closed bag "
                                            "that any rosbag2 reader opens")
    fix.add_argument("bag", metavar="CUT_BAG", help="the cut bag folder or .mcap file")
    fix.add_argument("out", metavar="OUT_DIR", help="folder for the repaired bag (must not exist)")
    fix.add_argument("--compression", choices=["none", "zstd", "lz4"], default="none",
                     help="chunk compression of the repaired bag (default: none)")
    fix.set_defaults(func=_repair_bag)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``adaptive-streamer`` command."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
