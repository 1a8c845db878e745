"""Hostile input stays bounded and ends as a known reject reason or a valid reading, never a crash.

The fuzz tests draw payloads and topics with hypothesis (derandomized: the same examples every
run) and feed them to the payload parsers and the topic routing. The limits they rely on are
published ones: RFC 8259 section 6 has no NaN or Infinity literals; IEEE 754 binary64 tops out
near 1.8e308, so an integer of 400 digits has no double; RFC 8428 section 4.4 makes ``bver`` a
positive integer version. The MQTT tests run against a private Mosquitto broker.
"""

from __future__ import annotations

import gc
import json
import math
import os
import time
import tracemalloc
from collections import Counter
from datetime import datetime, timezone

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from leadline.adapters.service.reject_summary import stage_source_rejects
from leadline.adapters.sources.csv_follow import CsvFollower
from leadline.adapters.sources.csv_rows import CsvLayout
from leadline.adapters.sources.feed_gate import FeedGate
from leadline.adapters.sources.payloads import JsonPayload, NumberPayload
from leadline.adapters.sources.route_cache import ENTRY_OVERHEAD_BYTES, RouteCache
from leadline.adapters.sources.senml import SenmlPayload
from leadline.adapters.sources.topics import TopicPattern
from leadline.adapters.store.eventstore import open_store
from leadline.detector.errors import RejectError
from leadline.detector.readings import Reading

UTC = timezone.utc
T0_S = 1_780_000_000  # 2026-05-28T20:26:40Z

#: Every reason a parser, the routing or the subscriber's bounds may give.
KNOWN_REASONS = frozenset({
    "oversized", "bad_utf8", "not_json", "non_numeric", "not_finite", "missing_field", "bad_time",
    "not_senml", "unknown_mandatory_field", "bad_version", "unsupported_version", "bad_name", "missing_value",
    "bad_topic", "unmatched_topic", "topic_too_long", "feed_limit", "feed_id_too_long", "bad_feed",
})

FUZZ = settings(derandomize=True, max_examples=400, deadline=None, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

huge_ints = st.integers(min_value=-(10**400), max_value=10**400)
json_scalars = st.one_of(st.none(), st.booleans(), st.integers(), huge_ints,
                         st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=20))
json_values = st.recursive(json_scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=5), inner, max_size=4)), max_leaves=12)
senml_fields = st.sampled_from(["bn", "bt", "bu", "bv", "bs", "bver", "n", "t", "u", "v", "s", "vs", "vb", "vd",
                                "ut", "x_", "extra"])
senml_records = st.dictionaries(senml_fields, json_values, max_size=6)
special = st.sampled_from([
    b'{"value": Infinity}', b'{"value": NaN}', b'{"value": -Infinity}', b'[{"bver": 1e400, "n": "a", "v": 1}]',
    b'{"value": 1' + b"0" * 400 + b"}", b'{"value": 1' + b"0" * 5000 + b"}", b"[" * 5000 + b"]" * 5000,
    b'{"value": ' + b"[" * 3000 + b"]" * 3000 + b"}", b'[{"n": "a", "v": 1e308, "bv": 1e308}]',
    b'{"value": 1, "t": 1' + b"0" * 400 + b"}", b"1e400", b"-0", b"\xef\xbb\xbf1", b"\x00",
])


def _dumps(document) -> bytes:
    # allow_nan=True writes NaN/Infinity literals: exactly the non-standard JSON to be refused
    return json.dumps(document, allow_nan=True).encode("utf-8")


payloads = st.one_of(
    st.binary(max_size=200),
    st.builds(_dumps, json_values),
    st.builds(lambda v, t: _dumps({"value": v, "t": t}), json_values, json_values),
    st.builds(_dumps, st.lists(senml_records, max_size=5)),
    special,
)
PARSERS = (NumberPayload(), JsonPayload(), JsonPayload(value_path="data.0.v", time_path="t", time_format="epoch_ms"),
           JsonPayload(time_path="t"), SenmlPayload(), SenmlPayload(use_sum=True), NumberPayload(max_bytes=64))


def _check_outcome(parser, payload: bytes) -> list[str]:
    """The reasons ``payload`` gave; fails on any other exception or an invalid value."""
    try:
        values, rejects = parser.parse(payload, float(T0_S))
    except RejectError as exc:
        assert exc.reason in KNOWN_REASONS, exc
        return [exc.reason]
    for value in values:
        assert isinstance(value.value, float)
        # a JSON null is a missing reading (NaN); nothing else may be non-finite
        assert math.isfinite(value.value) or (math.isnan(value.value) and isinstance(parser, JsonPayload))
        assert value.timestamp is None or value.timestamp.tzinfo is not None
    for exc in rejects:
        assert exc.reason in KNOWN_REASONS, exc
    return [exc.reason for exc in rejects]


