"""A real MQTT broker process for integration tests: mosquitto, or amqtt where it is absent.

Each broker gets a free loopback port and a temporary directory of its own (config, log,
password file, certificates), so tests never touch a system broker or each other.
Set EDGEPROP_TEST_BROKER=amqtt (or mosquitto) to force one; under CI=true mosquitto is
required, because amqtt speaks MQTT 3.1.1 only and is 4-5x slower (FIELD-NOTES).
"""
from __future__ import annotations

import contextlib
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from typing import Iterator

import pytest

HOST = "127.0.0.1"


class BrokerUnavailable(RuntimeError):
    """The requested broker (or broker feature) cannot be run on this machine."""


@dataclass(frozen=True)
class TlsFiles:
    """PEM files of a throwaway PKI: one CA, a server cert for 127.0.0.1, a client cert."""

    ca_file: str
    server_cert: str
    server_key: str
    client_cert: str
    client_key: str


def _mosquitto_path() -> str | None:
    return shutil.which("mosquitto") or shutil.which("mosquitto", path="/usr/sbin:/usr/local/sbin")


def broker_kind() -> str:
    """Which broker this machine runs for tests: 'mosquitto' or 'amqtt'."""
    forced = os.environ.get("EDGEPROP_TEST_BROKER")
    if forced in ("mosquitto", "amqtt"):
        return forced
    if _mosquitto_path():
        return "mosquitto"
    if os.environ.get("CI", "").lower() == "true":
        raise BrokerUnavailable(
            "CI=true but `mosquitto` is not on PATH: install the Debian package `mosquitto` "
            "(the amqtt fallback is for developer machines only)")
    return "amqtt"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nobody listened on a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((HOST, 0))
        return sock.getsockname()[1]


def make_test_pki(directory: str, server_san: str = "IP:127.0.0.1,DNS:localhost") -> TlsFiles:
    """Create a CA, a server certificate (for ``server_san``) and a client certificate with openssl."""
    def run(*args: str) -> None:
        subprocess.run(["openssl", *args], cwd=directory, check=True, capture_output=True, timeout=30)

    def key(name: str) -> None:
        run("ecparam", "-name", "prime256v1", "-genkey", "-noout", "-out", name)

    key("ca.key")
    run("req", "-x509", "-new", "-key", "ca.key", "-days", "2", "-subj", "/CN=edgeprop test CA",
        "-out", "ca.pem")
    for name, ext in (("server", f"subjectAltName={server_san}"), ("client", "")):
        key(f"{name}.key")
        run("req", "-new", "-key", f"{name}.key", "-subj", f"/CN=edgeprop test {name}",
            "-out", f"{name}.csr")
        with open(os.path.join(directory, f"{name}.ext"), "w") as fh:
            fh.write(ext + "\n" if ext else "basicConstraints=CA:FALSE\n")
        run("x509", "-req", "-in", f"{name}.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
            "-CAcreateserial", "-days", "2", "-extfile", f"{name}.ext", "-out", f"{name}.pem")
    path = lambda n: os.path.join(directory, n)  # noqa: E731
    return TlsFiles(path("ca.pem"), path("server.pem"), path("server.key"),
                    path("client.pem"), path("client.key"))


