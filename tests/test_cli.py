"""``edgeprop`` as a user runs it: real subprocesses, exit codes, what lands on stdout and stderr."""
from __future__ import annotations

import os
import shutil
import subprocess
import sys

import pytest
import yaml

from daemon import __version__

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CONFIGS = os.path.join(ROOT, "tests", "configs")
# DESIGN.md, "CLI": every subcommand the product card names.
SUBCOMMANDS = ("run", "check", "demo", "record", "replay", "tune", "checkpoints", "rollback", "status")

MODEL = """\
models:
  - name: bearing_temp
    target: {topic: site/p1/bearing_temp, field: value}
    inputs:
      - {name: speed, topic: site/p1/speed}
      - {name: current, topic: site/p1/current, field: value, lags_s: [0, 30]}
    training: {learning_rate: 0.005, batch_size: 16}
"""


def edgeprop(*args: str, cwd: str | None = None, timeout: float = 30.0) -> subprocess.CompletedProcess:
    """``python -m daemon.cli ARGS`` with the repo on PYTHONPATH, as an installed user would."""
    env = {**os.environ, "PYTHONPATH": ROOT}
    return subprocess.run([sys.executable, "-m", "daemon.cli", *args], capture_output=True,
                          text=True, env=env, cwd=cwd or ROOT, timeout=timeout)


def write(tmp_path, text: str, name: str = "edgeprop.yaml") -> str:
    path = tmp_path / name
    path.write_text(text)
    return str(path)


def test_help_lists_every_subcommand_and_the_advisory_notice():
    res = edgeprop("--help")
    assert res.returncode == 0, res.stderr
    assert res.stdout.startswith("usage: edgeprop")
    for name in SUBCOMMANDS:
        assert f"\n    {name} " in res.stdout or f"\n    {name}\n" in res.stdout, name
    assert "advisory" in res.stdout and "protective function" in res.stdout
    assert res.stderr == ""


def test_subcommand_help_names_its_options():
    res = edgeprop("rollback", "--help")
    assert res.returncode == 0, res.stderr
    for option in ("-c CONFIG", "--model MODEL", "--to ID"):
        assert option in res.stdout, option


def test_version():
    res = edgeprop("--version")
    assert res.returncode == 0
    assert res.stdout == f"edgeprop {__version__}\n"


def test_no_subcommand_prints_help_and_exits_2():
    res = edgeprop()
    assert res.returncode == 2
    assert "usage: edgeprop" in res.stdout


def test_unknown_subcommand_exits_2():
    res = edgeprop("frobnicate")
    assert res.returncode == 2
    assert "invalid choice: 'frobnicate'" in res.stderr
    assert res.stdout == ""


def test_check_without_config_option_exits_2():
    res = edgeprop("check")
    assert res.returncode == 2
    assert "the following arguments are required: -c/--config" in res.stderr


def test_check_prints_the_resolved_config_with_defaults(tmp_path):
    path = write(tmp_path, "node: station-7\n" + MODEL)
    res = edgeprop("check", "-c", path)
    assert res.returncode == 0, res.stderr
    assert res.stdout.startswith(f"# {path}: valid.")
    resolved = yaml.safe_load(res.stdout)
    # What the user wrote is kept ...
    assert resolved["node"] == "station-7"
    m = resolved["models"][0]
    assert m["inputs"][1]["lags_s"] == [0.0, 30.0] and m["inputs"][0]["field"] is None
    assert m["training"]["learning_rate"] == 0.005 and m["training"]["batch_size"] == 16
    # ... and every default of DESIGN.md "Contracts" is filled in.
    assert resolved["broker"] == {**resolved["broker"], "host": "127.0.0.1", "port": 1883,
                                  "client_id": None, "username": None, "password_file": None,
                                  "tls": None, "keepalive_s": 30}
    assert resolved["checkpoints"]["every_s"] == 300 and resolved["checkpoints"]["keep"] == 20
    assert resolved["metrics"]["listen"] == "127.0.0.1:9740"
    assert resolved["state_dir"] == str(tmp_path / "state")     # relative to the config file
    assert m["task"] == "regression" and m["align"]["max_age_s"] == 60
    assert m["net"] == {**m["net"], "hidden": [32, 32], "activation": "tanh", "seed": 1,
                        "dtype": "float64"}
    assert m["training"] == {**m["training"], "window": 2048, "steps_per_sample": 1,
                             "loss": "squared", "momentum": 0.0, "weight_decay": 0.0,
                             "clip_norm": None, "warmup_samples": 64}
    assert m["drift"]["detector"] == "page_hinkley" and m["drift"]["on_drift"] == "none"
    assert m["interval"]["coverage"] == 0.9
    assert m["publish"] == {"topic": None, "qos": 0, "retain": False, "every_s": None}
    # The printed config is itself a valid config that resolves to the same thing.
    again = edgeprop("check", "-c", write(tmp_path, res.stdout, "resolved.yaml"))
    assert again.returncode == 0, again.stderr
    assert yaml.safe_load(again.stdout) == resolved


