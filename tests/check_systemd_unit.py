"""Install edgeprop by the README's own commands and run it under a real systemd.

Why: the unit's promises (Type=notify start-up, watchdog pings, reload, restart after a crash,
clean stop, all under its sandbox: system-call filter, read-only system, private users) can
only be shown by systemd itself, and the pytest suite runs where systemd is not PID 1.
This boots the machine's own root file system, under an overlay whose changes are thrown
away afterwards, as a systemd-nspawn container; runs the shell block of README "Run it as a
service" in it (``sudo`` as plain root, ``sudoedit`` as the edits named below); then drives
the service and prints one line per check. Exit status 0 only when every check passed.

Needs: root, overlayfs, systemd-nspawn (Debian package systemd-container), and the Debian
mosquitto package (its unit gives the container a broker on 127.0.0.1:1883). The container
shares the host's network: nothing else may listen on 1883 or 9740 while it runs.
Not part of the pytest suite: it boots a whole system and takes about two minutes.

Usage: python3 tests/check_systemd_unit.py [--keep]   (--keep: leave the container running)
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
MACHINE = "edgeprop-check"
SRC_IN_CONTAINER = "/root/edgeprop-src"
CONFIG = "/etc/edgeprop/edgeprop.yaml"
VENV_PY = "/opt/edgeprop/venv/bin/python"
PATH = "/usr/local/sbin:/usr/local/bin:/usr/sbin:/usr/bin:/sbin:/bin"

# What the README leaves to the reader's editor. The example config's 120 s lag would make
# the check wait two minutes for enough history, so the edit shortens the lags.
EDITS = r"""
sudo() { if [ "$1" = "-u" ]; then u="$2"; shift 2; setpriv --reuid="$u" --regid="$u" --init-groups "$@"; else "$@"; fi; }
sudoedit() {
  case "$1" in
    */edgeprop.yaml) sed -i 's/lags_s: \[0, 30, 120\]/lags_s: [0, 2, 5]/' "$1" ;;
    */broker.password) echo 'check-only-secret' > "$1" ;;
    *) echo "no edit known for $1" >&2; return 1 ;;
  esac
}
set -e
"""

# Runs inside the container with the service's own venv: readings in, predictions out.
FEEDER = r"""
import json, math, sys, threading, time
import paho.mqtt.client as mqtt
seconds, rate = float(sys.argv[1]), float(sys.argv[2])
got, status = [], []
def on_message(c, u, m):
    (status if m.topic.endswith("/status") else got).append(m.payload.decode())
sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="check-sub")
sub.on_message = on_message
sub.connect("127.0.0.1", 1883)
sub.subscribe([("edgeprop/station-7/bearing_temp", 0), ("edgeprop/station-7/status", 1)])
sub.loop_start()
pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="check-pub")
pub.connect("127.0.0.1", 1883)
pub.loop_start()
time.sleep(0.5)
start = time.time()
i = 0
while time.time() - start < seconds:
    speed = 1450 + 200 * math.sin(i / 50)
    current = 30 + 0.01 * (speed - 1450)
    temp = 45 + 8 * math.tanh((speed - 1450) / 150) + 0.2 * current
    t = time.time()
    pub.publish("site/p1/speed", f"{speed:.3f}")
    pub.publish("site/p1/current", json.dumps({"value": current}))
    pub.publish("site/p1/ambient_temp", json.dumps({"value": 18.0}))
    pub.publish("site/p1/bearing_temp", json.dumps({"value": temp, "ts": t}))
    i += 1
    time.sleep(max(0.0, start + i / rate - time.time()))
time.sleep(1.0)
pub.loop_stop(); sub.loop_stop()
print(json.dumps({"targets": i, "predictions": got, "status": status}))
"""

STATUS_PEEK = r"""
import sys, time
import paho.mqtt.client as mqtt
seen = []
c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="check-status")
c.on_message = lambda cl, u, m: seen.append(m.payload.decode())
c.connect("127.0.0.1", 1883)
c.subscribe("edgeprop/station-7/status", 1)
c.loop_start()
deadline = time.time() + 5
while not seen and time.time() < deadline:
    time.sleep(0.05)
