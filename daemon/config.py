"""YAML config into the frozen settings of ``daemon.settings``, with every problem reported at once.

Validation is a table per section (key -> kind with its allowed range or choices) so adding a key
is one line and every message reads alike: key path, the bad value, what is allowed. Defaults and
which keys may be null are read from the dataclasses themselves, so they live in one place.
"""
from __future__ import annotations

import dataclasses
import os
import stat

import yaml

from daemon import settings as S
from daemon.errors import CheckpointError, ConfigError
from daemon.config_kinds import (  # noqa: F401  (show is public API)
    BAD,
    seconds,
    INLINE_PASSWORD,
    SOCKET_PATH_MAX,
    _Choice,
    _Ctx,
    _DOT_PATH,
    _Float,
    _HOST,
    _Int,
    _IntList,
    _ListOf,
    _NAME,
    _NODE,
    _Path,
    _Section,
    _Str,
    _Topic,
    _bool,
    _join,
    _lags,
    _listen,
    _ok,
    _wrong,
    show,
)


# ---- checks across keys ----------------------------------------------------------------------

def _cert_with_key(values, raw, path, ctx):
    if _ok(values, "cert_file", "key_file") and (values["cert_file"] is None) != (
            values["key_file"] is None):
        missing = "key_file" if values["key_file"] is None else "cert_file"
        ctx.bad(_join(path, missing), "required key is missing; give cert_file and key_file "
                                      "together (client certificate), or neither")


def _broker(values, raw, path, ctx):
    lo, hi = values["reconnect_min_s"], values["reconnect_max_s"]
    if _ok(values, "reconnect_min_s", "reconnect_max_s") and lo > hi:
        ctx.bad(_join(path, "reconnect_max_s"), f"{show(hi)} is below reconnect_min_s "
                                                f"{show(lo)}; allowed >= reconnect_min_s")
    if raw.get("password_file") is not None and values["username"] is None:
        ctx.bad(_join(path, "username"), "required key is missing; password_file is set, "
                                         "so give the username it belongs to")


# ---- with preflight (edgeprop check): what run loads or looks up before it connects ----------
# Each reports through the module that does the loading at run time, so check and run agree.
# None writes, binds or connects; they are kept out of plain loads so that a reload or an
# operator command does not depend on name lookup or on certificates it does not use.

def _broker_files(values, raw, path, ctx):
    if not ctx.preflight:
        return
    from daemon.broker_access import link_file_problems
    password_file = values["password_file"] if _ok(values, "password_file") else None
    tls = values["tls"] if isinstance(values["tls"], S.TlsSettings) else None
    ctx.problems.extend(link_file_problems(password_file, tls))


def _metrics_endpoint(values, raw, path, ctx):
    if not ctx.preflight:
        return
    from daemon.metrics_http import endpoint_problems
    listen = values["listen"] if _ok(values, "listen") else None
    tls = values["tls"] if isinstance(values["tls"], S.MetricsTls) else None
    auth = values["basic_auth"] if isinstance(values["basic_auth"], S.MetricsAuth) else None
    ctx.problems.extend(endpoint_problems(listen, tls, auth))


def _state_dir_in_place(values, raw, path, ctx):
    """Only a state_dir that exists is checked, so check creates none (run would create it)."""
    state_dir = values["state_dir"]
    if not ctx.preflight or state_dir is BAD or not os.path.isdir(state_dir):
        return
    from daemon.checkpoints import ensure_private_dir
    try:
        ensure_private_dir(state_dir)
    except CheckpointError as exc:
        ctx.bad("state_dir", str(exc))


def _control_socket_in_place(values, raw, path, ctx):
    """A file or directory where the control socket goes: run would refuse to replace it."""
    state_dir, control = values["state_dir"], values["control"]
    if not ctx.preflight or state_dir is BAD or control is BAD:
        return
    sock = control.socket or os.path.join(state_dir, "control.sock")
    if os.path.lexists(sock) and not stat.S_ISSOCK(os.lstat(sock).st_mode):
        ctx.bad("control.socket", f"{show(sock)} exists and is not a socket; run would refuse to "
                                  f"replace it: remove it, or set another control.socket")


