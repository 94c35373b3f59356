"""Config loading: defaults, round trip, and one specific message per kind of mistake."""
from __future__ import annotations

import copy
import dataclasses
import os
import shutil

import pytest
import yaml

from daemon import settings as S
from daemon.config import (SCHEMA, _ListOf, _Section, diff_settings, load_config, parse_config,
                           resolved_config)
from daemon.errors import ConfigError

HERE = os.path.dirname(os.path.abspath(__file__))
CONFIGS = os.path.join(HERE, "configs")
EXAMPLE = os.path.join(os.path.dirname(HERE), "deploy", "example.yaml")

MINIMAL = {"models": [{"name": "bearing_temp", "target": {"topic": "site/p1/bearing_temp"},
                       "inputs": [{"name": "speed", "topic": "site/p1/speed"}]}]}


def problems_of(raw: dict, base_dir: str | None = None) -> list[str]:
    with pytest.raises(ConfigError) as info:
        parse_config(raw, base_dir)
    return info.value.problems


def with_model(**changes) -> dict:
    raw = copy.deepcopy(MINIMAL)
    raw["models"][0].update(changes)
    return raw


def secret(path: str, mode: int = 0o600) -> str:
    os.makedirs(os.path.dirname(path), exist_ok=True)
    with open(path, "w") as fh:
        fh.write("s3cret\n")
    os.chmod(path, mode)
    return path


@pytest.fixture
def full_dir(tmp_path):
    shutil.copy(os.path.join(CONFIGS, "full.yaml"), tmp_path / "full.yaml")
    secret(str(tmp_path / "secrets" / "broker.password"))
    (tmp_path / "secrets" / "ca.pem").write_text("not checked here\n")
    return tmp_path


# ---- good configs ----------------------------------------------------------------------------

def test_minimal_file_fills_every_default():
    s = load_config(os.path.join(CONFIGS, "minimal.yaml"))
    m = s.models[0]
    assert m.target == S.SourceSettings("site/p1/bearing_temp")
    assert m.inputs == (S.InputSettings("speed", "site/p1/speed"),)
    assert (m.task, m.training, m.net, m.drift) == ("regression", S.TrainingSettings(),
                                                     S.NetSettings(), S.DriftSettings())
    assert (s.node, s.broker, s.metrics, s.checkpoints) == (
        "edgeprop", S.BrokerSettings(), S.MetricsSettings(), S.CheckpointSettings())
    assert s.state_dir == os.path.join(CONFIGS, "state")   # default resolved beside the file


def test_full_file_parses_and_resolves_paths_against_its_directory(full_dir, monkeypatch):
    monkeypatch.chdir("/")                                   # the CWD must not matter
    s = load_config(str(full_dir / "full.yaml"))
    assert s.broker.password_file == str(full_dir / "secrets" / "broker.password")
    assert s.broker.tls == S.TlsSettings(str(full_dir / "secrets" / "ca.pem"))
    assert s.broker.protocol == "5" and s.broker.port == 8883
    assert s.state_dir == str(full_dir / "state")
    assert s.control_socket == str(full_dir / "run" / "edgeprop.sock")
    assert s.metrics.listen == "[::1]:9741"
    bt, leak = s.models
    assert bt.training.learning_rate == 0.001                # "1e-3" is text to PyYAML
    assert bt.training.clip_norm == 5.0 and isinstance(bt.training.clip_norm, float)
    assert bt.inputs[1].lags_s == (0.0, 30.0) and bt.n_features == 4
    assert bt.inputs[2].field == "data.temp"
    assert s.publish_topic(bt) == "plant/p1/bearing_temp_pred"
    assert leak.training.loss == "logistic"                  # binary default
    assert leak.net.hidden == () and s.publish_topic(leak) == "edgeprop/station-7/seal_leak"


def test_resolved_config_round_trips_through_yaml(full_dir):
    s = load_config(str(full_dir / "full.yaml"))
    text = yaml.safe_dump(resolved_config(s), sort_keys=False)
    assert parse_config(yaml.safe_load(text)) == s
    assert "s3cret" not in text


