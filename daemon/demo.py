"""``edgeprop demo``: a broker, a simulated pumping station and the real daemon, in one command.

The daemon runs as the same subprocess systemd would start (``run -c``), so
what the demo shows is what a deployment does. The broker is the pure-Python
amqtt in a subprocess of its own (its asyncio loop stays out of ours), bound to
loopback only. The station runs faster than real time, so every reading carries
its simulated time and the config aligns on it. The view listens to the
daemon's predictions and asks its control socket for learning rate and loss.
Ctrl-C or SIGTERM stops the station, then the daemon, then the broker, and
the report is still written from what arrived.

With ``--broker`` the demo's three clients (daemon, station, view) connect
anonymously over plain TCP: it is a first look on a test broker, and a broker
that wants a login is better tried with a config of one's own and ``run``.
"""
from __future__ import annotations

import argparse
import contextlib
import importlib.util
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from typing import Optional

import paho.mqtt.client as mqtt
import yaml

from .cli import CAUTION
from .cli_files import output_dir
from .control import request
from .errors import ConfigError, ControlError, EdgepropError
from .demo_view import View, _report, scenario_times
from .simulator import PumpStation, publish_loop

PREFIX = "site/p1"
MODEL = "bearing_temp"
DT_S = 60.0                 # one reading per signal per simulated minute
SEED = 1
PLAIN_EVERY_S, TTY_EVERY_S = 5.0, 0.5


def config_path() -> str:
    """The demo config shipped inside the package."""
    return os.path.join(os.path.dirname(os.path.abspath(__file__)), "demo_config.yaml")


def require(module: str, what: str) -> None:
    """Fail with the install command when an optional package of the demo is missing."""
    if importlib.util.find_spec(module) is None:
        raise EdgepropError(f"{what} needs the optional package {module!r}, which is not installed; "
                            f"install the demo extra: pip install 'edgeprop[demo]'")


def parse_broker(text: str) -> tuple[str, int]:
    """``HOST:PORT`` of --broker; a usage error names the option."""
    host, sep, port = text.rpartition(":")
    if not sep or not host or not port.isdigit() or not 1 <= int(port) <= 65535:
        raise ConfigError([f"--broker: {text!r} is not HOST:PORT with a port 1..65535, "
                           f"e.g. 127.0.0.1:1883"])
    return host.strip("[]"), int(port)


def reachable(host: str, port: int, timeout: float = 5.0) -> None:
    """Fail early, naming the broker, when nothing accepts connections there."""
    try:
        socket.create_connection((host, port), timeout=timeout).close()
    except OSError as exc:
        raise EdgepropError(f"--broker {host}:{port}: cannot connect ({exc.strerror or exc}); "
                            f"is the broker running and listening there?") from None


def free_port() -> int:
    """A loopback TCP port nobody listened on a moment ago."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _tail(path: str, n: int = 15) -> str:
    try:
        with open(path, errors="replace") as f:
            return "".join(f.readlines()[-n:])
    except OSError:
        return ""


class Child:
    """A subprocess in its own session (so Ctrl-C reaches only us and we stop it in order)."""

    def __init__(self, name: str, argv: list[str], log_path: str, cwd: str,
                 env: Optional[dict] = None) -> None:
        self.name, self.log_path = name, log_path
        with open(log_path, "wb") as log:
            self.proc = subprocess.Popen(argv, stdin=subprocess.DEVNULL, stdout=log,
                                         stderr=subprocess.STDOUT, cwd=cwd, env=env,
                                         start_new_session=True)

    def check_alive(self) -> None:
        """Raise with the tail of its log if it has exited."""
        if self.proc.poll() is not None:
            raise EdgepropError(f"the {self.name} exited with status {self.proc.returncode}; "
                                f"last lines of {self.log_path}:\n{_tail(self.log_path)}")

    def stop(self, timeout: float = 10.0) -> Optional[int]:
        """SIGTERM, then SIGKILL after ``timeout`` s; returns the exit status."""
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        return self.proc.returncode


def start_broker(out: str, timeout: float = 20.0) -> tuple[Child, int]:
    """amqtt on a free loopback port with a loopback-only config (its default binds 0.0.0.0)."""
    port = free_port()
    cfg = os.path.join(out, "broker.yaml")
    with open(cfg, "w", encoding="utf-8") as f:
        f.write("listeners:\n  default:\n    type: tcp\n"
                f"    bind: 127.0.0.1:{port}\n"
                "plugins:\n  amqtt.plugins.authentication.AnonymousAuthPlugin:\n"
                "    allow_anonymous: true\n")
    child = Child("embedded broker (amqtt)", [sys.executable, "-m", "amqtt.scripts.broker_script",
                                              "-c", cfg], os.path.join(out, "broker.log"), out)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        child.check_alive()
        try:
            socket.create_connection(("127.0.0.1", port), timeout=0.5).close()
            return child, port
        except OSError:
            time.sleep(0.05)
    child.stop()
    raise EdgepropError(f"the embedded broker did not listen on 127.0.0.1:{port} within {timeout:g} s; "
                        f"see {child.log_path}")


def write_demo_config(out: str, host: str, port: int, sock: str) -> str:
    """The packaged demo config pointed at this run's broker, state and control socket."""
    with open(config_path(), encoding="utf-8") as f:
        cfg = yaml.safe_load(f)
    cfg["broker"].update(host=host, port=port, reconnect_min_s=0.2, reconnect_max_s=2.0)
    cfg["state_dir"] = os.path.join(out, "state")
    cfg["metrics"] = {"listen": "127.0.0.1:0"}
    cfg["control"] = {"socket": sock}
    cfg["checkpoints"]["every_s"] = 30.0       # real seconds: a few checkpoints to look at
    path = os.path.join(out, "demo.yaml")
    with open(path, "w", encoding="utf-8") as f:
        f.write("# written by `edgeprop demo` for this run; see daemon/demo_config.yaml\n")
        yaml.safe_dump(cfg, f, sort_keys=False)
    return path


