"""100,000 generated payloads through the worker's own code path: no crash, each one counted.

``Engine.handle`` is what the daemon's worker calls for every message taken from the inbound
queue, so it is driven here directly, in-process, with a real ``Metrics`` registry. Each
payload is generated with a known expectation where one can be stated without the daemon's
code (not UTF-8 -> undecodable, over the size limit -> oversize, a finite bare number ->
accepted, ...) and checked against what the engine counted for it. Arbitrary JSON, SenML and
random bytes carry no expectation beyond "counted": rejected under a reason, or used.

Every publish the engine makes goes through a callable that refuses any topic not derived
from the config, whatever the payload held.
"""
from __future__ import annotations

import io
import json
import math
import random
from typing import NamedTuple

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from daemon.config import parse_config
from daemon.engine import Engine
from daemon.logs import Log
from daemon.metrics import Metrics
from daemon.payloads import MAX_MAGNITUDE

# Finite but extreme readings (1e308) overflow the running scaler's arithmetic; numpy warns,
# the guard catches the non-finite result. The warnings are expected here, not failures.
pytestmark = pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning",
                                        "ignore:invalid value encountered:RuntimeWarning")

MAX_BYTES = 8192                   # broker.max_payload_bytes in this config: keeps huge cases cheap
T0 = 1_765_000_000.0               # arrival clock start, epoch seconds

CONFIG = {
    "node": "fuzz",
    "broker": {"max_payload_bytes": MAX_BYTES},
    "metrics": {"listen": None},
    "models": [
        {"name": "bt",
         "target": {"topic": "site/p1/bearing_temp", "field": "value"},
         "inputs": [{"name": "speed", "topic": "site/p1/speed"},                       # bare or SenML
                    {"name": "current", "topic": "site/p1/current", "field": "data.amps",
                     "time_field": "data.ts"},
                    {"name": "flow", "topic": "site/p1/pack", "field": "p1/flow"}],    # SenML by name
         "align": {"max_age_s": 600},
         "net": {"hidden": [8], "seed": 1},
         "training": {"batch_size": 8, "warmup_samples": 10, "learning_rate": 0.05},
         "publish": {"every_s": 30}},
        {"name": "trip", "task": "binary",
         "target": {"topic": "site/p1/trip"},
         "inputs": [{"name": "speed", "topic": "site/p1/speed"}],
         "align": {"max_age_s": 600},
         "net": {"hidden": [4], "seed": 2},
         "training": {"batch_size": 4, "warmup_samples": 5, "loss": "logistic"}},
    ],
}

# Routes per topic, written out from CONFIG by hand (not asked of the daemon).
ROUTES = {"site/p1/bearing_temp": 1, "site/p1/speed": 2, "site/p1/current": 1,
          "site/p1/pack": 1, "site/p1/trip": 1}
TARGET_TOPICS = {"site/p1/bearing_temp": "bt", "site/p1/trip": "trip"}
ALLOWED_PUBLISH = {"edgeprop/fuzz/bt", "edgeprop/fuzz/trip",
                   "edgeprop/fuzz/bt/info", "edgeprop/fuzz/trip/info"}
REASONS = {"oversize", "undecodable", "non_finite", "out_of_range", "future_time", "wrong_type",
           "missing_field",
           "bad_time", "bad_senml", "unknown_topic", "late"}


class CountingMetrics(Metrics):
    """The real metrics, also tallying the calls whose effect the test checks per payload."""

    def __init__(self) -> None:
        super().__init__(node="fuzz")
        self.skips = 0
        self.trips = 0

    def skipped(self, model: str, reason: str) -> None:
        self.skips += 1
        super().skipped(model, reason)

    def guard_tripped(self, model: str, reason: str) -> None:
        self.trips += 1
        super().guard_tripped(model, reason)


class Sink(io.TextIOBase):
    """Log stream keeping the last lines only: every line is formatted, none is stored for long."""

    def __init__(self) -> None:
        self.last: list[str] = []

    def write(self, text: str) -> int:
        self.last = (self.last + [text])[-20:]
        return len(text)


