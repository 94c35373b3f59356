"""Secure by default, checked on the real daemon: TLS, broker login, what is exposed, what is trusted.

Every test runs ``edgeprop run`` as a subprocess against a real mosquitto (TLS listener and
password file generated here with openssl and mosquitto_passwd) and looks at what an attacker
or a careless operator would see: log lines, CLI output, the scrape, sockets, files.
"""
from __future__ import annotations

import os
import pickle
import re
import socket
import stat
import time
import urllib.request
from types import SimpleNamespace

import numpy as np
import pytest

from broker_fixture import temporary_pki
from daemon.checkpoints import CheckpointStore
from daemon.config import load_config
from daemon.runtime import ModelRuntime
from daemon_proc import (
    DELETE, ROOT, Daemon, ReconnectingProbe, bearing_stream, cli, control, edited_broker,
    live_broker_log, model_config, set_config_keys, wait_until, write_config,
)

pytestmark = pytest.mark.integration

PRED = "edgeprop/testnode/m1"
SECRET = "Pump7-bearing-Secr3t"           # the broker password: must never be shown anywhere
WRONG = "not-the-Pump7-password"


@pytest.fixture(scope="module")
def other_pki():
    """A second, unrelated CA: what a gateway configured with the wrong CA file trusts."""
    with temporary_pki() as files:
        yield files


def secret_file(directory, text: str, mode: int = 0o600) -> str:
    path = os.path.join(str(directory), "broker.pass")
    with open(path, "w") as f:
        f.write(text + "\n")
    os.chmod(path, mode)
    return path


def predictions_flow(daemon: Daemon, probe: ReconnectingProbe, n: int = 40) -> None:
    daemon.wait_ready()
    probe.publish_many([(t, p) for t, p, _ in bearing_stream(n)], qos=0)
    probe.wait_for(lambda: len(probe.predictions()) >= 10, 15, "predictions")


def connect_failures(log: str) -> list[str]:
    return [l for l in log.splitlines() if "event=broker_connect_failed" in l]


# ---- TLS ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("client_cert", [False, True], ids=["server-cert", "client-cert"])
def test_tls_to_a_real_mosquitto_listener(broker_factory, pki, tmp_path, client_cert):
    broker = broker_factory(tls=pki, require_certificate=client_cert)
    cfg = write_config(tmp_path, broker, [model_config(warmup=10)])
    tls = {"ca_file": pki.ca_file}
    if client_cert:
        tls.update(cert_file=pki.client_cert, key_file=pki.client_key)
    set_config_keys(cfg, "broker", tls=tls)
    daemon = Daemon(cfg)
    probe = None
    try:
        probe = ReconnectingProbe(broker, tls=(pki.ca_file, pki.client_cert, pki.client_key))
        predictions_flow(daemon, probe)
        assert re.search(r"event=broker_connected .*tls=True", daemon.log())
    finally:
        if probe is not None:
            probe.close()
        assert daemon.stop() == 0, daemon.log()[-2000:]


def test_a_private_key_every_user_can_read_is_warned_about(broker_factory, pki, tmp_path):
    """Group-readable (0640, Debian's ssl-cert convention) passes quietly; others-readable is
    named by check and by the daemon's start-up log, and the daemon still connects."""
    broker = broker_factory(tls=pki, require_certificate=True)
    key = tmp_path / "client.key"
    key.write_bytes(open(pki.client_key, "rb").read())
    cfg = write_config(tmp_path, broker, [model_config(warmup=10)])
    set_config_keys(cfg, "broker", tls={"ca_file": pki.ca_file, "cert_file": pki.client_cert,
                                        "key_file": str(key)})
    warning = (f"warning: broker.tls.key_file: {str(key)!r} has mode 0644, so every user on this "
               f"machine can read the private key; run `chmod 600 {key}` (or 640 with a group "
               f"the service user is in)")
    key.chmod(0o640)
    res = cli(cfg, "check")
    assert res.returncode == 0 and "warning" not in res.stderr, res.stderr
    key.chmod(0o644)
    res = cli(cfg, "check")
    assert res.returncode == 0, res.stderr
    assert res.stderr.splitlines() == [warning]
    daemon = Daemon(cfg)
    try:
        daemon.wait_ready()
        assert re.search(r"level=warning event=private_key_readable detail=.*has mode 0644",
                         daemon.log()), daemon.log()[-2000:]
        assert re.search(r"event=broker_connected .*tls=True", daemon.log())
    finally:
        assert daemon.stop() == 0, daemon.log()[-2000:]


