"""Payload decoding: every accepted shape and every drop reason, asserted by name."""
from __future__ import annotations

import dataclasses
import json
import math
import pickle

import pytest
from hypothesis import given, settings, strategies as st

from daemon.errors import PayloadError
from daemon.payloads import LATEST_EPOCH_S, TARGET_ROLE, MessageDecoder, Reading, TopicRoutes, decode
from daemon.settings import InputSettings, ModelSettings, Settings, SourceSettings

ARRIVAL = 1733000000.0          # arrival clock used throughout (2024-11-30, epoch s)
LIMIT = 65536

BARE = SourceSettings("site/p1/speed")
FLOW = SourceSettings("site/p1/flow", field="value")
TIMED = SourceSettings("site/p1/flow", field="value", time_field="ts")


def dec(payload, source=BARE, limit=LIMIT):
    if isinstance(payload, str):
        payload = payload.encode()
    return decode(payload, source, ARRIVAL, limit)


def reason(payload, source=BARE, limit=LIMIT) -> str:
    with pytest.raises(PayloadError) as info:
        dec(payload, source, limit)
    return info.value.reason


# --- bare numbers ------------------------------------------------------------

@pytest.mark.parametrize("text, value", [
    ("61.2", 61.2), (" 61.2\n", 61.2), ("1e3", 1000.0), ("-4", -4.0), ("0", 0.0),
])
def test_bare_number_takes_arrival_time(text, value):
    assert dec(text) == [Reading(ARRIVAL, value)]


def test_bare_number_accepts_bytearray_and_memoryview():
    assert dec(bytearray(b"1450")) == [Reading(ARRIVAL, 1450.0)]
    assert decode(memoryview(b"1450"), BARE, ARRIVAL, LIMIT) == [Reading(ARRIVAL, 1450.0)]


# --- JSON objects ------------------------------------------------------------

def test_flat_field():
    assert dec('{"value": 41.5, "unit": "m3/h"}', FLOW) == [Reading(ARRIVAL, 41.5)]


def test_integer_field_becomes_float():
    out = dec('{"value": 1450}', FLOW)
    assert out == [Reading(ARRIVAL, 1450.0)] and isinstance(out[0].value, float)


def test_dot_path_and_list_index():
    src = SourceSettings("site/p1/motor", field="motor.phases.2")
    assert dec('{"motor": {"phases": [12.0, 12.2, 12.7]}}', src) == [Reading(ARRIVAL, 12.7)]


def test_time_field_top_level_and_nested():
    assert dec('{"value": 41.5, "ts": 1733000123.25}', TIMED) == [Reading(1733000123.25, 41.5)]
    src = SourceSettings("site/p1/flow", field="data.flow", time_field="meta.clock.t")
    payload = '{"data": {"flow": 40}, "meta": {"clock": {"t": 1733000100}}}'
    assert dec(payload, src) == [Reading(1733000100.0, 40.0)]


# --- drop reasons ------------------------------------------------------------

def test_oversize_is_checked_first():
    assert reason(b"1" * 11, limit=10) == "oversize"
    assert reason(b"\xff" * 11, limit=10) == "oversize"     # would also be undecodable
    assert dec(b"1" * 10, limit=10) == [Reading(ARRIVAL, 1111111111.0)]  # at the limit: kept


@pytest.mark.parametrize("payload", [
    b"\xff\xfe61.2", b"", b"  \n", b"abc", b"61,2", b"1_000", b"{", b'{"value": }',
    b"[" * 5_000, b"[" * 5_000 + b"]" * 5_000,    # nesting past the recursion limit
    b'{"a":' * 5_000,
], ids=lambda p: repr(p[:12]))
def test_undecodable(payload):
    assert reason(payload) == "undecodable"
    assert reason(payload, FLOW) == "undecodable"


def test_undecodable_too_many_digits():
    # CPython 3.11 refuses int literals beyond 4300 digits inside json.
    assert reason('{"value": ' + "1" * 5000 + "}", FLOW) == "undecodable"


