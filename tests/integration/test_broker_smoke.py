"""The test broker itself: deploy/kafka-local starts a working Kafka, and
the harness helpers (create, produce, consume, committed offsets) read
back what the broker holds.  Two independent clients are used,
confluent-kafka (its own bundled librdkafka) and kcat (a separate process
on the system librdkafka), so a helper bug cannot hide behind itself.

The expected facts come from Kafka's documented guarantees, not from our
code: source: Apache Kafka documentation, Design, "Guarantees": messages
sent by a producer to a topic partition are appended in the order they are
sent, and a consumer sees them in the order they are stored; every message
gets the next offset of its partition.
"""
import os
import subprocess

import pytest

import kafka_util as ku
from confluent_kafka import Consumer, KafkaException

N = 1000
PARTITIONS = 4


def make_batch(n, n_sources=37):
    """n payloads 'seq=<i> src=<k>' keyed by source, each with a header."""
    payloads = [f"seq={i:06d} src={i % n_sources:03d}".encode() for i in range(n)]
    keys = [f"src-{i % n_sources:03d}".encode() for i in range(n)]
    headers = [[("origin", b"smoke"), ("seq", str(i).encode())] for i in range(n)]
    return payloads, keys, headers


def seq_of(value):
    return int(value.split()[0].split(b"=")[1])


def test_bootstrap_address_and_status(kafka_local):
    # source: common practice (the script's own contract, documented in
    # deploy/kafka-local): loopback address on the chosen port.
    assert kafka_local.bootstrap == f"127.0.0.1:{kafka_local.port}"
    assert kafka_local.running()
    assert kafka_local.status_text().endswith(f"bootstrap {kafka_local.bootstrap}")
    env = subprocess.run([ku.KAFKA_LOCAL, "env", "--dir", kafka_local.run_dir],
                         stdout=subprocess.PIPE, text=True, check=True).stdout.strip()
    assert env == f"ODDSKY_KAFKA_BOOTSTRAP={kafka_local.bootstrap}"


def test_produce_consume_order_and_counts(broker, new_topic):
    topic = new_topic(PARTITIONS, prefix="smoke")
    assert ku.topic_partitions(broker, topic) == list(range(PARTITIONS))
    payloads, keys, headers = make_batch(N)
    delivered = ku.produce(broker, topic, payloads, keys=keys, headers=headers)
    assert all(d is not None for d in delivered)

    records = ku.consume_all(broker, topic, n=N, timeout_s=60)
    assert len(records) == N
    # Every payload exactly once.
    assert sorted(r.value for r in records) == sorted(payloads)

    by_part = {}
    for r in records:
        by_part.setdefault(r.partition, []).append(r)
    # The broker's own count per partition (high watermark) agrees.
    ends = ku.end_offsets(broker, topic)
    assert {p: len(rs) for p, rs in by_part.items()} == {p: e for p, e in ends.items() if e}
    assert sum(ends.values()) == N
    # With 37 keys over 4 partitions every partition gets some
    # (source: common practice: hash partitioning spreads keys).
    assert len(by_part) == PARTITIONS

    key_part = {}
    for p, rs in by_part.items():
        # Offsets 0, 1, 2, ... in order within each partition.
        assert [r.offset for r in rs] == list(range(len(rs))), f"partition {p}"
        # Send order is kept within each partition.
        seqs = [seq_of(r.value) for r in rs]
        assert seqs == sorted(seqs), f"partition {p} out of send order"
        for r in rs:
            # Headers and keys come back as sent.
            i = seq_of(r.value)
            assert r.key == keys[i]
            assert r.headers == [("origin", b"smoke"), ("seq", str(i).encode())]
            # One key, one partition.
            assert key_part.setdefault(r.key, p) == p
    # The delivery reports named the partition and offset that the reader saw.
    seen = {seq_of(r.value): (r.partition, r.offset) for r in records}
    assert all(seen[i] == delivered[i] for i in range(N))


def test_kcat_sees_the_same_messages(broker, new_topic):
    topic = new_topic(PARTITIONS, prefix="smoke-kcat")
    payloads, keys, headers = make_batch(N)
    delivered = ku.produce(broker, topic, payloads, keys=keys, headers=headers)
    rows = ku.kcat_consume(broker, topic)
    assert len(rows) == N
    by_coord = {(p, o): (k, v) for p, o, k, v in rows}
    assert len(by_coord) == N
    for i, (p, o) in enumerate(delivered):
        assert by_coord[(p, o)] == (keys[i], payloads[i])


