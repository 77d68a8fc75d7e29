"""rosbag2 recording and reading (rosbags, MCAP), offline replay and reports.

==================  ===============================================================
module              holds
==================  ===============================================================
``bag_io``          chunked MCAP bag writer, bag reader with crash recovery, repair
``recorder``        `Recorder`: the ``recorder`` node in a child process; stack topics
``run_info``        the adapter's parameters and files stored in a bag
``fast_cdr``        exact, fast reading of the per-cycle message types
``messages``        bag bytes -> windows, joint states, decision records
``inputs``          per-cycle `SessionInputs` rebuilt from a bag
``run``             `replay`: the decision cycles re-run on a bag
``compare``         replayed vs recorded: decisions, setpoints, limits, trips, timing
``report``          output bag, summary.json, report.md, plots
``batch``           bags x policies -> ranked CSV/Markdown table on all cores
``live``            republishing a bag's inputs with /clock in (scaled) real time
``cli_replay``      ``adaptive-streamer replay``
==================  ===============================================================

The session itself is built by `adaptive_streamer.core.adapter_setup.build_session`, the
same function the live adapter's configure step calls.
"""