def _password_in_clear(values, raw, path, ctx):
    """Basic auth without TLS beyond loopback would send the scrape password in clear text."""
    listen, tls, auth = values["listen"], values["tls"], values["basic_auth"]
    if not isinstance(auth, S.MetricsAuth) or tls is not None or not isinstance(listen, str):
        return
    host = listen.rsplit(":", 1)[0].strip("[]")
    if host == "localhost" or _is_loopback(host):
        return
    ctx.bad("metrics.basic_auth", f"set with metrics.tls null on {show(listen)}: the scrape "
                                  f"password would cross the network in clear text; set "
                                  f"metrics.tls (cert_file, key_file) or listen on 127.0.0.1")


def _is_loopback(host: str) -> bool:
    import ipaddress
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False            # a name: it may resolve to anything


def _training(values, raw, path, ctx):
    if not _ok(values, "momentum", "nesterov", "optimizer"):
        return
    if values["nesterov"] and values["momentum"] == 0.0:
        ctx.bad(_join(path, "nesterov"), "true needs momentum > 0 (Nesterov is a form of "
                                         "momentum); set momentum, e.g. 0.9, or drop nesterov")
    if values["optimizer"] == "adam" and (values["momentum"] != 0.0 or values["nesterov"]):
        key = "momentum" if values["momentum"] != 0.0 else "nesterov"
        ctx.bad(_join(path, key), f"{show(values[key])} applies to optimizer 'sgd' only; "
                                  f"adam keeps its own moment estimates, so remove it")


def _model(values, raw, path, ctx):
    task, training = values["task"], values["training"]
    if task is not BAD and training is not BAD:
        given = isinstance(raw.get("training"), dict) and "loss" in raw["training"]
        if task == "binary" and not given:
            values["training"] = training = dataclasses.replace(training, loss="logistic")
        if task == "binary" and training.loss != "logistic":
            ctx.bad(f"{path}.training.loss", f"{show(training.loss)} does not fit task "
                                             f"'binary'; allowed 'logistic'")
        if task == "regression" and training.loss == "logistic":
            ctx.bad(f"{path}.training.loss", "'logistic' is for task 'binary'; allowed "
                                             "'squared' or 'huber' for task 'regression'")
    target, inputs, publish = values["target"], values["inputs"], values["publish"]
    if target is BAD or inputs is BAD:
        return
    for i, inp in enumerate(inputs):
        if inp is not BAD and (inp.topic, inp.field) == (target.topic, target.field) \
                and 0.0 in inp.lags_s:
            ctx.bad(f"{path}.inputs[{i}]", f"topic {show(inp.topic)} field {show(inp.field)} "
                    f"is this model's own target; at lag 0 the model would be fed its own "
                    f"answer (use only lags > 0 for an autoregressive input)")
    if publish is not BAD and publish.topic is not None:
        own = {target.topic} | {i.topic for i in inputs if i is not BAD}
        if publish.topic in own:
            ctx.bad(f"{path}.publish.topic", f"{show(publish.topic)} is a topic this model "
                                             f"reads; it would consume its own predictions")


def _root(values, raw, path, ctx):
    node, models, state_dir, control = (values[k] for k in ("node", "models", "state_dir",
                                                            "control"))
    if node is not BAD and models is not BAD:
        status = f"edgeprop/{node}/status"
        first: dict[str, int] = {}
        names: set[str] = set()
        for i, m in enumerate(models):
            if m is BAD or m.name in names:       # a repeated name is reported already
                continue
            names.add(m.name)
            topic = m.publish.topic or f"edgeprop/{node}/{m.name}"
            where = f"models[{i}].publish.topic" if m.publish.topic else f"models[{i}].name"
            if topic == status:
                ctx.bad(where, f"publishing to {topic!r} collides with the daemon's status "
                               f"topic; choose another model name or publish.topic")
            elif topic in first:
                ctx.bad(where, f"publishing to {topic!r} collides with models[{first[topic]}]; "
                               f"give each model its own publish topic")
            else:
                first[topic] = i
    if state_dir is not BAD and control is not BAD:
        sock = control.socket or os.path.join(state_dir, "control.sock")
        size = len(os.fsencode(sock))
        if size > SOCKET_PATH_MAX:
            source = "" if control.socket else " (derived from state_dir)"
            ctx.bad("control.socket", f"{show(sock)}{source} is {size} bytes long; a Unix "
                                      f"socket path allows at most {SOCKET_PATH_MAX}; set a "
                                      f"shorter control.socket")