@FUZZ
@given(payload=payloads)
def test_fuzzed_payloads_give_known_rejects_or_valid_values(payload):
    for parser in PARSERS:
        _check_outcome(parser, payload)


def test_published_edge_cases_are_rejects_with_their_reason():
    json_value = JsonPayload()
    cases = [
        (json_value, b'{"value": Infinity}', "not_json"),  # RFC 8259 section 6: no such literal
        (json_value, b'{"value": NaN}', "not_json"),
        (json_value, b'{"value": 1' + b"0" * 400 + b"}", "not_finite"),  # beyond binary64's ~1.8e308
        (json_value, b'{"value": 1' + b"0" * 5000 + b"}", "not_json"),  # over Python's 4300-digit limit
        (json_value, b'{"value": ' + b"[" * 3000 + b"]" * 3000 + b"}", "not_json"),  # nesting depth
        (SenmlPayload(), b'[{"bver": 1e400, "n": "a", "v": 1}]', "bad_version"),  # RFC 8428 4.4: an integer
        (SenmlPayload(), b'[{"bver": 1' + b"0" * 400 + b', "n": "a", "v": 1}]', "unsupported_version"),
        (JsonPayload(time_path="t"), b'{"value": 1, "t": 1' + b"0" * 400 + b"}", "bad_time"),
    ]
    for parser, payload, reason in cases:
        assert _check_outcome(parser, payload) == [reason], payload[:40]


PATTERNS = [TopicPattern("plant/+site/flow/+meter"), TopicPattern("senml/#rest"), TopicPattern("+a/+b", "{a}.{b}"),
            TopicPattern("#")]
topics = st.text(alphabet=st.sampled_from(list("ab/+#$\x00\x1b\u202e é")), max_size=40)


@FUZZ
@given(topic=topics)
def test_fuzzed_topics_route_to_a_feed_none_or_bad_topic(topic):
    for pattern in PATTERNS:
        try:
            feed = pattern.feed_id(topic)
        except RejectError as exc:
            assert exc.reason == "bad_topic"
            continue
        assert feed is None or (isinstance(feed, str) and feed)


@FUZZ
@given(ops=st.lists(st.tuples(st.text(max_size=60), st.text(max_size=60)), max_size=200),
       max_bytes=st.integers(ENTRY_OVERHEAD_BYTES, 4000))
def test_route_cache_never_exceeds_its_bytes_and_evicts_least_recently_used(ops, max_bytes):
    cache = RouteCache(max_bytes)
    for topic, feed in ops:
        cache.put(topic, None, feed)
        assert cache.bytes <= max_bytes
        assert cache.bytes == sum(item[2] for item in cache._items.values())
        if cache.get(topic) is not None:
            assert next(reversed(cache._items)) == topic  # the newest entry is the most recently used


def test_route_cache_evicts_in_lru_order():
    size = len("t0") + len("f0") + ENTRY_OVERHEAD_BYTES
    cache = RouteCache(3 * size)
    for i in range(3):
        cache.put(f"t{i}", "sub", f"f{i}")
    assert cache.get("t0") == ("sub", "f0")  # t1 is now the least recently used
    cache.put("t3", "sub", "f3")
    assert cache.get("t1") is None and cache.get("t0") == ("sub", "f0") and len(cache) == 3


def test_feed_gate_admits_max_feeds_and_rejects_later_new_feeds():
    refused: list[RejectError] = []
    gate = FeedGate("m", refused.append, max_feeds=3, max_feed_id_chars=20)
    at = datetime(2026, 1, 1, tzinfo=UTC)
    out = [Reading(f"f{i % 5}", at, 1.0) for i in range(10)] + [Reading("x" * 21, at, 1.0), Reading("a\x00", at, 1.0)]
    assert gate.screen_tail(out, 0, "topic") == 6
    assert [r.feed_id for r in out] == ["f0", "f1", "f2"] * 2
    assert Counter(e.reason for e in refused) == {"feed_limit": 4, "feed_id_too_long": 1, "bad_feed": 1}
    assert len(gate) == 3


def test_csv_follower_counts_feed_limit_rejects_and_moves_its_mark(tmp_path):
    path = tmp_path / "wide.csv"
    rows = ["timestamp,feed,value"] + [f"{T0_S + i},meter-{i % 8},{i}" for i in range(80)]
    path.write_text("\n".join(rows) + "\n")
    follower = CsvFollower("scada", str(path), CsvLayout(time_format="epoch_s"), from_start=True, max_feeds=5)
    got = follower.poll(1000, 0.0)
    assert {r.feed_id for r in got} == {f"meter-{k}" for k in range(5)} and len(got) == 50
    assert follower.counts()["rejects_by_reason"] == {"feed_limit": 30}
    (mark,) = follower.durable_marks(got)
    assert mark.offset_bytes == path.stat().st_size  # the refused last rows do not hold the mark back
    follower.stop()


