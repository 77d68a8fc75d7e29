# SPDX-License-Identifier: Apache-2.0
"""Offline and live replay of recorded bags, batch comparison and reports (core + io).

==================  ===============================================================
module              holds
==================  ===============================================================
``recorder``        `Recorder`: the ``recorder`` node in a child process
``inputs``          per-cycle `SessionInputs` rebuilt from a bag
``run``             `replay`: the decision cycles re-run on a bag
``compare``         replayed vs recorded: decisions, setpoints, limits, trips, timing
``report``          output bag, summary.json, report.md, plots
``batch``           bags x policies -> ranked CSV/Markdown table on all cores
``live``            republishing a bag's inputs with /clock in (scaled) real time
``cli_replay``      ``adaptive-streamer replay``
==================  ===============================================================

Bags are read and written by `adaptive_streamer.io` (``bag_io``, ``messages``, ``fast_cdr``,
``run_info``). The session itself is built by `adaptive_streamer.core.adapter_setup.build_session`, the
same function the live adapter's configure step calls.
"""
