"""Soak run: does anything in the running daemon grow while it works and is operated?

Run: python tests/soak_daemon.py [--minutes 20] [--rate 4000]   (not collected by pytest;
prints a table and a verdict per figure; exits 1 if any figure grows beyond its bound).

A year unattended on a small box forgives no slow leak, and a leak shows only when the daemon
runs for a while *and* is operated. So this runs the real daemon (``edgeprop run``, two
models: a 4-input regression on a 32-32 tanh network and a 3-input ``task: binary`` on a
16-unit rectifier network; metrics endpoint on; a checkpoint every 5 s, keep 3) against a
real mosquitto on a free loopback port, under steady paced traffic well below the daemon's
limit (default 4,000 msg/s; its limit on a 2-core box is about 25,000), while a driver mixes in
on timers: ``status`` requests, metric scrapes, SIGHUP reloads that move the learning rate back
and forth, ``save-now``, ``rollback`` to the oldest checkpoint on disk, ``pin``/``unpin``, and a
broker kill -9 + restart every few minutes. The load generator reconnects after each one.

Every SAMPLE_S it records, for the worker process and for its broker-link child (``status``
gives ``pid`` and ``link_pid``): resident memory (VmRSS), open file descriptors, threads;
and the state directory's file count and bytes, the log's line count (with the lines no
operation of the driver explains counted apart) and the daemon's ``messages`` count.

The verdict per figure is its least-squares slope over the second half of the run (the first
half is warm-up: windows fill, caches settle, the allocator finds its size), per hour, against
a bound stated in BOUNDS with its reason. Counts that a passing request can raise for a moment
(fds, threads, files) are read three times 0.2 s apart and the least is kept: a leak stays,
a request in flight does not.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import re
import shutil
import signal
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
for _p in (ROOT, HERE):
    if _p not in sys.path:
        sys.path.insert(0, _p)

SAMPLE_S = 30.0
MIB = 1024.0 * 1024.0
INPUTS = ("speed", "current", "ambient", "suction")
FLAG_TOPIC = "bench/p1/overheat"         # the binary model's target: 1 while the bearing runs hot
LEARNING_RATES = (0.01, 0.005)           # what the reloads move between
STEP_TOPICS = [f"bench/p1/{n}" for n in (*INPUTS, "bearing_temp")] + [FLAG_TOPIC]

# Events the driver's own operations (and the config: a checkpoint every 5 s) explain.
OPERATION_EVENTS = frozenset({
    "checkpoint_saved", "reload_change", "reloaded", "rolled_back", "broker_connected",
    "broker_connection_lost", "broker_disconnected", "broker_connect_failed",
    "model_fresh", "model_restored", "started", "ready", "stopping", "stopped",
})
# What the models say about the data (changes seen, the guard relearning a level): their
# rate follows the traffic, not the daemon's age, so it is shown apart. Every other line
# counts as unexplained log volume.
MODEL_EVENTS = frozenset({"drift_detected", "loss_level_changed", "guard_tripped"})

# figure -> (bound per hour after warm-up, unit, why this bound). Chosen bounds, common
# practice, no source: each is what a leak tied to one of the driver's operations would
# exceed many times over, and what the figure's own jitter in a 10-minute half stays under.
BOUNDS: dict[str, tuple[float, str, str]] = {
    "rss_mib": (1.0, "MiB/h", "chosen bound: a 20-min run resolves about this much; at 1 MiB "
                "per scrape, reload or restart a leak would show as 20-700 MiB/h"),
    "fds": (4.0, "fds/h", "one fd leaked per broker restart is 15/h, per reload 80/h; two "
            "stray one-sample blips at the worst place give about 3/h"),
    "threads": (4.0, "threads/h", "as for fds"),
    "state_files": (4.0, "files/h", "retention keeps 3 per model plus pins: flat; a file "
                    "left per checkpoint would be 720/h"),
    "state_mib": (5.0, "MiB/h", "one pinned checkpoint coming and going moves it by "
                  "about 0.1 MiB; a checkpoint left every 5 s would be over 50 MiB/h"),
    "unexplained_log_lines": (60.0, "lines/h", "one rate-limited warning a minute; what "
                              "no operation explains should be near 0"),
}


# ---- load generator (this file run as `_publish HOST PORT RATE`) ---------------------------------

def reading_step(rng, t: float) -> list[tuple[str, str]]:
    """One plant step: four inputs, the bearing temperature and its overheat flag (invented).

    The inputs are drawn afresh each step around fixed means (a plant in steady service, in
    sample terms): slow swings would make the drift watch fire on every swing, and the soak
    is about growth, not about drift.
    """
    speed = rng.gauss(1000.0, 200.0)
    current = 10 + 0.02 * (speed - 1000) + rng.gauss(0.0, 0.5)
    ambient = rng.gauss(15.0, 3.0)
    suction = rng.gauss(1.2, 0.1)
    temp = 40 + 15 * math.tanh((speed - 1000) / 300) + 0.05 * current ** 2 + 0.3 * ambient
    hot = temp + rng.gauss(0.0, 1.0) > 50.5
    values = (speed, current, ambient, suction, temp + rng.gauss(0.0, 0.2), 1.0 if hot else 0.0)
    return [(topic, f'{{"value": {round(v, 4)!r}, "ts": {t!r}}}') for topic, v in zip(STEP_TOPICS, values)]


def connect_publisher(host: str, port: int, stopping: Callable[[], bool]):
    """A ``RawPublisher`` once the broker accepts one (it may be down for a restart)."""
    from bench_daemon import RawPublisher, _mqtt_string
    while not stopping():
        try:
            pub = RawPublisher(host, port)
        except (OSError, RuntimeError):
            time.sleep(0.2)
            continue
        pub.topics[FLAG_TOPIC] = _mqtt_string(FLAG_TOPIC)
        return pub
    return None


def role_publish(host: str, port: int, rate: float) -> None:
    """Publish paced steps until SIGTERM; reconnect when the broker goes away; report counts.

    Never faster than ``rate``: after a stall (a broker restart) it resumes the pace instead
    of catching up in a burst, so the daemon sees steady traffic.
    """
    stop = {"now": False}
    signal.signal(signal.SIGTERM, lambda *a: stop.__setitem__("now", True))
    import random
    rng = random.Random(7)
    sent = reconnects = 0
    pub = connect_publisher(host, port, lambda: stop["now"])
    start = time.perf_counter()
    while pub is not None and not stop["now"]:
        ahead = start + sent / rate - time.perf_counter()
        if ahead > 0.001:
            time.sleep(ahead)
        elif ahead < -0.5:
            start -= ahead                       # fell behind (broker away): never catch up
        step = reading_step(rng, time.time())
        try:
            pub.publish_many(step)
        except OSError:
            reconnects += 1
            pub = connect_publisher(host, port, lambda: stop["now"])
            continue
        sent += len(step)
    print(json.dumps({"sent": sent, "reconnects": reconnects}), flush=True)


# ---- the daemon under test ---------------------------------------------------------------------

def soak_models() -> list[dict]:
    """A regression model on all four inputs and a binary one on three of them."""
    def source(name: str, topic: str | None = None) -> dict:
        return {"name": name, "topic": topic or f"bench/p1/{name}", "field": "value", "time_field": "ts"}
    temp = {"name": "bearing", "target": {k: v for k, v in source("t", "bench/p1/bearing_temp").items()
                                          if k != "name"},
            "inputs": [source(n) for n in INPUTS], "align": {"max_age_s": 30},
            "training": {"learning_rate": LEARNING_RATES[0]}}
    flag = {"name": "overheat", "task": "binary",
            "target": {k: v for k, v in source("f", FLAG_TOPIC).items() if k != "name"},
            "inputs": [source(n) for n in INPUTS[:3]], "align": {"max_age_s": 30},
            "net": {"hidden": [16], "activation": "relu", "seed": 2},
            "training": {"learning_rate": LEARNING_RATES[0], "batch_size": 16}}
    return [temp, flag]


def start_daemon(broker, workdir: Path):
    """Write the config and start ``edgeprop run``; returns (Daemon, config path, metrics URL)."""
    from daemon_proc import Daemon, write_config
    config = write_config(workdir, broker, soak_models(), node="soak",
                          metrics={"listen": "127.0.0.1:0"},
                          checkpoints={"every_s": 5, "keep": 3})
    daemon = Daemon(config)
    daemon.wait_ready(timeout=60)
    return daemon, config, daemon.metrics_url()


# ---- what is sampled ---------------------------------------------------------------------------

def proc_field(pid: int, name: str) -> int:
    """An integer field of /proc/PID/status (VmRSS in kB, Threads)."""
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(name + ":"):
                return int(line.split()[1])
    raise RuntimeError(f"/proc/{pid}/status has no {name}: is process {pid} still running?")


def least_of_three(read: Callable[[], float]) -> float:
    """The least of three reads 0.2 s apart: a request in flight passes, a leak stays."""
    values = []
    for k in range(3):
        if k:
            time.sleep(0.2)
        values.append(read())
    return min(values)


def process_figures(pid: int) -> dict[str, float]:
    """Resident memory (MiB), open fds and threads of one process."""
    return {"rss_mib": proc_field(pid, "VmRSS") / 1024.0,
            "fds": least_of_three(lambda: len(os.listdir(f"/proc/{pid}/fd"))),
            "threads": least_of_three(lambda: proc_field(pid, "Threads"))}


def state_figures(state_dir: str) -> dict[str, float]:
    """Files (the least of three reads: a save in flight has a temp file) and MiB under state_dir."""
    def walk() -> tuple[int, int]:
        n = size = 0
        for dirpath, _dirs, files in os.walk(state_dir):
            for name in files:
                try:
                    size += os.stat(os.path.join(dirpath, name)).st_size
                    n += 1
                except FileNotFoundError:
                    pass
        return n, size
    counts = []
    for k in range(3):
        if k:
            time.sleep(0.2)
        counts.append(walk())
    n, size = min(counts)
    return {"state_files": n, "state_mib": size / MIB}


@dataclass
class LogCounter:
    """Counts the daemon's log lines, by event, reading only what was appended since last time."""

    path: str
    offset: int = 0
    lines: int = 0
    by_event: dict[str, int] = field(default_factory=dict)

    def update(self) -> None:
        with open(self.path, "rb") as f:
            f.seek(self.offset)
            data = f.read()
        whole = data[:data.rfind(b"\n") + 1]
        self.offset += len(whole)
        for line in whole.decode("utf-8", "replace").splitlines():
            self.lines += 1
            found = re.search(r"\bevent=(\S+)", line)
            event = found.group(1) if found else "(no event)"
            self.by_event[event] = self.by_event.get(event, 0) + 1

    @property
    def model_events(self) -> int:
        return sum(n for e, n in self.by_event.items() if e in MODEL_EVENTS)

    @property
    def unexplained(self) -> int:
        return sum(n for e, n in self.by_event.items()
                   if e not in OPERATION_EVENTS and e not in MODEL_EVENTS)