def keys_of(obj) -> set:
    if isinstance(obj, dict):
        return set(obj) | set().union(*(keys_of(v) for v in obj.values()))
    if isinstance(obj, list):
        return set().union(*(keys_of(v) for v in obj)) if obj else set()
    return set()


def test_resolved_config_has_no_password_key_and_derived_fills_topics(full_dir):
    s = load_config(str(full_dir / "full.yaml"))
    assert "password" not in keys_of(resolved_config(s))
    assert "password_file" in keys_of(resolved_config(s))
    plain = resolved_config(parse_config(MINIMAL, "/srv/ep"), derived=True)
    assert plain["models"][0]["publish"]["topic"] == "edgeprop/edgeprop/bearing_temp"
    assert plain["control"]["socket"] == "/srv/ep/state/control.sock"
    assert resolved_config(parse_config(MINIMAL))["models"][0]["publish"]["topic"] is None


def sections(kind, seen=None):
    seen = [] if seen is None else seen
    if isinstance(kind, _ListOf):
        kind = kind.item
    if isinstance(kind, _Section):
        seen.append(kind)
        for sub in kind.keys.values():
            sections(sub, seen)
    return seen


def test_schema_names_every_settings_field():
    found = sections(SCHEMA)
    for section in found:
        assert set(section.keys) == set(section.fields), section.cls.__name__
    every = {v for v in vars(S).values() if isinstance(v, type) and dataclasses.is_dataclass(v)}
    assert every == {s.cls for s in found}


def test_example_config_loads(tmp_path):
    with open(EXAMPLE) as fh:
        raw = yaml.safe_load(fh)
    raw["broker"]["password_file"] = secret(str(tmp_path / "broker.password"))
    s = parse_config(raw, os.path.dirname(EXAMPLE))
    assert s.node == "station-7" and [m.name for m in s.models] == ["bearing_temp", "seal_leak"]
    assert s.models[0].inputs[1].lags_s == (0.0, 30.0, 120.0)
    assert s.models[1].task == "binary" and s.models[1].training.loss == "logistic"
    assert parse_config(resolved_config(s)) == s


def test_example_fails_only_on_the_absent_password_file():
    if os.path.exists("/etc/edgeprop/broker.password"):
        pytest.skip("a real /etc/edgeprop/broker.password exists on this machine")
    with pytest.raises(ConfigError) as info:
        load_config(EXAMPLE)
    assert info.value.problems == [
        "broker.password_file: '/etc/edgeprop/broker.password' does not exist"]


# ---- one message per kind of mistake ----------------------------------------------------------