def test_tls_refusals_are_one_clear_line_per_attempt(broker_factory, pki, other_pki, tmp_path):
    broker = broker_factory(tls=pki, require_certificate=True)
    for sub in ("a", "b", "c"):
        (tmp_path / sub).mkdir()
    wrong_ca = write_config(tmp_path / "a", broker)
    set_config_keys(wrong_ca, "broker", tls={"ca_file": other_pki.ca_file,
                                             "cert_file": pki.client_cert, "key_file": pki.client_key})
    no_cert = write_config(tmp_path / "b", broker)
    set_config_keys(no_cert, "broker", tls={"ca_file": pki.ca_file})
    foreign_cert = write_config(tmp_path / "c", broker)     # a client certificate of another CA
    set_config_keys(foreign_cert, "broker", tls={"ca_file": pki.ca_file, "cert_file": other_pki.client_cert,
                                                 "key_file": other_pki.client_key})
    daemons = [Daemon(wrong_ca), Daemon(no_cert), Daemon(foreign_cert)]
    try:
        time.sleep(4.0)
        for d in daemons:
            assert d.proc.poll() is None, d.log()
        logs = [d.log() for d in daemons]
    finally:
        codes = [d.stop() for d in daemons]
    assert codes == [0, 0, 0], logs
    for log in logs:
        assert "event=broker_connected" not in log and "Traceback" not in log
        lines = connect_failures(log)
        # write_config's backoff is 0.2-1.0 s: at most one attempt per 0.2 s, and some retries
        assert 2 <= len(lines) <= 4.0 / 0.2 + 1, lines
        assert all(re.search(r"retry_in_s=\d", l) for l in lines)
    # the operator is told which way it failed: our CA does not vouch for this broker ...
    assert all("certificate verify failed" in l and "check broker.tls.ca_file" in l
               for l in connect_failures(logs[0])), logs[0]
    # ... or the broker wants a client certificate we did not present (mosquitto just closes
    # the connection after the handshake, so the line says what that usually means)
    assert all("client certificate" in l and "broker.tls.cert_file" in l
               for l in connect_failures(logs[1])), logs[1]
    # ... or it refused the one we presented: its TLS alert is kept, not "Unspecified error"
    assert all("ALERT" in l and "the broker refused our client certificate" in l
               for l in connect_failures(logs[2])), logs[2]


# ---- broker login -------------------------------------------------------------------------------