@pytest.mark.parametrize("payload, source", [
    ("nan", BARE), ("inf", BARE), ("-Infinity", BARE), ("1e999", BARE),
    ('{"value": NaN}', FLOW), ('{"value": Infinity}', FLOW), ('{"value": -Infinity}', FLOW),
    ('{"value": 1e999}', FLOW), ('{"value": 1' + "0" * 400 + "}", FLOW),
])
def test_non_finite(payload, source):
    assert reason(payload, source) == "non_finite"


@pytest.mark.parametrize("payload, source", [
    ("1e306", BARE), ("-2e12", BARE), ('{"value": 1e13}', FLOW),
    ('[{"n": "flow", "v": 5e300}]', SourceSettings("site/p1/flow", "flow")),
])
def test_implausibly_large_readings_are_out_of_range(payload, source):
    # finite, but they would overflow the running standardisers (x**2 is inf beyond ~1e154)
    assert reason(payload, source) == "out_of_range"


def test_largest_plausible_reading_is_kept():
    assert decode(b"1e12", BARE, 0.0, 1024)[0].value == 1e12


def test_non_finite_in_an_unread_field_is_tolerated():
    # A sibling channel reporting NaN must not cost us the good reading.
    assert dec('{"value": 41.5, "spare": NaN}', FLOW) == [Reading(ARRIVAL, 41.5)]


@pytest.mark.parametrize("payload", [
    '{"value": "41.5"}', '{"value": true}', '{"value": false}', '{"value": null}',
    '{"value": {"x": 1}}', '{"value": [1]}',
    "41.5",                  # field configured but a bare number arrives
    '"41.5"',
])
def test_wrong_type_with_field(payload):
    assert reason(payload, FLOW) == "wrong_type"


@pytest.mark.parametrize("payload", ['"61.2"', "true", "null"])
def test_wrong_type_bare(payload):
    assert reason(payload) == "wrong_type"


def test_object_without_field_hints_at_field():
    with pytest.raises(PayloadError) as info:
        dec('{"speed": 1450}')
    assert info.value.reason == "wrong_type"
    assert "set 'field'" in str(info.value) and "'speed'" in str(info.value)


@pytest.mark.parametrize("payload, field", [
    ('{"flow": 41.5}', "value"),
    ('{"data": {"flow": 41.5}}', "data.value"),
    ('{"data": 5}', "data.flow"),                  # walking into a number
    ('{"phases": [1, 2]}', "phases.2"),            # index out of range
    ('{"phases": [1, 2]}', "phases.x"),            # non-index into a list
])
def test_missing_field(payload, field):
    assert reason(payload, SourceSettings("site/p1/flow", field=field)) == "missing_field"


def test_missing_field_names_the_path():
    with pytest.raises(PayloadError) as info:
        dec('{"data": {"flow": 41.5}}', SourceSettings("t", field="data.value"))
    assert "'value'" in str(info.value) and "'flow'" in str(info.value)


def test_missing_time_field():
    assert reason('{"value": 41.5}', TIMED) == "missing_field"


@pytest.mark.parametrize("ts", ['"2024-11-30T10:00:00Z"', "true", "null", "-1", "NaN",
                                "Infinity", "7258118400.5", "1733000000000"])
def test_bad_time(ts):
    assert reason('{"value": 41.5, "ts": %s}' % ts, TIMED) == "bad_time"


def test_bad_time_hints_at_milliseconds():
    with pytest.raises(PayloadError) as info:
        dec('{"value": 41.5, "ts": 1733000000000}', TIMED)
    assert "milliseconds" in str(info.value)


def test_year_2200_is_the_last_accepted_second():
    # 7258118400 = 2200-01-01T00:00:00Z (Python's calendar.timegm((2200,1,1,0,0,0))).
    assert LATEST_EPOCH_S == 7258118400.0
    assert dec('{"value": 1, "ts": 7258118400}', TIMED)[0].t == LATEST_EPOCH_S


# --- SenML (RFC 8428) --------------------------------------------------------
# Section numbers below are RFC 8428's (quoted from memory); the packs are ours.

