"""Replay a capture through the daemon's own engine, as fast as the CPU allows.

No broker and no wall clock: the engine's clock is the capture's arrival time,
checkpoints stay in memory (the guard still has its "last good" state), and
every message the engine would publish goes to the output file in order.

With sensor times in the payloads (``time_field``), replay publishes what
``run`` published for the same traffic to the last bit (tests/test_replay.py).
Two things run on the clock instead of the data and so can differ: timer
checkpoints (the ``checkpoint`` id in messages stays null here, as there is
no store) and predict-only ticks (``publish.every_s``), which replay fires
after each message on the capture's clock where ``run`` fires them between
batches on the wall clock.
"""
from __future__ import annotations

import argparse
import json
import math
import sys
import time
from dataclasses import dataclass, field
from typing import IO, Callable, Optional

import numpy as np

from .capture import BadLine, read_capture
from .cli_files import input_file, output_dir, output_file
from .config import load_config
from .engine import Engine
from .errors import EdgepropError, PayloadError, SampleSkipped
from .logs import Log
from .report import accuracy, log_loss_terms
from .settings import Settings

PROGRESS_EVERY = 2000       # lines between progress updates
CAPTURE_EXPECTED = "a capture file written by `edgeprop record`"
REPORT_EXPECTED = "a directory for the plot and summary (created if missing)"


@dataclass
class ReplaySummary:
    lines: int = 0
    bad_lines: dict[str, int] = field(default_factory=dict)     # by kind, see bad_line_kind
    first_bad: Optional[str] = None
    published: int = 0
    seconds: float = 0.0
    rejects: dict[str, int] = field(default_factory=dict)
    models: dict[str, dict] = field(default_factory=dict)

    def text(self) -> str:
        rate = self.lines / self.seconds if self.seconds > 0 else float("inf")
        out = [f"replayed {self.lines} messages in {self.seconds:.2f} s ({rate:,.0f} msg/s); "
               f"published {self.published} predictions"]
        if self.bad_lines:
            out.append(f"skipped {sum(self.bad_lines.values())} bad capture lines: "
                       + "; ".join(f"{k}: {v}" for k, v in sorted(self.bad_lines.items()))
                       + f" (first: {self.first_bad})")
        if self.rejects:
            out.append("rejected payloads: " + ", ".join(f"{k}={v}" for k, v in sorted(self.rejects.items())))
        for name, m in self.models.items():
            out.append(_model_line(name, m))
            if m.get("why"):
                out.append(f"    {m['why']}")
        out.append("Predictions are advisory only; never a protective function.")
        return "\n".join(out)


def _model_line(name: str, m: dict) -> str:
    if not m["messages"]:
        return f"  {name}: 0 predictions, guard trips {m['guard_trips']}"
    err = (f"accuracy {m['accuracy']:.4f}, log-loss {m['log_loss']:.4g}" if "accuracy" in m
           else f"RMSE {m['rmse']:.4g} (second half {m['rmse_second_half']:.4g})")
    cov = "" if m.get("coverage") is None else f", interval coverage {m['coverage']:.3f}"
    return (f"  {name}: {m['messages']} predictions, {err}{cov}, drift events "
            f"{m['drift_events']}, guard trips {m['guard_trips']}")


@dataclass
class ModelTally:
    """What became of one model's target readings, for saying why predictions are few.

    ``run`` counts skips only in Prometheus; a replay has no metrics, and
    "0 predictions" alone leaves a user guessing between a topic typo, a lag
    longer than the capture and a warm-up that never ended.
    """

    target_topic: str
    warmup_samples: int
    targets: int = 0                    # target readings decoded for this model
    warmup: int = 0                     # learned from before warm-up ended, so not predicted
    skipped: dict[str, int] = field(default_factory=dict)       # by reason: stale, no_data
    first_skip: dict[str, str] = field(default_factory=dict)    # reason -> its first detail
    rejected: dict[str, int] = field(default_factory=dict)      # payloads on its topics, by reason

    def few(self, predictions: int) -> bool:
        """True when fewer than half of the target readings became predictions."""
        return predictions == 0 or 2 * predictions < self.targets

    def why(self) -> str:
        """The reasons, largest first, in words a user can act on."""
        if not self.targets:
            parts = [f"why: no target reading on {self.target_topic} reached the model"]
        else:
            causes = []
            if self.warmup:
                causes.append(f"{self.warmup} in warm-up (predictions start after "
                              f"{self.warmup_samples} learned samples, training.warmup_samples)")
            for reason, n in sorted(self.skipped.items(), key=lambda kv: -kv[1]):
                causes.append(f"{n} skipped as {reason} (first: {self.first_skip[reason]})")
            parts = [f"why: {self.targets} target readings, not predicted: " + ", ".join(causes)]
        if self.rejected:
            parts.append("payloads rejected on its topics: "
                         + ", ".join(f"{k}={v}" for k, v in sorted(self.rejected.items())))
        return "; ".join(parts)