class Rig:
    """One engine with real metrics, a guarded publish and a monotonic arrival clock."""

    def __init__(self, tmp_dir: str) -> None:
        self.settings = parse_config(CONFIG, tmp_dir)
        self.now = T0
        self.metrics = CountingMetrics()
        self.published: list[str] = []
        self.engine = Engine(self.settings, self._publish, Log("debug", Sink()), self.metrics,
                             clock=lambda: self.now)
        self.handled = 0
        self.learned = 0             # samples learned, summed over guard restores

    def _publish(self, topic: str, body: bytes, qos: int, retain: bool) -> bool:
        assert topic in ALLOWED_PUBLISH, f"published to {topic!r}, which is not from the config"
        msg = json.loads(body)
        assert msg["model"] in ("bt", "trip")
        self.published.append(topic)
        return True

    def feed(self, topic: str, payload: "bytes | Relative", expect: tuple[str, frozenset | None]) -> None:
        """Handle one payload and check what was counted for it."""
        e, m = self.engine, self.metrics
        rejects_before = dict(e.rejects)
        samples_before = sum(rt.learner.samples for rt in e.models.values())
        skips_before, trips_before = m.skips, m.trips
        self.now += 0.1
        if isinstance(payload, Relative):
            payload = payload.body(self.now)
        e.handle(topic, payload, self.now)            # nothing may escape
        e.tick(self.now)
        self.handled += 1
        delta = {k: v - rejects_before.get(k, 0) for k, v in e.rejects.items()
                 if v != rejects_before.get(k, 0)}
        rejected = sum(delta.values())
        assert set(delta) <= REASONS, f"unknown reason in {delta}"
        routes = ROUTES.get(topic, 0)
        where = f"topic {topic!r}, payload {payload[:120]!r} ({len(payload)} bytes)"
        if routes == 0:
            assert delta == {"unknown_topic": 1}, where
            return
        assert rejected <= routes, f"{delta} for {routes} route(s): {where}"
        kind, reasons = expect
        if kind == "reject":
            assert rejected == routes and set(delta) <= reasons, \
                f"expected {set(reasons)}, got {delta}: {where}"
        elif kind == "accept":
            assert rejected == 0, f"expected acceptance, got {delta}: {where}"
        samples = sum(rt.learner.samples for rt in e.models.values()) - samples_before
        self.learned += max(samples, 0)
        if topic in TARGET_TOPICS and rejected == 0:
            # a used target reading is learned from, skipped (stale input) or trips the guard;
            # a guard restore can reset the sample count, so a trip alone also counts
            assert samples > 0 or m.skips > skips_before or m.trips > trips_before, \
                f"target reading neither learned, skipped nor guarded: {where}"

    def check_totals(self) -> None:
        """The scrape agrees with the engine: every message received, each reject by reason."""
        reg = self.metrics.registry
        assert reg.get_sample_value("edgeprop_messages_received_total") == self.handled
        for reason, n in self.engine.rejects.items():
            assert reg.get_sample_value("edgeprop_messages_rejected_total", {"reason": reason}) == n
        assert self.engine.messages == self.handled


# ---- generators with their expectations ------------------------------------------------------

ANY: tuple = ("any", None)
ACCEPT: tuple = ("accept", None)


def reject(*reasons: str) -> tuple:
    return ("reject", frozenset(reasons))


def value_outcome(*values: float) -> tuple:
    """Finite readings are used unless beyond the plausible range daemon.payloads.MAX_MAGNITUDE."""
    return ACCEPT if all(abs(float(v)) <= MAX_MAGNITUDE for v in values) else reject("out_of_range")


finite = st.floats(allow_nan=False, allow_infinity=False)
# Values of a reading; extremes included on purpose (denormals, +-1.8e308, -0.0).
extreme = st.one_of(finite, st.sampled_from([5e-324, -5e-324, 1.7976931348623157e308, -0.0, 0.0]))
scalars = st.none() | st.booleans() | st.floats() | st.integers() | st.text(max_size=8)
json_docs = st.recursive(
    scalars,
    lambda kids: st.lists(kids, max_size=4) | st.dictionaries(
        st.sampled_from(["value", "data", "amps", "ts", "n", "bn", "bt", "t", "v", "bv", "vs",
                         "vb", "s", "bver", "u", "x_"]) | st.text(max_size=4), kids, max_size=5),
    max_leaves=15)