def senml(pack, field=None, topic="site/p1/senml"):
    return dec(json.dumps(pack), SourceSettings(topic, field=field))


def senml_reason(pack, field=None) -> str:
    with pytest.raises(PayloadError) as info:
        senml(pack, field)
    return info.value.reason


def test_senml_single_record_without_field():
    # Section 5 (JSON representation): a pack is an array of record objects.
    # No time at all: t = 0, which section 4.5.3 reads as "now" = arrival.
    assert senml([{"n": "p1/flow", "u": "m3/h", "v": 41.5}]) == [Reading(ARRIVAL, 41.5)]


def test_senml_base_name_and_base_time_pick_by_resolved_name():
    # Section 4.1: bn/bt apply to this and later records; 4.5.1: name = bn + n;
    # 4.5.3: time = bt + t. Records deliberately out of time order.
    pack = [
        {"bn": "urn:dev:pump1:", "bt": 1733000000, "n": "current", "u": "A", "t": 10, "v": 12.4},
        {"n": "speed", "u": "1/min", "v": 1450},
        {"n": "current", "u": "A", "v": 12.1},
    ]
    assert senml(pack, "urn:dev:pump1:current") == [
        Reading(1733000000.0, 12.1), Reading(1733000010.0, 12.4)]
    assert senml(pack, "urn:dev:pump1:speed") == [Reading(1733000000.0, 1450.0)]


def test_senml_base_fields_change_part_way():
    # Section 4.1: a later bn/bt replaces the earlier one for the records after it.
    pack = [
        {"bn": "p1/", "bt": 1733000000, "n": "flow", "v": 41.5},
        {"bn": "p2/", "bt": 1733000060, "n": "flow", "v": 38.0},
        {"n": "flow", "t": 5, "v": 38.2},
    ]
    assert senml(pack, "p1/flow") == [Reading(1733000000.0, 41.5)]
    assert senml(pack, "p2/flow") == [Reading(1733000060.0, 38.0), Reading(1733000065.0, 38.2)]


def test_senml_base_value_is_added():
    # Section 4.1: bv is added to each record's v.
    pack = [{"bn": "p1/", "bv": 20.0, "n": "bearing_temp", "t": 1733000000, "v": 41.25}]
    assert senml(pack, "p1/bearing_temp") == [Reading(1733000000.0, 61.25)]


def test_senml_relative_time():
    # Section 4.5.3: a resolved time below 2**28 is relative to now (negative = past).
    assert senml([{"n": "flow", "t": -5, "v": 40}]) == [Reading(ARRIVAL - 5, 40.0)]
    pack = [{"bn": "p1/", "bt": -60, "n": "flow", "t": 30, "v": 40}]
    assert senml(pack, "p1/flow") == [Reading(ARRIVAL - 30, 40.0)]
    # 2**28 itself is absolute: 1978-07-04, far from our arrival clock.
    assert senml([{"n": "flow", "t": 2 ** 28, "v": 40}]) == [Reading(2.0 ** 28, 40.0)]


def test_senml_without_field_takes_the_one_numeric_name():
    pack = [{"bn": "p1/", "bt": 1733000000, "n": "flow", "v": 40},
            {"n": "flow", "t": 1, "v": 41},
            {"n": "state", "vs": "running"}]
    assert senml(pack) == [Reading(1733000000.0, 40.0), Reading(1733000001.0, 41.0)]


def test_senml_without_field_and_several_names():
    pack = [{"bn": "p1/", "n": "flow", "v": 40}, {"n": "speed", "v": 1450}]
    with pytest.raises(PayloadError) as info:
        senml(pack)
    assert info.value.reason == "missing_field" and "p1/speed" in str(info.value)


def test_senml_name_absent():
    assert senml_reason([{"bn": "p1/", "n": "flow", "v": 40}], "p1/speed") == "missing_field"