def take_sample(t0: float, status: dict, state_dir: str, log: LogCounter) -> dict:
    """One row of the table."""
    log.update()
    row = {"t_min": (time.monotonic() - t0) / 60.0, "messages": status["messages"],
           "queue_dropped": status["queue_dropped"], "log_lines": log.lines,
           "model_event_lines": log.model_events, "unexplained_log_lines": log.unexplained,
           **state_figures(state_dir)}
    for who, pid in (("worker", status["pid"]), ("link", status["link_pid"])):
        for key, value in process_figures(pid).items():
            row[f"{who}.{key}"] = value
    return row


# ---- the operations ------------------------------------------------------------------------------

class Driver:
    """The operator and the plant's bad days, on timers; counts what each operation did."""

    def __init__(self, daemon, config: str, metrics_url: str, broker) -> None:
        from daemon.config import load_config
        self.daemon, self.config, self.url, self.broker = daemon, config, metrics_url, broker
        settings = load_config(config)
        self.socket, self.state_dir = settings.control_socket, settings.state_dir
        self.ok: dict[str, int] = {}
        self.failed: dict[str, int] = {}
        self.last_error: dict[str, str] = {}
        self.reloads = 0
        self.pinned: dict[str, str] = {}

    def request(self, payload: dict) -> object:
        from daemon_proc import control
        return control(self.socket, payload)

    def status(self) -> dict:
        return self.request({"cmd": "status"})

    def scrape(self) -> None:
        from daemon_proc import scrape
        samples = scrape(self.url)
        if not any(name.startswith("edgeprop_") for name, _labels in samples):
            raise RuntimeError("the scrape holds no edgeprop_ metric")

    def reload(self) -> None:
        """Move both models' learning rate to the other value and send SIGHUP."""
        import yaml
        self.reloads += 1
        rate = LEARNING_RATES[self.reloads % 2]
        with open(self.config) as f:
            cfg = yaml.safe_load(f)
        for model in cfg["models"]:
            model["training"]["learning_rate"] = rate
        tmp = self.config + ".new"
        with open(tmp, "w") as f:
            yaml.safe_dump(cfg, f, sort_keys=False)
        os.replace(tmp, self.config)           # the daemon never reads a half-written file
        self.daemon.signal(signal.SIGHUP)

    def save_now(self) -> None:
        self.request({"cmd": "save-now", "model": None})

    def rollback(self) -> None:
        """Roll each model back to its oldest checkpoint on disk (pinned ones included)."""
        from daemon_proc import checkpoint_ids
        for model in ("bearing", "overheat"):
            ids = checkpoint_ids(self.state_dir, model)
            if ids:
                self.request({"cmd": "rollback", "model": model, "to": ids[0]})

    def pin_cycle(self) -> None:
        """Unpin what the last cycle pinned, pin the newest checkpoint: one pin per model at a time."""
        from daemon_proc import checkpoint_ids
        for model in ("bearing", "overheat"):
            old = self.pinned.pop(model, None)
            if old is not None:
                self.request({"cmd": "unpin", "model": model, "id": old})
            ids = checkpoint_ids(self.state_dir, model)
            if ids:
                self.request({"cmd": "pin", "model": model, "id": ids[-1]})
                self.pinned[model] = ids[-1]

    def broker_bounce(self) -> None:
        """kill -9 the broker (a crash), and start it again on the same port 2 s later."""
        self.broker.kill()
        time.sleep(2.0)
        self.broker.start()

    def attempt(self, name: str, action: Callable[[], object]) -> None:
        try:
            action()
        except Exception as exc:  # noqa: BLE001 - counted and shown; the soak goes on
            self.failed[name] = self.failed.get(name, 0) + 1
            self.last_error[name] = f"{type(exc).__name__}: {exc}"
        else:
            self.ok[name] = self.ok.get(name, 0) + 1