# ---- the schema: one table per section; defaults and nullability come from daemon.settings ----

_POS = _Float(0, lo_open=True)
_NAME_RULE = "use letters, digits and _ only (it becomes a metrics label and a directory name)"
_FIELD_RULE = "give a dot path into the JSON object like 'value' or 'data.temp'"

_SOURCE_KEYS = {
    "topic": _Topic(),
    "field": _Str(_DOT_PATH, _FIELD_RULE),
    "time_field": _Str(_DOT_PATH, _FIELD_RULE),
}
_INPUT = _Section(S.InputSettings, {
    "name": _Str(_NAME, _NAME_RULE),
    **_SOURCE_KEYS,
    "lags_s": _lags,
})
_MODEL = _Section(S.ModelSettings, {
    "name": _Str(_NAME, _NAME_RULE),
    "task": _Choice("regression", "binary"),
    "target": _Section(S.SourceSettings, dict(_SOURCE_KEYS)),
    "inputs": _ListOf(_INPUT, "input"),
    "align": _Section(S.AlignSettings, {
        "max_age_s": seconds(),
        "late_tolerance_s": seconds(zero_allowed=True),
        "max_ahead_s": seconds(),
        "history": _Int(1, 1_000_000),
    }),
    "net": _Section(S.NetSettings, {
        "hidden": _IntList(_Int(1, 4096), 8, "hidden layers"),
        "activation": _Choice("tanh", "relu", "leaky_relu", "sigmoid", "identity"),
        "seed": _Int(0, 2**63 - 1),
        "dtype": _Choice("float64", "float32"),
        "init": _Choice("auto", "glorot", "he"),
    }),
    "training": _Section(S.TrainingSettings, {
        "learning_rate": _Float(0, 10, lo_open=True),
        "batch_size": _Int(1, 65536),
        "window": _Int(1, 10_000_000),
        "steps_per_sample": _Int(1, 1000),
        "loss": _Choice("squared", "huber", "logistic"),
        "huber_delta": _POS,
        "optimizer": _Choice("sgd", "adam"),
        "momentum": _Float(0, 1, hi_open=True),
        "nesterov": _bool,
        "weight_decay": _Float(0, 1),
        "clip_norm": _POS,
        "warmup_samples": _Int(0, 10_000_000),
        "sampling": _Choice("uniform", "recent"),
        "input_clip": _Float(0, 1000, lo_open=True),
    }, checks=(_training,)),
    "drift": _Section(S.DriftSettings, {
        "detector": _Choice("page_hinkley", "adwin", "none"),
        "delta": _Float(0),
        "threshold": _POS,
        "min_samples": _Int(1),
        "confidence": _Float(0, 1, lo_open=True, hi_open=True),
        "input_threshold": _POS,
        "input_reference": _Int(2),
        "input_recent": _Int(1),
        "on_drift": _Choice("none", "boost_lr", "shrink_window", "restore"),
        "boost_factor": _Float(1, 1000, lo_open=True),
        "boost_samples": _Int(1),
        "hold_samples": _Int(0),
    }),
    "interval": _Section(S.IntervalSettings, {
        "coverage": _Float(0, 1, lo_open=True, hi_open=True),
        "window": _Int(10, 1_000_000),    # fewer residuals give no usable quantile (common practice, no source)
        "adapt_rate": _Float(0, 1, hi_open=True),
    }),
    "guard": _Section(S.GuardSettings, {
        "enabled": _bool,
        "blowup_factor": _Float(1, lo_open=True),
        "blowup_samples": _Int(1),
        "lr_factor": _Float(0, 1, lo_open=True),
    }),
    "publish": _Section(S.PublishSettings, {
        "topic": _Topic(publish=True),
        "qos": _Int(0, 2),
        "retain": _bool,
        "every_s": seconds(),
    }),
}, checks=(_model,))