class ReplayEngine(Engine):
    """The daemon's engine, also keeping a ``ModelTally`` per model (see there for why).

    It hooks the engine's own per-reading steps rather than copying them, so the
    counts are of what the daemon did; tests/test_replay.py fails if a hook goes stale.
    """

    def __init__(self, settings: Settings, *args, **kwargs) -> None:
        super().__init__(settings, *args, **kwargs)
        # the skip counts are the engine's own (ModelRuntime.skipped, also shown by status)
        self.tally = {m.name: ModelTally(m.target.topic, m.training.warmup_samples,
                                         skipped=self.models[m.name].skipped)
                      for m in settings.models}

    def _on_target(self, rt, t: float, y: float) -> None:
        tally = self.tally[rt.name]
        tally.targets += 1
        warming = not rt.learner.warmed_up
        super()._on_target(rt, t, y)
        if warming:
            tally.warmup += 1

    def _skip(self, rt, exc: SampleSkipped) -> None:
        super()._skip(rt, exc)               # counts it in rt.skipped, which the tally shares
        self.tally[rt.name].first_skip.setdefault(exc.reason, str(exc).split(": ", 1)[-1])

    def _reject(self, exc: PayloadError, **where: object) -> None:
        tally = self.tally.get(str(where.get("model")))
        if tally is not None:
            tally.rejected[exc.reason] = tally.rejected.get(exc.reason, 0) + 1
        super()._reject(exc, **where)


def bad_line_kind(reason: str) -> str:
    """The reason of a bad capture line without its line-specific detail, for counting."""
    return reason.split(" (", 1)[0].split(", got ", 1)[0]


class _CaptureClock:
    """The engine's clock during replay: the arrival time of the line in hand."""

    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


def replay(settings: Settings, capture_path: str, sink: Callable[[dict], None],
           log: Optional[Callable[..., None]] = None,
           progress: Optional[Callable[[int], None]] = None) -> tuple[ReplaySummary, ReplayEngine]:
    """Feed every capture line to a fresh engine; ``sink`` receives each published message."""
    clock = _CaptureClock()
    summary = ReplaySummary()
    topics = {settings.publish_topic(m) for m in settings.models}

    def publish(topic: str, body: bytes, qos: int, retain: bool) -> bool:
        if topic in topics:
            summary.published += 1
            sink(json.loads(body))
        return True

    engine: ReplayEngine | None = None
    internal_errors = 0
    started = time.perf_counter()
    for item in read_capture(capture_path):
        if isinstance(item, BadLine):
            key = bad_line_kind(item.reason)
            summary.bad_lines[key] = summary.bad_lines.get(key, 0) + 1
            if summary.first_bad is None:
                summary.first_bad = f"line {item.line_no}: {item.reason}"
            continue
        clock.now = item.t
        if engine is None:
            engine = ReplayEngine(settings, publish, log or Log("warning"), None, clock)
        try:
            engine.handle(item.topic, item.payload, item.t)
        except Exception:       # as run's worker does: count it and go on (see service._handle_one)
            internal_errors += 1
        engine.tick(item.t)
        summary.lines += 1
        if progress is not None and summary.lines % PROGRESS_EVERY == 0:
            progress(summary.lines)
    summary.seconds = time.perf_counter() - started
    if engine is None:
        engine = ReplayEngine(settings, publish, log or Log("warning"), None, clock)
    summary.rejects = dict(engine.rejects)
    if internal_errors:
        summary.rejects["internal_error"] = internal_errors
    return summary, engine