def schedule(driver: Driver, bounce_s: float) -> list[list]:
    """[name, period s, action, next due]; offsets keep them from all firing at once."""
    now = time.monotonic()
    plan = [("status", 2.0, driver.status, 0.3), ("scrape", 5.0, driver.scrape, 0.7),
            ("reload", 45.0, driver.reload, 11.0), ("save-now", 20.0, driver.save_now, 7.0),
            ("rollback", 60.0, driver.rollback, 23.0), ("pin/unpin", 40.0, driver.pin_cycle, 17.0),
            ("broker kill+restart", bounce_s, driver.broker_bounce, bounce_s / 2)]
    return [[name, period, action, now + offset] for name, period, action, offset in plan]


def drive(driver: Driver, minutes: float, bounce_s: float, log: LogCounter) -> list[dict]:
    """Run the timers for ``minutes``; return the samples (one now, then one every SAMPLE_S)."""
    t0 = time.monotonic()
    end = t0 + minutes * 60.0
    samples = [take_sample(t0, driver.status(), driver.state_dir, log)]
    print_row(samples[-1])
    next_sample = t0 + SAMPLE_S
    timers = schedule(driver, bounce_s)
    while time.monotonic() < end:
        if driver.daemon.proc.poll() is not None:
            raise RuntimeError(f"the daemon exited ({driver.daemon.proc.returncode}) during the soak")
        timer = min(timers, key=lambda x: x[3])
        due = min(timer[3], next_sample)
        time.sleep(max(0.0, due - time.monotonic()))
        if due == next_sample:
            samples.append(sample_now(driver, t0, log))
            print_row(samples[-1])
            next_sample += SAMPLE_S
            continue
        driver.attempt(timer[0], timer[2])
        timer[3] += timer[1]
    samples.append(sample_now(driver, t0, log))
    print_row(samples[-1])
    return samples