def test_password_login_and_the_password_is_never_shown(broker_factory, tmp_path):
    broker = broker_factory(users={"edge": SECRET})
    cfg = write_config(tmp_path, broker, [model_config(warmup=10)],
                       metrics={"listen": "127.0.0.1:0"})
    set_config_keys(cfg, "broker", username="edge", password_file=secret_file(tmp_path, SECRET))
    daemon = Daemon(cfg)
    probe = None
    try:
        probe = ReconnectingProbe(broker, username="edge", password=SECRET)
        predictions_flow(daemon, probe)
        url = daemon.metrics_url()
        control(str(tmp_path / "ctl.sock"), {"cmd": "save-now"})
        shown = {
            "status": cli(cfg, "status"),
            "check": cli(cfg, "check"),
            "checkpoints": cli(cfg, "checkpoints"),
        }
        with urllib.request.urlopen(url, timeout=5) as resp:
            scrape_text = resp.read().decode()
        raw_status = repr(control(str(tmp_path / "ctl.sock"), {"cmd": "status"}))
        with open(f"/proc/{daemon.proc.pid}/cmdline", "rb") as f:
            cmdline = f.read()
        with open(f"/proc/{daemon.proc.pid}/environ", "rb") as f:
            environ = f.read()
    finally:
        if probe is not None:
            probe.close()
        code = daemon.stop()
    assert code == 0
    for name, done in shown.items():
        assert done.returncode == 0, (name, done.stderr)
    # the outputs are real (not empty): status sees the connection, check shows the file path
    assert "broker connected" in shown["status"].stdout
    assert "password_file:" in shown["check"].stdout and "username: edge" in shown["check"].stdout
    assert "edgeprop_samples_total" in scrape_text
    texts = {"log": daemon.log(), "scrape": scrape_text, "control status": raw_status,
             **{f"{k} stdout": v.stdout for k, v in shown.items()},
             **{f"{k} stderr": v.stderr for k, v in shown.items()}}
    for name, text in texts.items():
        assert SECRET not in text, f"the broker password appears in {name}"
    assert SECRET.encode() not in cmdline and SECRET.encode() not in environ
    for dirpath, _dirs, files in os.walk(tmp_path / "state"):
        for name in files:
            with open(os.path.join(dirpath, name), "rb") as f:
                assert SECRET.encode() not in f.read(), f"password written into {name}"


def test_wrong_password_is_refused_cleanly_with_backoff(tmp_path):
    with edited_broker(live_broker_log, users={"edge": SECRET}) as broker:
        cfg = write_config(tmp_path, broker)
        set_config_keys(cfg, "broker", username="edge", password_file=secret_file(tmp_path, WRONG))
        daemon = Daemon(cfg)
        try:
            time.sleep(4.0)
            assert daemon.proc.poll() is None, daemon.log()
            pid = daemon.proc.pid
            status = control(str(tmp_path / "ctl.sock"), {"cmd": "status"})
            log = daemon.log()
            refused_by_broker = broker.log_text().count("not authorised")
        finally:
            code = daemon.stop()
    assert code == 0 and daemon.proc.pid == pid           # one process throughout: no crash loop
    assert status["broker_connected"] is False
    lines = connect_failures(log)
    assert all('reason="Not authorized"' in l for l in lines), lines
    # one line per attempt: the broker saw as many refused logins (one may be in flight)
    assert len(lines) >= 2 and abs(len(lines) - refused_by_broker) <= 1, (lines, refused_by_broker)
    # paced by the backoff (write_config: 0.2 s floor), not a tight loop
    delays = [float(re.search(r"retry_in_s=([\d.]+)", l).group(1)) for l in lines]
    assert min(delays) >= 0.2 and len(lines) <= 4.0 / 0.2 + 1
    assert "event=broker_connected" not in log and "Traceback" not in log
    assert WRONG not in log and SECRET not in log


NEW_SECRET = "Pump7-rotated-Secr3t"


def connects(daemon: Daemon) -> int:
    return daemon.log().count("event=broker_connected")


