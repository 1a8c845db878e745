"""Input speed: MQTT subscriber beside a bare paho client, and CSV follower rows/s.

Run: ``python tests/benchmarks/bench_inputs.py`` (needs the mosquitto binary;
starts its own broker on a free loopback port, never 1883).

MQTT, measured side by side in one run, with the same publisher:

* live: both clients subscribed at once to the same 100 topics while one
  Python publisher sends QoS 1 messages as fast as it can; each client's rate
  is its received count over its first-to-last message time.
* backlog: both clients' persistent sessions hold the same queued messages;
  each then drains its queue alone. This is the client-bound rate.

"Bare" is a paho client that only counts (QoS 1, paho acknowledges at once).
"leadline" is :class:`MqttSubscriber` with a consumer that polls the queue
and acknowledges each batch right away, i.e. readings/s into the engine
queue including the manual acks. Each client runs in its own process.
Target: leadline >= 70% of bare.

CSV: a 1,000,000-row long-format file (ISO 8601 times, 100 feeds) read by
:class:`CsvFollower` from the start, with a durable mark per batch.
Target: >= 200,000 rows/s.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # tests/, for mqtt_broker

TOPICS = [f"plant/site{k % 10}/flow/m{k:03d}" for k in range(100)]
T0_S = 1_714_521_600


# -- worker processes -------------------------------------------------------------
def worker_bare(port: int, n: int, client_id: str, idle_s: float, subscribe_only: bool) -> dict:
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    state = {"count": 0, "first": None, "last": None}
    connected = threading.Event()

    def on_message(client, userdata, message):
        now = time.perf_counter()
        if state["first"] is None:
            state["first"] = now
        state["count"] += 1
        state["last"] = now

    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv5)
    client.on_message = on_message
    client.on_connect = lambda c, u, f, rc, p: (c.subscribe([(t, 1) for t in TOPICS]), connected.set())
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = 3600
    props.ReceiveMaximum = 1000
    client.connect("127.0.0.1", port, clean_start=False, properties=props)
    client.loop_start()
    connected.wait(10)
    return _wait(state, n, idle_s, subscribe_only, lambda: (client.disconnect(), client.loop_stop()))


def worker_leadline(port: int, n: int, client_id: str, idle_s: float, subscribe_only: bool) -> dict:
    import logging

    logging.getLogger("leadline").setLevel(logging.CRITICAL)  # paho's shutdown chatter
    from leadline.adapters.sources.mqtt_connection import MqttSettings
    from leadline.adapters.sources.mqtt_subscriber import MqttSubscriber, Subscription
    from leadline.adapters.sources.payloads import JsonPayload
    from leadline.adapters.sources.topics import TopicPattern

    sub = MqttSubscriber(
        "bench",
        MqttSettings(client_id=client_id, port=port, protocol="5", receive_maximum=1000),
        [Subscription(TopicPattern("plant/+site/flow/+meter"), JsonPayload("v", "t"))],
        queue_max_messages=10_000,
        dedupe_window=256,
    )
    state = {"count": 0, "first": None, "last": None}
    halt = threading.Event()

    def consume():
        while not halt.is_set():
            batch = sub.poll(1000, 0.05)
            if batch:
                now = time.perf_counter()
                if state["first"] is None:
                    state["first"] = now
                state["count"] += len(batch)
                state["last"] = now
                sub.ack(batch)

    sub.start()
    sub.wait_connected(10)
    consumer = threading.Thread(target=consume, daemon=True)
    consumer.start()

    def close():
        halt.set()
        consumer.join(5)
        time.sleep(0.2)
        sub.close()

    result = _wait(state, n, idle_s, subscribe_only, close)
    result["duplicates"] = sub.counts()["duplicates"]
    return result


def _wait(state: dict, n: int, idle_s: float, subscribe_only: bool, close) -> dict:
    if subscribe_only:
        time.sleep(0.5)
        close()
        return {"count": 0}
    print("ready", flush=True)
    deadline = time.perf_counter() + 120
    while state["count"] < n and time.perf_counter() < deadline:
        time.sleep(0.01)
    close()
    span = (state["last"] - state["first"]) if state["first"] is not None else float("nan")
    return {"count": state["count"], "span_s": span, "rate": state["count"] / span if span else float("nan")}


def publisher(port: int, n: int) -> float:
    """Publish ``n`` QoS 1 JSON messages round-robin over TOPICS; returns msg/s."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="bench-pub", protocol=mqtt.MQTTv311)
    client.max_inflight_messages_set(1000)
    client.max_queued_messages_set(0)
    client.connect("127.0.0.1", port)
    client.loop_start()
    start = time.perf_counter()
    infos = []
    for i in range(n):
        infos.append(client.publish(TOPICS[i % 100], json.dumps({"v": i, "t": T0_S + i // 100}), qos=1))
    for info in infos:
        info.wait_for_publish(60)
    elapsed = time.perf_counter() - start
    client.disconnect()
    client.loop_stop()
    return n / elapsed


def spawn(kind: str, port: int, n: int, client_id: str, subscribe_only: bool = False) -> subprocess.Popen:
    args = [sys.executable, __file__, "--worker", kind, "--port", str(port), "--n", str(n), "--client-id", client_id]
    if subscribe_only:
        args.append("--subscribe-only")
    return subprocess.Popen(args, stdout=subprocess.PIPE, text=True)


def wait_ready(proc: subprocess.Popen) -> None:
    line = proc.stdout.readline()
    if line.strip() != "ready":
        raise RuntimeError(f"worker did not start: {line!r}")


def result_of(proc: subprocess.Popen) -> dict:
    out, _ = proc.communicate(timeout=180)
    return json.loads(out.strip().splitlines()[-1])


def bench_mqtt(n_live: int, n_backlog: int, rounds: int) -> None:
    from mqtt_broker import MosquittoBroker, mosquitto_binary

    if mosquitto_binary() is None:
        print("MQTT: skipped, no mosquitto binary")
        return
    with tempfile.TemporaryDirectory() as tmp, MosquittoBroker(
        Path(tmp) / "broker", max_queued_messages=n_backlog + 1000, max_inflight_messages=1000
    ) as broker:
        # Live: both subscribed, one publisher.
        bare = spawn("bare", broker.port, n_live, "bench-bare-live")
        ours = spawn("leadline", broker.port, n_live, "bench-ours-live")
        wait_ready(bare)
        wait_ready(ours)
        pub_rate = publisher(broker.port, n_live)
        r_bare, r_ours = result_of(bare), result_of(ours)
        print(f"MQTT live, {n_live} QoS 1 messages over 100 topics, publisher {pub_rate:,.0f} msg/s")
        print(f"  bare paho (count only):  {r_bare['count']:>7} msgs  {r_bare['rate']:>9,.0f} msg/s")
        print(f"  leadline subscriber:     {r_ours['count']:>7} rdgs  {r_ours['rate']:>9,.0f} readings/s"
              f"  (duplicates dropped: {r_ours['duplicates']})")
        print(f"  ratio leadline / bare:   {r_ours['rate'] / r_bare['rate']:.0%}  (target >= 70%)")

        # Backlog: create both sessions, queue messages while both are away, drain one at a time.
        print(f"MQTT backlog, {n_backlog} queued QoS 1 messages per client, drained one client at a time")
        ratios = []
        for round_number in range(rounds):
            ids = {"bare": f"bench-bare-q{round_number}", "leadline": f"bench-ours-q{round_number}"}
            order = ["bare", "leadline"] if round_number % 2 == 0 else ["leadline", "bare"]
            for kind in order:
                result_of(spawn(kind, broker.port, 0, ids[kind], subscribe_only=True))
            publisher(broker.port, n_backlog)
            rates = {}
            for kind in order:
                proc = spawn(kind, broker.port, n_backlog, ids[kind])
                wait_ready(proc)
                rates[kind] = result_of(proc)
            ratio = rates["leadline"]["rate"] / rates["bare"]["rate"]
            ratios.append(ratio)
            print(f"  round {round_number + 1}: bare {rates['bare']['rate']:>9,.0f} msg/s "
                  f"({rates['bare']['count']} msgs), leadline {rates['leadline']['rate']:>9,.0f} readings/s "
                  f"({rates['leadline']['count']} readings): {ratio:.0%}")
        ratios.sort()
        print(f"  median ratio leadline / bare: {ratios[len(ratios) // 2]:.0%}  (target >= 70%)")


def bench_csv(rows: int) -> None:
    from leadline.adapters.sources.csv_follow import CsvFollower
    from leadline.adapters.sources.csv_rows import CsvLayout

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "flow.csv"
        t0 = datetime(2024, 5, 1, tzinfo=timezone.utc)
        with open(path, "w") as handle:
            handle.write("timestamp,feed,value\n")
            for i in range(rows):
                ts = (t0 + timedelta(minutes=i // 100)).isoformat()
                handle.write(f"{ts},northgate/meter-{i % 100:03d},{(i % 977) * 0.37:.3f}\n")
        size_mb = os.path.getsize(path) / 1e6
        for label, kwargs in (("long layout, ISO 8601 times", {}),):
            follower = CsvFollower("bench", str(path), CsvLayout(**kwargs), from_start=True)
            count = 0
            start = time.perf_counter()
            while True:
                batch = follower.poll(5000, 0)
                if not batch:
                    break
                follower.durable_marks(batch)
                count += len(batch)
            elapsed = time.perf_counter() - start
            print(f"CSV follower, {label}: {count:,} rows ({size_mb:.0f} MB) in {elapsed:.2f} s = "
                  f"{count / elapsed:,.0f} rows/s  (target >= 200,000 rows/s)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--worker", choices=["bare", "leadline"])
    parser.add_argument("--port", type=int)
    parser.add_argument("--n", type=int, default=0)
    parser.add_argument("--client-id")
    parser.add_argument("--subscribe-only", action="store_true")
    parser.add_argument("--live", type=int, default=30_000, help="messages in the live run")
    parser.add_argument("--backlog", type=int, default=30_000, help="messages queued per client")
    parser.add_argument("--rounds", type=int, default=3, help="backlog rounds")
    parser.add_argument("--csv-rows", type=int, default=1_000_000)
    args = parser.parse_args()
    if args.worker:
        fn = worker_bare if args.worker == "bare" else worker_leadline
        print(json.dumps(fn(args.port, args.n, args.client_id, 1.0, args.subscribe_only)))
        return
    bench_mqtt(args.live, args.backlog, args.rounds)
    bench_csv(args.csv_rows)


if __name__ == "__main__":
    main()