@pytest.mark.parametrize("record", [
    {"n": "p1/state", "vs": "running"},         # section 4.5.4: string value
    {"n": "p1/state", "vb": True},              # boolean value
    {"n": "p1/state", "vd": "AAEC"},            # data value (base64)
    {"n": "p1/state", "s": 1200.0},             # a sum only (section 4.2), no value
])
def test_senml_non_numeric_value_is_wrong_type(record):
    assert senml_reason([record], "p1/state") == "wrong_type"


def test_senml_non_numeric_record_elsewhere_is_ignored():
    pack = [{"bn": "p1/", "n": "state", "vs": "running"}, {"n": "flow", "v": 40.5}]
    assert senml(pack, "p1/flow") == [Reading(ARRIVAL, 40.5)]


@pytest.mark.parametrize("pack", [
    [],                                          # nothing in the pack
    [41.5],                                      # a record must be an object
    [{"bn": 7, "n": "flow", "v": 1}],            # bn must be a string
    [{"n": ["flow"], "v": 1}],                   # n must be a string
    [{"n": "flow", "t": "10", "v": 1}],          # t must be a number
    [{"bt": True, "n": "flow", "v": 1}],         # bt must be a number, not a boolean
    [{"n": "flow", "v": "41.5"}],                # v must be a number
    [{"v": 41.5}],                               # section 4.5.1: no name at all
    [{"n": "flow", "v": 1, "vs": "x"}],          # section 4.5.4: at most one value
    [{"n": "flow", "u": "m3/h"}],                # neither value nor sum
    [{"bver": 11, "n": "flow", "v": 1}],         # section 4.4: newer version than ours
    [{"bver": "10", "n": "flow", "v": 1}],
    [{"n": "flow", "v": 1, "ack_": 1}],          # section 4.4: must-understand label
])
def test_bad_senml(pack):
    assert senml_reason(pack, "flow") == "bad_senml"


def test_senml_version_10_is_fine():
    assert senml([{"bver": 10, "n": "flow", "v": 1}], "flow") == [Reading(ARRIVAL, 1.0)]


def test_senml_non_finite_and_bad_time():
    assert senml_reason_text('[{"n": "flow", "v": NaN}]') == "non_finite"
    assert senml_reason_text('[{"n": "flow", "v": 1e999}]') == "non_finite"
    assert senml_reason_text('[{"bv": 1e308, "n": "flow", "v": 1e308}]') == "non_finite"
    assert senml_reason_text('[{"n": "flow", "t": 1733000000000, "v": 1}]') == "bad_time"
    assert senml_reason_text('[{"n": "flow", "t": NaN, "v": 1}]') == "bad_time"
    assert senml_reason_text('[{"n": "flow", "t": -2000000000, "v": 1}]') == "bad_time"


def senml_reason_text(text: str) -> str:
    with pytest.raises(PayloadError) as info:
        dec(text, SourceSettings("site/p1/senml", field="flow"))
    return info.value.reason


# --- routing -----------------------------------------------------------------

def _settings() -> Settings:
    shared = "site/p1/motor"
    m1 = ModelSettings(
        name="bearing_temp", target=SourceSettings("site/p1/bearing_temp", "value"),
        inputs=(InputSettings("speed", "site/p1/speed"),
                InputSettings("current", shared, field="current")))
    m2 = ModelSettings(
        name="flow", target=SourceSettings("site/p1/flow"),
        inputs=(InputSettings("motor_speed", shared, field="speed"),))
    return Settings(models=(m1, m2))


def test_routes_share_topics_with_different_fields():
    routes = TopicRoutes(_settings())
    assert routes.topics == ["site/p1/bearing_temp", "site/p1/flow",
                             "site/p1/motor", "site/p1/speed"]
    motor = routes.lookup("site/p1/motor")
    assert [(r.model, r.role, r.source.field, r.slot) for r in motor] == [
        ("bearing_temp", "current", "current", 0), ("flow", "motor_speed", "speed", 1)]
    (target,) = routes.lookup("site/p1/bearing_temp")
    assert tuple(target) == ("bearing_temp", TARGET_ROLE, SourceSettings("site/p1/bearing_temp", "value"), 0)
    # One payload, decoded once per route, gives each model its own field.
    payload = b'{"current": 12.1, "speed": 1450}'
    got = [decode(payload, r.source, ARRIVAL, LIMIT)[0].value for r in motor]
    assert got == [12.1, 1450.0]