def test_a_rotated_broker_password_is_loaded_before_the_next_attempt(broker_factory, tmp_path):
    """The broker's password is changed and the daemon's file rewritten, first with a careless
    mode (refused once, the old password kept), then as it should be: the daemon logs in
    again by itself, with no restart (before, it tried the old password until restarted)."""
    broker = broker_factory(users={"edge": SECRET})
    cfg = write_config(tmp_path, broker, [model_config(warmup=10)])
    password_file = secret_file(tmp_path, SECRET)
    set_config_keys(cfg, "broker", username="edge", password_file=password_file)
    daemon = Daemon(cfg)
    probe = None
    try:
        daemon.wait_ready()
        broker.reconfigure(users={"edge": NEW_SECRET})
        secret_file(tmp_path, NEW_SECRET, mode=0o644)
        broker.restart()
        wait_until(lambda: "event=broker_files_unusable" in daemon.log(), 15, "the refusal")
        wait_until(lambda: "not authori" in daemon.log().lower(), 15, "the old password refused")
        os.chmod(password_file, 0o600)
        wait_until(lambda: connects(daemon) >= 2, 15, "a login with the new password")
        log = daemon.log()
        assert log.count("event=broker_files_unusable") == 1, log
        unusable = next(l for l in log.splitlines() if "event=broker_files_unusable" in l)
        assert "changed=broker.password_file" in unusable and "has mode 0644" in unusable
        assert "event=broker_files_reloaded changed=broker.password_file" in log
        probe = ReconnectingProbe(broker, username="edge", password=NEW_SECRET)
        predictions_flow(daemon, probe)
    finally:
        if probe is not None:
            probe.close()
        code = daemon.stop()
    assert code == 0, daemon.log()[-2000:]
    assert SECRET not in daemon.log() and NEW_SECRET not in daemon.log()


def test_a_renewed_ca_file_is_loaded_before_the_next_attempt(broker_factory, pki, other_pki, tmp_path):
    """The broker moves to a certificate of a new CA and the daemon's CA file is replaced
    (written beside it, then renamed over it, as deployment tools do): the daemon verifies
    the new certificate at its next attempt, with no restart."""
    broker = broker_factory(tls=pki)
    ca_file = tmp_path / "broker-ca.pem"
    ca_file.write_bytes(open(pki.ca_file, "rb").read())
    cfg = write_config(tmp_path, broker, [model_config(warmup=10)])
    set_config_keys(cfg, "broker", tls={"ca_file": str(ca_file)})
    daemon = Daemon(cfg)
    probe = None
    try:
        daemon.wait_ready()
        broker.reconfigure(tls=other_pki)
        broker.restart()
        wait_until(lambda: "certificate verify failed" in daemon.log(), 15, "the new certificate refused")
        fresh = tmp_path / "broker-ca.pem.new"
        fresh.write_bytes(open(other_pki.ca_file, "rb").read())
        os.replace(fresh, ca_file)
        wait_until(lambda: connects(daemon) >= 2, 15, "a connection verified with the new CA")
        assert "event=broker_files_reloaded changed=broker.tls.ca_file" in daemon.log()
        probe = ReconnectingProbe(broker, tls=(other_pki.ca_file, other_pki.client_cert,
                                               other_pki.client_key))
        predictions_flow(daemon, probe)
    finally:
        if probe is not None:
            probe.close()
        assert daemon.stop() == 0, daemon.log()[-2000:]


def test_secrets_outside_private_files_are_refused_without_echo(tmp_path):
    broker = SimpleNamespace(host="127.0.0.1", port=1)
    cfg = write_config(tmp_path, broker)
    set_config_keys(cfg, "broker", username="edge", password=SECRET)          # inline
    inline = cli(cfg, "check")
    set_config_keys(cfg, "broker", password=DELETE,
                    password_file=secret_file(tmp_path, SECRET, mode=0o644))   # readable by all
    shared = cli(cfg, "check")
    started = cli(cfg, "run", timeout=15)
    for done in (inline, shared, started):
        assert done.returncode == 2, done
        assert SECRET not in done.stdout + done.stderr
    assert "inline password is refused" in inline.stderr
    assert "chmod 600" in shared.stderr and "chmod 600" in started.stderr


# ---- what is exposed, and to whom ---------------------------------------------------------------

