"""Run the real daemon as a subprocess and talk to it over a real broker.

Shared by the integration tests: write a config for a broker fixture, start
``python -m daemon.cli run``, publish readings with paho, collect what the
daemon publishes, and send it real signals.
"""
from __future__ import annotations

import contextlib
import json
import os
import re
import signal
import subprocess
import sys
import threading
import time
from typing import Any

import paho.mqtt.client as mqtt
import yaml

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SYSTEMD_VARS = ("NOTIFY_SOCKET", "WATCHDOG_USEC", "WATCHDOG_PID")


def model_config(name: str = "m1", hidden=(16,), lr: float = 0.02, warmup: int = 50,
                 **extra: Any) -> dict:
    """A model reading site/p1/{speed,current} and predicting site/p1/bearing_temp.

    Times are arrival times (no ``time_field``), so the tests can publish in a burst.
    """
    m = {"name": name, "target": {"topic": "site/p1/bearing_temp", "field": "value"},
         "inputs": [{"name": "speed", "topic": "site/p1/speed", "field": "value"},
                    {"name": "current", "topic": "site/p1/current"}],
         "align": {"max_age_s": 30},
         "net": {"hidden": list(hidden), "activation": "tanh", "seed": 3},
         "training": {"learning_rate": lr, "warmup_samples": warmup, "batch_size": 16}}
    for key, value in extra.items():
        m.setdefault(key, {}).update(value) if isinstance(value, dict) else m.__setitem__(key, value)
    return m


def write_config(tmp_path, broker, models: list[dict] | None = None, *,
                 broker_options: dict | None = None, **top: Any) -> str:
    """Write a config file for ``broker``; returns its path.

    ``broker_options`` go into the config's ``broker`` section (the name ``broker`` is taken).
    """
    cfg = {"node": "testnode", "broker": {"host": broker.host, "port": broker.port,
                                          "reconnect_min_s": 0.2, "reconnect_max_s": 1.0,
                                          **(broker_options or {})},
           "state_dir": str(tmp_path / "state"), "metrics": {"listen": None},
           "control": {"socket": str(tmp_path / "ctl.sock")},
           "checkpoints": {"every_s": 3600, "keep": 5},
           "models": models or [model_config()]}
    for key, value in top.items():
        if isinstance(value, dict) and isinstance(cfg.get(key), dict):
            cfg[key].update(value)
        else:
            cfg[key] = value
    path = tmp_path / "edgeprop.yaml"
    path.write_text(yaml.safe_dump(cfg, sort_keys=False))
    return str(path)


class Daemon:
    """``edgeprop run`` in a subprocess, stderr captured to a file."""

    def __init__(self, config: str, env: dict | None = None, separate_stdout: bool = False) -> None:
        self.config = config
        self.log_path = config + f".{time.time_ns()}.log"
        self._log = open(self.log_path, "w")
        # separate_stdout: stderr alone goes to log_path, stdout to stdout_path (must stay empty)
        self.stdout_path = self.log_path + ".stdout" if separate_stdout else None
        self._out = open(self.stdout_path, "w") if separate_stdout else None
        # systemd's variables reach the daemon only when a test sets them: a suite run
        # from inside a unit must not have test daemons talking to the real manager.
        inherited = {k: v for k, v in os.environ.items() if k not in SYSTEMD_VARS}
        full_env = {**inherited, "PYTHONPATH": ROOT, **(env or {})}
        self.proc = subprocess.Popen([sys.executable, "-m", "daemon.cli", "run", "-c", config],
                                     stdout=self._out or self._log,
                                     stderr=self._log if separate_stdout else subprocess.STDOUT,
                                     env=full_env, cwd=os.path.dirname(config))

    def log(self) -> str:
        with open(self.log_path) as f:
            return f.read()

    def wait_log(self, needle: str, timeout: float = 15.0) -> str:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            text = self.log()
            if needle in text:
                return text
            if self.proc.poll() is not None:
                raise AssertionError(f"daemon exited {self.proc.returncode} before {needle!r}:\n{text}")
            time.sleep(0.05)
        raise AssertionError(f"{needle!r} not logged within {timeout} s:\n{self.log()}")

    def wait_ready(self, timeout: float = 15.0) -> str:
        """Wait for the daemon's "ready" line (broker connected, checkpoints restored)."""
        return self.wait_log("event=ready", timeout)

    def signal(self, sig: int) -> None:
        self.proc.send_signal(sig)

    def stop(self, timeout: float = 10.0) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(timeout)
        finally:
            self.kill()

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(5)
        self._log.close()
        if self._out is not None:
            self._out.close()

    def stdout(self) -> str:
        """What the daemon wrote to stdout (only with ``separate_stdout=True``)."""
        with open(self.stdout_path) as f:
            return f.read()

    def metrics_url(self, timeout: float = 15.0) -> str:
        """The scrape URL the ``started`` line reports (``metrics.listen`` may use port 0)."""
        text = self.wait_log("event=started", timeout)
        found = re.search(r"event=started .*metrics=(http\S+)", text)
        if not found:
            raise AssertionError(f"no metrics URL in the started line:\n{text}")
        return found.group(1)

    def status(self, timeout: float = 5.0) -> dict:
        """The running daemon's ``status`` reply through its control socket."""
        return control_status(self.config, timeout)