ERRORS = [
    # (change to the minimal config, exact problem expected)
    ({"training": {"learning_rate": -0.1}},
     "models[0].training.learning_rate: -0.1 is out of range; allowed (0, 10]"),
    ({"training": {"learning_rate": 11}},
     "models[0].training.learning_rate: 11.0 is out of range; allowed (0, 10]"),
    ({"training": {"learning_rate": float("nan")}},
     "models[0].training.learning_rate: nan is not a finite number"),
    ({"training": {"learning_rate": "fast"}},
     "models[0].training.learning_rate: 'fast' is a string; expected a number"),
    ({"training": {"batch_size": True}},
     "models[0].training.batch_size: true is a boolean; expected an integer"),
    ({"training": {"batch_size": 32.5}},
     "models[0].training.batch_size: 32.5 is a number; expected an integer"),
    ({"training": {"batch_size": 0}},
     "models[0].training.batch_size: 0 is out of range; allowed [1, 65536]"),
    ({"training": {"window": 10_000_001}},
     "models[0].training.window: 10000001 is out of range; allowed [1, 10000000]"),
    ({"training": {"batch_size": None}},
     "models[0].training.batch_size: null is not allowed here; expected an integer"),
    ({"training": {"loss": "logistic"}},
     "models[0].training.loss: 'logistic' is for task 'binary'; allowed 'squared' or 'huber' "
     "for task 'regression'"),
    ({"task": "binary", "training": {"loss": "squared"}},
     "models[0].training.loss: 'squared' does not fit task 'binary'; allowed 'logistic'"),
    ({"task": "classify"},
     "models[0].task: 'classify' is not one of 'regression', 'binary'"),
    ({"training": {"optimizer": "adamw"}},
     "models[0].training.optimizer: 'adamw' is not one of 'sgd', 'adam'; did you mean 'adam'?"),
    ({"training": {"nesterov": True}},
     "models[0].training.nesterov: true needs momentum > 0 (Nesterov is a form of momentum); "
     "set momentum, e.g. 0.9, or drop nesterov"),
    ({"training": {"optimizer": "adam", "momentum": 0.9}},
     "models[0].training.momentum: 0.9 applies to optimizer 'sgd' only; adam keeps its own "
     "moment estimates, so remove it"),
    ({"training": {"sampling": "newest"}},
     "models[0].training.sampling: 'newest' is not one of 'uniform', 'recent'"),
    ({"net": {"activation": "relux"}},
     "models[0].net.activation: 'relux' is not one of 'tanh', 'relu', 'leaky_relu', 'sigmoid', "
     "'identity'; did you mean 'relu'?"),
    ({"net": {"dtype": "float16"}},
     "models[0].net.dtype: 'float16' is not one of 'float64', 'float32'; did you mean 'float64'?"),
    ({"net": {"hidden": [32, 0]}},
     "models[0].net.hidden[1]: 0 is out of range; allowed [1, 4096]"),
    ({"net": {"hidden": [8] * 9}},
     "models[0].net.hidden: [8, 8, 8, 8, 8, 8, 8, 8, 8] has 9 hidden layers; allowed at most 8"),
    ({"net": {"hidden": 32}},
     "models[0].net.hidden: 32 is an integer; expected a list of integers like [32, 32]"),
    ({"drift": {"detector": "cusum"}},
     "models[0].drift.detector: 'cusum' is not one of 'page_hinkley', 'adwin', 'none'"),
    ({"drift": {"on_drift": "reset"}},
     "models[0].drift.on_drift: 'reset' is not one of 'none', 'boost_lr', 'shrink_window', "
     "'restore'; did you mean 'restore'?"),
    ({"interval": {"coverage": 1}},
     "models[0].interval.coverage: 1.0 is out of range; allowed (0, 1)"),
    ({"publish": {"qos": 3}}, "models[0].publish.qos: 3 is out of range; allowed [0, 2]"),
    ({"publish": {"every_s": 0}}, "models[0].publish.every_s: 0.0 is out of range; allowed (0, 2592000]"),
    ({"publish": {"topic": "plant/#"}},
     "models[0].publish.topic: 'plant/#' contains the wildcard '#'; publish topics may not "
     "contain wildcards"),
    ({"publish": {"topic": "site/p1/speed"}},
     "models[0].publish.topic: 'site/p1/speed' is a topic this model reads; it would consume "
     "its own predictions"),
    ({"target": {"topic": "site/+/bearing_temp"}},
     "models[0].target.topic: 'site/+/bearing_temp' contains the wildcard '+'; subscribe to one "
     "exact topic here (wildcards are not allowed)"),
    ({"target": {"topic": ""}},
     "models[0].target.topic: '' is empty; an MQTT topic needs at least one character"),
    ({"target": {"topic": "site/p1/t", "field": "data..value"}},
     "models[0].target.field: 'data..value' is not allowed; give a dot path into the JSON "
     "object like 'value' or 'data.temp'"),
    ({"target": {"field": "value"}}, "models[0].target.topic: required key is missing"),
    ({"inputs": [{"name": "speed", "topic": "site/p1/speed", "lags_s": [0, -30]}]},
     "models[0].inputs[0].lags_s[1]: -30.0 is out of range; allowed >= 0"),
    ({"inputs": [{"name": "speed", "topic": "site/p1/speed", "lags_s": [0, "1e300"]}]},
     "models[0].inputs[0].lags_s[1]: 1e+300 is out of range; allowed [0, 2592000] seconds "
     "(30 days)"),
    ({"inputs": [{"name": "speed", "topic": "site/p1/speed", "lags_s": [2592000.5]}]},
     "models[0].inputs[0].lags_s[0]: 2592000.5 is out of range; allowed [0, 2592000] seconds "
     "(30 days)"),
    ({"inputs": [{"name": "speed", "topic": "site/p1/speed", "lags_s": [0, 30, 30]}]},
     "models[0].inputs[0].lags_s[2]: 30.0 appears twice in [0, 30, 30]; give each lag once"),
    ({"inputs": [{"name": "speed", "topic": "site/p1/speed", "lags_s": []}]},
     "models[0].inputs[0].lags_s: [] has 0 lags; allowed 1 to 64"),
    ({"inputs": [{"name": "speed", "topic": "site/p1/#"}]},
     "models[0].inputs[0].topic: 'site/p1/#' contains the wildcard '#'; subscribe to one exact "
     "topic here (wildcards are not allowed)"),
    ({"inputs": [{"topic": "site/p1/speed"}]}, "models[0].inputs[0].name: required key is missing"),
    ({"inputs": [{"name": "speed"}]}, "models[0].inputs[0].topic: required key is missing"),
    ({"inputs": []}, "models[0].inputs: [] is empty; give at least one input"),
    ({"inputs": [{"name": "speed", "topic": "a/1"}, {"name": "flow", "topic": "a/2"},
                 {"name": "speed", "topic": "a/3"}]},
     "models[0].inputs[2].name: 'speed' duplicates inputs[0].name"),
    ({"name": "bearing temp"},
     "models[0].name: 'bearing temp' is not allowed; use letters, digits and _ only (it becomes "
     "a metrics label and a directory name)"),
    ({"name": False},
     "models[0].name: false is a boolean; expected a string (YAML reads yes/no/on/off/true/false "
     "as booleans; quote the text)"),
    ({"inputs": [{"name": "own", "topic": "site/p1/bearing_temp"}]},
     "models[0].inputs[0]: topic 'site/p1/bearing_temp' field null is this model's own target; "
     "at lag 0 the model would be fed its own answer (use only lags > 0 for an autoregressive "
     "input)"),
    ({"trainig": {}}, "models[0].trainig: unknown key; did you mean 'training'?"),
    ({"colour": "red"},
     "models[0].colour: unknown key; allowed keys: name, task, target, inputs, align, net, "
     "training, drift, interval, guard, publish"),
    ({"align": {"max_age_s": 0}},
     "models[0].align.max_age_s: 0.0 is out of range; allowed (0, 2592000]"),
    ({"guard": "on"}, "models[0].guard: 'on' is a string; expected a mapping of keys"),
]


