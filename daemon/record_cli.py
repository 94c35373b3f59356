"""``edgeprop record``: capture the config's topics to a file until told to stop."""
from __future__ import annotations

import argparse
import signal
import threading

from .cli_files import output_file
from .config import load_config
from .logs import Log
from .record import record


def run_record(args: argparse.Namespace, log: Log) -> int:
    """Record until --duration, --count, SIGINT or SIGTERM; print what was written."""
    settings = load_config(args.config)
    output_file("--out", args.out, "a new file name for the capture")
    stop = threading.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, lambda *_: stop.set())
    n = record(settings, args.out, args.duration, args.count, log, stop)
    print(f"recorded {n} messages to {args.out}")
    return 0