def start_daemon(config: str, out: str) -> Child:
    """``edgeprop run -c config``, as systemd runs it, with this package importable."""
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([root] + [p for p in [env.get("PYTHONPATH")] if p])
    return Child("daemon", [sys.executable, "-m", "daemon.cli", "run", "-c", config],
                 os.path.join(out, "daemon.log"), out, env)


def status(sock: str) -> Optional[dict]:
    """The daemon's status through its control socket, or None when it does not answer."""
    try:
        reply = request(sock, {"cmd": "status"}, timeout=2.0)
    except (ControlError, OSError):
        return None
    return reply.get("result") if reply.get("ok") else None


# Lines the daemon logs for a connection attempt that failed (daemon/mqtt_link.py), and the
# CONNACK refusals that no retry will cure (MQTT 3.1.1 codes 4 and 5, MQTT 5 0x86 and 0x87).
CONNECT_FAILED = ("event=broker_connect_failed", "event=broker_connection_lost")
LOGIN_REFUSED = ("Not authorized", "Bad user name or password")
ANONYMOUS_ONLY = ("the demo connects without a user name, password or TLS, so --broker must "
                  "accept anonymous clients on plain TCP; leave --broker out to use the embedded broker")


def last_connect_error(log_path: str) -> Optional[str]:
    """The daemon's last failed-connection line, which holds the broker's own reason."""
    for line in reversed(_tail(log_path, 200).splitlines()):
        if any(event in line for event in CONNECT_FAILED):
            return line.strip()
    return None


def wait_daemon_ready(daemon: Child, sock: str, stop: threading.Event, timeout: float = 30.0,
                      external: bool = True) -> None:
    """Until the daemon answers on its socket and is connected to the broker.

    A refused login fails at once, as retrying cannot fix it; any other failure is
    retried until ``timeout``. Either way the message carries the daemon's own
    last connection error, which otherwise sits unseen in its log.
    """
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and not stop.is_set():
        daemon.check_alive()
        st = status(sock)
        if st is not None and st.get("broker_connected"):
            time.sleep(0.3)            # its SUBSCRIBE goes out right after CONNACK
            return
        error = last_connect_error(daemon.log_path)
        if error is not None and any(reason in error for reason in LOGIN_REFUSED):
            raise EdgepropError(f"the broker refused the daemon's login: {error}\n{ANONYMOUS_ONLY}")
        time.sleep(0.1)
    if not stop.is_set():
        error = last_connect_error(daemon.log_path)
        said = (f"its last connection error: {error}" if error is not None
                else "it logged no connection error")
        raise EdgepropError(f"the daemon did not connect within {timeout:g} s; {said}\n"
                            f"(see {daemon.log_path}" + (f"; {ANONYMOUS_ONLY})" if external else ")"))


class Collector:
    """Subscribes to the daemon's prediction topic and keeps every message, in order."""

    def __init__(self, host: str, port: int, topic: str) -> None:
        self.messages: list[dict] = []
        self._lock = threading.Lock()
        self.client = _client("edgeprop-demo-view", host, port)
        self.client.on_connect = lambda c, *a: c.subscribe(topic, qos=0)
        self.client.on_message = self._on_message
        self.client.loop_start()

    def _on_message(self, client, userdata, msg) -> None:
        try:
            body = json.loads(msg.payload)
        except ValueError:
            return
        if isinstance(body, dict) and "predicted" in body:
            with self._lock:
                self.messages.append(body)

    def snapshot(self) -> list[dict]:
        with self._lock:
            return list(self.messages)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def _client(prefix: str, host: str, port: int) -> mqtt.Client:
    """A connected paho client (its loop not yet started); a refusal names the broker."""
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"{prefix}-{os.getpid()}")
    try:
        client.connect(host, port, keepalive=30)
    except OSError as exc:
        raise EdgepropError(f"cannot connect to the broker at {host}:{port} ({exc})") from None
    return client


