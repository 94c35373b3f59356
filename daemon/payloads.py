"""Turn one MQTT payload into timed readings, or say exactly why it cannot be used.

Three shapes arrive from plant gateways: a bare number (``61.2``), a JSON object
read through a dot path (``field: data.flow``), and a SenML pack (RFC 8428).
Every failure is a ``PayloadError`` whose ``reason`` becomes a metrics label, so
the worker loop can count it and go on; nothing else may escape ``decode``.
"""
from __future__ import annotations

import json
import math
from typing import Any, NamedTuple, Union

from daemon.errors import PayloadError
from daemon.settings import Settings, SourceSettings

# 2200-01-01T00:00:00Z as epoch seconds (calendar.timegm). A sensor clock past
# it is broken, or is sending milliseconds.
LATEST_EPOCH_S = 7258118400.0

# RFC 8428 section 4.5.3: a resolved time below 2**28 is relative to "now".
SENML_RELATIVE_LIMIT = 2.0 ** 28
# RFC 8428 section 4.4: the SenML version this reader understands (default 10).
SENML_VERSION = 10
_SENML_VALUES = ("v", "vs", "vb", "vd")

_DECODER = json.JSONDecoder()      # holds no state between calls; json.loads keeps one too

REASONS = ("oversize", "undecodable", "non_finite", "wrong_type", "missing_field",
           "bad_time", "bad_senml", "unknown_topic")


class Reading(NamedTuple):
    """One measured value at a time (epoch seconds)."""

    t: float
    value: float


def decode(payload: bytes, source: SourceSettings, arrival_t: float,
           max_bytes: int) -> list[Reading]:
    """Decode one payload for one source; raise ``PayloadError`` when it is unusable."""
    if len(payload) > max_bytes:
        raise PayloadError("oversize", f"{len(payload)} bytes on {source.topic!r}, "
                           f"limit broker.max_payload_bytes = {max_bytes}")
    try:
        text = str(payload, "utf-8")
    except UnicodeDecodeError as exc:
        raise PayloadError("undecodable", f"payload on {source.topic!r} is not UTF-8 "
                           f"(byte {exc.start})") from None
    if source.field is None:
        bare = _bare_number(text)
        if bare is not None:
            return [Reading(arrival_t, _finite(bare, "payload", source))]
    doc = _parse_json(text, source)
    if isinstance(doc, list):
        return _from_senml(doc, source, arrival_t)
    if source.field is None:
        if isinstance(doc, dict):
            raise PayloadError("wrong_type", f"payload on {source.topic!r} is a JSON object; "
                               f"set 'field' to the dot path of the value "
                               f"(keys: {_key_list(doc)})")
        raise PayloadError("wrong_type", f"payload on {source.topic!r} is {_kind(doc)}, "
                           f"expected a number")
    if not isinstance(doc, dict):
        raise PayloadError("wrong_type", f"payload on {source.topic!r} is {_kind(doc)}, "
                           f"expected a JSON object holding {source.field!r} "
                           f"(remove 'field' for bare numbers)")
    # The common case first: a flat key holding a plain float in range; anything else
    # takes the checking path below, which names what is wrong.
    value = doc.get(source.field) if "." not in source.field else None
    if not (type(value) is float and -MAX_MAGNITUDE <= value <= MAX_MAGNITUDE):
        value = _number(_lookup(doc, source.field, source), source.field, source)
    if source.time_field is None:
        return [Reading(arrival_t, value)]
    t = doc.get(source.time_field) if "." not in source.time_field else None
    if not (type(t) is float and 0.0 <= t <= LATEST_EPOCH_S):
        t = _time_value(_lookup(doc, source.time_field, source), source.time_field, source)
    return [Reading(t, value)]


def _bare_number(text: str) -> float | None:
    """The number a bare payload holds, or None when it is not a bare number."""
    try:
        x = float(text)
    except ValueError:
        return None
    # float() also takes "1_000"; no sensor means that, so leave it to the JSON path.
    return None if "_" in text else x


def _parse_json(text: str, source: SourceSettings) -> Any:
    # raw_decode at 0 is json.loads minus whitespace skipping and the setup around it;
    # whatever it does not take whole (whitespace, errors) goes through json.loads below
    try:
        doc, end = _DECODER.raw_decode(text)
        if end == len(text):
            return doc
    except (ValueError, RecursionError):
        pass
    if not text.strip():
        raise PayloadError("undecodable", f"empty payload on {source.topic!r} "
                           "(a cleared retained message?)")
    try:
        return json.loads(text)
    except RecursionError:
        raise PayloadError("undecodable", f"payload on {source.topic!r} is nested too "
                           "deeply to parse") from None
    except ValueError as exc:     # JSONDecodeError, and the int digit limit
        what = "a number or JSON" if source.field is None else "JSON"
        raise PayloadError("undecodable", f"payload on {source.topic!r} is not {what} "
                           f"({_short(str(exc))}): {_short(text)!r}") from None