class BrokerProcess:
    """One broker subprocess on a fixed free loopback port; restartable on that same port."""

    def __init__(self, kind: str | None = None, users: dict[str, str] | None = None,
                 tls: TlsFiles | None = None, require_certificate: bool = False) -> None:
        self.kind = kind or broker_kind()
        if self.kind == "mosquitto" and not _mosquitto_path():
            raise BrokerUnavailable("mosquitto is not installed")
        if self.kind == "amqtt" and (users or tls):
            raise BrokerUnavailable("the amqtt test broker here runs without passwords or TLS")
        self.host = HOST
        self.port = free_port()
        self.users = dict(users or {})
        self.tls = tls
        self.require_certificate = require_certificate
        # Our own 0755 directory (not pytest's 0700 tmp_path): mosquitto started as root drops
        # to the `mosquitto` user and must still read its config, password file and certs.
        self.dir = tempfile.mkdtemp(prefix="edgeprop-broker-")
        os.chmod(self.dir, 0o755)
        self.log_path = os.path.join(self.dir, "broker.log")
        self._proc: subprocess.Popen | None = None
        self._log_file = None
        self.config_path = self._write_config()

    def __repr__(self) -> str:
        return f"BrokerProcess({self.kind} on {self.host}:{self.port}, running={self.running})"

    def __enter__(self) -> "BrokerProcess":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def pid(self) -> int | None:
        return self._proc.pid if self._proc else None

    @property
    def running(self) -> bool:
        return self._proc is not None and self._proc.poll() is None

    def _file(self, name: str, text: str | None = None, source: str | None = None) -> str:
        path = os.path.join(self.dir, name)
        if source is not None:
            shutil.copyfile(source, path)
        else:
            with open(path, "w") as fh:
                fh.write(text or "")
        os.chmod(path, 0o644)      # test-only secrets; the broker's user must read them
        return path

    def _write_config(self) -> str:
        if self.kind == "amqtt":
            # amqtt's packaged default binds 0.0.0.0 and loads extra plugins (FIELD-NOTES)
            return self._file("amqtt.yaml", (
                "listeners:\n  default:\n    type: tcp\n"
                f"    bind: {self.host}:{self.port}\n"
                "plugins:\n  amqtt.plugins.authentication.AnonymousAuthPlugin:\n"
                "    allow_anonymous: true\n"))
        lines = [
            f"listener {self.port} {self.host}",
            # the default of 1000 silently drops messages to a subscriber that falls behind
            # (FIELD-NOTES); 0 = unbounded, so a test never loses data without saying so
            "max_queued_messages 0",
            "persistence false",
            "log_dest stdout",
            "log_type error warning notice information",
        ]
        if self.users:
            pw = self._file("passwd")
            for user, password in self.users.items():
                subprocess.run(["mosquitto_passwd", "-b", pw, user, password], check=True,
                               capture_output=True, timeout=30)
            os.chmod(pw, 0o644)
            lines += ["allow_anonymous false", f"password_file {pw}"]
        else:
            lines.append("allow_anonymous true")
        if self.tls:
            lines += [f"cafile {self._file('ca.pem', source=self.tls.ca_file)}",
                      f"certfile {self._file('server.pem', source=self.tls.server_cert)}",
                      f"keyfile {self._file('server.key', source=self.tls.server_key)}",
                      "tls_version tlsv1.2",
                      f"require_certificate {'true' if self.require_certificate else 'false'}"]
        return self._file("mosquitto.conf", "\n".join(lines) + "\n")

    def reconfigure(self, users: dict[str, str] | None = None, tls: TlsFiles | None = None) -> None:
        """New passwords and/or TLS files (a rotation); they take effect at the next ``restart``."""
        if users is not None:
            self.users = dict(users)
        if tls is not None:
            self.tls = tls
        self.config_path = self._write_config()

    def _command(self) -> list[str]:
        if self.kind == "amqtt":
            return [sys.executable, "-m", "amqtt.scripts.broker_script", "-c", self.config_path]
        return [_mosquitto_path() or "mosquitto", "-c", self.config_path]

    def start(self, timeout: float = 10.0) -> "BrokerProcess":
        """Start the broker and wait (at most ``timeout`` s) until it accepts TCP connections."""
        if self.running:
            return self
        self._log_file = open(self.log_path, "ab")
        self._proc = subprocess.Popen(self._command(), stdin=subprocess.DEVNULL, stdout=self._log_file,
                                      stderr=subprocess.STDOUT, start_new_session=True)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self._proc.poll() is not None:
                raise BrokerUnavailable(f"{self.kind} exited with {self._proc.returncode}:\n{self.log_text()}")
            try:
                with socket.create_connection((self.host, self.port), timeout=0.5):
                    return self
            except OSError:
                time.sleep(0.02)
        self.kill()
        raise BrokerUnavailable(f"{self.kind} did not listen on {self.port} within {timeout} s:\n{self.log_text()}")

    def stop(self, timeout: float = 5.0) -> None:
        """SIGTERM, then SIGKILL if the broker is still there after ``timeout`` s."""
        if self._proc is None:
            return
        if self._proc.poll() is None:
            self._proc.send_signal(signal.SIGCONT)      # in case a test left it paused
            self._proc.send_signal(signal.SIGTERM)
            try:
                self._proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self._proc.kill()
                self._proc.wait(5)
        self._reap()

    def kill(self) -> None:
        """SIGKILL at once, as a crash or power cut would (no goodbye to clients)."""
        if self._proc is None:
            return
        if self._proc.poll() is None:
            self._proc.kill()
            self._proc.wait(5)
        self._reap()

    def pause(self) -> None:
        """SIGSTOP: connections stay open but nothing is answered (a hung broker)."""
        if self.running:
            self._proc.send_signal(signal.SIGSTOP)

    def resume(self) -> None:
        """SIGCONT after ``pause()``."""
        if self.running:
            self._proc.send_signal(signal.SIGCONT)

    def restart(self, timeout: float = 10.0) -> "BrokerProcess":
        """Stop (if running) and start again on the same port."""
        self.stop()
        return self.start(timeout)

    def close(self) -> None:
        """Stop the broker and remove its temporary directory."""
        self.stop()
        shutil.rmtree(self.dir, ignore_errors=True)

    def log_text(self) -> str:
        """The broker's own log so far (for failure messages)."""
        try:
            with open(self.log_path, errors="replace") as fh:
                return fh.read()[-4000:]
        except OSError:
            return ""

    def _reap(self) -> None:
        self._proc = None
        if self._log_file is not None:
            self._log_file.close()
            self._log_file = None


def _start_or_fail(**options: object) -> BrokerProcess:
    proc = None
    try:
        proc = BrokerProcess(**options)   # type: ignore[arg-type]
        return proc.start()
    except BrokerUnavailable as exc:
        unavailable(exc, proc)


def unavailable(exc: BrokerUnavailable, proc: "BrokerProcess | None") -> None:
    """Clean up a broker that could not start; fail under CI=true, skip elsewhere."""
    if proc is not None:
        proc.close()
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(str(exc))
    pytest.skip(str(exc))


@pytest.fixture
def broker() -> Iterator[BrokerProcess]:
    """A started broker with anonymous access on a free loopback port; always stopped after."""
    proc = _start_or_fail()
    try:
        yield proc
    finally:
        proc.close()


@pytest.fixture
def broker_factory() -> Iterator:
    """Start brokers with options (users=, tls=, require_certificate=); all stopped after."""
    started: list[BrokerProcess] = []

    def make(**options: object) -> BrokerProcess:
        proc = _start_or_fail(**options)
        started.append(proc)
        return proc

    try:
        yield make
    finally:
        for proc in started:
            proc.close()


@contextlib.contextmanager
def temporary_pki() -> Iterator[TlsFiles]:
    """A fresh CA with server and client certificates (openssl) in a temporary directory."""
    directory = tempfile.mkdtemp(prefix="edgeprop-pki-")
    try:
        yield make_test_pki(directory)
    finally:
        shutil.rmtree(directory, ignore_errors=True)


@pytest.fixture(scope="module")
def pki() -> Iterator[TlsFiles]:
    """A CA with a server certificate for 127.0.0.1 and a client certificate (openssl)."""
    with temporary_pki() as files:
        yield files

