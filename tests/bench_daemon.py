"""Throughput and latency of the running daemon through mosquitto, beside a bare paho subscriber.

Run: python tests/bench_daemon.py [--quick]   (not collected by pytest; prints a table)

Everything goes through a real mosquitto on loopback and every party is its own process: a
paced publisher (writes its MQTT packets itself, one write per step, so the load generator
leaves the box to the subject), the subject (the daemon, or a bare paho subscriber) and, for latency, a
paho collector of the daemon's predictions. The traffic is a pump-station step: four input
readings (speed, current, ambient, suction pressure) then one bearing temperature, each a JSON
object with a sensor time ``ts`` (the publish time); the daemon runs one model with those 4
inputs and learns from every target reading with the DESIGN.md defaults (32-32 tanh, batch 32,
one SGD step per sample, metrics endpoint on).

Figures, all from the same run so the machine's load hits them alike:
  sustained  the highest offered rate on a ladder (x1.2 per step, then bisected) at which the
             subject got every message and never fell more than LAG_S behind the publisher. Bare subscriber: from
             each message's own publish time. Daemon: from its control socket (`status`:
             messages handled, queue_dropped) polled every POLL_S, and it must be drained
             within LAG_S of the last publish.
  burst      a bare subscriber draining a backlog: the most it reads when the socket is full.
  latency    at 1,000 msg/s: publish -> bare subscriber (one broker hop), and a target's
             publish -> its prediction's arrival at a collector (two broker hops + the model).
"""
from __future__ import annotations

import argparse
import json
import math
import os
import platform
import select
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
for _p in (ROOT, HERE):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from daemon.mqtt_frames import write_varint  # noqa: E402  (after the path is set)

INPUTS = ("speed", "current", "ambient", "suction")
TARGET = "bearing_temp"
TOPICS = [f"bench/p1/{name}" for name in (*INPUTS, TARGET)]
PRED_TOPIC = "edgeprop/bench/m1"
LAG_S = 0.25            # a ladder step passes while the subject stays within this of the publisher
POLL_S = 0.05           # control-socket poll period while the daemon is under load
LADDER_START, LADDER_FACTOR = 2000.0, 1.2
REFINE = 3              # bisection steps after the ladder (1.2 ** (1 / 8): about 2.5 % resolution)
PUBLISH_SLACK_S = 0.001  # the publisher sleeps only when this far ahead of its schedule
BARE_START = 4000.0     # the bare subscriber's ladder starts higher: it is never the slow one


# ---- child processes (this file run with a leading role word) ---------------------------------

def _client(host: str, port: int, name: str):
    import paho.mqtt.client as mqtt
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"bench-{name}-{os.getpid()}")

    def nodelay(c, userdata, sock):
        # without it the first ~50 small messages wait ~40 ms for Nagle (FIELD-NOTES)
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    client.on_socket_open = nodelay
    client.connect(host, port, keepalive=60)
    return client


def _mqtt_string(text: str) -> bytes:
    raw = text.encode()
    return len(raw).to_bytes(2, "big") + raw


def _mqtt_packet(first_byte: int, body: bytes) -> bytes:
    """One MQTT packet: fixed header (type, remaining length as a varint) and body."""
    return bytes((first_byte,)) + write_varint(len(body)) + body