class Probe:
    """A paho client that publishes readings and collects the daemon's messages."""

    def __init__(self, broker, subscribe: str = "edgeprop/#") -> None:
        self.messages: list[tuple[str, bytes]] = []
        self.arrivals: list[float] = []      # time.monotonic() of each entry of ``messages``
        self._lock = threading.Lock()
        self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"probe-{time.time_ns()}")
        self.client.on_message = self._on_message
        self._subscribed = threading.Event()
        self.client.on_subscribe = lambda *a: self._subscribed.set()
        self.client.connect(broker.host, broker.port, keepalive=30)
        self.client.subscribe(subscribe, qos=1)
        self.client.loop_start()
        assert self._subscribed.wait(5), "probe could not subscribe"

    def _on_message(self, client, userdata, msg) -> None:
        with self._lock:
            self.messages.append((msg.topic, msg.payload))
            self.arrivals.append(time.monotonic())

    def publish(self, topic: str, payload: str | bytes, qos: int = 1) -> None:
        self.client.publish(topic, payload, qos=qos).wait_for_publish(5)

    def publish_many(self, items, qos: int = 0, timeout: float = 30.0) -> int:
        """Publish (topic, payload, ...) tuples in order without a round trip each; wait for the last.

        One connection keeps the order of its messages (MQTT 3.1.1 section 4.6), so inputs
        published before a target reach the daemon before it.
        """
        info, n = None, 0
        for item in items:
            info = self.client.publish(item[0], item[1], qos=qos)
            n += 1
        if info is not None:
            info.wait_for_publish(timeout)
        return n

    def received_since(self, topic: str, since: float) -> int:
        """How many messages on ``topic`` arrived at or after monotonic time ``since``."""
        with self._lock:
            return sum(1 for (t, _p), at in zip(self.messages, self.arrivals)
                       if t == topic and at >= since)

    def predictions(self, topic: str = "edgeprop/testnode/m1") -> list[dict]:
        with self._lock:
            return [json.loads(p) for t, p in self.messages if t == topic]

    def payloads(self, topic: str) -> list[bytes]:
        with self._lock:
            return [p for t, p in self.messages if t == topic]

    def wait_for(self, pred, timeout: float = 15.0, what: str = "condition") -> None:
        wait_until(pred, timeout, what)

    def close(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


def bearing_stream(n: int, t0: float = 1_765_000_000.0, seed: int = 0, noise: float = 0.2):
    """Readings of a known nonlinear relation (invented for tests): temp = f(speed, current).

    Speed (JSON with a sensor time) and current (bare number) both precede the
    target reading at the same sensor time. Yields (topic, payload, truth) tuples.
    """
    import numpy as np
    rng = np.random.default_rng(seed)
    for i in range(n):
        t = t0 + i
        speed = 1000 + 400 * np.sin(i / 40) + 50 * rng.normal()
        current = 10 + 0.02 * (speed - 1000) + 2 * np.cos(i / 23)
        temp = 40 + 15 * np.tanh((speed - 1000) / 300) + 0.05 * current ** 2
        yield ("site/p1/speed", json.dumps({"value": float(speed), "ts": t}), None)
        yield ("site/p1/current", repr(float(current)), None)
        yield ("site/p1/bearing_temp", json.dumps({"value": float(temp + noise * rng.normal()), "ts": t}),
               float(temp))


def control_status(config: str, timeout: float = 5.0) -> dict:
    """``status`` from the daemon's control socket (the socket path is read from ``config``)."""
    from daemon.config import load_config
    from daemon.control import request
    reply = request(load_config(config).control_socket, {"cmd": "status"}, timeout)
    if not reply.get("ok"):
        raise AssertionError(f"status request refused: {reply}")
    return reply["result"]


def scrape(url: str, timeout: float = 5.0) -> dict[tuple, float]:
    """Samples of a metrics endpoint as {(name, ((label, value), ...)): value}."""
    import urllib.request

    from prometheus_client.parser import text_string_to_metric_families
    with urllib.request.urlopen(url, timeout=timeout) as resp:
        text = resp.read().decode()
    out = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            out[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return out


def retained(broker, topic: str, timeout: float = 5.0) -> bytes | None:
    """The retained message a new subscriber gets on ``topic``; None if there is none."""
    got: list[bytes] = []
    done = threading.Event()
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"retained-{time.time_ns()}")

    def on_message(c, userdata, msg):
        if msg.retain:
            got.append(msg.payload)
            done.set()

    def on_subscribe(c, userdata, mid, codes, props):
        # Retained messages are sent before the SUBACK is processed by most brokers, but
        # give a slow broker a moment; the wait below ends as soon as one arrives.
        subscribed.set()

    subscribed = threading.Event()
    client.on_message = on_message
    client.on_subscribe = on_subscribe
    client.connect(broker.host, broker.port, keepalive=30)
    client.subscribe(topic, qos=1)
    client.loop_start()
    try:
        if subscribed.wait(timeout):
            done.wait(0.5)
    finally:
        client.loop_stop()
        client.disconnect()
    return got[-1] if got else None


def wait_until(pred, timeout: float = 15.0, what: str = "condition", every: float = 0.05):
    """Poll ``pred`` until it returns a truthy value (returned) or fail after ``timeout`` s."""
    deadline = time.monotonic() + timeout
    last_exc = None
    while time.monotonic() < deadline:
        try:
            value = pred()
        except Exception as exc:  # noqa: BLE001 - e.g. the daemon not answering yet
            last_exc, value = exc, None
        if value:
            return value
        time.sleep(every)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}"
                         + (f" (last error: {last_exc!r})" if last_exc else ""))


