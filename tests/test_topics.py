"""Topic patterns: the subscription filter, feed ids, and clear errors."""

from __future__ import annotations

import pytest

from leadline.adapters.sources.topics import TopicPattern
from leadline.detector.errors import ConfigError, RejectError


def test_named_levels_make_the_feed_id_and_the_filter_drops_names():
    pattern = TopicPattern("plant/+site/flow/+meter")
    assert pattern.filter == "plant/+/flow/+"
    assert pattern.names == ("site", "meter")
    assert pattern.feed_id("plant/northgate/flow/dm-03") == "northgate/dm-03"


def test_topics_of_another_shape_do_not_match():
    pattern = TopicPattern("plant/+site/flow/+meter")
    assert pattern.feed_id("plant/northgate/pressure/dm-03") is None
    assert pattern.feed_id("plant/northgate/flow") is None
    assert pattern.feed_id("plant/northgate/flow/dm-03/extra") is None


def test_template_and_anonymous_wildcards():
    pattern = TopicPattern("site/+area/+/level/+tank", feed="{area}.level.{tank}")
    assert pattern.filter == "site/+/+/level/+"
    assert pattern.feed_id("site/east/gw7/level/t2") == "east.level.t2"


def test_named_rest_captures_remaining_levels():
    pattern = TopicPattern("meters/#path")
    assert pattern.filter == "meters/#"
    assert pattern.feed_id("meters/westbrook/gas/g-11") == "westbrook/gas/g-11"


def test_pattern_without_names_uses_the_topic():
    pattern = TopicPattern("telemetry/#")
    assert pattern.feed_id("telemetry/a/b") == "telemetry/a/b"
    # MQTT 3.1.1 section 4.7.1.2: '#' also matches the parent level.
    assert pattern.feed_id("telemetry") == "telemetry"


def test_wildcards_do_not_match_dollar_topics():
    # MQTT 3.1.1 section 4.7.2: filters starting with a wildcard do not match $-topics.
    assert TopicPattern("+name/status").feed_id("$SYS/status") is None


@pytest.mark.parametrize(
    "topic",
    ["plant//flow/dm-03", "plant/northgate/flow/"],
)
def test_empty_captured_level_is_rejected_with_the_topic(topic):
    with pytest.raises(RejectError, match="is empty") as info:
        TopicPattern("plant/+site/flow/+meter").feed_id(topic)
    assert info.value.reason == "bad_topic"
    assert info.value.where == topic


def test_empty_named_rest_is_rejected():
    with pytest.raises(RejectError, match="'path'"):
        TopicPattern("meters/#path").feed_id("meters")


@pytest.mark.parametrize(
    ("pattern", "message"),
    [
        ("", "non-empty"),
        ("a/#rest/b", "only allowed as the last level"),
        ("a/b+c", "must stand alone"),
        ("a/+1x", "capture name"),
        ("a/+x-y", "capture name"),
        ("a/+x/+x", "captured twice"),
        ("a/\0", "NUL"),
    ],
)
def test_bad_patterns_name_the_problem(pattern, message):
    with pytest.raises(ConfigError, match=message):
        TopicPattern(pattern)


def test_template_with_unknown_name_is_refused():
    with pytest.raises(ConfigError, match=r"uses \{tank\}"):
        TopicPattern("plant/+site", feed="{site}/{tank}")
