"""deploy/example.yaml and the README agree with each other and with what the code does.

A new user follows these literally: a path that differs between them, a command that
fails as shown, or a delay nobody mentions costs them an afternoon.
"""
from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys

from daemon_proc import ROOT

EXAMPLE = os.path.join(ROOT, "deploy", "example.yaml")
README = os.path.join(ROOT, "README.md")


def read(path: str) -> str:
    with open(path, encoding="utf-8") as f:
        return f.read()


def test_example_header_checks_the_path_the_readme_installs_it_to():
    installed = re.findall(r"deploy/example\.yaml (/etc/edgeprop/\S+)", read(README))
    checked = re.findall(r"edgeprop check -c (/etc/\S+)", read(EXAMPLE))
    assert installed == ["/etc/edgeprop/edgeprop.yaml"]
    assert checked and set(checked) == set(installed)


def test_readme_command_checks_the_example_before_the_password_file_exists(tmp_path):
    text = read(README)
    section = text[text.index("## Configuration"):text.index("## Payloads in")]
    assert "/etc/edgeprop/broker.password" in section          # the warning names the file
    block = re.search(r"```sh\n(.*?)```", section, re.S).group(1)
    (tmp_path / "deploy").mkdir()
    shutil.copy(EXAMPLE, tmp_path / "deploy" / "example.yaml")
    shell = f'edgeprop() {{ "{sys.executable}" -m daemon.cli "$@"; }}\nset -e\n{block}'
    proc = subprocess.run(["bash", "-c", shell], cwd=tmp_path, capture_output=True, text=True,
                          timeout=60, env={**os.environ, "PYTHONPATH": ROOT})
    assert proc.returncode == 0, proc.stderr
    assert "valid" in proc.stdout and "node: station-7" in proc.stdout


def test_readme_says_how_to_run_bare_edgeprop_before_its_first_use():
    text = read(README)
    blocks = [m for m in re.finditer(r"```sh\n(.*?)```", text, re.S)
              if re.search(r"^edgeprop \w", m.group(1), re.M)]
    before = text[:blocks[0].start()]         # up to the first shell block run as bare `edgeprop`
    assert ".venv/bin/edgeprop" in before and ". .venv/bin/activate" in before