# -- helpers for the operations tests (checkpoints, control, reload, notify) ------------------

def cli(config: str, *args: str, timeout: float = 30.0) -> subprocess.CompletedProcess:
    """Run ``edgeprop ARGS -c CONFIG`` in a subprocess, as an operator would; text output."""
    env = {k: v for k, v in os.environ.items() if k not in SYSTEMD_VARS}
    env["PYTHONPATH"] = ROOT
    return subprocess.run([sys.executable, "-m", "daemon.cli", *args, "-c", config],
                          capture_output=True, text=True, timeout=timeout, env=env,
                          cwd=os.path.dirname(config))


def control(socket_path: str, payload: dict) -> Any:
    """One request on the daemon's control socket; the result, or AssertionError with the error."""
    from daemon.control import request
    reply = request(socket_path, payload)
    assert reply.get("ok"), f"control request {payload} refused: {reply.get('error')}"
    return reply["result"]


def checkpoint_ids(state_dir: str, model: str = "m1") -> list[str]:
    """Checkpoint ids on disk for ``model``, oldest first (read-only: no store is opened)."""
    from daemon.checkpoints import ID_RE, _id_key
    directory = os.path.join(state_dir, model)
    if not os.path.isdir(directory):
        return []
    ids = [n[:-4] for n in os.listdir(directory) if n.endswith(".npz") and ID_RE.match(n[:-4])]
    return sorted(ids, key=_id_key)


def offline_runtime(config: str, cid: str, model: str = "m1"):
    """A ``ModelRuntime`` for ``model`` loaded from checkpoint ``cid`` without a running daemon.

    Reads the file with ``nets.store.read_state`` directly, so it never tidies or writes the
    state directory a running daemon may be using.
    """
    from daemon.config import load_config
    from daemon.runtime import ModelRuntime
    from nets.store import read_state
    settings = load_config(config)
    m = next(x for x in settings.models if x.name == model)
    arrays, header = read_state(os.path.join(settings.state_dir, model, cid + ".npz"))
    rt = ModelRuntime(m, settings.publish_topic(m), None)
    rt.learner.check_header(header)
    rt.load_arrays(arrays)
    rt.checkpoint_id = cid
    return rt, header