def test_check_binary_task_gets_logistic_loss(tmp_path):
    path = write(tmp_path, """\
models:
  - name: seal_leak
    task: binary
    target: {topic: site/p1/seal_leak_contact}
    inputs: [{name: flow, topic: site/p1/flow}]
""")
    res = edgeprop("check", "-c", path)
    assert res.returncode == 0, res.stderr
    assert yaml.safe_load(res.stdout)["models"][0]["training"]["loss"] == "logistic"


def test_check_reports_every_problem_of_a_bad_config_and_exits_2(tmp_path):
    path = shutil.copy(os.path.join(CONFIGS, "many_errors.yaml"), tmp_path)
    res = edgeprop("check", "-c", path)
    assert res.returncode == 2
    assert res.stdout == ""
    expected = [
        "brokr: unknown key; did you mean 'broker'?",
        "node: 'station 7' is not allowed; use letters, digits, _ and - only (it goes into "
        "topics and labels)",
        "models[0].trainig: unknown key; did you mean 'training'?",
        "models[0].target.topic: 'site/+/bearing_temp' contains the wildcard '+'; subscribe to "
        "one exact topic here (wildcards are not allowed)",
        "models[0].inputs[1].name: 'speed' duplicates inputs[0].name",
        "models[1].net.activation: 'relux' is not one of 'tanh', 'relu', 'leaky_relu', "
        "'sigmoid', 'identity'; did you mean 'relu'?",
        "models[1].training.learning_rate: -0.1 is out of range; allowed (0, 10]",
    ]
    lines = [line.strip() for line in res.stderr.splitlines()]
    assert lines[0] == "edgeprop: invalid configuration:"
    assert lines[1:] == expected
    assert "Traceback" not in res.stderr


def test_check_reports_cross_key_problems(tmp_path):
    path = write(tmp_path, """\
node: station-7
broker: {password: hunter2}
models:
  - name: seal_leak
    task: binary
    target: {topic: site/p1/seal_leak_contact}
    inputs: [{name: flow, topic: site/p1/flow}]
    training: {loss: squared, nesterov: true}
    publish: {topic: site/p1/flow, qos: 3}
""")
    res = edgeprop("check", "-c", path)
    assert res.returncode == 2
    for message in (
        "broker.password: an inline password is refused: put the password alone in a file only "
        "the daemon's user can read (chmod 600) and set password_file to its path",
        "models[0].training.loss: 'squared' does not fit task 'binary'; allowed 'logistic'",
        "models[0].training.nesterov: true needs momentum > 0 (Nesterov is a form of momentum); "
        "set momentum, e.g. 0.9, or drop nesterov",
        "models[0].publish.qos: 3 is out of range; allowed [0, 2]",
    ):
        assert message in res.stderr, (message, res.stderr)


@pytest.mark.parametrize("name, message", [
    ("not_yaml.yaml", "not_yaml.yaml:4:11: not valid YAML: expected ',' or '}', but got ':'"),
    ("repeated_key.yaml", "repeated_key.yaml: line 7, column 5: key 'training' appears again "
                          "(first on line 6); YAML would keep only the last one, so merge or "
                          "remove one"),
])
def test_check_points_at_the_line_of_a_broken_file(tmp_path, name, message):
    path = shutil.copy(os.path.join(CONFIGS, name), tmp_path)
    res = edgeprop("check", "-c", path)
    assert res.returncode == 2
    assert message in res.stderr
    assert "Traceback" not in res.stderr


def test_missing_config_file_exits_2_with_a_clear_message(tmp_path):
    missing = str(tmp_path / "nowhere.yaml")
    for command in ("check", "run", "status"):
        res = edgeprop(command, "-c", missing)
        assert res.returncode == 2, command
        assert f"{missing}: cannot read the config file: No such file or directory" in res.stderr
        assert "Traceback" not in res.stderr