def enc(text: str) -> bytes:
    return text.encode("utf-8", "surrogatepass")


@st.composite
def bare_numbers(draw):
    """Bare-number topics: finite floats accepted; non-finite spellings refused."""
    topic = draw(st.sampled_from(["site/p1/speed", "site/p1/trip"]))
    if topic == "site/p1/trip":
        return topic, draw(st.sampled_from([b"0", b"1", b"1.0", b" 0 "])), ACCEPT
    choice = draw(st.integers(0, 3))
    if choice == 0:
        v = draw(extreme)
        return topic, repr(v).encode(), value_outcome(v)
    if choice == 1:
        v = draw(st.integers(-10**300, 10**300))
        return topic, str(v).encode(), value_outcome(v)
    if choice == 2:
        spelled = draw(st.sampled_from(["nan", "NaN", "inf", "-inf", "Infinity", "-Infinity",
                                        "1e999", "-1e400", "NaN ", " inf"]))
        return topic, spelled.encode(), reject("non_finite", "undecodable")
    big = "1" + "0" * draw(st.integers(309, 2000))        # an integer beyond float range
    return topic, big.encode(), reject("non_finite", "undecodable", "oversize")


@st.composite
def target_objects(draw):
    """The regression target, a JSON object read at 'value'."""
    topic = "site/p1/bearing_temp"
    choice = draw(st.integers(0, 4))
    if choice == 0:
        v = draw(extreme)
        return topic, enc(json.dumps({"value": v, "unit": "degC"})), value_outcome(v)
    if choice == 1:
        doc = {k: v for k, v in draw(st.dictionaries(st.text(max_size=5), scalars, max_size=4)).items()
               if k != "value"}
        return topic, enc(json.dumps(doc)), reject("missing_field")
    if choice == 2:
        bad = draw(st.none() | st.booleans() | st.text(max_size=10) | st.lists(finite, max_size=3)
                   | st.dictionaries(st.text(max_size=3), finite, max_size=2))
        return topic, enc(json.dumps({"value": bad})), reject("wrong_type")
    if choice == 3:
        spelled = draw(st.sampled_from(["NaN", "Infinity", "-Infinity", "1e400", "-2e308"]))
        return topic, f'{{"value": {spelled}}}'.encode(), reject("non_finite")
    return topic, enc(json.dumps(draw(json_docs))), ANY


@st.composite
def timed_inputs(draw):
    """An input read at data.amps with its own time at data.ts."""
    topic = "site/p1/current"
    choice = draw(st.integers(0, 3))
    if choice == 0:
        # sensor time a little before arrival (inside the history's late tolerance); the
        # absolute time is filled in when the payload is fed, see ``Relative``
        v = draw(finite)
        return topic, Relative(v, draw(st.floats(-2.0, 0.0))), value_outcome(v)
    if choice == 1:
        ts = draw(st.one_of(st.floats(), st.sampled_from([-1, 8e9, 1.7e12]), st.text(max_size=4),
                            st.booleans(), st.none()))
        if isinstance(ts, float) and math.isfinite(ts) and 0 <= ts <= 7258118400.0:
            # a valid time: kept in the past, where it can only be late or accepted (one far in
            # the future is refused; see test_one_future_stamp_does_not_block_an_input)
            ts = min(ts, T0)
            return topic, {"data": {"amps": 1.0, "ts": ts}}, ANY
        return topic, {"data": {"amps": 1.0, "ts": ts}}, reject("bad_time")
    if choice == 2:
        return topic, {"data": draw(json_docs)}, ANY
    return topic, draw(json_docs), ANY


class Relative(NamedTuple):
    """A timed reading whose sensor time is ``dt`` seconds from its arrival."""

    amps: float
    dt: float

    def body(self, arrival_t: float) -> bytes:
        return json.dumps({"data": {"amps": self.amps, "ts": arrival_t + self.dt}}).encode()


senml_keys = st.sampled_from(["bn", "bt", "bv", "bver", "n", "t", "v", "vs", "vb", "vd", "s",
                              "u", "ut", "x_"])
senml_values = st.one_of(st.text(max_size=6), st.floats(), st.integers(-10**20, 10**20),
                         st.booleans(), st.none(), st.sampled_from(["p1/", "flow", "p1/flow"]))