class PacedPublisher:
    """Publishes ``bearing_stream`` readings at ``rate`` targets/s from a thread (QoS 0).

    Keeps going across daemon restarts, like a plant that does not wait for its gateway.
    Never faster than ``rate``: after a stall it resumes the pace instead of catching up,
    so any span of L seconds carries at most about ``rate * L`` targets.
    """

    def __init__(self, probe: Probe, rate: float, seed: int = 0) -> None:
        self.probe, self.rate, self.seed = probe, rate, seed
        self.targets = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="paced-publisher", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        start = time.monotonic()
        for i, (topic, payload, truth) in enumerate(bearing_stream(10_000_000, seed=self.seed)):
            if self._stop.is_set():
                return
            self.probe.client.publish(topic, payload, qos=0)
            if truth is not None:
                self.targets += 1
                delay = start + self.targets / self.rate - time.monotonic()
                if delay > 0:
                    time.sleep(delay)
                else:
                    start -= delay       # fell behind: never catch up in a burst above the rate

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(5)


class NotifyListener:
    """A datagram socket where systemd's notify socket would be; records every line received."""

    def __init__(self) -> None:
        import socket
        import tempfile
        self.dir = tempfile.mkdtemp(prefix="sdn-")        # short: sun_path holds 107 bytes
        self.path = os.path.join(self.dir, "notify")
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(self.path)
        self.sock.settimeout(0.1)
        self.datagrams: list[tuple[float, str]] = []

    def env(self, watchdog_usec: int | None = None) -> dict:
        env = {"NOTIFY_SOCKET": self.path}
        if watchdog_usec is not None:
            env["WATCHDOG_USEC"] = str(watchdog_usec)
        return env

    def collect(self, until, timeout: float = 15.0, what: str = "notification") -> None:
        """Receive datagrams until ``until(self)`` is true."""
        deadline = time.monotonic() + timeout
        while not until(self):
            if time.monotonic() > deadline:
                raise AssertionError(f"timed out waiting for {what}; got {self.datagrams}")
            try:
                data = self.sock.recv(4096)
            except OSError:
                continue
            self.datagrams.append((time.monotonic(), data.decode()))

    def lines(self) -> list[str]:
        """Every assignment received, in order (a datagram may carry several lines)."""
        return [line for _t, text in self.datagrams for line in text.split("\n") if line]

    def close(self) -> None:
        import shutil
        self.sock.close()
        shutil.rmtree(self.dir, ignore_errors=True)


# -- helpers for the fault and security tests ---------------------------------------------------

def rss_mib(pid: int) -> float:
    """Resident memory of process ``pid`` (VmRSS from /proc), MiB."""
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    raise AssertionError(f"no VmRSS for pid {pid}")


def child_pids(pid: int) -> list[int]:
    """The direct children of ``pid`` (for the daemon: its broker link process)."""
    kids: list[int] = []
    for task in os.listdir(f"/proc/{pid}/task"):
        try:
            with open(f"/proc/{pid}/task/{task}/children") as f:
                kids += [int(k) for k in f.read().split()]
        except FileNotFoundError:       # a thread that ended meanwhile (e.g. an HTTP handler)
            pass
    return kids


def daemon_pss_mib(daemon: "Daemon") -> float:
    """Proportional set size of the daemon and its link process together, MiB (proc(5)).

    Pages the two share (the interpreter, libraries) are split between them instead of
    counted twice, as the kernel's memory cgroup (systemd's MemoryMax) charges them once.
    """
    total = 0.0
    pid = daemon.proc.pid
    for p in (pid, *child_pids(pid)):
        with open(f"/proc/{p}/smaps_rollup") as f:
            total += next(int(line.split()[1]) for line in f if line.startswith("Pss:")) / 1024.0
    return total