class RawPublisher:
    """An MQTT 3.1.1 client that only publishes at QoS 0, writing the packets itself.

    The load generator must take as little of a 2-core box as it can: paho's publish wakes
    its network thread for every message (about 36 us of CPU per message at 24,000 msg/s,
    measured here), which the subject under test would otherwise lose. One ``sendall`` per
    step of five readings costs a few microseconds per message.
    """

    def __init__(self, host: str, port: int) -> None:
        self.sock = socket.create_connection((host, port))
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        # CONNECT: protocol name, level 4, clean session, keepalive 0 (off), client id
        body = _mqtt_string("MQTT") + bytes([4, 0x02, 0, 0]) + _mqtt_string(f"bench-pub-{os.getpid()}")
        self.sock.sendall(_mqtt_packet(0x10, body))
        if self._read(4) != b"\x20\x02\x00\x00":
            raise RuntimeError("the broker refused the benchmark publisher")
        self.topics = {topic: _mqtt_string(topic) for topic in TOPICS}

    def _read(self, n: int) -> bytes:
        data = b""
        while len(data) < n:
            chunk = self.sock.recv(n - len(data))
            if not chunk:
                raise RuntimeError("the broker closed the benchmark publisher's connection")
            data += chunk
        return data

    def publish_many(self, messages: list[tuple[str, str]]) -> None:
        self.sock.sendall(b"".join(_mqtt_packet(0x30, self.topics[topic] + payload.encode())
                                   for topic, payload in messages))

    def flush_and_close(self) -> None:
        """PINGREQ and wait for PINGRESP: the broker has read every publish sent before it."""
        self.sock.sendall(b"\xc0\x00")
        if self._read(2) != b"\xd0\x00":
            raise RuntimeError("no PINGRESP from the broker")
        self.sock.sendall(b"\xe0\x00")        # DISCONNECT
        self.sock.close()


def role_publish(host: str, port: int, rate: float, count: int, seed: int) -> None:
    """Publish ``count`` messages (whole steps of 5) at ``rate`` msg/s; 0 = as fast as possible."""
    import numpy as np
    steps = count // len(TOPICS)
    noise = np.random.default_rng(seed).normal(size=(steps, 2)).tolist()
    client = RawPublisher(host, port)
    sent = 0
    first = time.time()
    perf0 = time.perf_counter()
    for i in range(steps):
        if rate > 0:
            # Sleep, never spin (a spinning publisher takes a whole core of a 2-core box), and
            # only when a millisecond ahead: a sleep per step would cost more than the step.
            # After an overshoot the next steps go out back to back until on schedule again.
            ahead = perf0 + sent / rate - time.perf_counter()
            if ahead > PUBLISH_SLACK_S:
                time.sleep(ahead)
        t = time.time()
        speed = 1000 + 400 * math.sin(i / 400) + 30 * noise[i][0]
        current = 10 + 0.02 * (speed - 1000) + noise[i][1]
        ambient = 15 + 5 * math.sin(i / 5000)
        suction = 1.2 + 0.1 * math.cos(i / 700)
        temp = 40 + 15 * math.tanh((speed - 1000) / 300) + 0.05 * current ** 2 + 0.3 * ambient
        # the same text json.dumps({"value": ..., "ts": t}) gives, without its call overhead
        client.publish_many([(topic, f'{{"value": {round(value, 4)!r}, "ts": {t!r}}}')
                             for topic, value in zip(TOPICS, (speed, current, ambient, suction, temp))])
        sent += len(TOPICS)
    last = time.time()
    client.flush_and_close()
    flushed = time.time()
    print(json.dumps({"sent": sent, "first": first, "last": last, "flushed": flushed}), flush=True)


def role_subscribe(host: str, port: int, mode: str, expect: int, idle_s: float) -> None:
    """Receive until ``expect`` messages arrived (or none for ``idle_s``); report lags.

    raw: keep (arrival, payload) only, decode after the run; json: json.loads in the callback,
    as a consumer would; predictions: the daemon's messages, lag = arrival - prediction "t".
    """
    import threading
    rows: list = []
    done, ready = threading.Event(), threading.Event()

    def on_message(c, userdata, msg):
        now = time.time()
        if mode == "raw":
            rows.append((now, msg.payload))
        elif mode == "json":
            rows.append((now, json.loads(msg.payload)["ts"]))
        else:
            rows.append((now, json.loads(msg.payload)["t"]))
        if len(rows) >= expect:
            done.set()

    client = _client(host, port, "sub")
    client.on_message = on_message
    client.on_subscribe = lambda *a: ready.set()
    client.subscribe([(PRED_TOPIC, 0)] if mode == "predictions" else [(t, 0) for t in TOPICS])
    client.loop_start()
    ready.wait(10)
    print("ready", flush=True)
    while not done.is_set():
        before = len(rows)
        done.wait(idle_s)
        if len(rows) == before and before > 0:
            break
    client.loop_stop()
    client.disconnect()
    stamps = [r[1] if mode != "raw" else json.loads(r[1])["ts"] for r in rows]
    print(json.dumps({"n": len(rows), "first": rows[0][0] if rows else None,
                      "last": rows[-1][0] if rows else None,
                      "lag": [r[0] - s for r, s in zip(rows, stamps)]}), flush=True)