def _in_the_past(v: object) -> object:
    """A relative SenML time moved before arrival; anything else as it is."""
    if isinstance(v, (int, float)) and not isinstance(v, bool) and abs(v) < 2 ** 28:
        return -abs(v)
    return v


@st.composite
def senml_packs(draw):
    """SenML (RFC 8428) packs: well-formed ones that must be read, and random records."""
    topic = draw(st.sampled_from(["site/p1/pack", "site/p1/speed"]))
    if draw(st.booleans()):
        n = draw(st.integers(1, 4))
        recs = [{"bn": "p1/", "n": "flow", "v": draw(finite), "t": -0.5 * (n - i)} for i in range(n)]
        if topic == "site/p1/speed":
            for r in recs:
                r["n"] = "speed"
        return topic, recs, value_outcome(*(r["v"] for r in recs))
    records = draw(st.lists(st.dictionaries(senml_keys, senml_values, max_size=6), max_size=5))
    # The rig is shared by every example, and a random record may be read (speed takes the one
    # numeric name of a pack; a record may resolve to "p1/flow"). One with a small positive
    # relative "t" or "bt" would be accepted seconds ahead of arrival (inside align.max_ahead_s)
    # as the input's newest reading, and a later well-formed pack stamped before arrival would
    # then be late, as it should be, failing the "accept" expected of it. So relative times are
    # kept in the past; absolute ones (>= 2**28, RFC 8428 section 4.5.3) stay as drawn.
    records = [{k: _in_the_past(v) if k in ("t", "bt") else v for k, v in r.items()} for r in records]
    return topic, records, ANY


@st.composite
def nested_and_huge(draw):
    """Deep nesting, huge strings, and payloads just around the size limit."""
    topic = draw(st.sampled_from(sorted(ROUTES)))
    choice = draw(st.integers(0, 3))
    if choice == 0:
        depth = draw(st.integers(1, 4000))
        opener = draw(st.sampled_from(["[", '{"value":', '{"data":']))
        closer = {"[": "]", '{"value":': "}", '{"data":': "}"}[opener]
        text = opener * depth + "1" + closer * depth * draw(st.integers(0, 1))
        if len(text) > MAX_BYTES:
            return topic, text.encode(), reject("oversize")
        return topic, text.encode(), ANY
    if choice == 1:
        n = draw(st.integers(0, 3 * MAX_BYTES))
        char = draw(st.sampled_from(["x", "\u00e9", "\U0001f525"]))   # 1, 2 and 4 UTF-8 bytes
        body = json.dumps({"value": char * n}, ensure_ascii=False).encode()
        if len(body) > MAX_BYTES:
            return topic, body, reject("oversize")
        return topic, body, reject("wrong_type", "missing_field", "bad_senml", "undecodable")
    if choice == 2:
        pad = MAX_BYTES - len(b'{"value": 1.5, "pad": ""}') + draw(st.integers(-2, 2))
        body = b'{"value": 1.5, "pad": "' + b"p" * pad + b'"}'
        return topic, body, reject("oversize") if len(body) > MAX_BYTES else ANY
    return topic, b" " * draw(st.integers(0, 40)), reject("undecodable")


@st.composite
def random_bytes(draw):
    """Random bytes on a configured topic; invalid UTF-8 must be refused as undecodable."""
    topic = draw(st.sampled_from(sorted(ROUTES)))
    payload = draw(st.binary(max_size=200))
    try:
        payload.decode("utf-8")
    except UnicodeDecodeError:
        return topic, payload, reject("undecodable")
    return topic, payload, ANY


@st.composite
def stray_topics(draw):
    """Topics no model reads (a wildcard subscription upstream, a replayed capture)."""
    topic = draw(st.text(min_size=1, max_size=30).filter(lambda t: t not in ROUTES))
    return topic, draw(st.binary(max_size=20)), ANY


def as_bytes(case: tuple) -> tuple[str, bytes, tuple]:
    topic, body, expect = case
    if not isinstance(body, (bytes, Relative)):
        body = enc(json.dumps(body))
    return topic, body, expect


STRUCTURED = st.one_of(bare_numbers(), target_objects(), timed_inputs(), senml_packs(),
                       nested_and_huge()).map(as_bytes)