def daemon_rss_mib(daemon: "Daemon") -> float:
    """Resident memory of the daemon and its link process together, MiB.

    The inbound queue lives in the link process, so a bound on the worker alone would prove
    nothing. Summed VmRSS counts shared library pages twice: an upper bound.
    """
    pid = daemon.proc.pid
    return rss_mib(pid) + sum(rss_mib(k) for k in child_pids(pid))


class ReconnectingProbe(Probe):
    """A Probe that survives broker restarts (re-subscribes on every connect), with TLS/login.

    ``tls`` is (ca_file, cert_file or None, key_file or None).
    """

    def __init__(self, broker, subscribe: str = "edgeprop/#", tls: tuple | None = None,
                 username: str | None = None, password: str | None = None) -> None:
        import ssl
        self.messages, self.arrivals = [], []
        self._lock = threading.Lock()
        self._topic = subscribe
        self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"probe-{time.time_ns()}")
        self.client.on_message = self._on_message
        self._subscribed = threading.Event()
        self.client.on_connect = lambda c, u, f, rc, p: c.subscribe(self._topic, qos=1)
        self.client.on_subscribe = lambda *a: self._subscribed.set()
        self.client.reconnect_delay_set(0.05, 0.3)
        if username is not None:
            self.client.username_pw_set(username, password)
        if tls is not None:
            ctx = ssl.create_default_context(cafile=tls[0])
            if tls[1]:
                ctx.load_cert_chain(tls[1], tls[2])
            self.client.tls_set_context(ctx)
        self.client.connect(broker.host, broker.port, keepalive=30)
        self.client.loop_start()
        assert self._subscribed.wait(5), "probe could not subscribe"


class PipedDaemon(Daemon):
    """``edgeprop run`` whose output goes through a pipe the test copies to ``log_path``.

    For faults that also hit files the daemon writes (a file-size limit): a pipe is not
    a file, so the daemon's log lines still arrive while its writes to disk fail.
    """

    def __init__(self, config: str, env: dict | None = None) -> None:
        self.config = config
        self.log_path = config + f".{time.time_ns()}.log"
        self._log = open(self.log_path, "w")
        self._out = None
        inherited = {k: v for k, v in os.environ.items() if k not in SYSTEMD_VARS}
        self.proc = subprocess.Popen([sys.executable, "-m", "daemon.cli", "run", "-c", config],
                                     stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                                     env={**inherited, "PYTHONPATH": ROOT, **(env or {})},
                                     cwd=os.path.dirname(config))
        self._copier = threading.Thread(target=self._copy, name="daemon-log-copy", daemon=True)
        self._copier.start()

    def _copy(self) -> None:
        for line in iter(self.proc.stdout.readline, b""):
            self._log.write(line.decode("utf-8", "replace"))
            self._log.flush()

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(5)
        self._copier.join(5)
        self.proc.stdout.close()
        self._log.close()


# A raw MQTT 3.1.1 QoS 0 publisher (sections 3.1 CONNECT, 3.3 PUBLISH). paho queues QoS 0
# publishes without bound when the broker pushes back (FIELD-NOTES: 254 MiB); a blocking
# socket cannot run ahead of the broker, and one Python process sends >100k msg/s this way.

def _mqtt_varint(n: int) -> bytes:
    out = bytearray()
    while True:
        n, digit = divmod(n, 128)
        out.append(digit | (0x80 if n else 0))
        if not n:
            return bytes(out)


def _mqtt_str(b: bytes) -> bytes:
    return len(b).to_bytes(2, "big") + b


def mqtt_publish_packet(topic: str, payload: bytes) -> bytes:
    """One QoS 0 PUBLISH packet."""
    body = _mqtt_str(topic.encode()) + payload
    return b"\x30" + _mqtt_varint(len(body)) + body