def _lookup(doc: Any, path: str, source: SourceSettings) -> Any:
    """Follow a dot path through objects (and integer indexes through lists)."""
    if "." not in path and isinstance(doc, dict):      # the common flat case
        if path in doc:
            return doc[path]
        raise PayloadError("missing_field", f"no {path!r} in payload on {source.topic!r} "
                           f"(keys: {_key_list(doc)})")
    node = doc
    walked: list[str] = []
    for seg in path.split("."):
        where = ".".join(walked) or "the top level"
        if isinstance(node, dict):
            if seg not in node:
                raise PayloadError("missing_field", f"no {seg!r} under {where} of payload on "
                                   f"{source.topic!r} (path {path!r}; keys: {_key_list(node)})")
            node = node[seg]
        elif isinstance(node, list):
            if not (seg.isascii() and seg.isdigit()) or int(seg) >= len(node):
                raise PayloadError("missing_field", f"{where} of payload on {source.topic!r} "
                                   f"is a list of {len(node)}; segment {seg!r} of path "
                                   f"{path!r} must be an index 0..{len(node) - 1}")
            node = node[int(seg)]
        else:
            raise PayloadError("missing_field", f"{where} of payload on {source.topic!r} is "
                               f"{_kind(node)}, it has no {seg!r} (path {path!r})")
        walked.append(seg)
    return node


def _number(v: Any, what: str, source: SourceSettings) -> float:
    # bool is an int subclass in Python, but true/false is not a measurement.
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise PayloadError("wrong_type", f"{what!r} in payload on {source.topic!r} is "
                           f"{_kind(v)}, expected a number")
    return _finite(v, what, source)


def _finite(v: float | int, what: str, source: SourceSettings) -> float:
    try:
        x = float(v)
    except OverflowError:        # a JSON integer beyond float range
        x = math.inf
    if not math.isfinite(x):
        raise PayloadError("non_finite", f"{what!r} in payload on {source.topic!r} is {x}")
    if abs(x) > MAX_MAGNITUDE:
        raise PayloadError("out_of_range", f"{what!r} in payload on {source.topic!r} is {x:g}; "
                           f"readings beyond +-{MAX_MAGNITUDE:g} are taken for a faulty sensor")
    return x


def _time_value(v: Any, what: str, source: SourceSettings) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise PayloadError("bad_time", f"time {what!r} in payload on {source.topic!r} is "
                           f"{_kind(v)}, expected epoch seconds as a number")
    try:
        t = float(v)
    except OverflowError:
        t = math.inf
    return _check_epoch(t, what, source)


def _check_epoch(t: float, what: str, source: SourceSettings) -> float:
    if not math.isfinite(t) or t < 0.0:
        raise PayloadError("bad_time", f"time {what!r} in payload on {source.topic!r} is {t}, "
                           "expected epoch seconds >= 0")
    if t > LATEST_EPOCH_S:
        hint = " (milliseconds? send seconds)" if t / 1000.0 <= LATEST_EPOCH_S else ""
        raise PayloadError("bad_time", f"time {what!r} in payload on {source.topic!r} is "
                           f"{t:.17g}, after year 2200{hint}")
    return t


# --- SenML (RFC 8428) --------------------------------------------------------

def _from_senml(pack: list, source: SourceSettings, arrival_t: float) -> list[Reading]:
    """Resolve a SenML pack (RFC 8428 section 4.6) and pick records by name."""
    records = _resolve_senml(pack, source)
    if source.field is not None:
        picked = [r for r in records if r[0] == source.field]
        if not picked:
            names = sorted({r[0] for r in records})
            raise PayloadError("missing_field", f"no SenML record named {source.field!r} in "
                               f"pack on {source.topic!r} (names: {_short(str(names))})")
    else:
        picked = [r for r in records if "v" in r[2]]
        names = sorted({r[0] for r in picked})
        if len(names) != 1:
            all_names = sorted({r[0] for r in records})
            raise PayloadError("missing_field", f"SenML pack on {source.topic!r} has "
                               f"{len(names)} numeric record names; set 'field' to the "
                               f"resolved name to read (names: {_short(str(all_names))})")
    out = [Reading(_senml_time(t, source, arrival_t), _senml_value(name, rec, source))
           for name, t, rec in picked]
    out.sort(key=lambda r: r.t)
    return out