def sample_now(driver: Driver, t0: float, log: LogCounter) -> dict:
    """A sample; ``status`` may be refused while the worker is busy, so it is asked again."""
    from daemon.errors import ControlError
    for _ in range(10):
        try:
            return take_sample(t0, driver.status(), driver.state_dir, log)
        except (AssertionError, ControlError):    # "daemon busy", or no answer in time
            time.sleep(0.5)
    return take_sample(t0, driver.status(), driver.state_dir, log)


# ---- the verdict -----------------------------------------------------------------------------------

COLUMNS = [("t_min", "min", "{:6.1f}"), ("messages", "messages", "{:11,.0f}"),
           ("worker.rss_mib", "w.RSS", "{:6.2f}"), ("worker.fds", "w.fd", "{:4.0f}"),
           ("worker.threads", "w.thr", "{:5.0f}"), ("link.rss_mib", "l.RSS", "{:6.2f}"),
           ("link.fds", "l.fd", "{:4.0f}"), ("link.threads", "l.thr", "{:5.0f}"),
           ("state_files", "files", "{:5.0f}"), ("state_mib", "st.MiB", "{:6.2f}"),
           ("log_lines", "log", "{:6.0f}"), ("model_event_lines", "model", "{:5.0f}"),
           ("unexplained_log_lines", "unexpl", "{:6.0f}")]