RAW = st.one_of(random_bytes(), stray_topics(), st.builds(
    lambda t, doc: (t, enc(json.dumps(doc)), ANY), st.sampled_from(sorted(ROUTES)), json_docs))

def fuzz_settings(examples: int) -> settings:
    return settings(max_examples=examples, deadline=None, database=None, print_blob=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.large_base_example])


INTERESTING = [b"1e308", b"-1.7976931348623157e308", b"5e-324", b"-0", b"NaN", b"Infinity",
               b"9" * 400, b"\x00", b"\xff", b"\xc3", b'"', b"[", b"{", b"}", b"]", b",", b":",
               b'"v":', b'"bn":"x/"', b"true", b"null", b"\\u0000", b"\\ud800"]


def mutants(payload: bytes, seed: int, count: int) -> list[bytes]:
    """Cheap byte-level variants of a generated payload (truncate, overwrite, insert, repeat).

    Hypothesis draws the payloads and the seed; these derived variants multiply each drawn
    case, because drawing structured JSON costs ~1 ms a payload and 100,000 are wanted.
    """
    rng = random.Random(seed)
    out = []
    for _ in range(count):
        b = bytearray(payload)
        for _op in range(rng.randint(1, 3)):
            op = rng.randrange(5)
            at = rng.randint(0, len(b))
            if op == 0:
                del b[at:]
            elif op == 1 and b:
                b[min(at, len(b) - 1)] = rng.randrange(256)
            elif op == 2:
                b[at:at] = rng.choice(INTERESTING)
            elif op == 3:
                b[at:at] = b[at:at + rng.randint(1, 64)] * rng.randint(2, 300)
            else:
                b[at:at + rng.randint(0, 8)] = rng.choice(INTERESTING)
        out.append(bytes(b))
    return out


def expectation(payload: bytes) -> tuple:
    """What a mutant must give: oversize first, then undecodable for non-UTF-8, else anything."""
    if len(payload) > MAX_BYTES:
        return reject("oversize")
    try:
        payload.decode("utf-8")
    except UnicodeDecodeError:
        return reject("undecodable")
    return ANY


def run_batches(tmp_path, strategy, examples: int, per_example: int = 10, variants: int = 9) -> Rig:
    """Feed ``examples`` x ``per_example`` generated payloads, each with ``variants`` mutants."""
    rig = Rig(str(tmp_path))

    @fuzz_settings(examples)
    @given(st.lists(strategy, min_size=per_example, max_size=per_example),
           st.integers(0, 2**32 - 1))
    def batch(cases, seed):
        for i, (topic, body, expect) in enumerate(cases):
            rig.feed(topic, body, expect)
            raw = body.body(rig.now) if isinstance(body, Relative) else body
            for variant in mutants(raw, seed + i, variants):
                rig.feed(topic, variant, expectation(variant))

    batch()
    rig.check_totals()
    return rig


def test_structured_payloads_70k(tmp_path):
    rig = run_batches(tmp_path, STRUCTURED, 700)
    assert rig.handled >= 70_000
    e = rig.engine
    # the generators reach the learning path and every drop reason they aim at
    assert rig.learned > 1000, rig.learned
    assert {"oversize", "undecodable", "non_finite", "wrong_type", "missing_field",
            "bad_time", "bad_senml"} <= set(e.rejects)
    assert rig.published, "no prediction was published"


def test_random_bytes_and_stray_topics_30k(tmp_path):
    rig = run_batches(tmp_path, RAW, 300)
    assert rig.handled >= 30_000
    assert {"undecodable", "unknown_topic"} <= set(rig.engine.rejects)


def test_one_future_stamp_does_not_block_an_input(tmp_path):
    # a sensor clock far ahead (align.max_ahead_s) is refused, so it cannot become the
    # input's newest reading and make every on-time reading after it look late
    rig = Rig(str(tmp_path))
    rig.feed("site/p1/current", Relative(1.0, 0.0), ACCEPT)
    future = json.dumps({"data": {"amps": 1.0, "ts": 7_000_000_000.0}}).encode()  # year 2191
    rig.feed("site/p1/current", future, reject("future_time"))
    rig.feed("site/p1/current", Relative(2.0, 0.0), ACCEPT)      # on time: refused as late
