"""Resident memory and CPU per message of the daemon, with 1 and 10 models, for one plant hour.

Run: python tests/bench_resources.py   (not collected by pytest; prints a table, ~1-2 min)

The plant: a pump station with 10 inputs and one target, each read once a second, for one
hour (36,000 input + 3,600 target readings = 39,600 messages). Every model reads all 10
inputs and predicts the bearing temperature with the DESIGN.md defaults: 32-32 tanh,
batch 32, one SGD step per sample, window 2048, 512 readings of history per input.

Two ways to push the hour through, each in a fresh process per configuration:
  run     the real ``edgeprop run`` against mosquitto on loopback (metrics endpoint on). RSS
          from /proc after start, and after the hour of traffic (sent as fast as the daemon
          keeps up with, none dropped), summed over the daemon and its broker link process
          (shared library pages counted twice: an upper bound); CPU from /proc/PID/stat of
          both over the traffic, so the MQTT network thread and the metrics are included.
  replay  ``daemon.replay.replay`` on a capture of the same hour, in a process that first
          imports everything ``run`` imports; CPU from getrusage around the replay only.

Targets (from the issue): <= 80 MiB resident with 10 models; <= 0.1 CPU-seconds per 1,000
messages for one model at batch 32 and one step per sample.
"""
from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
for _p in (ROOT, HERE):
    if _p not in sys.path:
        sys.path.insert(0, _p)

INPUTS = ("speed", "flow", "current", "suction_kpa", "discharge_kpa", "ambient", "oil_temp",
          "vibration", "valve", "power")
TARGET = "bearing_temp"
HOUR_S = 3600
T0 = 1_765_000_000.0
MIB_TARGET, CPU_TARGET = 80.0, 0.1
PACED_RATE, PACED_S = 110.0, 20.0


def plant_hour(seed: int = 7) -> list[tuple[float, str, str]]:
    """One hour of an invented pump station at 1 Hz: (arrival time, topic, payload)."""
    import numpy as np
    rng = np.random.default_rng(seed)
    out = []
    for i in range(HOUR_S):
        t = T0 + i
        speed = 1450 + 60 * np.sin(i / 300) + 5 * rng.normal()
        flow = 0.08 * speed + rng.normal()
        current = 20 + 0.01 * speed + 0.05 * flow + 0.3 * rng.normal()
        values = [speed, flow, current, 120 + rng.normal(), 480 + 3 * rng.normal(),
                  18 + 2 * np.sin(i / 900), 45 + 0.01 * speed, 2 + 0.2 * rng.normal(),
                  60 + 5 * np.sin(i / 600), 0.9 * current * 0.4]
        for k, (name, v) in enumerate(zip(INPUTS, values)):
            out.append((t + 0.01 * k, f"plant/p1/{name}", json.dumps({"value": round(float(v), 4)})))
        temp = 35 + 0.004 * speed + 0.15 * current + 0.2 * values[5] + 0.1 * rng.normal()
        out.append((t + 0.5, f"plant/p1/{TARGET}", json.dumps({"value": round(float(temp), 4)})))
    return out


def config(workdir: str, models: int, broker_port: int) -> str:
    """Config with ``models`` models over the same 10 inputs (defaults elsewhere)."""
    import yaml
    cfg = {"node": "bench", "broker": {"host": "127.0.0.1", "port": broker_port},
           "state_dir": os.path.join(workdir, "state"), "metrics": {"listen": "127.0.0.1:0"},
           "checkpoints": {"every_s": 3600},
           "models": [{"name": f"m{j}", "target": {"topic": f"plant/p1/{TARGET}", "field": "value"},
                       "inputs": [{"name": n, "topic": f"plant/p1/{n}", "field": "value"}
                                  for n in INPUTS],
                       "net": {"seed": j + 1}} for j in range(models)]}
    path = os.path.join(workdir, f"bench-{models}.yaml")
    with open(path, "w") as f:
        yaml.safe_dump(cfg, f, sort_keys=False)
    return path


def write_capture(path: str, hour: list) -> None:
    from daemon.capture import CaptureWriter
    with CaptureWriter(path, overwrite=True) as w:
        for t, topic, payload in hour:
            w.write(t, topic, payload.encode())


# ---- replay, in a child process -----------------------------------------------------------------

REPLAY_CHILD = r"""
import json, resource, sys
import daemon.service                      # everything `run` imports: paho, prometheus, ...
from daemon.config import load_config
from daemon.replay import replay
def rss(key="VmRSS"):
    for line in open("/proc/self/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1]) / 1024
settings = load_config(sys.argv[1])
after_imports = rss()
ru0 = resource.getrusage(resource.RUSAGE_SELF)
summary, engine = replay(settings, sys.argv[2], lambda msg: None)
ru1 = resource.getrusage(resource.RUSAGE_SELF)
cpu = (ru1.ru_utime - ru0.ru_utime) + (ru1.ru_stime - ru0.ru_stime)
print(json.dumps({"after_imports": after_imports, "after_hour": rss(), "peak": rss("VmHWM"),
                  "cpu": cpu, "messages": summary.lines, "published": summary.published,
                  "wall": summary.seconds, "rejects": summary.rejects}))
"""