def test_kcat_produced_messages_read_by_confluent(broker, new_topic):
    topic = new_topic(2, prefix="smoke-kcat-in")
    lines = [f"line-{i:04d}".encode() for i in range(200)]
    keys = [f"k{i % 5}".encode() for i in range(200)]
    ku.kcat_produce(broker, topic, lines, keys=keys)
    records = ku.consume_all(broker, topic, n=None, timeout_s=60)
    assert sorted(r.value for r in records) == sorted(lines)
    assert {(r.key, r.value) for r in records} == set(zip(keys, lines))
    # kcat sends in line order; per partition the order is kept.
    for p in (0, 1):
        vals = [r.value for r in records if r.partition == p]
        assert vals == sorted(vals)


def test_committed_offsets_of_a_group(broker, new_topic):
    topic = new_topic(PARTITIONS, prefix="smoke-group")
    payloads = [f"m{i}".encode() for i in range(100)]
    ku.produce(broker, topic, payloads, keys=[f"k{i}".encode() for i in range(100)])
    group = ku.unique_name("g")
    assert ku.committed_offsets(broker, group, topic) == {p: None for p in range(PARTITIONS)}

    # A group member reads everything and commits synchronously; the
    # committed offset is the next offset to read, i.e. the end of each
    # partition (source: Apache Kafka documentation, consumer position and
    # committed position).
    c = Consumer({"bootstrap.servers": broker, "group.id": group,
                  "enable.auto.commit": False, "auto.offset.reset": "earliest"})
    try:
        c.subscribe([topic])
        got = 0
        seen = set()
        for _ in range(300):
            for m in c.consume(num_messages=100, timeout=0.2):
                assert m.error() is None, m.error()
                got += 1
                seen.add(m.value())
            if got >= 100:
                break
        assert got == 100 and seen == set(payloads)
        c.commit(asynchronous=False)
    finally:
        c.close()
    ends = ku.end_offsets(broker, topic)
    assert ku.committed_offsets(broker, group, topic) == {
        p: (e if e else None) for p, e in ends.items()}


def test_missing_topic_is_not_created(broker):
    # auto.create.topics.enable=false (deploy/kafka-local's choice): a
    # producer, which asks the broker to auto-create by default, gets an
    # error and the topic does not appear.
    # source: Apache Kafka broker config docs, auto.create.topics.enable;
    # librdkafka CONFIGURATION.md, allow.auto.create.topics (producer
    # default true).
    name = ku.unique_name("absent")
    with pytest.raises((KafkaException, TimeoutError)):
        ku.produce(broker, name, [b"x"], timeout_s=5,
                   extra_config={"allow.auto.create.topics": True})
    with pytest.raises(KeyError):
        ku.topic_partitions(broker, name)
    assert not ku.topic_exists(broker, name)


def test_script_topic_create(kafka_local, broker):
    name = ku.unique_name("script")
    subprocess.run([ku.KAFKA_LOCAL, "topic-create", name, "3", "--dir", kafka_local.run_dir],
                   check=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE, timeout=120)
    ku.wait_until(lambda: ku.topic_exists(broker, name), 30, what="topic to appear")
    assert ku.topic_partitions(broker, name) == [0, 1, 2]


def test_bench_relay_relays_exactly_and_commits(broker, new_topic):
    # The bare relay of tests/bench (built by `make test` / `make bench`):
    # every input message appears once on the output with the same key and
    # bytes, and the group's committed offsets reach the end of the input.
    # source: Apache Kafka documentation, committed position = next offset
    # to read; librdkafka INTRODUCTION.md, at-least-once with manual store.
    relay = os.path.join(os.path.dirname(ku.oddsky_binary()), "tests", "bench", "relay")
    if not os.access(relay, os.X_OK):
        pytest.fail(f"{relay} is missing: build it with "
                    f"make BUILD=... {os.path.relpath(relay, ku.TOP)}", pytrace=False)
    src = new_topic(PARTITIONS, prefix="relay-in")
    dst = new_topic(PARTITIONS, prefix="relay-out")
    n = 20000
    payloads = [f"{i:08d}:".encode() + bytes([i % 256]) * 40 for i in range(n)]
    keys = [f"k{i % 101}".encode() for i in range(n)]
    ku.produce(broker, src, payloads, keys=keys)
    group = ku.unique_name("relay")
    p = subprocess.run([relay, "-b", broker, "-i", src, "-o", dst, "-n", str(n),
                        "-g", group, "-t", "120"],
                       stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, timeout=180)
    assert p.returncode == 0, p.stderr
    lines = dict(line.split("=", 1) for line in p.stdout.split())
    assert int(lines["relay_messages"]) == n
    assert float(lines["relay_per_s"]) > 0

    out = ku.consume_all(broker, dst, n=None, timeout_s=60)
    assert len(out) == n
    assert sorted((r.key, r.value) for r in out) == sorted(zip(keys, payloads))
    assert ku.committed_offsets(broker, group, src) == ku.end_offsets(broker, src)