# ------------------------------------------------------------------------------ through a real broker
@pytest.fixture
def broker(tmp_path):
    from mqtt_broker import MosquittoBroker, mosquitto_binary

    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine (apt-get install mosquitto)")
    with MosquittoBroker(tmp_path / "broker") as running:
        yield running


def _subscriber(port: int, client_id: str, **kwargs):
    from leadline.adapters.sources.mqtt_connection import MqttSettings
    from leadline.adapters.sources.mqtt_subscriber import MqttSubscriber, Subscription

    subscriptions = [Subscription(TopicPattern("plant/+site/flow/+meter"), JsonPayload(value_path="v", time_path="t")),
                     Subscription(TopicPattern("senml/+device"), SenmlPayload())]
    sub = MqttSubscriber("plant-mqtt", MqttSettings(client_id=client_id, port=port), subscriptions, **kwargs)
    sub.start()
    sub.wait_connected(10)
    return sub


def _drain(sub, want_readings: int, want_rejects: int, timeout_s: float, on_readings=None) -> int:
    got = 0
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        readings = sub.poll(5000, 0.05)
        if on_readings is not None:
            on_readings(readings)
        got += len(readings)
        sub.ack(readings)
        rejected = sum(sub.counts()["rejects_by_reason"].values())
        if got >= want_readings and rejected >= want_rejects:
            break
    return got


@pytest.mark.broker
def test_long_topics_and_new_feeds_beyond_the_limit_are_counted_rejects(broker):
    from mqtt_broker import QosOnePublisher

    sub = _subscriber(broker.port, "bounds", max_topic_bytes=64, max_feeds=2)
    publisher = QosOnePublisher(broker.port)
    try:
        publisher.publish("plant/north/flow/" + "m" * 60, json.dumps({"v": 1, "t": T0_S}))  # 77 bytes
        for k in range(4):
            publisher.publish(f"plant/north/flow/m{k}", json.dumps({"v": k, "t": T0_S}))
        publisher.publish("plant/north/flow/m0", json.dumps({"v": 9, "t": T0_S + 1}))
        assert publisher.wait_all(10)
        got = _drain(sub, 3, 3, 10)
        assert got == 3
        assert sub.counts()["rejects_by_reason"] == {"topic_too_long": 1, "feed_limit": 2}
        samples = {s.reason: s for s in sub.take_rejects()}
        assert len(samples["topic_too_long"].where) < 100
    finally:
        publisher.close()
        sub.close()


# ------------------------------------------------------------------------------ 10^5 generated messages
KINDS = {  # kind: (share, expected reason or None for a reading)
    "json": (0.52, None), "senml": (0.05, None), "not_json": (0.05, "not_json"),
    "infinity": (0.03, "not_json"), "huge_int": (0.03, "not_finite"), "deep": (0.02, "not_json"),
    "bver": (0.02, "bad_version"), "long_topic": (0.03, "topic_too_long"), "empty_level": (0.02, "bad_topic"),
    "new_feed": (0.10, "feed_limit"), "text_value": (0.05, "non_numeric"), "oversized": (0.005, "oversized"),
    "bad_utf8": (0.02, "bad_utf8"), "missing": (0.025, "missing_field"), "bad_time": (0.03, "bad_time"),
}
JSON_FEEDS, SENML_FEEDS = 150, 50


def _message(kind: str, i: int, rng: np.random.Generator) -> tuple[str, bytes]:
    k = int(rng.integers(JSON_FEEDS))
    topic = f"plant/site{k % 5}/flow/m{k:03d}"
    value = round(float(rng.normal(40.0, 2.0)), 6)
    if kind == "json":
        return topic, b'{"v": %r, "t": %d}' % (value, T0_S + i)
    if kind == "senml":
        return f"senml/dev{k % SENML_FEEDS}", _dumps([{"n": "temp", "v": value, "t": T0_S + i}])
    bad = {
        "not_json": b"{bad", "infinity": b'{"v": Infinity, "t": 1}',
        "huge_int": b'{"v": 1' + b"0" * 400 + b', "t": 1}', "deep": b'{"v": ' + b"[" * 3000 + b"]" * 3000 + b"}",
        "text_value": b'{"v": "high", "t": 1}', "oversized": b"9" * 70_000, "bad_utf8": b"\xff\xfe",
        "missing": b'{"t": 1}', "bad_time": b'{"v": 1, "t": "31.02.2026"}',
    }
    if kind in bad:
        return topic, bad[kind]
    if kind == "bver":
        return "senml/dev0", b'[{"bver": 1e400, "n": "temp", "v": 1}]'
    if kind == "long_topic":
        return "plant/site0/flow/" + "m" * 300, b'{"v": 1, "t": 1}'
    if kind == "empty_level":
        return "plant//flow/m001", b'{"v": 1, "t": 1}'
    return f"plant/intruder/flow/x{i}", b'{"v": 1, "t": %d}' % (T0_S + i)  # new_feed