c.loop_stop()
print(seen[0] if seen else "")
"""


class Container:
    """The host's root file system under a throw-away overlay, booted by systemd-nspawn."""

    def __init__(self, workdir: Path) -> None:
        self.workdir = workdir
        self.root = workdir / "root"
        self.proc: subprocess.Popen | None = None
        self.init_pid = 0

    def start(self) -> None:
        upper, work = self.workdir / "upper", self.workdir / "work"
        for d in (self.root, upper, work):
            d.mkdir()
        subprocess.run(["mount", "-t", "overlay", "overlay", "-o",
                        f"lowerdir=/,upperdir={upper},workdir={work}", str(self.root)], check=True)
        shutil.copytree(REPO, str(self.root) + SRC_IN_CONTAINER, ignore=shutil.ignore_patterns(
            ".git", ".venv", "build", "*.egg-info", "__pycache__", ".pytest_cache"))
        log = open(self.workdir / "boot.log", "wb")
        self.proc = subprocess.Popen(
            ["systemd-nspawn", "-D", str(self.root), "-M", MACHINE, "--register=no",
             "--keep-unit", "--link-journal=no", "--console=read-only", "-b"],
            stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT)
        deadline = time.monotonic() + 60
        while not self.init_pid and time.monotonic() < deadline:
            children = Path(f"/proc/{self.proc.pid}/task/{self.proc.pid}/children")
            if self.proc.poll() is not None:
                raise RuntimeError(f"systemd-nspawn exited: see {self.workdir / 'boot.log'}")
            pids = children.read_text().split() if children.exists() else []
            self.init_pid = int(pids[0]) if pids else 0
            time.sleep(0.2)
        state = self.sh("systemctl is-system-running --wait", timeout=120).stdout.strip()
        if state not in ("running", "degraded"):
            raise RuntimeError(f"the container's systemd did not come up: {state!r}")

    def sh(self, script: str, timeout: float = 300, stdin: str | None = None) -> subprocess.CompletedProcess:
        return subprocess.run(["nsenter", "-t", str(self.init_pid), "-a", "env", "-i", f"PATH={PATH}",
                               "HOME=/root", "sh", "-c", script], capture_output=True, text=True,
                              timeout=timeout, input=stdin)

    def show(self, prop: str) -> str:
        return self.sh(f"systemctl show -p {prop} --value edgeprop").stdout.strip()

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            if self.init_pid:
                self.sh("systemctl poweroff", timeout=30)
            try:
                self.proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        subprocess.run(["umount", str(self.root)], check=False)


def readme_service_block() -> str:
    """The shell block under README "Run it as a service", made to run unattended."""
    text = (REPO / "README.md").read_text()
    section = text[text.index("## Run it as a service"):]
    block = section[section.index("```sh\n") + 6:]
    block = block[:block.index("```")]
    lines = []
    for line in block.splitlines():
        if line.startswith("journalctl") and " -f" in line:
            continue                                   # follows the journal forever
        if line.strip() == "systemctl status edgeprop":
            line += " --no-pager"
        lines.append(line.replace("/path/to/edgeprop", SRC_IN_CONTAINER))
    return EDITS + "\n".join(lines) + "\n"


