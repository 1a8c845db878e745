"""Subscribe to MQTT topics and hand their values to the engine as readings.

Flow
----
paho's network thread runs :meth:`MqttSubscriber._on_message`: it maps the
topic to a feed id (:mod:`.topics`), parses the payload (:mod:`.payloads`,
:mod:`.senml`) and puts the message's readings on a bounded queue. When the
queue is full the callback *blocks* (backpressure): the broker keeps the
messages, nothing is dropped. The service thread takes readings with
:meth:`~MqttSubscriber.poll`, commits their effects, then calls
:meth:`~MqttSubscriber.ack`, which sends the PUBACKs (``manual_ack=True``).
A crash before the commit therefore leaves the messages unacknowledged, and
the broker delivers them again to the same persistent session.

Duplicates
----------
QoS 1 is "at least once": after a reconnect the broker sends unacknowledged
messages again, and a publisher may resend too. :meth:`poll` drops a reading
whose ``(feed, timestamp)`` it has already issued (still pending, or
committed within the last ``dedupe_window`` timestamps of the feed, or at or
before ``resume_after[feed]``). A dropped duplicate is acknowledged once the
reading it repeats is committed. Readings timed by arrival cannot be told
from their repeats this way (each delivery arrives at another time); send
timestamps in the payload to get exactly-once readings.

Arrival time
------------
A payload without a time (a plain number, JSON without ``time_path``, SenML
relative times resolve against it) is timed by its arrival at the
subscriber, and the reading has ``timestamp_from_arrival=True``;
:meth:`MqttSubscriber.arrival_time_feeds` lists the feeds this happened to,
with counts.

Throughput and broker settings
------------------------------
Since a message is acknowledged only after the commit, the broker's window
of unacknowledged messages bounds the flow: MQTT 5 clients announce it as
Receive Maximum (``MqttSettings.receive_maximum``, default 1000); for 3.1.1
clients Mosquitto's ``max_inflight_messages`` (default 20) applies and
should be raised (for example to 1000). ``max_queued_messages`` (default
1000 per client, mosquitto.conf(5)) must cover outage time x message rate, or
the broker drops the rest. :meth:`~MqttSubscriber.poll`
lingers ``batch_linger_s`` (default 20 ms) once a message is waiting, so
that the service thread takes, and acknowledges, messages in batches.

Rejects
-------
A message on a topic no pattern maps, with an empty captured level, or with
a payload its parser rejects is counted by reason and sampled (where = the
topic), and acknowledged at once: it can never become a reading, and an
unacknowledged message would hold one of the broker's in-flight slots for
ever.

Bounds under hostile input
--------------------------
A topic longer than ``max_topic_bytes`` is rejected (``topic_too_long``)
before it is decoded or routed; readings of a new feed beyond
``max_feeds`` are rejected (``feed_limit``, :mod:`.feed_gate`); the route
cache is bounded in bytes (:mod:`.route_cache`).
"""

from __future__ import annotations

import itertools
import logging
import threading
import time
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Iterable, Mapping, NamedTuple, Sequence

import paho.mqtt.client as mqtt
from paho.mqtt.subscribeoptions import SubscribeOptions

from leadline.adapters.ports import RejectSample, SourceOffset
from leadline.adapters.sources.feed_gate import DEFAULT_MAX_FEEDS, FeedGate
from leadline.adapters.sources.mqtt_connection import MqttSettings, build_client, connect_async
from leadline.adapters.sources.mqtt_queue import _BoundedQueue, _FeedWindow, _Pending
from leadline.adapters.sources.payloads import PayloadParser
from leadline.adapters.sources.rejects import RejectDelta, RejectLog
from leadline.adapters.sources.route_cache import DEFAULT_MAX_BYTES as DEFAULT_ROUTE_CACHE_BYTES
from leadline.adapters.sources.route_cache import RouteCache
from leadline.adapters.sources.timeparse import epoch_seconds_to_utc
from leadline.adapters.sources.topics import TopicPattern
from leadline.detector.errors import ConfigError, RejectError, SourceError
from leadline.detector.readings import Reading

logger = logging.getLogger("leadline.sources.mqtt")