def test_run_refuses_a_bad_config_before_starting(tmp_path):
    path = shutil.copy(os.path.join(CONFIGS, "many_errors.yaml"), tmp_path)
    res = edgeprop("run", "-c", path, timeout=20)
    assert res.returncode == 2
    assert "level=error event=config_invalid" in res.stderr and "problems=7" in res.stderr
    assert ('level=error event=config_problem detail="brokr: unknown key; did you mean '
            "'broker'?\"") in res.stderr
    assert res.stdout == "" and "Traceback" not in res.stderr


def _saved_checkpoint(config: str) -> str:
    """Save one checkpoint of a fresh model into the config's state_dir; return its id."""
    from daemon.config import load_config
    from daemon.runtime import ModelRuntime, store_for
    settings = load_config(config)
    m = settings.models[0]
    store = store_for(settings.state_dir, m, settings.checkpoints.keep, log=lambda *a, **k: None)
    return ModelRuntime(m, settings.publish_topic(m), store).checkpoint("operator")


def test_status_and_checkpoints_without_a_daemon_act_on_the_state_dir(tmp_path):
    path = write(tmp_path, "node: station-7\nstate_dir: st\nmetrics: {listen: null}\n" + MODEL)
    cid = _saved_checkpoint(path)
    state = str(tmp_path / "st")
    for command in ("status", "checkpoints"):
        res = edgeprop(command, "-c", path)
        assert res.returncode == 0, res.stderr
        assert f"edgeprop: daemon not running; acting on {state} directly" in res.stderr
        row = [line for line in res.stdout.splitlines() if cid in line]
        assert len(row) == 1 and row[0].split()[:2] == ["bearing_temp", cid], res.stdout
    assert edgeprop("status", "-c", path).stdout.startswith("daemon: not running\n")


def test_checkpoints_without_any_saved_lists_none(tmp_path):
    path = write(tmp_path, "state_dir: st\nmetrics: {listen: null}\n" + MODEL)
    res = edgeprop("checkpoints", "-c", path)
    assert res.returncode == 0, res.stderr
    assert "daemon not running" in res.stderr
    assert res.stdout.splitlines()[0].split()[:2] == ["model", "id"]
    rows = res.stdout.splitlines()[1:]
    assert len(rows) == 1 and rows[0].split()[0] == "bearing_temp" and "no checkpoints" in rows[0]


def test_offline_command_on_an_unknown_model_exits_1(tmp_path):
    path = write(tmp_path, "state_dir: st\nmetrics: {listen: null}\n" + MODEL)
    res = edgeprop("rollback", "-c", path, "--model", "nope", "--to", "x")
    assert res.returncode == 1
    assert "no model named 'nope' in the config; models: bearing_temp" in res.stderr
    assert "Traceback" not in res.stderr


# ---- output into a pipe that closes early (as `| head -1` does) ------------------------------

def edgeprop_into_pipe(*args: str, read_lines: int) -> tuple[int, bytes, list[bytes]]:
    """Run edgeprop with stdout into a pipe whose reader takes ``read_lines`` lines and closes.

    With ``read_lines=0`` the read end is closed before the program starts, so its very first
    write meets a pipe nobody reads. Returns (exit code, stderr, lines read).
    """
    env = {**os.environ, "PYTHONPATH": ROOT}
    r, w = os.pipe()
    reader = os.fdopen(r, "rb")
    if read_lines == 0:
        reader.close()
    try:
        proc = subprocess.Popen([sys.executable, "-m", "daemon.cli", *args], stdout=w,
                                stderr=subprocess.PIPE, env=env, cwd=ROOT)
    finally:
        os.close(w)
    lines = [reader.readline() for _ in range(read_lines)]
    reader.close()
    _, err = proc.communicate(timeout=30)
    return proc.returncode, err, lines


def many_models(n: int) -> str:
    return "models:\n" + "".join(
        f"  - name: m{i}\n    target: {{topic: site/p{i}/t}}\n"
        f"    inputs: [{{name: x, topic: site/p{i}/x}}]\n" for i in range(n))


def test_output_into_a_pipe_cut_short_by_its_reader_ends_quietly(tmp_path):
    # ~250 kB of resolved config: far more than a pipe holds, so the program is still writing
    # when the reader goes away after its first line.
    path = write(tmp_path, "metrics: {listen: null}\n" + many_models(150))
    code, err, lines = edgeprop_into_pipe("check", "-c", path, read_lines=1)
    assert lines[0].startswith(b"# ") and b"valid" in lines[0]
    assert err == b"", err.decode()
    assert code == 128 + 13          # as a tool stopped by SIGPIPE reports to the shell