def _resolve_senml(pack: list, source: SourceSettings) -> list[tuple[str, float, dict]]:
    """(resolved name, bt + t, record with bv folded into v) for every record."""
    if not pack:
        raise PayloadError("bad_senml", f"empty SenML pack on {source.topic!r}")
    # RFC 8428 section 4.1: a base field holds for its record and all later ones
    # until a record sets it again.
    bn, bt, bv = "", 0.0, 0.0
    out = []
    for i, rec in enumerate(pack):
        if not isinstance(rec, dict):
            raise PayloadError("bad_senml", f"SenML record {i} on {source.topic!r} is "
                               f"{_kind(rec)}, expected an object")
        _check_labels(rec, i, source)
        if "bn" in rec:
            bn = _senml_str(rec, "bn", i, source)
        if "bt" in rec:
            bt = _senml_num(rec, "bt", i, source)
        if "bv" in rec:
            bv = _senml_num(rec, "bv", i, source)
        name = bn + (_senml_str(rec, "n", i, source) if "n" in rec else "")
        if not name:
            # RFC 8428 section 4.5.1: the resolved name must not be empty.
            raise PayloadError("bad_senml", f"SenML record {i} on {source.topic!r} has no "
                               "name (neither 'bn' nor 'n')")
        t = bt + (_senml_num(rec, "t", i, source) if "t" in rec else 0.0)
        if "v" in rec:
            rec = dict(rec, v=bv + _senml_num(rec, "v", i, source))
        out.append((name, t, rec))
    return out


def _check_labels(rec: dict, i: int, source: SourceSettings) -> None:
    # RFC 8428 section 4.4 (from memory): a label ending in "_" must be understood
    # or the pack refused, and a bver above ours must not be used. We know none.
    if "bver" in rec:
        ver = rec["bver"]
        if isinstance(ver, bool) or not isinstance(ver, int) or ver < 1:
            raise PayloadError("bad_senml", f"SenML record {i} on {source.topic!r}: 'bver' "
                               f"is {ver!r}, expected a positive integer")
        if ver > SENML_VERSION:
            raise PayloadError("bad_senml", f"SenML pack on {source.topic!r} is version "
                               f"{ver}; this reader understands up to {SENML_VERSION}")
    for key in rec:
        if isinstance(key, str) and key.endswith("_"):
            raise PayloadError("bad_senml", f"SenML record {i} on {source.topic!r} has "
                               f"must-understand label {_short(key)!r}, which edgeprop "
                               "does not understand")


def _senml_str(rec: dict, key: str, i: int, source: SourceSettings) -> str:
    v = rec[key]
    if not isinstance(v, str):
        raise PayloadError("bad_senml", f"SenML record {i} on {source.topic!r}: {key!r} is "
                           f"{_kind(v)}, expected a string")
    return v


def _senml_num(rec: dict, key: str, i: int, source: SourceSettings) -> float:
    v = rec[key]
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise PayloadError("bad_senml", f"SenML record {i} on {source.topic!r}: {key!r} is "
                           f"{_kind(v)}, expected a number")
    try:
        return float(v)
    except OverflowError:
        return math.inf


def _senml_time(t: float, source: SourceSettings, arrival_t: float) -> float:
    # RFC 8428 section 4.5.3: below 2**28 the time is relative to now (negative
    # is the past); at or above, it is seconds since the Unix epoch.
    if math.isfinite(t) and t < SENML_RELATIVE_LIMIT:
        t = arrival_t + t
    return _check_epoch(t, "bt + t", source)


def _senml_value(name: str, rec: dict, source: SourceSettings) -> float:
    """The numeric value of a picked record (RFC 8428 section 4.5.4)."""
    present = [k for k in _SENML_VALUES if k in rec]
    if len(present) > 1:
        raise PayloadError("bad_senml", f"SenML record {name!r} on {source.topic!r} has "
                           f"several value fields {present}; at most one is allowed")
    if not present:
        if "s" in rec:
            raise PayloadError("wrong_type", f"SenML record {name!r} on {source.topic!r} "
                               "carries only a sum 's'; edgeprop reads the value 'v'")
        raise PayloadError("bad_senml", f"SenML record {name!r} on {source.topic!r} has "
                           "no value and no sum")
    if present[0] != "v":
        raise PayloadError("wrong_type", f"SenML record {name!r} on {source.topic!r} has "
                           f"{present[0]!r} ({_kind(rec[present[0]])}), expected a numeric 'v'")
    return _finite(rec["v"], name, source)