@pytest.mark.parametrize("change, expected", ERRORS, ids=[e[1].split(":")[0] + f"#{i}"
                                                          for i, e in enumerate(ERRORS)])
def test_each_model_mistake_has_its_message(change, expected):
    assert problems_of(with_model(**change)) == [expected]


TOP_ERRORS = [
    ({"node": "station 7"},
     "node: 'station 7' is not allowed; use letters, digits, _ and - only (it goes into topics "
     "and labels)"),
    ({"brokr": {}}, "brokr: unknown key; did you mean 'broker'?"),
    ({"broker": {"port": 70000}}, "broker.port: 70000 is out of range; allowed [1, 65535]"),
    ({"broker": {"host": "mqtt://plant"}},
     "broker.host: 'mqtt://plant' is not allowed; give a host name or IP address only, without "
     "scheme or port"),
    ({"broker": {"protocol": 4}},
     "broker.protocol: 4 is an integer; expected one of '3.1.1', '5'"),
    ({"broker": {"protocol": "3.1"}},
     "broker.protocol: '3.1' is not one of '3.1.1', '5'; did you mean '3.1.1'?"),
    ({"broker": {"username": "ep", "password": "hunter2"}},
     "broker.password: an inline password is refused: put the password alone in a file only "
     "the daemon's user can read (chmod 600) and set password_file to its path"),
    ({"broker": {"reconnect_min_s": 10, "reconnect_max_s": 5}},
     "broker.reconnect_max_s: 5.0 is below reconnect_min_s 10.0; allowed >= reconnect_min_s"),
    ({"checkpoints": {"keep": 0}}, "checkpoints.keep: 0 is out of range; allowed >= 1"),
    ({"checkpoints": {"every_s": 0}}, "checkpoints.every_s: 0.0 is out of range; allowed (0, 2592000]"),
    ({"metrics": {"listen": "9740"}},
     "metrics.listen: '9740' is not HOST:PORT with port 0..65535; e.g. '127.0.0.1:9740' or "
     "'[::1]:9740' (port 0 picks a free port and logs it; null disables the endpoint)"),
    ({"metrics": {"listen": "[::g]:9740"}},
     "metrics.listen: '[::g]:9740' is not HOST:PORT with port 0..65535; e.g. '127.0.0.1:9740' or "
     "'[::1]:9740' (port 0 picks a free port and logs it; null disables the endpoint)"),
    ({"metrics": {"basic_auth": {"username": "prom", "password": "x"}}},
     "metrics.basic_auth.password: an inline password is refused: put the password alone in a "
     "file only the daemon's user can read (chmod 600) and set password_file to its path\n"
     "metrics.basic_auth.password_file: required key is missing"),
    ({"logging": {"level": "verbose"}},
     "logging.level: 'verbose' is not one of 'debug', 'info', 'warning', 'error'"),
    ({"state_dir": 5}, "state_dir: 5 is an integer; expected a file path string"),
    ({"models": []}, "models: [] is empty; give at least one model"),
    ({"models": {"bearing_temp": {}}},
     "models: {bearing_temp: {}} is a mapping; expected a list of models"),
]