def run_replay(cfg: str, capture: str) -> dict:
    env = {**os.environ, "PYTHONPATH": ROOT}
    done = subprocess.run([sys.executable, "-c", REPLAY_CHILD, cfg, capture], capture_output=True,
                          text=True, env=env, timeout=900)
    if done.returncode != 0:
        raise RuntimeError(f"replay child failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


# ---- the real daemon --------------------------------------------------------------------------

def proc_cpu_s(pid: int) -> float:
    """utime + stime of ``pid`` (all threads) and its live children, in seconds (proc(5)).

    The daemon's broker connection runs in a child process: its CPU is the daemon's too.
    """
    from daemon_proc import child_pids
    total = 0.0
    for p in (pid, *child_pids(pid)):
        with open(f"/proc/{p}/stat") as f:
            fields = f.read().rsplit(")", 1)[1].split()
        total += (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    return total


def run_daemon(broker, cfg: str, hour: list, workdir: str) -> dict:
    from daemon_proc import Daemon, daemon_pss_mib, daemon_rss_mib, flood_process, flood_result, wait_until
    daemon = Daemon(cfg)
    try:
        daemon.wait_ready(30)
        time.sleep(1.0)                                  # let start-up allocations settle
        pid = daemon.proc.pid
        after_start = daemon_rss_mib(daemon)
        idle0 = proc_cpu_s(pid)
        time.sleep(3.0)                                  # idle: timers, keepalive, no traffic
        idle_per_s = (proc_cpu_s(pid) - idle0) / 3.0
        cpu0, wall0 = proc_cpu_s(pid), time.monotonic()
        # Sent in order on one connection, at a pace the worker keeps up with: the queue must
        # never overflow, or the figures would be for less than an hour of data.
        rate = 4000 if "bench-1." in cfg else 2500
        flood = flood_process(broker, [(t, p) for _t, t, p in hour], rate, len(hour) / rate + 60,
                              workdir, count=len(hour))
        flood_result(flood, len(hour) / rate + 120)
        wait_until(lambda: daemon.status()["messages"] >= len(hour), 300, "the hour handled",
                   every=0.2)
        cpu, wall = proc_cpu_s(pid) - cpu0, time.monotonic() - wall0
        status = daemon.status()
        after_hour = daemon_rss_mib(daemon)
        pss_hour = daemon_pss_mib(daemon)
        paced = paced_cpu(broker, pid, hour, workdir,
                          lambda: daemon.status()["messages"] - status["messages"])
        return {"after_start": after_start, "after_hour": after_hour, "pss_hour": pss_hour,
                "cpu": cpu, "wall": wall,
                "idle_per_s": idle_per_s, "paced_cpu": paced,
                "messages": status["messages"], "dropped": status["queue_dropped"],
                "samples": {k: m["samples"] for k, m in status["models"].items()}}
    finally:
        daemon.stop(30)


def paced_cpu(broker, pid: int, hour: list, workdir: str, handled) -> float:
    """CPU seconds per message of process ``pid`` when readings come one at a time.

    PACED_RATE messages/s (ten times the plant's 11/s, so the CPU clock's 10 ms ticks add up
    to a usable figure in PACED_S seconds): every message wakes the process on its own, as on
    the plant, instead of arriving in a batch the way the hour above did.
    """
    from daemon_proc import flood_process, flood_result, wait_until
    n = int(PACED_RATE * PACED_S)
    cpu0 = proc_cpu_s(pid)
    flood = flood_process(broker, [(t, p) for _t, t, p in hour[:n]], PACED_RATE, PACED_S + 30,
                          workdir, count=n)
    flood_result(flood, PACED_S + 60)
    wait_until(lambda: handled() >= n, 30, "the paced messages handled", every=0.2)
    return (proc_cpu_s(pid) - cpu0) / n


BARE_CHILD = r"""
import sys, time, paho.mqtt.client as mqtt
got = [0]
c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bench-bare")
c.on_message = lambda cl, u, m: got.__setitem__(0, got[0] + 1)
c.connect("127.0.0.1", int(sys.argv[1]))
c.subscribe("plant/#")
c.loop_start()
print("ready", flush=True)
while True:
    line = sys.stdin.readline()
    if not line:
        break
    print(got[0], flush=True)
"""


def bare_subscriber_cpu(broker, hour: list, workdir: str) -> float:
    """The same paced traffic into a bare paho subscriber: the transport's own cost per message."""
    child = subprocess.Popen([sys.executable, "-c", BARE_CHILD, str(broker.port)],
                             stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline().strip() == "ready"
        time.sleep(0.5)

        def handled() -> int:
            child.stdin.write("?\n")
            child.stdin.flush()
            return int(child.stdout.readline())
        return paced_cpu(broker, child.pid, hour, workdir, handled)
    finally:
        child.stdin.close()
        child.wait(10)


# ---- report --------------------------------------------------------------------------------------

def environment() -> str:
    import numpy
    try:
        from threadpoolctl import threadpool_info
        blas = "; ".join(f"{i['internal_api']} {i.get('num_threads')} threads"
                         for i in threadpool_info()) or "none loaded"
    except Exception:  # noqa: BLE001 - informative only
        blas = "threadpoolctl not available"
    return (f"{platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
            f"numpy {numpy.__version__}, BLAS: {blas}")


def verdict(value: float, target: float) -> str:
    return "PASS" if value <= target else "MISS"


def main() -> int:
    from broker_fixture import BrokerProcess
    hour = plant_hour()
    n_msgs = len(hour)
    print(f"# {environment()}")
    print(f"# one plant hour: {n_msgs:,} messages ({len(INPUTS)} inputs + 1 target at 1 Hz)\n")
    rows = []
    with tempfile.TemporaryDirectory(prefix="edgeprop-res-") as tmp, \
            BrokerProcess(kind="mosquitto") as broker:
        broker.start()
        capture = os.path.join(tmp, "hour.jsonl")
        write_capture(capture, hour)
        bare = bare_subscriber_cpu(broker, hour, tmp)
        for models in (1, 10):
            work = os.path.join(tmp, f"m{models}")
            os.mkdir(work)
            cfg = config(work, models, broker.port)
            rep = run_replay(cfg, capture)
            assert rep["messages"] == n_msgs and not rep["rejects"], rep
            live = run_daemon(broker, cfg, hour, work)
            assert live["messages"] == n_msgs and live["dropped"] == 0, live
            assert all(s == HOUR_S for s in live["samples"].values()), live["samples"]
            rows.append((models, rep, live))
            print(f"  {models} model(s): done (replay {rep['wall']:.1f} s, run {live['wall']:.1f} s)",
                  flush=True)

    print("\n| models | path | RSS after start (MiB) | RSS after 1 h (MiB) | CPU s / 1,000 msgs "
          "| CPU s / 1,000 targets | against the targets |")
    print("|---|---|---|---|---|---|---|")
    for models, rep, live in rows:
        lines = [("run, fed as fast as it keeps up", live["after_start"], live["after_hour"],
                  1000 * live["cpu"] / n_msgs),
                 (f"run, paced {PACED_RATE:.0f} msg/s", None, None, 1000 * live["paced_cpu"]),
                 ("replay (engine only)", rep["after_imports"], rep["after_hour"],
                  1000 * rep["cpu"] / n_msgs)]
        for path, start, end, per_msg in lines:
            checks = []
            if models == 10 and end is not None and path.startswith("run"):
                # two processes: summed RSS counts their shared pages twice, PSS once
                checks.append(f"RSS summed {verdict(end, MIB_TARGET)}, PSS {live['pss_hour']:.1f} MiB "
                              f"{verdict(live['pss_hour'], MIB_TARGET)} (<= {MIB_TARGET:.0f} MiB)")
            if models == 1:
                checks.append(f"CPU {verdict(per_msg, CPU_TARGET)} (<= {CPU_TARGET} s)")
            start_text = "-" if start is None else f"{start:.1f}" + (
                " (imports)" if path.startswith("replay") else "")
            end_text = "-" if end is None else f"{end:.1f}"
            per_target = per_msg * n_msgs / HOUR_S
            print(f"| {models} | {path} | {start_text} | {end_text} | {per_msg:.3f} | "
                  f"{per_target:.2f} | {'; '.join(checks) or '-'} |")
    print(f"| - | bare paho subscriber, paced {PACED_RATE:.0f} msg/s | - | - | "
          f"{1000 * bare:.3f} | - | transport floor, for comparison |")
    idle = ", ".join(f"{m} model(s) {1000 * live['idle_per_s']:.1f} ms/s" for m, _r, live in rows)
    print("\nrun: the real daemon (worker process with metrics endpoint and control socket, plus "
          "its broker link process) fed through mosquitto; RSS summed over both (shared pages "
          "twice); CPU of both from /proc, idle wake-ups included (idle CPU: "
          f"{idle}). Fed as fast as it keeps up, messages arrive in batches; paced, each one "
          "wakes the process on its own.\nreplay: the engine alone on the same capture, in a "
          "process with the daemon's imports loaded (no MQTT, no metrics).")
    return 0


if __name__ == "__main__":
    sys.exit(main())