def score_messages(messages: list[dict], engine: ReplayEngine) -> dict[str, dict]:
    """Per-model prequential scores from the published messages, and why they are few if so."""
    out: dict[str, dict] = {}
    for name, rt in engine.models.items():
        ms = [m for m in messages if m["model"] == name and m["measured"] is not None]
        res = np.asarray([m["residual"] for m in ms], float)
        entry: dict = {"messages": len(ms), "drift_events": engine.drift_events.get(name, 0),
                       "guard_trips": engine.guard_trips.get(name, 0)}
        tally = engine.tally[name]
        if tally.few(len(ms)):
            entry["why"] = tally.why()
        if rt.learner.binary:
            p = np.asarray([m["predicted"] for m in ms], float)
            y = np.asarray([m["measured"] for m in ms], float)
            entry["accuracy"] = accuracy(p, y)
            entry["log_loss"] = float(np.mean(log_loss_terms(p, y))) if len(ms) else math.nan
        else:
            entry["rmse"] = float(np.sqrt(np.mean(res ** 2))) if len(res) else math.nan
            half = res[len(res) // 2:]
            entry["rmse_second_half"] = float(np.sqrt(np.mean(half ** 2))) if len(half) else math.nan
            flags = [m["outside"] for m in ms if m["outside"] is not None]
            entry["coverage"] = 1.0 - float(np.mean(flags)) if flags else None
        out[name] = entry
    return out


def run_replay(args: argparse.Namespace) -> int:
    """``edgeprop replay``: write published messages as JSON lines and print a summary."""
    settings = load_config(args.config)
    input_file("--capture", args.capture, CAPTURE_EXPECTED)
    output_file("--out", args.out, "a file name for the published messages (JSON lines)")
    if args.report:
        output_dir("--report", args.report, REPORT_EXPECTED)
    messages: list[dict] = []
    progress = ProgressBar(count_lines(args.capture), sys.stderr) if sys.stderr.isatty() else None
    try:
        out = open(args.out, "w", encoding="utf-8")
    except OSError as exc:
        raise EdgepropError(f"--out {args.out}: cannot create it ({exc.strerror or exc})") from None
    with out:
        def sink(msg: dict) -> None:
            messages.append(msg)
            out.write(json.dumps(msg, separators=(",", ":")) + "\n")
        summary, engine = replay(settings, args.capture, sink, progress=progress)
    if progress is not None:
        progress.finish(summary.lines)
    summary.models = score_messages(messages, engine)
    print(summary.text())
    print(f"messages written to {args.out}")
    if args.report:
        if not messages:
            print("no predictions were published; no plot written")
            return 0
        from .report import write_report
        binary = [m.name for m in settings.models if m.task == "binary"]
        png, txt = write_report(messages, args.report, f"replay of {args.capture}", binary=binary)
        print(f"plot: {png}\nsummary: {txt}")
    return 0


def count_lines(path: str) -> int:
    """Newlines in a file, read in large binary blocks (cheap next to the replay itself)."""
    n = 0
    with open(path, "rb") as f:
        while block := f.read(1 << 20):
            n += block.count(b"\n")
    return n


class ProgressBar:
    """``[#####.....]  50%  12,000 / 24,000 lines`` redrawn in place on a terminal."""

    WIDTH = 30

    def __init__(self, total: int, stream: IO[str]) -> None:
        self.total, self.stream = max(total, 1), stream
        self.started = time.perf_counter()

    def __call__(self, done: int) -> None:
        frac = min(1.0, done / self.total)
        bar = "#" * int(frac * self.WIDTH) + "." * (self.WIDTH - int(frac * self.WIDTH))
        rate = done / max(time.perf_counter() - self.started, 1e-9)
        self.stream.write(f"\r[{bar}] {frac:4.0%}  {done:,} / {self.total:,} lines  {rate:,.0f} msg/s")
        self.stream.flush()

    def finish(self, done: int) -> None:
        self(max(done, self.total))
        self.stream.write("\n")
        self.stream.flush()
