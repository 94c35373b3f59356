"""Throughput and latency of the running daemon through mosquitto, beside a bare paho subscriber.

Run: python tests/bench_daemon.py [--quick]   (not collected by pytest; prints a table)

Everything goes through a real mosquitto on loopback, and every party is its own process:
a paced paho publisher, the subject (the daemon, or a bare paho subscriber) and, for latency,
a paho collector of the daemon's predictions. The traffic is a pump-station step: four input
readings (speed, current, ambient, suction pressure) and one bearing temperature, each a JSON
object with a sensor time; the daemon runs one model with those 4 inputs and learns from every
target reading (the DESIGN.md default network: 32-32 tanh, batch 32, one step per sample).

Figures measured in the same run, so the machine's load hits them alike:
  bare limit      a bare paho subscriber draining a burst (raw, and json.loads on each payload)
  bare latency    publish -> bare subscriber at 1,000 msg/s
  daemon latency  target publish -> its prediction's arrival at 1,000 msg/s (two broker hops)
  sustained       the highest offered rate (a ladder of steps) at which the daemon handled
                  every message (control-socket `status`: messages and queue_dropped), fell
                  at most LAG_S behind the publisher during the step and drained within LAG_S.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import platform
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
for p in (ROOT, HERE):
    if p not in sys.path:
        sys.path.insert(0, p)

INPUTS = ("speed", "current", "ambient", "suction")
TARGET = "bearing_temp"
TOPICS = [f"bench/p1/{name}" for name in (*INPUTS, TARGET)]
PRED_TOPIC = "edgeprop/bench/m1"
LAG_S = 0.25                # a step passes while the daemon stays within this of the publisher


# ---- child processes: publisher and subscribers (run this file with a leading role word) ----

def _client(host: str, port: int, name: str):
    import paho.mqtt.client as mqtt
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"bench-{name}-{os.getpid()}")

    def nodelay(c, userdata, sock):
        # Nagle + delayed ACK would add ~40 ms to the first messages (FIELD-NOTES)
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    client.on_socket_open = nodelay
    client.connect(host, port, keepalive=60)
    return client


def role_publish(host: str, port: int, rate: float, count: int, seed: int) -> None:
    """Publish ``count`` messages (whole steps of 5) at ``rate`` msg/s (0: as fast as possible)."""
    import numpy as np
    rng = np.random.default_rng(seed)
    client = _client(host, port, "pub")
    client.loop_start()
    time.sleep(0.2)
    steps = count // len(TOPICS)
    sent, info = 0, None
    start = time.time()
    perf0 = time.perf_counter()
    for i in range(steps):
        if rate > 0:
            # Sleep (never spin: a spinning publisher takes a whole core of a 2-core box);
            # when a sleep overshoots, the next steps go out back to back to catch up.
            ahead = perf0 + sent / rate - time.perf_counter()
            if ahead > 0:
                time.sleep(ahead)
        t = time.time()
        speed = 1000 + 400 * math.sin(i / 400) + 30 * rng.normal()
        current = 10 + 0.02 * (speed - 1000) + rng.normal()
        ambient = 15 + 5 * math.sin(i / 5000)
        suction = 1.2 + 0.1 * math.cos(i / 700)
        temp = 40 + 15 * math.tanh((speed - 1000) / 300) + 0.05 * current ** 2 + 0.3 * ambient
        for topic, value in zip(TOPICS, (speed, current, ambient, suction, temp)):
            info = client.publish(topic, json.dumps({"value": round(value, 4), "ts": t}), qos=0)
            sent += 1
    last = time.time()
    if info is not None:
        info.wait_for_publish(30)
    client.loop_stop()
    client.disconnect()
    print(json.dumps({"sent": sent, "first": start, "last": last}), flush=True)


def role_subscribe(host: str, port: int, mode: str, expect: int, idle_s: float) -> None:
    """Receive until ``expect`` messages arrived (or ``idle_s`` without any); report figures.

    mode raw: count only; json: json.loads each payload; latency: arrival - payload "ts";
    predictions: arrival - prediction "t" for messages on the daemon's prediction topic.
    """
    import threading
    got = {"n": 0, "first": None, "last": None}
    lat: list[float] = []
    done = threading.Event()
    ready = threading.Event()

    def on_message(c, userdata, msg):
        now = time.time()
        if mode == "json":
            json.loads(msg.payload)
        elif mode == "latency":
            lat.append(now - json.loads(msg.payload)["ts"])
        elif mode == "predictions":
            lat.append(now - json.loads(msg.payload)["t"])
        if got["first"] is None:
            got["first"] = now
        got["last"] = now
        got["n"] += 1
        if got["n"] >= expect:
            done.set()

    client = _client(host, port, "sub")
    client.on_message = on_message
    client.on_subscribe = lambda *a: ready.set()
    topics = [(PRED_TOPIC, 0)] if mode == "predictions" else [(t, 0) for t in TOPICS]
    client.subscribe(topics)
    client.loop_start()
    ready.wait(10)
    print("ready", flush=True)
    while not done.is_set():
        before = got["n"]
        done.wait(idle_s)
        if got["n"] == before and got["n"] > 0:
            break
    client.loop_stop()
    client.disconnect()
    print(json.dumps({"n": got["n"], "first": got["first"], "last": got["last"],
                      "latency": lat}), flush=True)


# ---- the bench itself ---------------------------------------------------------------------------

def _spawn(*args: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, os.path.abspath(__file__), *map(str, args)],
                            stdout=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": ROOT})


def _result(proc: subprocess.Popen, timeout: float = 120) -> dict:
    out, _ = proc.communicate(timeout=timeout)
    lines = [line for line in out.splitlines() if line.startswith("{")]
    if proc.returncode != 0 or not lines:
        raise RuntimeError(f"child failed ({proc.returncode}): {out[-2000:]}")
    return json.loads(lines[-1])


def subscriber(broker, mode: str, expect: int, idle_s: float = 2.0) -> subprocess.Popen:
    proc = _spawn("_subscribe", broker.host, broker.port, mode, expect, idle_s)
    line = proc.stdout.readline()
    if line.strip() != "ready":
        proc.kill()
        raise RuntimeError(f"subscriber did not start: {line!r}")
    return proc


def publish(broker, rate: float, count: int, seed: int = 0) -> subprocess.Popen:
    return _spawn("_publish", broker.host, broker.port, rate, count, seed)


def pct(values: list[float], q: float) -> float:
    import numpy as np
    return float(np.percentile(np.asarray(values), q))


def bare_limit(broker, mode: str, count: int) -> float:
    """msg/s a bare subscriber drains from a burst larger than it can take live."""
    sub = subscriber(broker, mode, count)
    pub = _result(publish(broker, 0, count))
    res = _result(sub)
    if res["n"] != pub["sent"]:
        print(f"  note: bare {mode} subscriber got {res['n']} of {pub['sent']}", file=sys.stderr)
    return (res["n"] - 1) / (res["last"] - res["first"])


def bare_latency(broker, rate: float, seconds: float) -> list[float]:
    count = int(rate * seconds) // 5 * 5
    sub = subscriber(broker, "latency", count)
    _result(publish(broker, rate, count, seed=1))
    return _result(sub)["latency"]


class DaemonUnderTest:
    """The real daemon (``edgeprop run``) with one 4-input model, stopped on close."""

    def __init__(self, broker, workdir: Path) -> None:
        from daemon_proc import Daemon, write_config
        model = {"name": "m1",
                 "target": {"topic": f"bench/p1/{TARGET}", "field": "value", "time_field": "ts"},
                 "inputs": [{"name": n, "topic": f"bench/p1/{n}", "field": "value", "time_field": "ts"}
                            for n in INPUTS],
                 "align": {"max_age_s": 30}}
        config = write_config(workdir, broker, [model], node="bench",
                              metrics={"listen": "127.0.0.1:0"},
                              checkpoints={"every_s": 3600, "keep": 3})
        from daemon.config import load_config
        self.socket = load_config(config).control_socket
        self.daemon = Daemon(config)
        self.daemon.wait_log("event=ready", timeout=30)

    def status(self) -> dict:
        """``status`` through the control socket (answered by the worker between batches)."""
        from daemon.control import request
        return request(self.socket, {"cmd": "status"})["result"]

    def close(self) -> int:
        return self.daemon.stop()


def daemon_latency(broker, dut: DaemonUnderTest, rate: float, seconds: float) -> list[float]:
    count = int(rate * seconds) // 5 * 5
    coll = subscriber(broker, "predictions", count // 5)
    _result(publish(broker, rate, count, seed=2))
    return _result(coll)["latency"]


def offered_step(broker, dut: DaemonUnderTest, rate: float, seconds: float) -> dict:
    """Offer ``rate`` msg/s for ``seconds``; report whether the daemon kept up, and how far behind."""
    count = int(rate * seconds) // 5 * 5
    before = dut.status()
    pub = publish(broker, rate, count, seed=3)
    polls = []
    while pub.poll() is None:
        st = dut.status()
        polls.append((time.time(), st["messages"]))
        time.sleep(0.1)
    res = _result(pub)
    start, last = res["first"], res["last"]
    deadline = time.time() + 10
    while True:
        st = dut.status()
        now = time.time()
        if st["messages"] - before["messages"] >= res["sent"] or now > deadline:
            break
        time.sleep(0.01)
    drain = max(0.0, now - last)
    offered = res["sent"] / max(last - start, 1e-9)
    # Lag at each poll: what the paced publisher had sent by then minus what the daemon handled.
    lags = [min(res["sent"], offered * max(0.0, t - start)) - (m - before["messages"])
            for t, m in polls if t > start]
    max_lag_s = max([0.0, *lags]) / offered
    handled = st["messages"] - before["messages"]
    dropped = st["queue_dropped"] - before["queue_dropped"]
    ok = handled == res["sent"] and dropped == 0 and max_lag_s <= LAG_S and drain <= LAG_S
    return {"rate": rate, "offered": offered, "sent": res["sent"], "handled": handled,
            "dropped": dropped, "max_lag_s": max_lag_s, "drain_s": drain, "ok": ok}


def environment() -> str:
    try:
        from threadpoolctl import threadpool_info
        blas = ", ".join(f"{i['internal_api']} {i.get('num_threads')} threads" for i in threadpool_info())
    except Exception:  # noqa: BLE001 - optional, informative only
        blas = "threadpoolctl not available"
    mosq = subprocess.run(["mosquitto", "-h"], capture_output=True, text=True).stdout.splitlines()
    import paho.mqtt
    return (f"{platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
            f"paho-mqtt {paho.mqtt.__version__}, {mosq[0] if mosq else 'mosquitto ?'}, BLAS: {blas}")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="shorter steps (rough figures)")
    ap.add_argument("--burst", type=int, default=60_000, help="messages in the bare-limit burst")
    args = ap.parse_args()
    seconds = 4.0 if args.quick else 8.0
    step_s = 3.0 if args.quick else 5.0

    from broker_fixture import BrokerProcess
    with tempfile.TemporaryDirectory(prefix="edgeprop-bench-") as tmp, \
            BrokerProcess(kind="mosquitto") as broker:
        broker.start()
        print(f"# {environment()}", flush=True)
        print("# broker: mosquitto on loopback, max_queued_messages 0 (unbounded; drops would "
              "otherwise hide in the broker)", flush=True)
        raw = bare_limit(broker, "raw", args.burst)
        decoded = bare_limit(broker, "json", args.burst)
        bare_lat = bare_latency(broker, 1000, seconds)
        print(f"bare subscriber: {raw:,.0f} msg/s raw, {decoded:,.0f} msg/s json.loads; "
              f"latency p50 {pct(bare_lat, 50) * 1e3:.2f} ms p99 {pct(bare_lat, 99) * 1e3:.2f} ms",
              flush=True)

        dut = DaemonUnderTest(broker, Path(tmp))
        try:
            # warm-up (64 targets) and a first look at the path
            offered_step(broker, dut, 1000, 1.0)
            lat = daemon_latency(broker, dut, 1000, seconds)
            print(f"daemon latency at 1,000 msg/s: p50 {pct(lat, 50) * 1e3:.2f} ms "
                  f"p99 {pct(lat, 99) * 1e3:.2f} ms ({len(lat)} predictions)", flush=True)
            ladder, best = [], None
            rate = 2000.0
            while rate <= 1.25 * raw:
                step = offered_step(broker, dut, rate, step_s)
                ladder.append(step)
                print(f"  offered {step['offered']:8,.0f} msg/s: handled {step['handled']}/"
                      f"{step['sent']}, queue drops {step['dropped']}, max lag "
                      f"{step['max_lag_s'] * 1e3:6.0f} ms, drained in {step['drain_s'] * 1e3:5.0f} ms"
                      f" -> {'kept up' if step['ok'] else 'fell behind'}", flush=True)
                if not step["ok"]:
                    # one retry: a passing neighbour process must not end the ladder early
                    again = offered_step(broker, dut, rate, step_s)
                    if not again["ok"]:
                        break
                    step = again
                best = step
                rate += 500.0
            status = dut.status()
        finally:
            code = dut.close()

    sustained = best["offered"] if best else 0.0
    p50, p99, bare99 = pct(lat, 50), pct(lat, 99), pct(bare_lat, 99)
    rows = [
        ("bare paho subscriber, QoS 0 (transport limit)", f"{raw:,.0f} msg/s", "", ""),
        ("bare paho subscriber + json.loads", f"{decoded:,.0f} msg/s", "", ""),
        ("daemon sustained, no drops (4 inputs + target)", f"{sustained:,.0f} msg/s",
         f">= 60 % of {raw:,.0f} = {0.6 * raw:,.0f}", "yes" if sustained >= 0.6 * raw else "NO"),
        ("  as share of the bare limit", f"{100 * sustained / raw:.0f} %", ">= 60 %", ""),
        ("bare subscriber latency p50 / p99 at 1,000 msg/s",
         f"{pct(bare_lat, 50) * 1e3:.2f} / {bare99 * 1e3:.2f} ms", "", ""),
        ("daemon latency p50 at 1,000 msg/s (target -> prediction)", f"{p50 * 1e3:.2f} ms",
         "<= 1 ms", "yes" if p50 <= 1e-3 else "NO"),
        ("daemon latency p99 at 1,000 msg/s", f"{p99 * 1e3:.2f} ms",
         f"<= 2 x bare p99 = {2 * bare99 * 1e3:.2f} ms", "yes" if p99 <= 2 * bare99 else "NO"),
    ]
    print()
    print("| figure | measured | target | met |")
    print("| --- | --- | --- | --- |")
    for row in rows:
        print("| " + " | ".join(row) + " |")
    print(f"\ndaemon: {status['models']['m1']['samples']} samples learned, queue_dropped "
          f"{status['queue_dropped']}, exit code {code}")
    return 0


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "_publish":
        role_publish(sys.argv[2], int(sys.argv[3]), float(sys.argv[4]), int(sys.argv[5]), int(sys.argv[6]))
    elif len(sys.argv) > 1 and sys.argv[1] == "_subscribe":
        role_subscribe(sys.argv[2], int(sys.argv[3]), sys.argv[4], int(sys.argv[5]), float(sys.argv[6]))
    else:
        sys.exit(main())