@pytest.mark.parametrize("command", ["checkpoints", "status", "check"])
def test_output_into_a_pipe_nobody_reads_ends_quietly(tmp_path, command):
    path = write(tmp_path, "state_dir: st\nmetrics: {listen: null}\n" + MODEL)
    code, err, _ = edgeprop_into_pipe(command, "-c", path, read_lines=0)
    assert b"Traceback" not in err and b"BrokenPipeError" not in err, err.decode()
    assert code == 128 + 13



# ---- check does on disk what run does before it connects -------------------------------------

def private_file(tmp_path, name: str, text: str) -> str:
    path = tmp_path / name
    path.write_text(text)
    path.chmod(0o600)
    return str(path)


def problem_lines(stderr: str) -> list[str]:
    lines = [line.strip() for line in stderr.splitlines()]
    assert lines[0] == "edgeprop: invalid configuration:", stderr
    return lines[1:]


def test_check_loads_the_files_run_loads_and_reports_them_with_the_other_problems(tmp_path):
    for name in ("ca.pem", "client.pem", "client.key", "server.pem", "server.key"):
        (tmp_path / name).write_text("garbage\n")
    broker_pass = private_file(tmp_path, "broker.pass", "")
    private_file(tmp_path, "metrics.pass", "")
    path = write(tmp_path, """\
broker:
  username: edge
  password_file: broker.pass
  tls: {ca_file: ca.pem, cert_file: client.pem, key_file: client.key}
metrics:
  listen: "no.such.host.invalid:9740"
  tls: {cert_file: server.pem, key_file: server.key}
  basic_auth: {username: prom, password_file: metrics.pass}
""" + MODEL.replace("learning_rate: 0.005", "learning_rate: -1"))
    res = edgeprop("check", "-c", path)
    assert res.returncode == 2 and res.stdout == "", res.stderr
    lines = problem_lines(res.stderr)
    ca = str(tmp_path / "ca.pem")

    def one(prefix: str) -> str:
        found = [line for line in lines if line.startswith(prefix)]
        assert len(found) == 1, (prefix, lines)
        return found[0]

    assert one(f"broker.password_file: {broker_pass!r} is empty; write the broker password into it")
    assert "NO_CERTIFICATE_OR_CRL_FOUND" in one(f"broker.tls.ca_file: cannot load CA certificates "
                                                f"from {ca!r}")
    assert "expected" in one("broker.tls.cert_file/key_file: cannot load client certificate "
                             f"{str(tmp_path / 'client.pem')!r}")
    assert one("metrics.tls: cannot load cert_file")
    assert one("metrics.basic_auth.password_file:").endswith("is empty; put the password on its "
                                                             "first line")
    assert one("metrics.listen: cannot resolve host 'no.such.host.invalid' (")
    assert one("models[0].training.learning_rate: -1.0 is out of range")
    assert len(lines) == 7, lines


def test_check_accepts_good_tls_files_and_neither_connects_nor_writes(tmp_path, pki):
    import socket
    private_file(tmp_path, "broker.pass", "pump-station-7\n")
    private_file(tmp_path, "metrics.pass", "scrape\n")
    # A broker port that notes any connection, and a metrics port already held (by a running
    # daemon, say): check must neither connect to the one nor bind the other.
    with socket.socket() as broker, socket.socket() as held:
        broker.bind(("127.0.0.1", 0))
        broker.listen(1)
        held.bind(("127.0.0.1", 0))
        held.listen(1)
        path = write(tmp_path, f"""\
broker:
  host: 127.0.0.1
  port: {broker.getsockname()[1]}
  username: edge
  password_file: broker.pass
  tls: {{ca_file: {pki.ca_file}, cert_file: {pki.client_cert}, key_file: {pki.client_key}}}
metrics:
  listen: "localhost:{held.getsockname()[1]}"
  tls: {{cert_file: {pki.server_cert}, key_file: {pki.server_key}}}
  basic_auth: {{username: prom, password_file: metrics.pass}}
state_dir: state
""" + MODEL)
        before = sorted(os.listdir(tmp_path))
        res = edgeprop("check", "-c", path)
        assert res.returncode == 0, res.stderr
        broker.setblocking(False)
        with pytest.raises(BlockingIOError):
            broker.accept()
    assert sorted(os.listdir(tmp_path)) == before          # no state directory, nothing else