# ---- driving the children ---------------------------------------------------------------------

def _spawn(*args: object) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, os.path.abspath(__file__), *map(str, args)],
                            stdout=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": ROOT})


def _result(proc: subprocess.Popen, timeout: float = 180, reap: bool = True) -> dict:
    """The child's JSON line, read as soon as it is printed; then the child is reaped.

    ``reap=False`` returns without waiting for the child to exit: paho's ``loop_stop`` in the
    publisher takes up to a second, and a caller timing the daemon must not sleep through it.
    """
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        line = proc.stdout.readline()
        if not line:
            break
        if line.startswith("{"):
            if reap:
                proc.wait(timeout=30)
            return json.loads(line)
    proc.kill()
    raise RuntimeError(f"child {proc.args[2:]} gave no result (exit {proc.poll()})")


def subscriber(broker, mode: str, expect: int, idle_s: float = 2.0) -> subprocess.Popen:
    proc = _spawn("_subscribe", broker.host, broker.port, mode, expect, idle_s)
    if proc.stdout.readline().strip() != "ready":
        proc.kill()
        raise RuntimeError("subscriber did not start")
    return proc


def publisher(broker, rate: float, count: int, seed: int = 0) -> subprocess.Popen:
    return _spawn("_publish", broker.host, broker.port, rate, count, seed)


def pct(values: list[float], q: float) -> float:
    import numpy as np
    return float(np.percentile(np.asarray(values), q))


