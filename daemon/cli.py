"""``edgeprop`` command line. Exit codes: 0 ok, 2 bad usage or config, 1 runtime failure,
141 output pipe closed by its reader."""
from __future__ import annotations

import argparse
import math
import os
import signal
import sys
from typing import Callable, Sequence

from . import __version__
from .errors import ConfigError, EdgepropError
from .logs import Log

EXIT_OK, EXIT_FAILURE, EXIT_USAGE = 0, 1, 2
EXIT_BROKEN_PIPE = 128 + signal.SIGPIPE

CAUTION = ("Predictions are advisory only: never a protective function (trip, interlock, "
           "safety instrumented system). Local codes and licensed practice govern.")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:     # argparse exits 2 too; keep its wording
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}\n")


def above_zero(kind: type, allowed: str) -> Callable[[str], float]:
    """An argparse type: a finite number above zero of ``kind`` (int or float).

    Zero, negative and non-finite values would be accepted by float and int yet make no sense
    for a duration, a count or a number of processes (``record --duration -5`` recorded nothing
    and exited 0); refused here they are a usage error naming what is allowed.
    """
    def parse(text: str) -> float:
        try:
            value = kind(text)
        except ValueError:
            noun = "an integer" if kind is int else "a number"
            raise argparse.ArgumentTypeError(f"{text!r} is not {noun}; allowed {allowed}") from None
        if not (math.isfinite(value) and value > 0):
            raise argparse.ArgumentTypeError(f"{text!r} is out of range; allowed {allowed}")
        return value
    return parse


SECONDS = above_zero(float, "a number of seconds > 0")


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="edgeprop", description="Online-learning soft sensors for MQTT plant data. "
                + CAUTION)
    p.add_argument("--version", action="version", version=f"edgeprop {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    def cmd(name: str, help: str, config: bool = True) -> argparse.ArgumentParser:
        sp = sub.add_parser(name, help=help, description=help)
        if config:
            sp.add_argument("-c", "--config", required=True, help="YAML config file")
        return sp

    cmd("run", "run the daemon in the foreground (systemd runs this)")
    cmd("check", "validate a config and print it with every default filled in")
    cmd("status", "show what the running daemon is doing")
    sp = cmd("checkpoints", "list checkpoints per model")
    sp.add_argument("--model", help="only this model")
    sp = cmd("rollback", "restore a model to a checkpoint")
    sp.add_argument("--model", required=True)
    sp.add_argument("--to", required=True, metavar="ID", help="checkpoint id (see 'checkpoints')")
    for verb in ("pin", "unpin"):
        sp = cmd(verb, f"{verb} a checkpoint so retention {'never prunes' if verb == 'pin' else 'may prune'} it")
        sp.add_argument("--model", required=True)
        sp.add_argument("--id", required=True)
    sp = cmd("save-now", "checkpoint now (the running daemon)")
    sp.add_argument("--model", help="only this model")
    sp = cmd("demo", "see edgeprop learn a simulated pumping station, in one command", config=False)
    sp.add_argument("--duration", type=SECONDS, default=90.0, help="real seconds to run (default 90)")
    sp.add_argument("--speed", type=above_zero(float, "simulated seconds per real second, > 0"),
                    default=3600.0,
                    help="simulated seconds per real second (default 3600: 90 s show 3.75 days)")
    sp.add_argument("--out", default="edgeprop-demo", help="directory for the plot and summary")
    sp.add_argument("--broker", metavar="HOST:PORT", help="use this broker (one that accepts anonymous clients on plain TCP) instead of an embedded one")
    sp = cmd("record", "capture the traffic of the config's topics to a file")
    sp.add_argument("--out", required=True)
    sp.add_argument("--duration", type=SECONDS, help="stop after this many seconds")
    sp.add_argument("--count", type=above_zero(int, "an integer > 0"),
                    help="stop after this many messages")
    sp = cmd("replay", "run a capture through the daemon's own path, faster than real time")
    sp.add_argument("--capture", required=True)
    sp.add_argument("--out", required=True, help="published messages as JSON lines")
    sp.add_argument("--report", metavar="DIR", help="also write the plot and summary here")
    sp = cmd("tune", "replay a capture with several learning rates and rank them")
    sp.add_argument("--capture", required=True)
    sp.add_argument("--learning-rates", required=True, help="comma-separated, e.g. 0.001,0.01,0.1")
    sp.add_argument("--batch-sizes", help="comma-separated, e.g. 16,32")
    sp.add_argument("--jobs", type=above_zero(int, "an integer > 0"),
                    help="parallel processes (default: CPU count)")
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``edgeprop`` console script.

    Output piped into ``head`` and the like may find the pipe closed: that is the reader's
    choice, not an error, so it ends quietly with the exit code the shell shows for a tool
    stopped by SIGPIPE (128 + 13), as ``yes | head -1`` does.
    """
    try:
        try:
            return _main(argv)
        finally:
            sys.stdout.flush()        # a closed pipe shows up here when the output was short
    except BrokenPipeError:
        _discard_stdout()
        return EXIT_BROKEN_PIPE


def _discard_stdout() -> None:
    """Point stdout at /dev/null, so the interpreter's last flush at exit has nowhere to fail.

    This is the pattern of the note on SIGPIPE in the Python documentation of ``signal``.
    """
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())
    os.close(devnull)


def _main(argv: Sequence[str] | None) -> int:
    args = build_parser().parse_args(argv)
    if args.command is None:
        build_parser().print_help()
        return EXIT_USAGE
    log = Log("info")
    try:
        return _dispatch(args, log)
    except ConfigError as exc:
        print(f"edgeprop: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except EdgepropError as exc:
        print(f"edgeprop: {exc}", file=sys.stderr)
        return EXIT_FAILURE
    except KeyboardInterrupt:
        return EXIT_FAILURE


def _dispatch(args: argparse.Namespace, log: Log) -> int:
    name = args.command
    if name == "run":
        from .service import run_service
        return run_service(args.config, log)
    if name == "check":
        return _check(args.config)
    if name in ("status", "checkpoints", "rollback", "pin", "unpin", "save-now"):
        from .operate import operate
        return operate(name, args)
    if name == "demo":
        from .demo import run_demo
        return run_demo(args)
    if name == "record":
        from .record_cli import run_record
        return run_record(args, log)
    if name == "replay":
        from .replay import run_replay
        return run_replay(args)
    if name == "tune":
        from .tune import run_tune
        return run_tune(args)
    raise AssertionError(name)


def _check(path: str) -> int:
    import yaml

    from .config import load_config, resolved_config
    from .key_files import world_readable_keys
    settings = load_config(path, preflight=True)
    for warning in world_readable_keys(settings):
        print(f"warning: {warning}", file=sys.stderr)
    print(f"# {path}: valid. Resolved configuration (defaults filled in):")
    print(yaml.safe_dump(resolved_config(settings), sort_keys=False), end="")
    return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