def test_check_refuses_a_state_dir_every_user_may_write_as_run_does(tmp_path):
    state = tmp_path / "state"
    state.mkdir()
    state.chmod(0o777)
    path = write(tmp_path, "state_dir: state\nmetrics: {listen: null}\n" + MODEL)
    res = edgeprop("check", "-c", path)
    assert res.returncode == 2
    assert problem_lines(res.stderr) == [
        f"state_dir: state directory {state} is writable by every user (mode 0o777); anyone "
        f"could replace the model's weights. Fix it with: chmod o-w {state}"]


def test_run_refuses_an_empty_password_file_before_connecting(tmp_path):
    secret = private_file(tmp_path, "broker.pass", "\n")
    path = write(tmp_path, "broker: {username: edge, password_file: broker.pass}\n"
                           "metrics: {listen: null}\nstate_dir: state\n" + MODEL)
    res = edgeprop("run", "-c", path, timeout=20)
    assert res.returncode == 2, res.stderr
    assert (f"broker.password_file: {secret!r} is empty; write the broker password into it"
            in res.stderr)
    # refused before the models are set up: no model_fresh line ahead of the refusal to confuse
    assert "event=model_" not in res.stderr, res.stderr


# ---- file arguments: a directory, a missing file and an unreadable one each say so -------------

CAPTURE_EXPECTED = "expected a capture file written by `edgeprop record`"


@pytest.fixture
def replay_setup(tmp_path):
    """A config and an empty capture file (replays in no time)."""
    config = write(tmp_path, "metrics: {listen: null}\n" + MODEL)
    capture = tmp_path / "cap.jsonl"
    capture.write_text("")
    return config, str(capture)


@pytest.mark.parametrize("command", ["replay", "tune"])
def test_capture_argument_that_is_a_directory_or_missing_says_which(tmp_path, replay_setup, command):
    config, _ = replay_setup
    extra = ["--out", str(tmp_path / "o.jsonl")] if command == "replay" else ["--learning-rates", "0.01"]
    for capture, what in ((tmp_path, "is a directory"), (tmp_path / "none.jsonl", "no such file")):
        res = edgeprop(command, "-c", config, "--capture", str(capture), *extra)
        assert res.returncode == 1, res.stderr
        assert f"edgeprop: --capture {capture}: {what}; {CAPTURE_EXPECTED}\n" == res.stderr


def test_capture_argument_that_is_no_regular_file_says_so(tmp_path, replay_setup):
    config, _ = replay_setup
    fifo = tmp_path / "fifo"
    os.mkfifo(fifo)
    res = edgeprop("replay", "-c", config, "--capture", str(fifo), "--out", str(tmp_path / "o.jsonl"),
                   timeout=10)
    assert res.returncode == 1
    assert res.stderr == f"edgeprop: --capture {fifo}: is not a regular file; {CAPTURE_EXPECTED}\n"


@pytest.mark.skipif(os.geteuid() == 0, reason="root reads files whatever their mode")
def test_capture_argument_that_cannot_be_read_says_why(tmp_path, replay_setup):
    config, capture = replay_setup
    os.chmod(capture, 0)
    res = edgeprop("replay", "-c", config, "--capture", capture, "--out", str(tmp_path / "o.jsonl"))
    assert res.returncode == 1
    assert res.stderr == (f"edgeprop: --capture {capture}: cannot read it (Permission denied); "
                          f"{CAPTURE_EXPECTED}\n")


def test_replay_output_paths_are_checked_before_replaying(tmp_path, replay_setup):
    config, capture = replay_setup
    existing = tmp_path / "report.png"
    existing.write_text("")
    cases = [
        (["--out", str(tmp_path)], f"--out {tmp_path}: is a directory; expected a file name for "
                                   f"the published messages"),
        (["--out", str(tmp_path / "no" / "o.jsonl")],
         f"--out {tmp_path / 'no' / 'o.jsonl'}: directory {tmp_path / 'no'} does not exist; "
         f"expected a file name for the published messages"),
        (["--out", str(tmp_path / "o.jsonl"), "--report", str(existing)],
         f"--report {existing}: exists and is not a directory; expected a directory for the "
         f"plot and summary"),
    ]
    for args, message in cases:
        res = edgeprop("replay", "-c", config, "--capture", capture, *args)
        assert res.returncode == 1, (args, res.stdout, res.stderr)
        assert res.stderr.startswith(f"edgeprop: {message}"), (args, res.stderr)
        assert not (tmp_path / "o.jsonl").exists()