def steps_of(rate: float, seconds: float) -> int:
    return max(5, int(rate * seconds) // 5 * 5)


# ---- the bare subscriber -----------------------------------------------------------------------

def bare_step(broker, mode: str, rate: float, seconds: float) -> dict:
    count = steps_of(rate, seconds)
    sub = subscriber(broker, mode, count)
    pub = _result(publisher(broker, rate, count))
    res = _result(sub)
    offered = pub["sent"] / max(pub["last"] - pub["first"], 1e-9)
    max_lag = max(res["lag"]) if res["lag"] else math.inf
    return {"rate": rate, "offered": offered, "sent": pub["sent"], "got": res["n"],
            "max_lag_s": max_lag, "lag": res["lag"],
            "ok": res["n"] == pub["sent"] and max_lag <= LAG_S}


def bare_burst(broker, mode: str, count: int) -> float:
    """msg/s a bare subscriber drains from a backlog (the publisher outruns it)."""
    sub = subscriber(broker, mode, count)
    _result(publisher(broker, 0, count))
    res = _result(sub)
    return (res["n"] - 1) / (res["last"] - res["first"])


# ---- the daemon ---------------------------------------------------------------------------------

class DaemonUnderTest:
    """The real daemon (``edgeprop run``) with one 4-input model; stopped by ``close``."""

    def __init__(self, broker, workdir: Path) -> None:
        from daemon.config import load_config
        from daemon_proc import Daemon, write_config
        model = {"name": "m1",
                 "target": {"topic": f"bench/p1/{TARGET}", "field": "value", "time_field": "ts"},
                 "inputs": [{"name": n, "topic": f"bench/p1/{n}", "field": "value",
                             "time_field": "ts"} for n in INPUTS],
                 "align": {"max_age_s": 30}}
        config = write_config(workdir, broker, [model], node="bench",
                              metrics={"listen": "127.0.0.1:0"},
                              checkpoints={"every_s": 3600, "keep": 3})
        self.socket = load_config(config).control_socket
        self.daemon = Daemon(config)
        self.daemon.wait_log("event=ready", timeout=30)

    def status(self) -> dict:
        """``status`` through the control socket (the worker answers between batches)."""
        from daemon.control import request
        return request(self.socket, {"cmd": "status"})["result"]

    def close(self) -> int:
        return self.daemon.stop()


def daemon_step(broker, dut: DaemonUnderTest, rate: float, seconds: float) -> dict:
    """Offer ``rate`` msg/s; poll the daemon's handled count until it has them all (or 10 s)."""
    count = steps_of(rate, seconds)
    before = dut.status()
    pub = publisher(broker, rate, count, seed=3)
    polls, res = [], None
    deadline = None
    while True:
        st = dut.status()
        now = time.time()
        handled = st["messages"] - before["messages"]
        polls.append((now, handled))
        if res is None and select.select([pub.stdout], [], [], 0)[0]:
            res = _result(pub, reap=False)
            deadline = time.time() + 10
        if res is not None and (handled >= res["sent"] or now > deadline):
            break
        time.sleep(POLL_S)
    pub.wait(timeout=30)
    offered = res["sent"] / max(res["last"] - res["first"], 1e-9)
    # lag at each poll: what the paced publisher had sent by then, minus what the daemon handled
    lags = [min(res["sent"], offered * (t - res["first"])) - h for t, h in polls if t > res["first"]]
    max_lag_s = max([0.0, *lags]) / offered
    drain_s = max(0.0, polls[-1][0] - res["flushed"])
    dropped = st["queue_dropped"] - before["queue_dropped"]
    ok = handled == res["sent"] and dropped == 0 and max_lag_s <= LAG_S and drain_s <= LAG_S
    return {"rate": rate, "offered": offered, "sent": res["sent"], "got": handled,
            "dropped": dropped, "max_lag_s": max_lag_s, "drain_s": drain_s, "ok": ok}


def daemon_latency(broker, rate: float, seconds: float) -> list[float]:
    count = steps_of(rate, seconds)
    coll = subscriber(broker, "predictions", count // 5)
    _result(publisher(broker, rate, count, seed=2))
    return _result(coll)["lag"]


# ---- ladder and report ----------------------------------------------------------------------------

def _try(name: str, step, rate: float) -> dict:
    """One offered rate, retried once on failure (a neighbour's burst must not decide it)."""
    res = step(rate)
    if not res["ok"]:
        res = step(rate)
    extra = f", queue drops {res['dropped']}, drained in {res['drain_s'] * 1e3:4.0f} ms" \
        if "dropped" in res else ""
    print(f"  {name:12s} offered {res['offered']:8,.0f} msg/s: got {res['got']}/{res['sent']}, "
          f"max lag {res['max_lag_s'] * 1e3:7.1f} ms{extra} -> "
          f"{'kept up' if res['ok'] else 'fell behind'}", flush=True)
    return res


def ladder(name: str, step, limit: float, start: float = LADDER_START) -> float:
    """The highest offered rate kept up with: climb x1.2 until a rate fails, then bisect.

    The ladder alone would only place a limit within 20 %, too coarse to judge a ratio of
    two limits against 60 %; REFINE geometric bisections between the last rate kept up with
    and the first that failed bring that to about 2.5 %.
    """
    best, passed, failed, rate = 0.0, None, None, start
    while rate <= limit:
        res = _try(name, step, rate)
        if not res["ok"]:
            failed = rate
            break
        best, passed = max(best, res["offered"]), rate
        if res["offered"] < 0.9 * rate:
            print(f"  {name:12s} the publisher itself could not offer more; ladder ends", flush=True)
            return best
        rate *= LADDER_FACTOR
    if passed is None or failed is None:
        return best
    for _ in range(REFINE):
        mid = math.sqrt(passed * failed)
        res = _try(name, step, mid)
        if res["ok"]:
            best, passed = max(best, res["offered"]), mid
        else:
            failed = mid
    return best


def environment() -> str:
    try:
        from threadpoolctl import threadpool_info
        blas = "; ".join(f"{i['internal_api']} {i.get('num_threads')} threads" for i in threadpool_info())
    except Exception:  # noqa: BLE001 - informative only
        blas = "threadpoolctl not available"
    mosq = subprocess.run(["mosquitto", "-h"], capture_output=True, text=True).stdout.splitlines()
    import paho.mqtt
    return (f"{platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
            f"paho-mqtt {paho.mqtt.__version__}, {mosq[0] if mosq else 'mosquitto ?'}, "
            f"BLAS: {blas or 'none loaded'}")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="shorter steps (rougher figures)")
    ap.add_argument("--burst", type=int, default=50_000, help="messages in the bare burst")
    args = ap.parse_args()
    step_s = 2.0 if args.quick else 4.0
    lat_s = 4.0 if args.quick else 10.0

    from broker_fixture import BrokerProcess
    with tempfile.TemporaryDirectory(prefix="edgeprop-bench-") as tmp, \
            BrokerProcess(kind="mosquitto") as broker:
        broker.start()
        print(f"# {environment()}", flush=True)
        print("# mosquitto on loopback, its defaults except max_queued_messages 0 (unbounded, so a "
              "slow subscriber shows as lag, not as silent loss)", flush=True)
        burst_raw = bare_burst(broker, "raw", args.burst)
        burst_json = bare_burst(broker, "json", args.burst)
        print(f"  bare burst drain: {burst_raw:,.0f} msg/s raw, {burst_json:,.0f} msg/s json.loads",
              flush=True)
        bare_lat = bare_step(broker, "raw", 1000, lat_s)["lag"]
        bare_raw = ladder("bare raw", lambda r: bare_step(broker, "raw", r, step_s),
                          1.3 * burst_raw, BARE_START)
        bare_json = ladder("bare json", lambda r: bare_step(broker, "json", r, step_s),
                           1.3 * burst_json, BARE_START)

        dut = DaemonUnderTest(broker, Path(tmp))
        try:
            daemon_step(broker, dut, 1000, 1.0)                # warm-up: 64 targets, then some
            lat = daemon_latency(broker, 1000, lat_s)
            sustained = ladder("daemon", lambda r: daemon_step(broker, dut, r, step_s),
                               1.3 * bare_raw)
            status = dut.status()
        finally:
            code = dut.close()

    p50, p99, bare99 = pct(lat, 50), pct(lat, 99), pct(bare_lat, 99)
    rows = [
        ("bare paho subscriber, sustained, raw (transport limit)", f"{bare_raw:,.0f} msg/s", "", ""),
        ("bare paho subscriber, sustained, json.loads each", f"{bare_json:,.0f} msg/s", "", ""),
        ("bare paho subscriber, burst drain raw / json", f"{burst_raw:,.0f} / {burst_json:,.0f} msg/s",
         "", ""),
        ("daemon, sustained without drops (4 inputs + target)", f"{sustained:,.0f} msg/s",
         f">= 60 % of {bare_raw:,.0f} = {0.6 * bare_raw:,.0f}",
         "yes" if sustained >= 0.6 * bare_raw else "NO"),
        ("  as share of bare raw / bare json",
         f"{100 * sustained / bare_raw:.0f} % / {100 * sustained / bare_json:.0f} %", ">= 60 %", ""),
        ("bare latency p50 / p99 at 1,000 msg/s (one hop)",
         f"{pct(bare_lat, 50) * 1e3:.2f} / {bare99 * 1e3:.2f} ms", "", ""),
        ("daemon latency p50, target -> prediction, 1,000 msg/s", f"{p50 * 1e3:.2f} ms", "<= 1 ms",
         "yes" if p50 <= 1e-3 else "NO"),
        ("daemon latency p99, same", f"{p99 * 1e3:.2f} ms",
         f"<= 2 x bare p99 = {2 * bare99 * 1e3:.2f} ms", "yes" if p99 <= 2 * bare99 else "NO"),
    ]
    print()
    print("| figure | measured | target | met |")
    print("| --- | --- | --- | --- |")
    for row in rows:
        print("| " + " | ".join(row) + " |")
    print(f"\ndaemon afterwards: {status['models']['m1']['samples']} samples learned, "
          f"{status['messages']} messages, queue_dropped {status['queue_dropped']}, exit code {code}; "
          f"latency over {len(lat)} predictions, bare over {len(bare_lat)} messages")
    return 0


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "_publish":
        role_publish(sys.argv[2], int(sys.argv[3]), float(sys.argv[4]), int(sys.argv[5]),
                     int(sys.argv[6]))
    elif len(sys.argv) > 1 and sys.argv[1] == "_subscribe":
        role_subscribe(sys.argv[2], int(sys.argv[3]), sys.argv[4], int(sys.argv[5]),
                       float(sys.argv[6]))
    else:
        sys.exit(main())
