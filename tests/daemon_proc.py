"""Run the real daemon as a subprocess and talk to it over a real broker.

Shared by the integration tests: write a config for a broker fixture, start
``python -m daemon.cli run``, publish readings with paho, collect what the
daemon publishes, and send it real signals.
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from typing import Any

import paho.mqtt.client as mqtt
import yaml

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


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


def write_config(tmp_path, broker, models: list[dict] | None = None, **top: Any) -> str:
    """Write a config file for ``broker``; returns its path."""
    cfg = {"node": "testnode", "broker": {"host": broker.host, "port": broker.port,
                                          "reconnect_min_s": 0.2, "reconnect_max_s": 1.0},
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

    def __init__(self, config: str, env: dict | None = None) -> None:
        self.config = config
        self.log_path = config + f".{time.time_ns()}.log"
        self._log = open(self.log_path, "w")
        full_env = {**os.environ, "PYTHONPATH": ROOT, **(env or {})}
        self.proc = subprocess.Popen([sys.executable, "-m", "daemon.cli", "run", "-c", config],
                                     stdout=self._log, stderr=subprocess.STDOUT, env=full_env,
                                     cwd=os.path.dirname(config))

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


class Probe:
    """A paho client that publishes readings and collects the daemon's messages."""

    def __init__(self, broker, subscribe: str = "edgeprop/#") -> None:
        self.messages: list[tuple[str, bytes]] = []
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

    def publish(self, topic: str, payload: str | bytes, qos: int = 1) -> None:
        self.client.publish(topic, payload, qos=qos).wait_for_publish(5)

    def predictions(self, topic: str = "edgeprop/testnode/m1") -> list[dict]:
        with self._lock:
            return [json.loads(p) for t, p in self.messages if t == topic]

    def payloads(self, topic: str) -> list[bytes]:
        with self._lock:
            return [p for t, p in self.messages if t == topic]

    def wait_for(self, pred, timeout: float = 15.0, what: str = "condition") -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if pred():
                return
            time.sleep(0.05)
        raise AssertionError(f"timed out waiting for {what}")

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