SCHEMA = _Section(S.Settings, {
    "node": _Str(_NODE, "use letters, digits, _ and - only (it goes into topics and labels)"),
    "broker": _Section(S.BrokerSettings, {
        "host": _Str(_HOST, "give a host name or IP address only, without scheme or port"),
        "port": _Int(1, 65535),
        "client_id": _Str(),
        "username": _Str(),
        "password_file": _Path(must_exist=True, secret=True),
        "tls": _Section(S.TlsSettings, {
            "ca_file": _Path(must_exist=True),
            "cert_file": _Path(must_exist=True),
            "key_file": _Path(must_exist=True),
        }, nullable=True, checks=(_cert_with_key,)),
        "keepalive_s": _Int(1, 65535),
        "protocol": _Choice("3.1.1", "5", aliases={5: "5"}),
        "reconnect_min_s": _Float(0, 3600, lo_open=True),
        "reconnect_max_s": _Float(0, 86400, lo_open=True),
        "queue_size": _Int(1, 10_000_000),
        "queue_bytes": _Int(65536, 2**31 - 1),
        "max_payload_bytes": _Int(1, 268_435_455),   # MQTT 3.1.1 section 2.2.3 maximum
    }, checks=(_broker, _broker_files), refused={"password": INLINE_PASSWORD}),
    "state_dir": _Path(is_dir=True),
    "checkpoints": _Section(S.CheckpointSettings, {
        "every_s": seconds(),
        "keep": _Int(1),
        "fresh_on_mismatch": _bool,
    }),
    "metrics": _Section(S.MetricsSettings, {
        "listen": _listen,
        "tls": _Section(S.MetricsTls, {
            "cert_file": _Path(must_exist=True),
            "key_file": _Path(must_exist=True),
        }, nullable=True),
        "basic_auth": _Section(S.MetricsAuth, {
            "username": _Str(),
            "password_file": _Path(must_exist=True, secret=True),
        }, nullable=True, refused={"password": INLINE_PASSWORD}),
    }, checks=(_password_in_clear, _metrics_endpoint)),
    "control": _Section(S.ControlSettings, {"socket": _Path()}),
    "logging": _Section(S.LoggingSettings, {"level": _Choice("debug", "info", "warning", "error")}),
    "models": _ListOf(_MODEL, "model"),
}, checks=(_root, _state_dir_in_place, _control_socket_in_place))


# ---- public API ------------------------------------------------------------------------------

class _Loader(yaml.SafeLoader):
    """SafeLoader that also notes repeated keys, which plain YAML silently collapses to the last."""

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self.duplicates: list[str] = []

    def construct_mapping(self, node, deep=False):
        first: dict[object, int] = {}
        for key_node, _ in node.value:
            if not isinstance(key_node, yaml.ScalarNode) or key_node.tag.endswith(":merge"):
                continue
            key = self.construct_object(key_node, deep=True)
            line = key_node.start_mark.line + 1
            if key in first:
                self.duplicates.append(
                    f"line {line}, column {key_node.start_mark.column + 1}: key {show(key)} "
                    f"appears again (first on line {first[key]}); YAML would keep only the "
                    f"last one, so merge or remove one")
            else:
                first[key] = line
        return super().construct_mapping(node, deep=deep)