def test_record_out_that_is_a_directory_says_so_before_connecting(tmp_path):
    # port 1: were it to connect first, the error would be an unreachable broker
    config = write(tmp_path, "broker: {host: 127.0.0.1, port: 1}\nmetrics: {listen: null}\n" + MODEL)
    res = edgeprop("record", "-c", config, "--out", str(tmp_path), "--count", "1")
    assert res.returncode == 1
    assert res.stderr.startswith(f"edgeprop: --out {tmp_path}: is a directory; expected a new "
                                 f"file name for the capture"), res.stderr


def test_demo_out_that_is_a_file_says_so(tmp_path):
    taken = tmp_path / "demo"
    taken.write_text("")
    res = edgeprop("demo", "--out", str(taken), "--broker", "127.0.0.1:1")
    assert res.returncode == 1
    assert res.stderr.startswith(f"edgeprop: --out {taken}: exists and is not a directory; "
                                 f"expected a directory for the plot and summary"), res.stderr


# ---- numeric arguments: zero, negative and non-finite values are usage errors ------------------

@pytest.mark.parametrize("args, option", [
    (["record", "--out", "x.jsonl", "--duration", "-5"], "--duration"),
    (["record", "--out", "x.jsonl", "--duration", "0"], "--duration"),
    (["record", "--out", "x.jsonl", "--duration", "nan"], "--duration"),
    (["record", "--out", "x.jsonl", "--duration", "inf"], "--duration"),
    (["record", "--out", "x.jsonl", "--count", "0"], "--count"),
    (["record", "--out", "x.jsonl", "--count", "-3"], "--count"),
    (["tune", "--capture", "c.jsonl", "--learning-rates", "0.01", "--jobs", "0"], "--jobs"),
    (["tune", "--capture", "c.jsonl", "--learning-rates", "0.01", "--jobs", "-2"], "--jobs"),
    (["demo", "--duration", "-1"], "--duration"),
    (["demo", "--speed", "0"], "--speed"),
    (["demo", "--speed", "inf"], "--speed"),
])
def test_numeric_arguments_out_of_range_are_usage_errors(tmp_path, args, option):
    config = write(tmp_path, "broker: {host: 127.0.0.1, port: 1}\nmetrics: {listen: null}\n" + MODEL)
    full = args[:1] + (["-c", config] if args[0] != "demo" else []) + args[1:]
    res = edgeprop(*full, cwd=str(tmp_path))
    assert res.returncode == 2, res.stderr
    value = args[args.index(option) + 1]
    assert f"error: argument {option}: {value!r} is out of range; allowed " in res.stderr, res.stderr
    assert res.stdout == "" and not (tmp_path / "x.jsonl").exists()


def test_numeric_argument_that_is_no_number_names_what_is_allowed(tmp_path):
    config = write(tmp_path, MODEL)
    res = edgeprop("record", "-c", config, "--out", "x.jsonl", "--count", "1.5", cwd=str(tmp_path))
    assert res.returncode == 2
    assert "error: argument --count: '1.5' is not an integer; allowed an integer > 0" in res.stderr


@pytest.mark.parametrize("rates", ["0.01,nan", "inf"])
def test_learning_rates_must_be_finite(tmp_path, rates):
    config = write(tmp_path, MODEL)
    res = edgeprop("tune", "-c", config, "--capture", str(tmp_path / "none.jsonl"),
                   "--learning-rates", rates)
    assert res.returncode == 2, res.stderr
    assert f"--learning-rates: {rates!r}: every value must be a finite number > 0" in res.stderr


def test_check_reports_a_file_where_the_control_socket_goes(tmp_path):
    state = tmp_path / "state"
    state.mkdir(mode=0o700)
    (state / "control.sock").write_text("not a socket\n")
    path = write(tmp_path, f"state_dir: {state}\n" + MODEL)
    res = edgeprop("check", "-c", path)
    assert res.returncode == 2, (res.stdout, res.stderr)
    assert problem_lines(res.stderr) == [
        f"control.socket: {str(state / 'control.sock')!r} exists and is not a socket; run would "
        f"refuse to replace it: remove it, or set another control.socket"]
    (state / "control.sock").unlink()
    assert edgeprop("check", "-c", path).returncode == 0
