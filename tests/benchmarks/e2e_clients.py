"""The MQTT clients of bench_end_to_end.py: publisher processes and the bare subscriber.

Each runs in its own process (``multiprocessing``, spawn context) and reports
through shared counters, so the benchmark reads every party's count at the
same instant:

* :func:`publisher_main`: one paho client publishing QoS 1 JSON readings of
  its share of the feeds (feed ``k`` belongs to publisher ``k % P``), one
  feed after the other, each feed's readings one minute apart in reading
  time. It counts the PUBACKs it received in ``acked``. It obeys commands
  from the benchmark (:class:`Publishers`): publish a fixed number of
  messages, flat out until told to stop, or paced at a rate while planting
  spikes. Flat out means as fast as paho goes while at most
  :data:`IN_FLIGHT` messages wait for their PUBACK (so paho's own queue
  cannot hide a slow broker). Publishers run at nice :data:`PUBLISHER_NICE`:
  on a machine with fewer cores than processes the scheduler then serves the
  service and the bare client first; whether the publishers still kept
  ahead is read from their rate in the window (bench_end_to_end.py's
  "limited by").
* :func:`bare_main`: a paho client that only subscribes (QoS 1, MQTT 5,
  receive maximum 1000 like the service's default) and parses each
  payload's JSON and its two numbers, counting in ``received``.

Values: white noise, mean 50 and standard deviation 1, from one seeded
table per publisher; a planted spike adds :data:`SPIKE_SD` = 20 to one reading.
"""

from __future__ import annotations

import json
import os
import threading
import time
from dataclasses import dataclass
from multiprocessing import get_context
from typing import Any

TOPIC_ROOT = "e2e"
#: The service's subscription: ``e2e/<group>/<meter>`` -> feed ``e2e/<group>/<meter>``.
TOPIC_PATTERN = "e2e/+group/+meter"
FEED_TEMPLATE = "e2e/{group}/{meter}"
MEAN = 50.0
SPIKE_SD = 20.0
STEP_S = 60
IN_FLIGHT = 2000
RECEIVE_MAXIMUM = 1000
#: Publishers yield the CPU to the service and the bare client when the cores are short (module docstring).
PUBLISHER_NICE = 5


def topic_of(k: int) -> str:
    return f"{TOPIC_ROOT}/g{k // 100:03d}/m{k % 100:02d}"


def feed_of(k: int) -> str:
    return topic_of(k)


def _connect(client: Any, port: int, **kwargs: Any) -> None:
    connected = threading.Event()
    previous = client.on_connect

    def on_connect(c, userdata, flags, reason_code, properties):
        if previous is not None:
            previous(c, userdata, flags, reason_code, properties)
        connected.set()

    client.on_connect = on_connect
    client.connect("127.0.0.1", port, keepalive=60, **kwargs)
    client.loop_start()
    if not connected.wait(20):
        raise RuntimeError(f"could not connect to the broker on 127.0.0.1:{port}")


def publisher_main(index: int, n_publishers: int, port: int, n_feeds: int, t0_s: int, seed: int,
                   commands: Any, acked: Any, stop: Any) -> None:
    """One publisher process (module docstring); replies to each command on ``commands``."""
    import numpy as np
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    os.nice(PUBLISHER_NICE)
    feeds = list(range(index, n_feeds, n_publishers))
    topics = [topic_of(k) for k in feeds]
    next_step = [0] * len(feeds)
    noise = [float(x) for x in np.random.default_rng(seed + index).standard_normal(4099)]
    state = {"cursor": 0, "sent": 0}
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"e2e-publisher-{index}", protocol=mqtt.MQTTv311)
    client.max_inflight_messages_set(1000)
    client.max_queued_messages_set(0)

    def on_publish(c, userdata, mid, reason_code, properties):
        acked.value += 1

    client.on_publish = on_publish
    _connect(client, port)

    def send(j: int, spike: bool) -> None:
        k, step = feeds[j], next_step[j]
        value = MEAN + noise[(k * 31 + step) % 4099] + (SPIKE_SD if spike else 0.0)
        client.publish(topics[j], b'{"t":%d,"v":%.5f}' % (t0_s + STEP_S * step, value), qos=1)
        next_step[j] = step + 1
        state["sent"] += 1

    def run(messages: int | None, rate: float | None, spikes: dict[int, float]) -> dict:
        """Round robin over the feeds; a due spike is published at once, out of its feed's turn."""
        planted = []
        due = sorted((t, k) for k, t in spikes.items())
        start = time.monotonic()
        n = 0
        cursor = state["cursor"]
        while messages is None or n < messages:
            if messages is None and not n & 127 and stop.is_set():
                break
            if rate is not None:
                while n >= rate * (time.monotonic() - start) and not stop.is_set():
                    time.sleep(0.001)
                if stop.is_set():
                    break
            else:
                while state["sent"] - acked.value >= IN_FLIGHT:
                    time.sleep(0.0002)
            if due and time.monotonic() >= due[0][0]:
                k = due.pop(0)[1]
                j = (k - index) // n_publishers
                planted.append((k, next_step[j], time.monotonic()))
                send(j, spike=True)
            else:
                send(cursor, spike=False)
                cursor = cursor + 1 if cursor + 1 < len(feeds) else 0
            n += 1
        state["cursor"] = cursor
        deadline = time.monotonic() + 120
        while acked.value < state["sent"] and time.monotonic() < deadline:
            time.sleep(0.005)
        return {"published": n, "elapsed_s": time.monotonic() - start, "planted": planted,
                "unacked": state["sent"] - acked.value}

    commands.send({"ready": True})
    while True:
        command = commands.recv()
        if command["do"] == "close":
            break
        commands.send(run(command.get("messages"), command.get("rate"), dict(command.get("spikes", {}))))
    client.disconnect()
    client.loop_stop()