def raw_flood(host: str, port: int, packets: list[bytes], rate: float, seconds: float,
              count: int | None = None) -> dict:
    """Send ``packets`` round-robin at ``rate``/s for ``seconds`` (or until ``count`` sent)."""
    import socket
    body = _mqtt_str(b"MQTT") + bytes([4, 0x02]) + (0).to_bytes(2, "big") \
        + _mqtt_str(f"flood-{os.getpid()}".encode())       # clean session, no keepalive
    with socket.create_connection((host, port), timeout=10) as sock:
        sock.sendall(b"\x10" + _mqtt_varint(len(body)) + body)
        ack = sock.recv(4)
        if ack[:1] != b"\x20" or len(ack) < 4 or ack[3] != 0:
            raise RuntimeError(f"broker refused the flood connection: {ack!r}")
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        limit = count if count is not None else int(rate * seconds)
        sent, start = 0, time.monotonic()
        while sent < limit:
            elapsed = time.monotonic() - start
            if elapsed >= seconds:
                break
            due = min(limit, int(rate * elapsed) + 1) - sent
            if due <= 0:
                time.sleep(0.002)
                continue
            due = min(due, 2000)
            sock.sendall(b"".join(packets[(sent + i) % len(packets)] for i in range(due)))
            sent += due
        sock.sendall(b"\xe0\x00")                            # DISCONNECT
        return {"sent": sent, "seconds": time.monotonic() - start}


def flood_process(broker, items: list[tuple[str, bytes | str]], rate: float, seconds: float,
                  workdir: str, count: int | None = None) -> subprocess.Popen:
    """Run ``raw_flood`` in a child process; its stdout is one JSON line with sent/seconds."""
    path = os.path.join(workdir, f"flood-{time.time_ns()}.json")
    with open(path, "w") as f:
        json.dump([[t, p if isinstance(p, str) else p.decode("latin-1"), isinstance(p, bytes)]
                   for t, p in items], f)
    code = ("import json, sys; from daemon_proc import mqtt_publish_packet, raw_flood\n"
            "items = json.load(open(sys.argv[1]))\n"
            "pk = [mqtt_publish_packet(t, p.encode('latin-1') if raw else p.encode()) for t, p, raw in items]\n"
            "r = sys.argv[2:]\n"
            "out = raw_flood(r[0], int(r[1]), pk, float(r[2]), float(r[3]), int(r[4]) if r[4] != '-' else None)\n"
            "print(json.dumps(out), flush=True)\n")
    here = os.path.dirname(os.path.abspath(__file__))
    return subprocess.Popen([sys.executable, "-c", code, path, broker.host, str(broker.port),
                             str(rate), str(seconds), "-" if count is None else str(count)],
                            stdout=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONPATH": os.pathsep.join([here, ROOT])})


def flood_result(proc: subprocess.Popen, timeout: float) -> dict:
    """Wait for a ``flood_process`` and return its figures."""
    try:
        out, _ = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.communicate()
        raise AssertionError(f"flood publisher still running after {timeout} s")
    assert proc.returncode == 0, f"flood publisher failed ({proc.returncode}): {out}"
    return json.loads(out.strip().splitlines()[-1])


@contextlib.contextmanager
def edited_broker(edit, **options):
    """A mosquitto ``BrokerProcess(**options)`` whose config text goes through ``edit`` first.

    Skips where mosquitto is missing, fails under CI=true (as the ``broker`` fixture does).
    """
    from broker_fixture import BrokerProcess, BrokerUnavailable, unavailable
    proc = None
    try:
        proc = BrokerProcess(kind="mosquitto", **options)
        with open(proc.config_path) as f:
            text = edit(f.read())
        with open(proc.config_path, "w") as f:
            f.write(text)
        proc.start()
    except BrokerUnavailable as exc:
        unavailable(exc, proc)
    try:
        yield proc
    finally:
        proc.close()


def live_broker_log(text: str) -> str:
    """An ``edited_broker`` edit: log every event type to stderr, unbuffered, as it happens.

    (mosquitto 2.0.11 takes one type per ``log_type`` line, and block-buffers a stdout
    that is a file, so the fixture's own log shows nothing while the broker runs.)
    """
    lines = [l for l in text.splitlines() if not l.startswith(("log_dest", "log_type"))]
    return "\n".join(lines + ["log_dest stderr", "log_type all"]) + "\n"


def set_config_keys(path: str, section: str, **keys: object) -> str:
    """Set (or, with value ``DELETE``, remove) keys of one section of a config file."""
    with open(path) as f:
        cfg = yaml.safe_load(f)
    part = cfg.setdefault(section, {})
    for key, value in keys.items():
        if value is DELETE:
            part.pop(key, None)
        else:
            part[key] = value
    with open(path, "w") as f:
        yaml.safe_dump(cfg, f, sort_keys=False)
    return path


DELETE = object()
