"""The systemd unit, checked with systemd's own analyser."""
from __future__ import annotations

import os
import re
import subprocess
import sys

from tooling import require_tool

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
UNIT = os.path.join(ROOT, "deploy", "edgeprop.service")


def _unit_with_real_binary(tmp_path) -> str:
    """The unit with ExecStart pointed at a binary that exists here (the install path need not)."""
    text = open(UNIT).read()
    text = text.replace("/opt/edgeprop/venv/bin/edgeprop", sys.executable + " -m daemon.cli")
    path = tmp_path / "edgeprop.service"
    path.write_text(text)
    return str(path)


def test_unit_verifies_clean(tmp_path):
    tool = require_tool("systemd-analyze")
    unit = _unit_with_real_binary(tmp_path)
    proc = subprocess.run([tool, "verify", unit], capture_output=True, text=True, timeout=60)
    problems = [l for l in (proc.stdout + proc.stderr).splitlines()
                if "edgeprop.service" in l]
    assert proc.returncode == 0 and not problems, proc.stdout + proc.stderr


def test_unit_security_exposure_at_most_2_5(tmp_path):
    tool = require_tool("systemd-analyze")
    proc = subprocess.run([tool, "security", "--offline=yes", UNIT], capture_output=True,
                          text=True, timeout=60)
    m = re.search(r"Overall exposure level for edgeprop.service: ([0-9.]+)", proc.stdout + proc.stderr)
    assert m, proc.stdout + proc.stderr
    assert float(m.group(1)) <= 2.5


def test_unit_speaks_notify_and_reload_by_hup():
    text = open(UNIT).read()
    for line in ("Type=notify", "ExecReload=/bin/kill -HUP $MAINPID", "Restart=on-failure",
                 "StateDirectory=edgeprop", "RuntimeDirectory=edgeprop", "NoNewPrivileges=yes",
                 "ProtectSystem=strict", "ProtectHome=yes", "PrivateTmp=yes", "PrivateDevices=yes",
                 "CapabilityBoundingSet=\n", "MemoryMax=", "WatchdogSec="):
        assert line in text, line
    assert re.search(r"^User=edgeprop$", text, re.M)


def _filter_members(tool: str, group: str, seen: set | None = None) -> set[str]:
    """System calls in a systemd filter group, nested groups expanded."""
    seen = set() if seen is None else seen
    out = subprocess.run([tool, "syscall-filter", group], capture_output=True, text=True,
                         timeout=60).stdout
    calls: set[str] = set()
    for line in out.splitlines()[1:]:
        name = line.strip()
        if not name or name.startswith("#"):
            continue
        if name.startswith("@"):
            if name not in seen:
                seen.add(name)
                calls |= _filter_members(tool, name, seen)
        else:
            calls.add(name)
    return calls


def test_the_unit_lets_the_daemon_start_its_link_process():
    # edgeprop run starts its broker link as a child (subprocess: vfork/clone, execve, a
    # Unix socket pair, close_range for pass_fds, wait4). The unit's SystemCallFilter must
    # allow those, or the service fails at start on a real box.
    tool = require_tool("systemd-analyze")
    text = open(UNIT).read()
    allowed, denied = set(), set()
    for line in text.splitlines():
        if line.startswith("SystemCallFilter="):
            value = line.split("=", 1)[1]
            target = denied if value.startswith("~") else allowed
            for group in value.lstrip("~").split():
                target |= _filter_members(tool, group) if group.startswith("@") else {group}
    needed = {"execve", "clone", "vfork", "socketpair", "close_range", "wait4", "pipe2"}
    assert needed <= allowed, sorted(needed - allowed)
    assert not needed & denied, sorted(needed & denied)
    assert "AF_UNIX" in next(l for l in text.splitlines() if l.startswith("RestrictAddressFamilies="))