def bare_main(port: int, received: Any, ready: Any, stop: Any) -> None:
    """The bare subscriber (module docstring): subscribe, parse, count, until ``stop``."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties
    from paho.mqtt.subscribeoptions import SubscribeOptions

    subscribed = threading.Event()
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="e2e-bare", protocol=mqtt.MQTTv5)

    def on_message(c, userdata, message):
        document = json.loads(message.payload)
        float(document["v"]), float(document["t"])
        received.value += 1

    client.on_message = on_message
    client.on_connect = lambda c, u, f, rc, p: c.subscribe([(f"{TOPIC_ROOT}/+/+", SubscribeOptions(qos=1))])
    client.on_subscribe = lambda c, u, mid, codes, p: subscribed.set()
    props = Properties(PacketTypes.CONNECT)
    props.ReceiveMaximum = RECEIVE_MAXIMUM
    _connect(client, port, clean_start=True, properties=props)
    if not subscribed.wait(20):
        raise RuntimeError("the bare client's subscription was not acknowledged")
    ready.set()
    stop.wait()
    client.disconnect()
    client.loop_stop()


@dataclass
class Publishers:
    """P publisher processes and the bare subscriber on one broker, driven by the benchmark."""

    port: int
    n_feeds: int
    n_publishers: int
    t0_s: int
    seed: int = 2026

    def start(self) -> "Publishers":
        ctx = get_context("spawn")
        self._ctx = ctx
        self.stop_event = ctx.Event()
        self.bare_stop = ctx.Event()
        bare_ready = ctx.Event()
        self.received = ctx.Value("q", 0, lock=False)
        self.acked = [ctx.Value("q", 0, lock=False) for _ in range(self.n_publishers)]
        self.bare = ctx.Process(target=bare_main, args=(self.port, self.received, bare_ready, self.bare_stop),
                                daemon=True)
        self.bare.start()
        if not bare_ready.wait(60):
            raise RuntimeError("the bare client did not start")
        self.pipes, self.procs = [], []
        for i in range(self.n_publishers):
            ours, theirs = ctx.Pipe()
            proc = ctx.Process(target=publisher_main, args=(i, self.n_publishers, self.port, self.n_feeds,
                                                            self.t0_s, self.seed, theirs, self.acked[i],
                                                            self.stop_event), daemon=True)
            proc.start()
            self.pipes.append(ours)
            self.procs.append(proc)
        for pipe in self.pipes:
            if not pipe.poll(60):
                raise RuntimeError("a publisher did not start")
            pipe.recv()
        return self

    @property
    def pids(self) -> list[int]:
        return [p.pid for p in self.procs]

    def acked_total(self) -> int:
        return sum(v.value for v in self.acked)

    def received_total(self) -> int:
        return self.received.value

    def begin(self, *, messages_per_feed: int | None = None, rate: float | None = None,
              spikes: dict[int, float] | None = None) -> None:
        """Start a phase on every publisher: a fixed count per feed, or until :meth:`finish` (flat out or paced)."""
        self.stop_event.clear()
        for i, pipe in enumerate(self.pipes):
            own = len(range(i, self.n_feeds, self.n_publishers))
            command: dict[str, Any] = {"do": "run"}
            if messages_per_feed is not None:
                command["messages"] = messages_per_feed * own
            if rate is not None:
                command["rate"] = rate / self.n_publishers
            command["spikes"] = {k: t for k, t in (spikes or {}).items() if k % self.n_publishers == i}
            pipe.send(command)

    def finish(self, timeout_s: float = 600.0) -> list[dict]:
        """Stop an open-ended phase (a counted one ends by itself) and gather the replies."""
        self.stop_event.set()
        replies = []
        for pipe in self.pipes:
            if not pipe.poll(timeout_s):
                raise RuntimeError("a publisher did not finish its phase")
            replies.append(pipe.recv())
        return replies

    def close(self) -> None:
        for pipe in getattr(self, "pipes", []):
            try:
                pipe.send({"do": "close"})
            except OSError:
                pass
        self.bare_stop.set()
        for proc in [*getattr(self, "procs", []), self.bare]:
            proc.join(10)
            if proc.is_alive():
                proc.kill()
                proc.join(5)
