# SPDX-License-Identifier: Apache-2.0
"""Command-line options of ``adaptive-streamer demo`` and the fault-injection spec."""
from __future__ import annotations

import argparse
import math
from dataclasses import dataclass

FAULTS = {
    "feedback_dropout": "the edge sensor stops publishing (feedback goes stale)",
    "reference_jump": "the reference windows are 0.2 rad off on one joint from then on "
                      "(faulty reference source)",
    "joint_state_stall": "the driver stops publishing joint_states",
    "nan_policy": "the policy is swapped for one that outputs NaN during motion",
    "slow_policy": "the policy is swapped for one that takes longer than a decision period "
                   "while the reference moves",
    "adapter_stall": "the adapter's process is suspended (SIGSTOP) for SECONDS, then resumed "
                     "(SIGCONT)",
    "adapter_crash": "the adapter's process is killed (SIGKILL)",
}
# faults written FAULT:SECONDS@T, with what SECONDS means
LENGTH_FAULTS = {"adapter_stall": "how long the adapter stays suspended"}

# --output: the adapter's driver output and the simulated driver's command interface
OUTPUTS = {
    "stream": "setpoints streamed at the driver's rate (position output, the driver holds on "
              "its command timeout)",
    "plan": "the committed plan per decision on driver/plan (the driver interpolates it and "
            "brakes along its tail to rest when no new plan comes)",
}


class OptionError(ValueError):
    """A demo option is malformed."""


@dataclass(frozen=True)
class Injection:
    """A fault, when to inject it (seconds after the pass starts) and, for the faults of
    `LENGTH_FAULTS`, how long it lasts [s] (NaN for the others)."""

    fault: str
    at: float
    length: float = math.nan


def describe(fault: str, length: float = math.nan) -> str:
    """What ``fault`` does (`FAULTS`), with its length in place of SECONDS when given."""
    text = FAULTS[fault]
    return text.replace("SECONDS", f"{length:g} s") if math.isfinite(length) else text


def _spec_help() -> str:
    return ("expected FAULT@SECONDS with FAULT one of "
            f"{sorted(set(FAULTS) - set(LENGTH_FAULTS))}, or FAULT:SECONDS@SECONDS with FAULT "
            f"one of {sorted(LENGTH_FAULTS)}")


def parse_injection(spec: str) -> Injection:
    """``FAULT@SECONDS`` or ``FAULT:LENGTH@SECONDS`` -> `Injection` (the fault names are
    `FAULTS`; those of `LENGTH_FAULTS` need the length, the others take none)."""
    head, sep, when = spec.partition("@")
    fault, colon, length_text = head.partition(":")
    if not sep or fault not in FAULTS:
        raise OptionError(f"--inject '{spec}': {_spec_help()}")
    length = math.nan
    if fault in LENGTH_FAULTS:
        if not colon:
            raise OptionError(f"--inject '{spec}': {fault} needs its length, "
                              f"{fault}:SECONDS@SECONDS (SECONDS: {LENGTH_FAULTS[fault]})")
        try:
            length = float(length_text)
        except ValueError:
            raise OptionError(f"--inject '{spec}': the length '{length_text}' of {fault} is "
                              "not a number of seconds") from None
        if not (math.isfinite(length) and length > 0.0):
            raise OptionError(f"--inject '{spec}': the length of {fault} must be a finite "
                              f"number of seconds > 0, got {length_text}")
    elif colon:
        raise OptionError(f"--inject '{spec}': {fault} takes no length (written {fault}@SECONDS)")
    try:
        at = float(when)
    except ValueError:
        raise OptionError(f"--inject '{spec}': '{when}' is not a number of seconds") from None
    if not (math.isfinite(at) and at >= 0.0):
        raise OptionError(f"--inject '{spec}': the time must be a finite number of seconds "
                          ">= 0")
    return Injection(fault, at, length)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``demo``."""
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="stop the pass after S seconds (default: the whole pass)")
    parser.add_argument("--policy", default=None, metavar="CARD|KIND",
                        help="policy card, or a kind: onnx (default), linear_feedback, "
                             "tracker (reference only), hold")
    parser.add_argument("--limits", default=None, metavar="FILE",
                        help="joint limits YAML to run with (the reference is slowed to fit)")
    parser.add_argument("--output", choices=sorted(OUTPUTS), default="stream",
                        help="what the adapter sends the simulated driver: "
                             + "; ".join(f"{k}: {v}" for k, v in OUTPUTS.items())
                             + " (default: stream)")
    parser.add_argument("--record", default=None, metavar="DIR",
                        help="record every stack topic to a rosbag2 (MCAP) bag in DIR")
    parser.add_argument("--report", default="demo_report", metavar="DIR",
                        help="folder for the plots and summary, and the logs of a failed run "
                             "(default: demo_report)")
    parser.add_argument("--inject", action="append", default=[], metavar="FAULT@SECONDS",
                        help="inject a fault: " + "; ".join(
                            f"{k}: {v}" + (f" (written {k}:SECONDS@T)" if k in LENGTH_FAULTS
                                           else "") for k, v in FAULTS.items()))
    parser.add_argument("--seed", type=int, default=None,
                        help="scenario seed (panel placement, sensor noise; default: the "
                             "scenario file's)")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")
    parser.add_argument("--no-plots", action="store_true",
                        help="write the summary only, no PNG plots (faster)")