@pytest.mark.slow
@pytest.mark.broker
def test_a_hundred_thousand_generated_messages_are_counted_exactly_in_bounded_memory(broker, tmp_path):
    from mqtt_broker import QosOnePublisher

    # LEADLINE_FUZZ_MESSAGES=1000000 gives the long form (about 15 min); CI runs 10^5
    n, chunk = int(os.environ.get("LEADLINE_FUZZ_MESSAGES", "100000")), 5_000
    rng = np.random.default_rng(20261202)
    names = list(KINDS)
    shares = np.array([KINDS[k][0] for k in names])
    kinds = rng.choice(len(names), size=n, p=shares / shares.sum())
    sub = _subscriber(broker.port, "hundred-thousand", max_topic_bytes=256, max_feeds=JSON_FEEDS + SENML_FEEDS,
                      dedupe_window=16, route_cache_bytes=256 * 1024, queue_max_messages=2000)
    store = open_store(str(tmp_path / "rejects.db"))
    publisher = QosOnePublisher(broker.port, max_inflight=1000)
    # feed -> [readings, sum of epoch s, sum of squares]: exactly-once in memory bounded by the feed limit
    # (a repeat or a loss changes the count or the sums; QoS 1 may reorder, so order is not checked)
    seen: dict[str, list] = {}
    want: dict[str, list] = {}

    def tally(table: dict, feed: str, epoch_s: int) -> None:
        entry = table.setdefault(feed, [0, 0, 0])
        entry[0] += 1
        entry[1] += epoch_s
        entry[2] += epoch_s * epoch_s

    def check(readings) -> None:
        for r in readings:
            tally(seen, r.feed_id, int(r.timestamp.timestamp()))

    try:
        # first every allowed feed once, so that the feed limit is full before the mix starts
        for k in range(JSON_FEEDS):
            publisher.publish(f"plant/site{k % 5}/flow/m{k:03d}", b'{"v": 1.0, "t": %d}' % (T0_S - 1))
            tally(want, f"site{k % 5}/m{k:03d}", T0_S - 1)
        for d in range(SENML_FEEDS):
            publisher.publish(f"senml/dev{d}", _dumps([{"n": "temp", "v": 1.0, "t": T0_S - 1}]))
            tally(want, f"dev{d}/temp", T0_S - 1)
        assert publisher.wait_all(30)
        assert _drain(sub, JSON_FEEDS + SENML_FEEDS, 0, 30, check) == JSON_FEEDS + SENML_FEEDS
        expected_rejects: Counter = Counter()
        expected_readings = JSON_FEEDS + SENML_FEEDS
        got_readings = expected_readings
        baseline = None
        tracemalloc.start()
        for start in range(0, n, chunk):
            want_rejects = 0
            for i in range(start, start + chunk):
                kind = names[kinds[i]]
                topic, payload = _message(kind, i, rng)
                publisher.publish(topic, payload)
                reason = KINDS[kind][1]
                if reason is None:
                    expected_readings += 1
                    feed = topic.split("/", 1)[1].replace("/flow/", "/") if kind == "json" else f"{topic[6:]}/temp"
                    tally(want, feed, T0_S + i)
                else:
                    expected_rejects[reason] += 1
                    want_rejects += 1
            assert publisher.wait_all(60)
            publisher.infos.clear()
            publisher.published.clear()
            before = sum(sub.counts()["rejects_by_reason"].values())
            got_readings += _drain(sub, expected_readings - got_readings, before, 60, check)
            stage_source_rejects(store, sub)
            store.flush()
            gc.collect()
            if start == 4 * chunk:
                baseline = tracemalloc.get_traced_memory()[0]
        growth = tracemalloc.get_traced_memory()[0] - baseline
        tracemalloc.stop()
        assert got_readings == expected_readings
        assert seen == want  # every valid reading exactly once
        assert len(seen) == JSON_FEEDS + SENML_FEEDS
        counts = {c.reason: c.count for c in store.reject_counts()}
        assert counts == dict(expected_rejects)
        assert set(counts) <= KNOWN_REASONS
        # 80,000 messages after the baseline; anything kept per message would be several MB
        assert growth < 2_000_000, growth
    finally:
        publisher.close()
        sub.close()
        store.close()