@pytest.mark.parametrize("change, expected", TOP_ERRORS, ids=[e[1].split(":")[0] + f"#{i}"
                                                              for i, e in enumerate(TOP_ERRORS)])
def test_each_top_level_mistake_has_its_message(change, expected):
    raw = copy.deepcopy(MINIMAL)
    raw.update(change)
    assert problems_of(raw) == expected.split("\n")


def test_models_missing_and_top_level_not_a_mapping():
    assert problems_of({"node": "station-7"}) == ["models: required key is missing"]
    assert problems_of(["models"]) == [
        "(top level): [models] is a list; expected a mapping with keys such as node, broker "
        "and models"]


def test_duplicate_model_names():
    raw = copy.deepcopy(MINIMAL)
    raw["models"].append(copy.deepcopy(raw["models"][0]))
    assert problems_of(raw) == ["models[1].name: 'bearing_temp' duplicates models[0].name"]


def test_publish_topic_collisions():
    raw = copy.deepcopy(MINIMAL)
    other = copy.deepcopy(raw["models"][0])
    other.update(name="seal_leak", publish={"topic": "edgeprop/edgeprop/bearing_temp"})
    raw["models"].append(other)
    assert problems_of(raw) == [
        "models[1].publish.topic: publishing to 'edgeprop/edgeprop/bearing_temp' collides with "
        "models[0]; give each model its own publish topic"]
    assert problems_of(with_model(name="status")) == [
        "models[0].name: publishing to 'edgeprop/edgeprop/status' collides with the daemon's "
        "status topic; choose another model name or publish.topic"]


def test_accepted_forms():
    s = parse_config(with_model(training={"learning_rate": 1}, net={"hidden": []},
                                align=None, inputs=[{"name": "bt", "topic": "site/p1/bearing_temp",
                                                     "lags_s": [60, 120, 2592000]}]))
    m = s.models[0]
    assert m.training.learning_rate == 1.0 and isinstance(m.training.learning_rate, float)
    assert m.net.hidden == () and m.align == S.AlignSettings()   # empty section: defaults
    assert m.inputs[0].lags_s == (60.0, 120.0, 2592000.0)   # lagged own target is autoregression
    for given, kept in ((5, "5"), ("5", "5"), ("3.1.1", "3.1.1")):
        raw = copy.deepcopy(MINIMAL)
        raw["broker"] = {"protocol": given}
        assert parse_config(raw).broker.protocol == kept
    for listen in ("[::1]:9740", "localhost:9100", None):
        raw = copy.deepcopy(MINIMAL)
        raw["metrics"] = {"listen": listen}
        assert parse_config(raw).metrics.listen == listen


# ---- files that must exist, secrets ------------------------------------------------------------