#: Default bound of a topic's length in bytes; longer topics are rejected (topic_too_long).
DEFAULT_MAX_TOPIC_BYTES = 256


@dataclass(frozen=True)
class Subscription:
    """One topic pattern and the parser of its payloads."""

    pattern: TopicPattern
    parser: PayloadParser
    qos: int = 1

    def __post_init__(self) -> None:
        if self.qos not in (0, 1):
            raise ConfigError(f"subscription {self.pattern.pattern!r}: qos must be 0 or 1, got {self.qos!r}")


class MqttOrigin(NamedTuple):
    """Where a reading came from: the message id, its session epoch, our sequence number."""

    mid: int
    session: int
    seq: int


class MqttSubscriber:
    """A :class:`~leadline.adapters.ports.Source` fed by MQTT subscriptions.

    Parameters
    ----------
    name : str
        The configured source's name.
    settings : MqttSettings
        Broker, session, TLS and credentials.
    subscriptions : sequence of Subscription
        Tried in order; the first pattern that maps a topic wins.
    queue_max_messages : int
        Bound of the queue between the network thread and :meth:`poll`.
    dedupe_window : int
        Committed timestamps remembered per feed for dropping repeats.
    resume_after : mapping of feed -> datetime, optional
        The newest committed reading time per feed (from the store); readings
        at or before it are repeats.
    batch_linger_s : float
        Once a message is waiting, :meth:`poll` waits this much longer for a
        fuller batch (throughput over a few ms of latency).
    max_topic_bytes : int
        Longer topics are rejected (``topic_too_long``).
    max_feeds : int
        Distinct feeds this source may create; readings of further new
        feeds are rejected (``feed_limit``).
    route_cache_bytes : int
        Bound of the topic route cache.
    """

    def __init__(
        self,
        name: str,
        settings: MqttSettings,
        subscriptions: Sequence[Subscription],
        *,
        queue_max_messages: int = 10_000,
        dedupe_window: int = 1024,
        resume_after: Mapping[str, datetime] | None = None,
        batch_linger_s: float = 0.02,
        reject_log: RejectLog | None = None,
        max_topic_bytes: int = DEFAULT_MAX_TOPIC_BYTES,
        max_feeds: int = DEFAULT_MAX_FEEDS,
        route_cache_bytes: int = DEFAULT_ROUTE_CACHE_BYTES,
    ):
        if not subscriptions:
            raise ConfigError(f"{name}: an MQTT source needs at least one subscription")
        if queue_max_messages < 1:
            raise ConfigError(f"{name}: queue_max_messages must be at least 1")
        self.name = name
        self.settings = settings
        self.subscriptions = list(subscriptions)
        self.dedupe_window = dedupe_window
        self.batch_linger_s = batch_linger_s
        self._resume_after = dict(resume_after or {})
        self._queue = _BoundedQueue(queue_max_messages)
        self._rejects = reject_log or RejectLog(name)
        if max_topic_bytes < 1:
            raise ConfigError(f"{name}: max_topic_bytes must be at least 1")
        self.max_topic_bytes = max_topic_bytes
        self._feeds = FeedGate(name, self._rejects.add, max_feeds)
        self._client: mqtt.Client | None = None
        self._stopping = threading.Event()
        self._connected = threading.Event()  # connected and subscribed (SUBACK seen)
        self._subscribe_mid: int | None = None
        self._session = 0
        self._route_cache = RouteCache(route_cache_bytes)
        self._lock = threading.Lock()
        #: The latest unit each feed's payloads gave (SenML "u"/"bu"), until :meth:`take_units`.
        self._units: dict[str, str] = {}
        self._units_lock = threading.Lock()
        self._seq = itertools.count(1)
        self._pending: dict[int, _Pending] = {}
        self._pending_keys: dict[tuple[str, datetime], int] = {}
        self._windows: dict[str, _FeedWindow] = {}
        self._arrival_feeds: dict[str, int] = {}
        self._counts = {"messages": 0, "readings": 0, "duplicates": 0, "acked": 0, "rejected_messages": 0}
        self.last_error: str | None = None

    # -- Source protocol ----------------------------------------------------------
    def start(self) -> None:
        """Connect in the background (a broker that is down is retried)."""
        if self._client is not None:
            return
        client = build_client(self.settings, manual_ack=True)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_connect_fail = self._on_connect_fail
        client.on_message = self._on_message
        client.on_subscribe = self._on_subscribe
        self._client = client
        connect_async(client, self.settings)
        client.loop_start()
        logger.info("%s: connecting to %s as %r", self.name, self.settings.address, self.settings.client_id)

    def poll(self, max_items: int, timeout_s: float) -> list[Reading]:
        """Readings of whole messages, repeats removed, up to about ``max_items``."""
        out: list[Reading] = []
        items = self._queue.take(max(1, max_items), max(0.0, timeout_s), self.batch_linger_s)
        if items:
            with self._lock:
                for item in items:
                    self._take(item, out)
            self._counts["readings"] += len(out)
        return out

    def durable_marks(self, readings: Sequence[Reading]) -> list[SourceOffset]:
        """MQTT positions are acknowledgements, not marks: always empty."""
        return []

    def ack(self, readings: Sequence[Reading]) -> None:
        """Acknowledge the messages of ``readings`` (their effects are committed)."""
        seqs: dict[int, None] = {}
        for reading in readings:
            origin = reading.origin
            if type(origin) is MqttOrigin:
                seqs[origin.seq] = None
        to_ack: list[tuple[int, int, int]] = []
        with self._lock:
            for seq in seqs:
                pending = self._pending.pop(seq, None)
                if pending is None:
                    continue
                for key in pending.keys:
                    if self._pending_keys.get(key) == seq:
                        del self._pending_keys[key]
                    window = self._windows.get(key[0])
                    if window is None:
                        window = self._windows[key[0]] = _FeedWindow()
                    window.add(key[1], self.dedupe_window)
                to_ack.append((pending.mid, pending.qos, pending.session))
                to_ack.extend(pending.extra)
        self._send_acks(to_ack)

    def take_rejects(self) -> list[RejectSample]:
        return self._rejects.take()

    def take_units(self) -> dict[str, str]:
        """The unit each feed's payloads gave since the last call (the latest per feed)."""
        with self._units_lock:
            units, self._units = self._units, {}
        return units

    def take_reject_counts(self) -> list[RejectDelta]:
        """Exact reject counts per reason since the last call (the samples are capped)."""
        return self._rejects.take_counts()

    def stop(self) -> None:
        """Stop taking messages; the connection stays for acks until :meth:`close`.

        Messages not yet queued stay unacknowledged in the broker's session
        and are delivered again at the next start.
        """
        self._stopping.set()

    def close(self, timeout_s: float = 5.0) -> None:
        """Stop, disconnect (the broker keeps the session) and end the network thread."""
        self.stop()
        client = self._client
        if client is None:
            return
        # Let the last PUBACKs leave before the DISCONNECT: a broker that has
        # not read them when the socket closes sends those messages again.
        deadline = time.monotonic() + timeout_s
        while client.want_write() and time.monotonic() < deadline:
            time.sleep(0.01)
        time.sleep(min(0.05, max(0.0, deadline - time.monotonic())))
        client.disconnect()
        client.loop_stop()
        self._connected.clear()
        logger.info("%s: disconnected from %s", self.name, self.settings.address)

    # -- extras -------------------------------------------------------------------
    @property
    def connected(self) -> bool:
        return self._connected.is_set()

    def wait_connected(self, timeout_s: float) -> None:
        """Block until connected and subscribed; SourceError naming the last failure otherwise."""
        if not self._connected.wait(timeout_s):
            client = self._client
            reason = self.last_error or (getattr(client, "last_connect_error", None) if client else None)
            raise SourceError(
                f"{self.name}: not connected to {self.settings.address} after {timeout_s} s"
                + (f"; last error: {reason}" if reason else "")
            )

    def counts(self) -> dict[str, Any]:
        """Messages received, readings issued, duplicates dropped, acks, rejects by reason."""
        with self._lock:
            counts: dict[str, Any] = dict(self._counts)
        counts["rejects_by_reason"] = self._rejects.counts()
        counts["queued"] = len(self._queue)
        return counts

    def arrival_time_feeds(self) -> dict[str, int]:
        """Feeds whose readings were timed by arrival, with how many."""
        with self._lock:
            return dict(self._arrival_feeds)

    def pending_messages(self) -> int:
        """Messages issued by poll and not yet acknowledged."""
        with self._lock:
            return len(self._pending)

    # -- paho callbacks (network thread) -------------------------------------------
    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason_code: Any, properties: Any) -> None:
        if reason_code.is_failure:
            self.last_error = f"connection refused: {reason_code}"
            logger.warning("%s: %s refused the connection: %s", self.name, self.settings.address, reason_code)
            return
        session_present = bool(getattr(flags, "session_present", False))
        if not session_present:
            self._session += 1  # the broker holds no earlier session: old message ids are void
        self.last_error = None
        if self.settings.protocol == "5":
            topics: list[tuple[str, Any]] = [
                (s.pattern.filter, SubscribeOptions(qos=s.qos)) for s in self.subscriptions
            ]
        else:
            topics = [(s.pattern.filter, s.qos) for s in self.subscriptions]
        result, mid = client.subscribe(topics)
        if result != mqtt.MQTT_ERR_SUCCESS:
            logger.warning("%s: subscribe failed: %s", self.name, mqtt.error_string(result))
        self._subscribe_mid = mid  # connected counts from the SUBACK on
        logger.info(
            "%s: connected to %s (session present: %s); subscribing to %s",
            self.name, self.settings.address, session_present, [t for t, _ in topics],
        )

    def _on_subscribe(self, client: mqtt.Client, userdata: Any, mid: int, reason_codes: Any, properties: Any) -> None:
        for code in reason_codes:
            if code.is_failure:
                self.last_error = f"subscription refused: {code}"
                logger.error("%s: the broker refused a subscription: %s", self.name, code)
        if mid == self._subscribe_mid:
            self._connected.set()

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason_code: Any, properties: Any) -> None:
        self._connected.clear()
        if self._stopping.is_set():
            return
        if not (self.last_error or "").startswith("connection refused"):
            self.last_error = f"disconnected: {reason_code}"
        logger.warning("%s: disconnected from %s (%s); reconnecting", self.name, self.settings.address, reason_code)

    def _on_connect_fail(self, client: mqtt.Client, userdata: Any) -> None:
        reason = getattr(client, "last_connect_error", None) or "connection failed"
        if reason != self.last_error:
            logger.warning("%s: cannot connect to %s: %s; retrying", self.name, self.settings.address, reason)
        self.last_error = reason

    def _on_message(self, client: mqtt.Client, userdata: Any, message: mqtt.MQTTMessage) -> None:
        try:
            self._handle(client, message)
        except Exception:  # never let the network thread die on our bug
            logger.exception("%s: unexpected error handling a message; acknowledged and counted", self.name)
            self._rejects.add(RejectError("internal_error", "unexpected error in the message handler"))
            self._ack_now(client, message)

    def _handle(self, client: mqtt.Client, message: mqtt.MQTTMessage) -> None:
        if self._stopping.is_set():
            return  # left unacknowledged: delivered again at the next start
        now_s = time.time()
        self._counts["messages"] += 1
        topic_bytes = getattr(message, "_topic", b"")
        if len(topic_bytes) > self.max_topic_bytes:
            where = repr(bytes(topic_bytes[:80])) + "..."
            self._reject(client, message, RejectError(
                "topic_too_long", f"topic of {len(topic_bytes)} bytes; expected at most {self.max_topic_bytes} "
                "(max_topic_bytes)", where))
            return
        try:
            topic = message.topic
        except UnicodeDecodeError:
            self._reject(client, message, RejectError("bad_topic", "topic is not UTF-8", repr(message._topic[:80])))
            return
        route = self._route_cache.get(topic)
        if route is None:
            try:
                route = self._route(topic)
            except RejectError as exc:
                self._reject(client, message, exc)
                return
            if route is None:
                self._reject(
                    client,
                    message,
                    RejectError("unmatched_topic", "no configured topic pattern maps this topic to a feed", topic),
                )
                return
        subscription, feed = route
        try:
            values, record_rejects = subscription.parser.parse(message.payload, now_s)
        except RejectError as exc:
            self._reject(client, message, exc)
            return
        for exc in record_rejects:
            self._rejects.add(RejectError(exc.reason, exc.detail, topic, exc.raw))
        if not values:
            self._ack_now(client, message)  # rejected records only (or an empty pack)
            return
        session = self._session
        seq = next(self._seq)
        origin = MqttOrigin(message.mid, session, seq)
        readings: list[Reading] = []
        arrival: datetime | None = None
        for value in values:
            feed_id = feed if value.name is None else (f"{feed}/{value.name}" if feed else value.name)
            if value.unit:
                with self._units_lock:
                    self._units[feed_id] = value.unit
            timestamp = value.timestamp
            if timestamp is None:
                if arrival is None:
                    arrival = epoch_seconds_to_utc(now_s)
                readings.append(Reading(feed_id, arrival, value.value, origin, True))
            else:
                readings.append(Reading(feed_id, timestamp, value.value, origin))
        if not self._feeds.screen_tail(readings, 0, topic):
            self._ack_now(client, message)  # every reading was of a refused feed
            return
        item = (message.mid, message.qos, session, seq, readings)
        while not self._queue.put(item, 0.5):
            if self._stopping.is_set():
                return  # unacknowledged: delivered again later

    def _route(self, topic: str) -> tuple[Subscription, str] | None:
        for subscription in self.subscriptions:
            feed = subscription.pattern.feed_id(topic)
            if feed is not None:
                self._route_cache.put(topic, subscription, feed)
                return subscription, feed
        return None

    def _reject(self, client: mqtt.Client, message: mqtt.MQTTMessage, error: RejectError) -> None:
        where = error.where or _topic_text(message)
        self._rejects.add(RejectError(error.reason, error.detail, where, error.raw or bytes(message.payload[:512])))
        self._counts["rejected_messages"] += 1
        self._ack_now(client, message)

    def _ack_now(self, client: mqtt.Client, message: mqtt.MQTTMessage) -> None:
        if message.qos > 0:
            client.ack(message.mid, message.qos)

    # -- service thread -----------------------------------------------------------
    def _take(self, item: tuple[Any, ...], out: list[Reading]) -> None:
        """Issue the new readings of one queued message; park or ack its repeats."""
        mid, qos, session, seq, readings = item
        pending_keys = self._pending_keys
        windows = self._windows
        resume_after = self._resume_after
        fresh: list[Reading] = []
        keys: list[tuple[str, datetime]] = []
        repeat_of_pending = 0
        for reading in readings:
            feed_id = reading.feed_id
            key = (feed_id, reading.timestamp)
            pending_seq = pending_keys.get(key)
            if pending_seq is not None:
                repeat_of_pending = max(repeat_of_pending, pending_seq)
                continue
            window = windows.get(feed_id)
            if window is not None and key[1] in window.seen:
                continue
            if resume_after:
                resume = resume_after.get(feed_id)
                if resume is not None and key[1] <= resume:
                    continue
            pending_keys[key] = seq
            keys.append(key)
            fresh.append(reading)
            if reading.timestamp_from_arrival:
                self._arrival_feeds[feed_id] = self._arrival_feeds.get(feed_id, 0) + 1
        if len(fresh) != len(readings):
            self._counts["duplicates"] += len(readings) - len(fresh)
        if fresh:
            self._pending[seq] = _Pending(mid, qos, session, keys)
            out.extend(fresh)
        elif repeat_of_pending and repeat_of_pending in self._pending:
            self._pending[repeat_of_pending].extra.append((mid, qos, session))
        else:
            self._send_acks([(mid, qos, session)])  # repeats of committed readings

    def _send_acks(self, acks: Iterable[tuple[int, int, int]]) -> None:
        client = self._client
        if client is None:
            return
        current = self._session
        sent: set[int] = set()
        for mid, qos, session in acks:
            if qos == 0 or session != current or mid in sent:
                continue  # QoS 0 needs none; a void session's ids mean nothing now
            sent.add(mid)
            client.ack(mid, qos)
        self._counts["acked"] += len(sent)


def _topic_text(message: mqtt.MQTTMessage) -> str:
    try:
        return message.topic
    except UnicodeDecodeError:
        return repr(message._topic[:80])