def print_row(row: dict, header: bool = False) -> None:
    if header:
        print(" ".join(f"{label:>{len(fmt.format(0))}}" for _k, label, fmt in COLUMNS), flush=True)
        return
    print(" ".join(fmt.format(row[key]) for key, _l, fmt in COLUMNS), flush=True)


def slope_per_hour(samples: list[dict], key: str) -> tuple[float, float]:
    """Least-squares slope of ``key`` against time, per hour, and its standard error."""
    xs = [s["t_min"] / 60.0 for s in samples]
    ys = [float(s[key]) for s in samples]
    n = len(xs)
    mx, my = sum(xs) / n, sum(ys) / n
    sxx = sum((x - mx) ** 2 for x in xs)
    slope = sum((x - mx) * (y - my) for x, y in zip(xs, ys)) / sxx
    resid = [y - (my + slope * (x - mx)) for x, y in zip(xs, ys)]
    stderr = math.sqrt(sum(r * r for r in resid) / (n - 2) / sxx) if n > 2 else math.nan
    return slope, stderr


def verdicts(samples: list[dict]) -> list[tuple]:
    """(figure, start, middle, end, slope/h, stderr, bound, unit, ok) for each bounded figure."""
    half = samples[-1]["t_min"] / 2.0
    second = [s for s in samples if s["t_min"] >= half]
    rows = []
    for key in [c[0] for c in COLUMNS[2:]]:
        base = key.split(".")[-1]
        bound, unit, _why = BOUNDS.get(base, (math.nan, "/h", ""))
        slope, err = slope_per_hour(second, key)
        rows.append((key, samples[0][key], second[0][key], samples[-1][key], slope, err, bound,
                     unit, not (slope > bound) if not math.isnan(bound) else None))
    return rows