def test_password_file_must_exist_be_private_and_have_a_username(tmp_path):
    raw = copy.deepcopy(MINIMAL)
    raw["broker"] = {"username": "ep", "password_file": "broker.password"}
    missing = str(tmp_path / "broker.password")
    assert problems_of(raw, str(tmp_path)) == [
        f"broker.password_file: {missing!r} does not exist"]
    secret(missing, 0o644)
    assert problems_of(raw, str(tmp_path)) == [
        f"broker.password_file: {missing!r} has mode 0644 and is readable by group/others; "
        f"chmod 600 it"]
    os.chmod(missing, 0o600)
    assert parse_config(raw, str(tmp_path)).broker.password_file == missing
    del raw["broker"]["username"]
    assert problems_of(raw, str(tmp_path)) == [
        "broker.username: required key is missing; password_file is set, so give the username "
        "it belongs to"]


def test_tls_files(tmp_path):
    (tmp_path / "client.pem").write_text("x")
    raw = copy.deepcopy(MINIMAL)
    raw["broker"] = {"tls": {"ca_file": "ca.pem", "cert_file": "client.pem"}}
    assert problems_of(raw, str(tmp_path)) == [
        f"broker.tls.ca_file: {str(tmp_path / 'ca.pem')!r} does not exist",
        "broker.tls.key_file: required key is missing; give cert_file and key_file together "
        "(client certificate), or neither"]
    raw["broker"]["tls"] = {"cert_file": "client.pem"}
    assert problems_of(raw, str(tmp_path))[0] == "broker.tls.ca_file: required key is missing"


def test_control_socket_path_length(tmp_path):
    raw = copy.deepcopy(MINIMAL)
    raw["state_dir"] = "/var/lib/" + "x" * 100
    [problem] = problems_of(raw)
    assert problem.startswith("control.socket: '/var/lib/xxx")
    assert "(derived from state_dir) is 122 bytes long; a Unix socket path allows at most 107" \
        in problem
    raw["control"] = {"socket": "/run/edgeprop/control.sock"}
    assert parse_config(raw).control_socket == "/run/edgeprop/control.sock"


# ---- whole files -------------------------------------------------------------------------------

def test_every_mistake_in_a_file_is_reported_at_once():
    with pytest.raises(ConfigError) as info:
        load_config(os.path.join(CONFIGS, "many_errors.yaml"))
    assert sorted(p.split(":")[0] for p in info.value.problems) == sorted([
        "node", "brokr", "models[0].target.topic", "models[0].inputs[1].name",
        "models[0].trainig", "models[1].training.learning_rate", "models[1].net.activation"])
    assert "-0.1 is out of range; allowed (0, 10]" in str(info.value)


def test_file_problems_name_the_file_and_position(tmp_path):
    missing = str(tmp_path / "nope.yaml")
    with pytest.raises(ConfigError) as info:
        load_config(missing)
    assert info.value.problems == [f"{missing}: cannot read the config file: No such file or "
                                   f"directory"]
    bad = os.path.join(CONFIGS, "not_yaml.yaml")
    with pytest.raises(ConfigError) as info:
        load_config(bad)
    [problem] = info.value.problems
    assert problem.startswith(f"{bad}:4:") and "not valid YAML" in problem
    (tmp_path / "empty.yaml").write_text("# nothing yet\n")
    with pytest.raises(ConfigError, match="the file is empty"):
        load_config(str(tmp_path / "empty.yaml"))


def test_repeated_key_is_reported_with_its_line():
    path = os.path.join(CONFIGS, "repeated_key.yaml")
    with pytest.raises(ConfigError) as info:
        load_config(path)
    assert info.value.problems == [
        f"{path}: line 7, column 5: key 'training' appears again (first on line 6); YAML would "
        f"keep only the last one, so merge or remove one"]


def test_yaml_merge_keys_are_not_repeats(tmp_path):
    (tmp_path / "c.yaml").write_text(
        "models:\n  - name: m\n    target: {topic: a/t}\n    inputs: [{name: i, topic: a/i}]\n"
        "    training:\n      <<: {learning_rate: 0.02, batch_size: 8}\n      batch_size: 16\n")
    tr = load_config(str(tmp_path / "c.yaml")).models[0].training
    assert (tr.learning_rate, tr.batch_size) == (0.02, 16)


# ---- reload diff -------------------------------------------------------------------------------