def test_message_decoder_decodes_once_per_source_and_keeps_refusals_apart():
    """What the broker connection's process hands the worker: per distinct source of the
    topic, the readings or the refusal, in the slots the routes point at."""
    settings = _settings()
    m1, m2 = settings.models
    # a third model reading the same field of the shared topic shares its slot
    m3 = dataclasses.replace(m2, name="flow2", inputs=(InputSettings("amps", "site/p1/motor", field="current"),))
    routes = TopicRoutes(dataclasses.replace(settings, models=(m1, m2, m3)))
    decoder = MessageDecoder(routes.sources_by_topic, LIMIT)
    motor = routes.lookup("site/p1/motor")
    assert [(r.model, r.slot) for r in motor] == [("bearing_temp", 0), ("flow", 1), ("flow2", 0)]
    outcomes = decoder.decode_message("site/p1/motor", b'{"current": 12.1, "speed": 1450}', ARRIVAL)
    assert outcomes == (((ARRIVAL, 12.1),), ((ARRIVAL, 1450.0),))
    assert all(type(pair) is tuple for o in outcomes for pair in o)      # plain, cheap to pickle
    # one field missing: that source's slot holds the refusal, the other its reading
    current, speed = decoder.decode_message("site/p1/motor", b'{"speed": 1450}', ARRIVAL)
    assert isinstance(current, PayloadError) and current.reason == "missing_field"
    assert "no 'current'" in str(current)
    assert speed == ((ARRIVAL, 1450.0),)
    # the refusal crosses the process boundary whole
    back = pickle.loads(pickle.dumps(current))
    assert (type(back), back.reason, str(back)) == (PayloadError, current.reason, str(current))
    assert decoder.decode_message("site/p1/elsewhere", b"1", ARRIVAL) is None
    oversize = decoder.decode_message("site/p1/speed", b"1" * (LIMIT + 1), ARRIVAL)
    assert oversize[0].reason == "oversize"


def test_unknown_topic():
    routes = TopicRoutes(_settings())
    assert "site/p1/ambient" not in routes and "site/p1/speed" in routes
    with pytest.raises(PayloadError) as info:
        routes.lookup("site/p1/ambient")
    assert info.value.reason == "unknown_topic" and "site/p1/ambient" in str(info.value)


# --- nothing but PayloadError escapes ------------------------------------------

def _check_outcome(payload: bytes, source: SourceSettings) -> None:
    try:
        out = decode(payload, source, ARRIVAL, 4096)
    except PayloadError as exc:
        assert exc.reason in {"oversize", "undecodable", "non_finite", "out_of_range", "wrong_type",
                              "missing_field", "bad_time", "bad_senml"}
        return
    assert out and all(math.isfinite(r.t) and math.isfinite(r.value) for r in out)
    assert [r.t for r in out] == sorted(r.t for r in out)


SOURCES = st.sampled_from([BARE, FLOW, TIMED, SourceSettings("t", "a.0.b", "a.1"),
                           SourceSettings("t", "p1/flow")])
JSON = st.recursive(
    st.none() | st.booleans() | st.floats() | st.integers() | st.text(max_size=5),
    lambda kids: st.lists(kids, max_size=4)
    | st.dictionaries(st.sampled_from(["value", "ts", "a", "b", "n", "bn", "bt", "t", "v",
                                       "bv", "vs", "s", "bver", "x_"]), kids, max_size=5),
    max_leaves=12)


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=64), SOURCES)
def test_any_bytes_give_readings_or_a_payload_error(payload, source):
    _check_outcome(payload, source)


@settings(max_examples=300, deadline=None)
@given(JSON, SOURCES)
def test_any_json_gives_readings_or_a_payload_error(doc, source):
    _check_outcome(json.dumps(doc).encode(), source)