def report(samples: list[dict], driver: Driver, log: LogCounter, published: dict,
           minutes: float) -> bool:
    print("\n| figure | start | at half | end | slope over 2nd half (/h) | bound (/h) | verdict |")
    print("| --- | ---: | ---: | ---: | ---: | ---: | --- |")
    all_ok = True
    for key, start, mid, end, slope, err, bound, unit, ok in verdicts(samples):
        verdict = "n/a" if ok is None else ("flat" if ok else "GROWS")
        all_ok &= ok is not False
        limit = "-" if ok is None else f"{bound:g} {unit}"
        print(f"| {key} | {start:,.2f} | {mid:,.2f} | {end:,.2f} | {slope:+.2f} ± {err:.2f} | "
              f"{limit} | {verdict} |")
    print("\nbounds (chosen, common practice, no source):")
    for key, (bound, unit, why) in BOUNDS.items():
        print(f"  {key} <= {bound:g} {unit}: {why}")
    handled = samples[-1]["messages"] - samples[0]["messages"]
    span_s = (samples[-1]["t_min"] - samples[0]["t_min"]) * 60.0
    print(f"\n{minutes:g} min; messages handled in the samples' span {handled:,} "
          f"({handled / span_s:,.0f}/s); published by the load generator {published.get('sent', '?'):,} "
          f"with {published.get('reconnects', '?')} reconnects; queue_dropped at the end "
          f"{samples[-1]['queue_dropped']}")
    print("operations ok / failed: " + ", ".join(
        f"{name} {driver.ok.get(name, 0)}/{driver.failed.get(name, 0)}"
        for name in sorted(set(driver.ok) | set(driver.failed))))
    for name, error in driver.last_error.items():
        print(f"  last failure of {name}: {error}")
    print("log lines by event: " + ", ".join(f"{e} {n}" for e, n in
                                             sorted(log.by_event.items(), key=lambda x: -x[1])))
    return all_ok


# ---- main -----------------------------------------------------------------------------------------

def start_publisher(broker, rate: float):
    import subprocess
    return subprocess.Popen([sys.executable, os.path.abspath(__file__), "_publish", broker.host,
                             str(broker.port), str(rate)], stdout=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONPATH": os.pathsep.join([ROOT, HERE])})


def stop_publisher(proc) -> dict:
    proc.send_signal(signal.SIGTERM)
    out, _ = proc.communicate(timeout=30)
    lines = [line for line in out.splitlines() if line.startswith("{")]
    return json.loads(lines[-1]) if lines else {}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=20.0, help="duration of the soak (default 20)")
    ap.add_argument("--rate", type=float, default=4000.0, help="offered readings per second")
    ap.add_argument("--bounce-minutes", type=float, default=4.0,
                    help="minutes between broker kill+restarts (default 4)")
    ap.add_argument("--keep-log", metavar="FILE", help="copy the daemon's log here at the end")
    args = ap.parse_args()
    from broker_fixture import BrokerProcess
    import daemon
    print(f"# daemon package from {os.path.dirname(daemon.__file__)}; Python {sys.version.split()[0]}; "
          f"{os.cpu_count()} CPUs; {time.strftime('%Y-%m-%d %H:%M:%S')}", flush=True)
    with tempfile.TemporaryDirectory(prefix="edgeprop-soak-") as tmp, \
            BrokerProcess(kind="mosquitto") as broker:
        broker.start()
        dut, config, url = start_daemon(broker, Path(tmp))
        publisher = start_publisher(broker, args.rate)
        published: dict = {}
        try:
            driver = Driver(dut, config, url, broker)
            log = LogCounter(dut.log_path)
            print_row({}, header=True)
            samples = drive(driver, args.minutes, args.bounce_minutes * 60.0, log)
        finally:
            published = stop_publisher(publisher)
            code = dut.stop(timeout=15)
            if args.keep_log:
                shutil.copyfile(dut.log_path, args.keep_log)
        ok = report(samples, driver, log, published, args.minutes)
        print(f"daemon exit code on SIGTERM: {code}")
    print("VERDICT: nothing grows beyond its bound" if ok else "VERDICT: something grows (see GROWS)")
    return 0 if ok else 1


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "_publish":
        role_publish(sys.argv[2], int(sys.argv[3]), float(sys.argv[4]))
    else:
        sys.exit(main())