def test_diff_settings_names_changed_paths():
    old = parse_config(MINIMAL)
    assert diff_settings(old, old) == []
    raw = with_model(training={"learning_rate": 0.005},
                     inputs=[{"name": "speed", "topic": "site/p1/speed", "lags_s": [0, 30]},
                             {"name": "flow", "topic": "site/p1/flow"}])
    raw["models"].append({"name": "seal_leak", "task": "binary", "target": {"topic": "a/leak"},
                          "inputs": [{"name": "flow", "topic": "site/p1/flow"}]})
    raw["logging"] = {"level": "debug"}
    assert diff_settings(old, parse_config(raw)) == [
        "logging.level: 'info' -> 'debug'",
        "models[bearing_temp].inputs[speed].lags_s: [0.0] -> [0.0, 30.0]",
        "models[bearing_temp].inputs[flow]: added",
        "models[bearing_temp].training.learning_rate: 0.01 -> 0.005",
        "models[seal_leak]: added",
    ]
    assert diff_settings(parse_config(raw), old)[-1] == "models[seal_leak]: removed"


def test_ages_and_periods_over_30_days_are_refused_all_at_once():
    raw = with_model(align={"max_age_s": 1e300, "late_tolerance_s": 4e6, "max_ahead_s": 0},
                     publish={"every_s": 1e9})
    raw["checkpoints"] = {"every_s": 3e7}              # 3e2 mistyped: no save for a year
    assert sorted(problems_of(raw)) == [
        "checkpoints.every_s: 30000000.0 is out of range; allowed (0, 2592000]",
        "models[0].align.late_tolerance_s: 4000000.0 is out of range; allowed [0, 2592000]",
        "models[0].align.max_age_s: 1e+300 is out of range; allowed (0, 2592000]",
        "models[0].align.max_ahead_s: 0.0 is out of range; allowed (0, 2592000]",
        "models[0].publish.every_s: 1000000000.0 is out of range; allowed (0, 2592000]",
    ]
    ok = with_model(align={"max_age_s": 2592000, "late_tolerance_s": 0}, publish={"every_s": 0.5})
    parse_config(ok)


def test_basic_auth_without_tls_is_refused_beyond_loopback(tmp_path):
    pw = secret(str(tmp_path / "metrics.pass"))
    auth = {"username": "prom", "password_file": pw}
    for listen in ("0.0.0.0:9740", "192.168.10.5:9740", "[::]:9740", "gateway.plant.lan:9740"):
        raw = dict(MINIMAL, metrics={"listen": listen, "basic_auth": auth})
        assert problems_of(raw) == [
            f"metrics.basic_auth: set with metrics.tls null on {listen!r}: the scrape password "
            f"would cross the network in clear text; set metrics.tls (cert_file, key_file) or "
            f"listen on 127.0.0.1"], listen
    for listen in ("127.0.0.1:9740", "[::1]:9740", "localhost:9740"):
        parse_config(dict(MINIMAL, metrics={"listen": listen, "basic_auth": auth}))


def test_world_readable_private_keys_are_named_by_their_key(tmp_path):
    """The key inside a certificate file (no key_file) and the metrics key count too; group
    read access (0640) does not."""
    from daemon.key_files import world_readable_keys
    files = {}
    for name, mode in (("ca.pem", 0o644), ("both.pem", 0o644), ("metrics.key", 0o604),
                       ("metrics.crt", 0o644)):
        files[name] = str(tmp_path / name)
        (tmp_path / name).write_text("x")
        os.chmod(files[name], mode)
    base = load_config(os.path.join(CONFIGS, "minimal.yaml"))
    s = dataclasses.replace(
        base, broker=dataclasses.replace(base.broker, tls=S.TlsSettings(files["ca.pem"], files["both.pem"])),
        metrics=dataclasses.replace(base.metrics, tls=S.MetricsTls(files["metrics.crt"], files["metrics.key"])))
    assert [w.split(":")[0] for w in world_readable_keys(s)] == ["broker.tls.cert_file",
                                                                 "metrics.tls.key_file"]
    assert "has mode 0604" in world_readable_keys(s)[1]
    os.chmod(files["both.pem"], 0o640)
    os.chmod(files["metrics.key"], 0o600)
    assert world_readable_keys(s) == []
    assert world_readable_keys(base) == []
