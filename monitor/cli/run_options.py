"""Command-line options shared by ``elmon replay`` and ``elmon tune``: engine, chunks, truth.

Not a command module itself (it registers nothing); the command modules call these helpers.
"""

from __future__ import annotations

import argparse


def positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"{text!r}: must be >= 1")
    return v


def add_engine_options(p: argparse.ArgumentParser) -> None:
    """``--engine``, ``--scheduler``, ``--partitions``, ``--chunk-rows``, ``--quiet``."""
    g = p.add_argument_group("engine")
    g.add_argument("--engine", choices=["local", "dask"], default="local",
                   help="local: this machine; dask: series partitioned over a Dask cluster "
                        "(default local)")
    g.add_argument("--scheduler", metavar="ADDRESS",
                   help="Dask scheduler address, e.g. tcp://10.0.0.5:8786 (default: a local "
                        "cluster of 2 workers on 127.0.0.1)")
    g.add_argument("--partitions", type=positive_int, metavar="N",
                   help="series partitions for the Dask engine (default 2 per worker)")
    g.add_argument("--chunk-rows", type=positive_int, metavar="N",
                   help="read the log in chunks of about N rows (default: whole when under "
                        "64 MB, else 1,000,000); a chunked log must be in time order per series")
    g.add_argument("--quiet", action="store_true", help="no progress output")


def add_truth_options(p: argparse.ArgumentParser, required: bool = False) -> None:
    """``--truth`` and ``--horizon``."""
    p.add_argument("--truth", required=required, metavar="TRUTH",
                   help="known change points: CSV with series, ts, kind (the simulators' truth "
                        "files, or incidents written by hand)")
    p.add_argument("--horizon", type=positive_int, default=90, metavar="N",
                   help="detection window after a change, observations (default 90)")


def engine_kwargs(args) -> dict:
    """The :func:`monitor.replay.driver.replay` keywords of the engine options."""
    return {"engine": args.engine, "scheduler": args.scheduler, "npartitions": args.partitions,
            "chunk_rows": args.chunk_rows, "progress": not args.quiet}
