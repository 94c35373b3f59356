"""deploy/example.yaml and the README agree with each other and with what the code does.

A new user follows these literally: a path that differs between them, a command that
fails as shown, or a delay nobody mentions costs them an afternoon.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys

import yaml

from daemon.capture import CaptureWriter
from daemon.cli import build_parser
from daemon.config import parse_config
from daemon.replay import replay
from daemon_proc import ROOT

EXAMPLE = os.path.join(ROOT, "deploy", "example.yaml")
README = os.path.join(ROOT, "README.md")


def read(path: str) -> str:
    with open(path, encoding="utf-8") as f:
        return f.read()


def example_without_login() -> dict:
    raw = yaml.safe_load(read(EXAMPLE))
    del raw["broker"]["username"], raw["broker"]["password_file"]
    return raw


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


def test_example_lag_comment_states_the_first_prediction_delay_it_causes(tmp_path):
    """The comment beside the lags, and what a replay of the example actually does."""
    settings = parse_config(example_without_login(), os.path.dirname(EXAMPLE))
    bearing = settings.models[0]
    longest = max(max(i.lags_s) for i in bearing.inputs)
    warmup = bearing.training.warmup_samples
    lines = read(EXAMPLE).splitlines()
    at = next(k for k, line in enumerate(lines) if "lags_s: [0, 30, 120]" in line)
    beside = " ".join(lines[at:at + 3])
    assert f"{longest:g} s of current history" in beside and f"warmup_samples ({warmup})" in beside
    assert "over 2 minutes" in beside and longest + warmup > 120
    # readings once a second: the first sample at 120 s, then 64 learned without a prediction
    t0 = 1_765_000_000.0
    cap = tmp_path / "example.jsonl"
    with CaptureWriter(str(cap)) as w:
        for i in range(300):
            t = t0 + i
            w.write(t, "site/p1/speed", b"1450")
            w.write(t, "site/p1/current", json.dumps({"value": 20 + i % 7}).encode())
            w.write(t, "site/p1/ambient_temp", json.dumps({"value": 18.0}).encode())
            w.write(t, "site/p1/bearing_temp", json.dumps({"value": 50 + i % 5, "ts": t}).encode())
    published: list[dict] = []
    replay(settings, str(cap), published.append)
    first = min(m["t"] for m in published if m["model"] == "bearing_temp")
    assert first - t0 == longest + warmup
    text = read(README)
    service = text[text.index("## Run it as a service"):text.index("## Guarantees")]
    assert "more than 2 minutes" in service.replace("\n", " ")
    assert f"{longest:g} s of motor-current history" in service.replace("\n", " ")


def test_files_the_demo_and_readme_write_in_the_checkout_are_ignored_by_git():
    out = build_parser().parse_args(["demo"]).out         # the demo's default --out
    for path in (f"{out}/report.png", "example-check.yaml"):
        proc = subprocess.run(["git", "-C", ROOT, "check-ignore", "-q", path],
                              capture_output=True, text=True, timeout=30)
        assert proc.returncode == 0, f"{path} is not ignored by .gitignore ({proc.stderr.strip()})"