def wait_for(check, timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():
            return True
        time.sleep(0.25)
    return False


def run_checks(c: Container) -> list[tuple[str, bool, str]]:
    results: list[tuple[str, bool, str]] = []

    def record(name: str, ok: bool, detail: str = "") -> bool:
        results.append((name, ok, detail))
        print(f"{'PASS' if ok else 'FAIL'}  {name}" + (f"  ({detail})" if detail else ""), flush=True)
        return ok

    install = c.sh(readme_service_block(), timeout=600)
    if not record("README install block runs (useradd, venv, pip, config, check, unit, enable --now)",
                  install.returncode == 0, f"exit {install.returncode}"):
        print(install.stdout[-3000:], install.stderr[-3000:], sep="\n")
        return results
    started = time.monotonic()
    record("active after enable --now (Type=notify: READY=1 arrived)", c.show("ActiveState") == "active",
           c.show("ActiveState"))
    record("status text names the broker", "connected to broker" in c.show("StatusText"), c.show("StatusText"))
    peek = c.sh(f"{VENV_PY} -", stdin=STATUS_PEEK).stdout.strip()
    record("retained status message is online", peek == "online", repr(peek))

    feed = c.sh(f"{VENV_PY} - 20 20", stdin=FEEDER, timeout=60)
    out = json.loads(feed.stdout) if feed.returncode == 0 else {"predictions": [], "targets": 0}
    msgs = [json.loads(p) for p in out["predictions"]]
    exact = all(m["residual"] == m["measured"] - m["predicted"] for m in msgs)
    record("predictions published under the sandbox, residual = measured - predicted",
           len(msgs) > 100 and exact, f"{len(msgs)} predictions for {out['targets']} targets")

    time.sleep(max(0.0, 40 - (time.monotonic() - started)))
    record("still running after 40 s with WatchdogSec=30 (the pings arrive), no restarts",
           c.show("ActiveState") == "active" and c.show("NRestarts") == "0",
           f"NRestarts={c.show('NRestarts')} WatchdogUSec={c.show('WatchdogUSec')}")

    c.sh(f"sed -i 's/learning_rate: 0.01 /learning_rate: 0.005 /' {CONFIG}")
    reload = c.sh("systemctl reload edgeprop")
    journal = c.sh("journalctl -u edgeprop --no-pager -o cat").stdout
    changes = [line for line in journal.splitlines() if "event=reload_change" in line]
    record("systemctl reload applies the new learning rate",
           reload.returncode == 0 and any("learning_rate" in ln and "0.005" in ln for ln in changes)
           and c.show("ActiveState") == "active", f"exit {reload.returncode}; {changes[-1:]}")

    saved = c.sh(f"/opt/edgeprop/venv/bin/edgeprop save-now -c {CONFIG}")
    main_pid = c.show("MainPID")
    c.sh("systemctl kill -s KILL --kill-whom=main edgeprop")
    back = wait_for(lambda: c.show("NRestarts") == "1" and c.show("ActiveState") == "active"
                    and c.show("MainPID") != main_pid, 30)
    journal = c.sh("journalctl -u edgeprop --no-pager -o cat").stdout
    record("SIGKILL of the worker: systemd restarts it, models come back from their checkpoints",
           saved.returncode == 0 and back and journal.count("event=model_restored") >= 2,
           f"save-now exit {saved.returncode}, restarted {back}")

    child = c.sh("pgrep -f 'daemon.link_child'").stdout.split()
    c.sh(f"kill -KILL {child[0]}" if child else "true")
    back = wait_for(lambda: c.show("NRestarts") == "2" and c.show("ActiveState") == "active", 30)
    journal = c.sh("journalctl -u edgeprop --no-pager -o cat").stdout
    record("SIGKILL of the broker-link process: worker saves, exits 1, systemd restarts",
           bool(child) and back and "event=link_process_lost" in journal, f"restarted {back}")

    t0 = time.monotonic()
    stop = c.sh("systemctl stop edgeprop")
    took = time.monotonic() - t0
    record("systemctl stop: clean exit 0 within 5 s",
           stop.returncode == 0 and c.show("ExecMainStatus") == "0" and c.show("Result") == "success"
           and took < 5, f"{took:.1f} s, ExecMainStatus={c.show('ExecMainStatus')}")
    peek = c.sh(f"{VENV_PY} -", stdin=STATUS_PEEK).stdout.strip()
    record("retained status message is offline after stop", peek == "offline", repr(peek))
    journal = c.sh("journalctl -u edgeprop --no-pager -o cat").stdout
    record("no traceback in the journal", "Traceback" not in journal)
    return results


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--keep", action="store_true", help="leave the container running at the end")
    args = ap.parse_args()
    if os.geteuid() != 0 or not shutil.which("systemd-nspawn") or not shutil.which("nsenter"):
        print("needs root, systemd-nspawn (Debian: systemd-container) and nsenter", file=sys.stderr)
        return 2
    workdir = Path(tempfile.mkdtemp(prefix="edgeprop-systemd-", dir="/var/tmp"))
    container = Container(workdir)
    try:
        container.start()
        results = run_checks(container)
    finally:
        if not args.keep:
            container.stop()
            shutil.rmtree(workdir, ignore_errors=True)
        else:
            print(f"container left running: nsenter -t {container.init_pid} -a sh", file=sys.stderr)
    failed = [name for name, ok, _ in results if not ok]
    print(f"\n{len(results) - len(failed)} of {len(results)} checks passed")
    return 1 if failed or not results else 0


if __name__ == "__main__":
    sys.exit(main())