def _listening_tcp(pid: int) -> set[tuple[str, int]]:
    """(address, port) of every TCP socket process ``pid`` listens on (/proc, proc(5))."""
    inodes = set()
    for fd in os.listdir(f"/proc/{pid}/fd"):
        try:
            target = os.readlink(f"/proc/{pid}/fd/{fd}")
        except OSError:
            continue
        if target.startswith("socket:["):
            inodes.add(target[8:-1])
    found = set()
    for table, size in (("tcp", 4), ("tcp6", 16)):
        with open(f"/proc/{pid}/net/{table}") as f:
            next(f)
            for row in f:
                cols = row.split()
                local, state, inode = cols[1], cols[3], cols[9]
                if state != "0A" or inode not in inodes:        # 0A: TCP_LISTEN
                    continue
                hexaddr, hexport = local.split(":")
                raw = bytes.fromhex(hexaddr)
                # /proc prints each 32-bit word in host (little-endian) order
                raw = b"".join(raw[i:i + 4][::-1] for i in range(0, size, 4))
                family = socket.AF_INET if size == 4 else socket.AF_INET6
                found.add((socket.inet_ntop(family, raw), int(hexport, 16)))
    return found


def test_defaults_expose_only_loopback_and_owner_only_files(broker, tmp_path):
    with socket.socket() as probe_port:
        try:
            probe_port.bind(("127.0.0.1", 9740))
        except OSError:
            # CI's machine is fresh, so there the port must be free: a busy port fails
            if os.environ.get("CI") == "true":
                pytest.fail("port 9740 (the default metrics port) is in use on the CI machine")
            pytest.skip("port 9740 (the default metrics port) is in use on this machine")
    cfg = write_config(tmp_path, broker)
    set_config_keys(cfg, "metrics", listen=DELETE)          # the default listen address
    set_config_keys(cfg, "control", socket=DELETE)          # the default: state_dir/control.sock
    assert load_config(cfg).metrics.listen == "127.0.0.1:9740"
    daemon = Daemon(cfg)
    try:
        daemon.wait_ready()
        sock_path = tmp_path / "state" / "control.sock"
        control(str(sock_path), {"cmd": "save-now"})
        listening = _listening_tcp(daemon.proc.pid)
        st = os.stat(sock_path)
    finally:
        code = daemon.stop()
    assert code == 0
    assert listening == {("127.0.0.1", 9740)}, f"listening on {listening}"
    assert stat.S_ISSOCK(st.st_mode) and stat.S_IMODE(st.st_mode) & 0o077 == 0
    assert st.st_uid == os.getuid()
    for path in (tmp_path / "state", tmp_path / "state" / "m1"):
        assert stat.S_IMODE(os.stat(path).st_mode) & 0o077 == 0, oct(os.stat(path).st_mode)
    for name in os.listdir(tmp_path / "state" / "m1"):
        assert stat.S_IMODE(os.stat(tmp_path / "state" / "m1" / name).st_mode) & 0o077 == 0, name


@pytest.mark.parametrize("which, mode", [("state", 0o777), ("state", 0o1777), ("model", 0o777)],
                         ids=["state-777", "state-sticky", "model-777"])
def test_world_writable_state_dir_is_refused(tmp_path, which, mode):
    state = tmp_path / "state"
    state.mkdir(mode=0o700)
    target = state if which == "state" else state / "m1"
    target.mkdir(exist_ok=True)
    os.chmod(target, mode)
    cfg = write_config(tmp_path, SimpleNamespace(host="127.0.0.1", port=1))
    daemon = Daemon(cfg)
    try:
        code = daemon.proc.wait(15)
    finally:
        daemon.kill()
    log = daemon.log()
    assert code == 1, log
    assert "event=start_failed" in log and "writable by every user" in log
    assert f"chmod o-w {target}" in log
    assert not (tmp_path / "ctl.sock").exists()
    assert sorted(os.listdir(state)) == ([] if which == "state" else ["m1"])


# ---- what is trusted ---------------------------------------------------------------------------

class _Payload:
    """Unpickling this creates a marker file: proof that a checkpoint was unpickled."""

    def __init__(self, marker: str) -> None:
        self.marker = marker

    def __reduce__(self):
        return (open, (self.marker, "w"))