class Station:
    """The simulated station publishing in a thread, paced at ``speed`` x real time."""

    def __init__(self, host: str, port: int, speed: float, span_s: float) -> None:
        season, fault = scenario_times(span_s)
        self.station = PumpStation(SEED, dt_s=DT_S, fault_at_s=fault, season_at_s=season)
        self.stop = threading.Event()
        self.client = _client("edgeprop-demo-station", host, port)
        # Nagle + delayed ACK hold back the first small messages ~40 ms each (FIELD-NOTES)
        self.client.socket().setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.client.loop_start()
        publish = lambda topic, payload: self.client.publish(topic, payload, qos=0)  # noqa: E731
        self.thread = threading.Thread(target=publish_loop, name="demo-station", daemon=True,
                                       args=(publish, self.station, PREFIX, speed, span_s,
                                             time.monotonic, time.sleep, self.stop))
        self.thread.start()

    def close(self) -> None:
        self.stop.set()
        self.thread.join(5)
        self.client.disconnect()
        self.client.loop_stop()


def _stop_daemon(daemon: Child) -> None:
    code = daemon.stop()
    if code not in (0, None):
        print(f"daemon exited with status {code}; see {daemon.log_path}", file=sys.stderr)


def run_demo(args: argparse.Namespace) -> int:
    """``edgeprop demo``: run, show, stop in order, write the report; print its paths."""
    external = parse_broker(args.broker) if args.broker else None
    if external is None:
        require("amqtt", "the embedded MQTT broker of the demo")
    require("matplotlib", "the demo's plot")
    output_dir("--out", args.out, "a directory for the plot and summary (created if missing)")
    out = os.path.abspath(args.out)
    try:
        os.makedirs(out, exist_ok=True)
    except OSError as exc:
        raise EdgepropError(f"--out {args.out}: cannot create the directory ({exc.strerror or exc})") from None
    if external is not None:
        reachable(*external)
    shutil.rmtree(os.path.join(out, "state"), ignore_errors=True)   # a re-run starts fresh
    print(CAUTION, flush=True)
    span_s = args.duration * args.speed
    view = View(sys.stdout.isatty(), lambda s: (sys.stdout.write(s), sys.stdout.flush()),
                args.duration, span_s)
    stop = threading.Event()
    collector: Optional[Collector] = None
    failure: Optional[EdgepropError] = None
    # Undone in reverse: station, view, daemon (SIGTERM: it checkpoints), broker, signals, temp dir;
    # each even if an earlier one failed, and a second Ctrl-C meanwhile only sets the flag again.
    with contextlib.ExitStack() as undo:
        sock_dir = tempfile.mkdtemp(prefix="edgeprop-demo-")     # short path: sun_path is 108 bytes
        undo.callback(shutil.rmtree, sock_dir, True)
        for sig in (signal.SIGINT, signal.SIGTERM):
            undo.callback(signal.signal, sig, signal.signal(sig, lambda *_: stop.set()))
        if external is None:
            broker, port = start_broker(out)
            undo.callback(broker.stop, 5)
            host = "127.0.0.1"
        else:
            host, port = external
        sock = os.path.join(sock_dir, "control.sock")
        config = write_demo_config(out, host, port, sock)
        print(f"broker {host}:{port} ({'embedded amqtt' if external is None else 'external'}); "
              f"daemon config {config}; log {os.path.join(out, 'daemon.log')}", flush=True)
        daemon = start_daemon(config, out)
        undo.callback(_stop_daemon, daemon)
        wait_daemon_ready(daemon, sock, stop, external=external is not None)
        if not stop.is_set():
            collector = Collector(host, port, f"edgeprop/demo-station/{MODEL}")
            undo.callback(collector.close)
            station = Station(host, port, args.speed, span_s)
            undo.callback(station.close)
            try:
                _watch(daemon, collector, station, sock, view, stop, args.duration)
            except EdgepropError as exc:      # the daemon died: still report what arrived
                failure = exc
    messages = collector.snapshot() if collector is not None else []
    code = _report(out, messages, view, span_s, args.speed, stop.is_set())
    if failure is not None:
        raise failure
    return code


def _watch(daemon: Child, collector: Collector, station: Station, sock: str, view: View,
           stop: threading.Event, duration: float) -> None:
    started = time.monotonic()
    every = TTY_EVERY_S if view.tty else PLAIN_EVERY_S
    next_show = started
    while not stop.is_set():
        now = time.monotonic()
        daemon.check_alive()
        msgs, st = collector.snapshot(), status(sock)
        view.note_status(st, msgs)
        if now >= next_show:
            view.show(now - started, st, msgs)
            next_show = now + every
        if not station.thread.is_alive() or now - started >= duration:
            _settle(collector)
            view.show(time.monotonic() - started, status(sock), collector.snapshot())
            return
        stop.wait(0.25)
    view.show(time.monotonic() - started, status(sock), collector.snapshot())
    print("stopping on request; writing what arrived", flush=True)


def _settle(collector: Collector, quiet_s: float = 1.0, limit_s: float = 8.0) -> None:
    """Let the daemon finish its backlog: until no prediction arrived for ``quiet_s``."""
    deadline = time.monotonic() + limit_s
    count, since = len(collector.snapshot()), time.monotonic()
    while time.monotonic() < deadline and time.monotonic() - since < quiet_s:
        time.sleep(0.1)
        n = len(collector.snapshot())
        if n != count:
            count, since = n, time.monotonic()