def load_config(path: str, preflight: bool = False) -> S.Settings:
    """Read and validate the YAML config at ``path``; relative paths in it start at its directory.

    With ``preflight`` (``edgeprop check``), also report what ``run`` would refuse on disk before
    it connects: password and TLS files that do not load, a metrics host that does not resolve,
    an existing state_dir every user may write to.
    """
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except OSError as exc:
        raise ConfigError([f"{path}: cannot read the config file: {exc.strerror or exc}"]) from None
    except UnicodeDecodeError as exc:
        raise ConfigError([f"{path}: not UTF-8 text (bad byte at offset {exc.start})"]) from None
    loader = None
    try:
        loader = _Loader(text)
        raw = loader.get_single_data()
    except yaml.reader.ReaderError as exc:          # a control character such as NUL
        pos = exc.position
        where = f"{path}:{text.count(chr(10), 0, pos) + 1}:{pos - text.rfind(chr(10), 0, pos)}"
        raise ConfigError([f"{where}: not valid YAML: character #x{exc.character:04x} is not "
                           f"allowed in a YAML file"]) from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"{path}:{mark.line + 1}:{mark.column + 1}" if mark else path
        raise ConfigError([f"{where}: not valid YAML: {exc.problem or exc.context}"]) from None
    except yaml.YAMLError as exc:
        raise ConfigError([f"{path}: not valid YAML: {exc}"]) from None
    except RecursionError:     # the YAML composer recurses once per nesting level
        raise ConfigError([f"{path}: nested too deeply to read (lists or mappings inside each "
                           f"other hundreds of levels down); no edgeprop config needs that"]) from None
    finally:
        if loader is not None:
            loader.dispose()
    if raw is None:
        raise ConfigError([f"{path}: the file is empty; it needs at least 'models'"])
    repeated = [f"{path}: {d}" for d in loader.duplicates]
    try:
        settings = parse_config(raw, os.path.dirname(os.path.abspath(path)), preflight)
    except ConfigError as exc:
        raise ConfigError(repeated + exc.problems) from None
    except RecursionError:     # deep structures under a key that is validated or shown
        raise ConfigError(repeated + [f"{path}: nested too deeply to validate; no edgeprop "
                                      f"config needs lists or mappings that deep"]) from None
    if repeated:
        raise ConfigError(repeated)
    return settings


def parse_config(raw: object, base_dir: str | None = None, preflight: bool = False) -> S.Settings:
    """Validate a plain mapping (as YAML gives it) into ``Settings``, or raise every problem found.

    ``preflight`` as for ``load_config``.
    """
    ctx = _Ctx(base_dir, preflight)
    if not isinstance(raw, dict):
        _wrong(raw, "a mapping with keys such as node, broker and models", "", ctx)
        raise ConfigError(ctx.problems)
    settings = SCHEMA(raw, "", ctx)
    if ctx.problems or settings is BAD:
        raise ConfigError(ctx.problems or ["(top level): invalid configuration"])
    return settings


def _plain(obj: object, kind: object) -> object:
    if obj is None:
        return None
    if isinstance(kind, _Section):
        return {name: _plain(getattr(obj, name), sub) for name, sub in kind.keys.items()}
    if isinstance(kind, _ListOf):
        return [_plain(x, kind.item) for x in obj]
    return list(obj) if isinstance(obj, tuple) else obj


def resolved_config(settings: S.Settings, derived: bool = False) -> dict:
    """Every setting as plain YAML-safe data, defaults filled in; with ``derived``, also the
    publish topics and control socket the daemon computes when they are null.

    Settings hold no password (only ``password_file`` paths), so neither does this.
    """
    out = _plain(settings, SCHEMA)
    if derived:
        out["control"]["socket"] = settings.control_socket
        for model, plain in zip(settings.models, out["models"]):
            plain["publish"]["topic"] = settings.publish_topic(model)
    return out


def _changes(old: object, new: object, path: str, out: list[str]) -> None:
    if isinstance(old, dict) and isinstance(new, dict):
        for key in list(old) + [k for k in new if k not in old]:
            _changes(old.get(key), new.get(key), _join(path, key), out)
    elif _named(old) and _named(new):
        before = {x["name"]: x for x in old}
        after = {x["name"]: x for x in new}
        for name in list(before) + [n for n in after if n not in before]:
            where = f"{path}[{name}]"
            if name not in after:
                out.append(f"{where}: removed")
            elif name not in before:
                out.append(f"{where}: added")
            else:
                _changes(before[name], after[name], where, out)
    elif old != new:
        out.append(f"{path}: {show(old)} -> {show(new)}")


def _named(v: object) -> bool:
    return isinstance(v, list) and all(isinstance(x, dict) and "name" in x for x in v)


def diff_settings(old: S.Settings, new: S.Settings) -> list[str]:
    """Changed key paths, e.g. ``models[bearing_temp].training.learning_rate: 0.01 -> 0.005``."""
    out: list[str] = []
    _changes(resolved_config(old), resolved_config(new), "", out)
    return out