# --- routing -----------------------------------------------------------------

# No plant reading in any unit comes near this; a value beyond it is a glitch that would overflow
# the running standardisers and drift references (squares of 1e306 are inf). Common practice, no source.
MAX_MAGNITUDE = 1e12
TARGET_ROLE = "<target>"   # cannot clash with an input name: those are [A-Za-z0-9_]+


class Route(NamedTuple):
    """Where a topic's readings go: a model, the role (TARGET_ROLE or an input name), the
    source, and ``slot``: the source's place among the distinct sources of its topic, which
    is where ``MessageDecoder.decode_message`` puts what it decoded for it."""

    model: str
    role: str
    source: SourceSettings
    slot: int = 0


class TopicRoutes:
    """Exact-topic map from MQTT topic to every (model, role, source) reading it."""

    def __init__(self, settings: Settings) -> None:
        readers: dict[str, list[tuple[str, str, SourceSettings]]] = {}
        for m in settings.models:
            readers.setdefault(m.target.topic, []).append((m.name, TARGET_ROLE, m.target))
            for inp in m.inputs:
                readers.setdefault(inp.topic, []).append((m.name, inp.name, inp.source))
        self._routes: dict[str, tuple[Route, ...]] = {}
        self.sources_by_topic: dict[str, tuple[SourceSettings, ...]] = {}
        for topic, found in readers.items():
            sources = tuple(dict.fromkeys(source for _m, _r, source in found))
            self.sources_by_topic[topic] = sources
            self._routes[topic] = tuple(Route(model, role, source, sources.index(source))
                                        for model, role, source in found)

    def __repr__(self) -> str:
        return f"TopicRoutes({len(self._routes)} topics)"

    def __contains__(self, topic: str) -> bool:
        return topic in self._routes

    @property
    def topics(self) -> list[str]:
        """Every topic to subscribe to, sorted."""
        return sorted(self._routes)

    def lookup(self, topic: str) -> tuple[Route, ...]:
        """The routes of ``topic``; ``PayloadError('unknown_topic')`` if none."""
        try:
            return self._routes[topic]
        except KeyError:
            raise PayloadError("unknown_topic", f"no model reads topic {_short(topic)!r}; "
                               f"configured topics: {_short(str(self.topics))}") from None


Outcome = Union[tuple[tuple[float, float], ...], PayloadError]


class MessageDecoder:
    """Decodes a message once for each distinct source that reads its topic, refusals included.

    A class of its own so that the broker connection's process can run it beside paho, on
    the core the worker does not use, and hand the worker plain (t, value) pairs; the engine
    runs the same code for replay and tests, so both see the same readings and refusals.
    """

    def __init__(self, sources_by_topic: dict[str, tuple[SourceSettings, ...]], max_bytes: int) -> None:
        self._sources = dict(sources_by_topic)
        self.max_bytes = int(max_bytes)

    def __repr__(self) -> str:
        return f"MessageDecoder({len(self._sources)} topics, max_bytes={self.max_bytes})"

    def decode_message(self, topic: str, payload: bytes, arrival_t: float) -> tuple[Outcome, ...] | None:
        """One outcome per distinct source of ``topic`` (``Route.slot`` indexes them): the
        readings as (t, value) tuples, or the ``PayloadError`` that refused the payload.
        None for a topic no model reads. Never raises for a payload."""
        sources = self._sources.get(topic)
        if sources is None:
            return None
        outcomes: list[Outcome] = []
        for source in sources:
            try:
                outcomes.append(tuple([tuple(r) for r in decode(payload, source, arrival_t, self.max_bytes)]))
            except PayloadError as exc:
                # kept without its traceback, whose frame holds this list: no cycle to collect
                outcomes.append(exc.with_traceback(None))
        return tuple(outcomes)


# --- message helpers ---------------------------------------------------------

def _kind(v: Any) -> str:
    if v is None:
        return "null"
    if isinstance(v, bool):
        return f"a boolean ({'true' if v else 'false'})"
    if isinstance(v, str):
        return f"a string ({_short(v)!r})"
    if isinstance(v, dict):
        return "an object"
    if isinstance(v, list):
        return "a list"
    return "a number"


def _key_list(d: dict) -> str:
    keys = list(d)[:8]
    more = ", ..." if len(d) > 8 else ""
    return ", ".join(_short(repr(k), 40) for k in keys) + more if keys else "none"


def _short(s: str, limit: int = 80) -> str:
    """Clip text for a log line: payloads can be up to max_bytes long."""
    return s if len(s) <= limit else s[:limit] + f"...({len(s)} chars)"