def test_checkpoints_are_never_unpickled(broker, tmp_path):
    cfg = write_config(tmp_path, broker)
    settings = load_config(cfg)
    model = settings.models[0]
    store = CheckpointStore(str(tmp_path / "state" / "m1"), 5)
    good = ModelRuntime(model, settings.publish_topic(model), store).checkpoint("seeded")
    marker = str(tmp_path / "UNPICKLED")
    evil_dir = tmp_path / "state" / "m1"
    # newer ids than the good one, so the daemon tries them first
    with open(evil_dir / "29991231T235959Z-999990.npz", "wb") as f:          # object array in an npz
        np.savez(f, __header__=np.frombuffer(b"{}", np.uint8),
                 w=np.array([_Payload(marker)], dtype=object))
    with open(evil_dir / "29991231T235959Z-999991.npz", "wb") as f:          # a bare pickle stream
        pickle.dump(_Payload(marker), f)
    with open(evil_dir / "29991231T235959Z-999992.npz", "wb") as f:          # an object .npy
        np.save(f, np.array([_Payload(marker)], dtype=object), allow_pickle=True)
    daemon = Daemon(cfg)
    try:
        log = daemon.wait_ready()
    finally:
        daemon.stop()
    assert not os.path.exists(marker), "a checkpoint was unpickled"
    for n in range(999990, 999993):
        assert re.search(rf"event=checkpoint_skipped id=29991231T235959Z-{n} reason=", log), log
    assert f"event=model_restored id={good} " in log, log


def test_no_code_path_can_unpickle():
    """Static guard: numpy's loader is only ever called with allow_pickle=False; no pickle import."""
    calls = 0
    for package in ("daemon", "nets"):
        for name in os.listdir(os.path.join(ROOT, package)):
            if not name.endswith(".py"):
                continue
            with open(os.path.join(ROOT, package, name)) as f:
                text = f.read()
            assert not re.search(r"^\s*(import|from)\s+(c?pickle|shelve|marshal|dill)\b", text, re.M), name
            for call in re.finditer(r"np\.load\(([^)]*)\)", text):
                calls += 1
                assert "allow_pickle=False" in call.group(1), f"{name}: {call.group(0)}"
    assert calls >= 1


def test_publish_topics_come_from_config_only(broker, tmp_path):
    cfg = write_config(tmp_path, broker, [model_config(warmup=10)])
    daemon = Daemon(cfg)
    probe = None
    hostile = [
        ("site/p1/bearing_temp", '{"value": 50.0, "topic": "evil/x", "publish": {"topic": "evil/y"}, '
                                 '"model": "evil", "node": "../../evil"}'),
        ("site/p1/speed", '{"value": 1000, "topic": "edgeprop/testnode/evil", "ts": 0}'),
        ("site/p1/current", '[{"bn": "edgeprop/testnode/evil/", "n": "x", "v": 10.5}]'),
        ("site/p1/current", "edgeprop/testnode/hijack"),
        ("site/p1/bearing_temp", '{"value": "edgeprop/#"}'),
        ("edgeprop/testnode/m1/set", '{"topic": "evil/z"}'),
    ]
    try:
        daemon.wait_ready()
        probe = ReconnectingProbe(broker, subscribe="#")
        stream = [(t, p) for t, p, _ in bearing_stream(60)]
        mixed = []
        for i, item in enumerate(stream):
            mixed.append(item)
            if i % 10 == 5:
                mixed.extend(hostile)
        probe.publish_many(mixed, qos=0)
        probe.wait_for(lambda: len(probe.predictions()) >= 20, 15, "predictions")
        time.sleep(0.5)
        with probe._lock:
            seen = list(probe.messages)
    finally:
        if probe is not None:
            probe.close()
        daemon.stop()
    ours = {t for t, _p in mixed}
    from_daemon = {t for t, _p in seen if t not in ours}
    assert PRED in from_daemon
    assert from_daemon <= {PRED, PRED + "/info", "edgeprop/testnode/status"}, from_daemon
    assert all(b"evil" not in p and b"hijack" not in p for t, p in seen if t in from_daemon)
