"""End-to-end throughput and latency of `oddsky run` through a real broker.

One Apache Kafka broker (deploy/kafka-local, KRaft, one node on
127.0.0.1, its own ports and run dir under WORKDIR) for both parts:

Throughput: N demo packets (`oddsky simulate --brokers`, as fast as it
goes) are preloaded on a 4-partition topic.  Then, in the same run on the
same input topic: tests/bench/relay (a bare consume -> produce relay with
the daemon's client settings, no decoding, the ceiling) copies the topic
to another topic; then `oddsky run` is started with a fresh consumer group
and timed from its start until GET /status counts.results (results whose
delivery the broker confirmed) reaches N; the output topic's end offsets
are checked to hold N records.  e2e_vs_relay = e2e_per_s / relay_per_s;
relay_per_s is timed by the relay itself from its first consumed message
(no start-up), so two fairer ratios are printed as well:
e2e_vs_relay_wall (both wall clocks from process start) and
e2e_vs_relay_broker_span (both output topics use LogAppendTime; records
divided by first-to-last append time on each).

Latency: a fresh daemon on fresh topics; once it owns the 4 partitions the
simulator writes packets at a steady RATE per second for SECONDS seconds.
Both topics use message.timestamp.type=LogAppendTime, so every message's
timestamp is the broker's append time (source: Apache Kafka topic config
documentation, message.timestamp.type).  Each result names its input in
the oddsky.input.partition / oddsky.input.offset headers (DESIGN "Output
record"); latency = result append time - input append time, read back
with confluent-kafka (message.timestamp()), in milliseconds (the broker's
resolution).

Prints key=value lines on stdout; progress on stderr.

    bench_kafka.py --build DIR --workdir DIR [--n N] [--format F]
                   [--rate R] [--seconds S]
"""
import argparse
import json
import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "integration"))

import kafka_util as ku  # noqa: E402
from confluent_kafka import (OFFSET_BEGINNING, TIMESTAMP_LOG_APPEND_TIME,  # noqa: E402
                             Consumer, KafkaError, KafkaException, TopicPartition)

FEATMAP = os.path.join(ku.TOP, "config", "demo-featmap.json")
SCHEMA = os.path.join(ku.TOP, "config", "schemas", "oddsky-demo-packet.avsc")
APPEND_TIME = {"message.timestamp.type": "LogAppendTime"}


def say(msg):
    print(f"[bench_kafka] {msg}", file=sys.stderr, flush=True)


def out(key, value):
    print(f"{key}={value}", flush=True)


def config(broker, in_topic, out_topic, dlq_topic, group, workdir, port, schema_dir):
    """`oddsky run` config: defaults everywhere except where the daemon
    must be told (topics, group, dirs, status port)."""
    return {
        "model": {"seed": 1},
        "kafka": {
            "brokers": broker, "group_id": group, "input_topics": [in_topic],
            "output_topic": out_topic, "dead_letter_topic": dlq_topic,
            "consumer": {"auto.offset.reset": "earliest"},
        },
        "input": {"schema_dir": schema_dir},
        "featmap": FEATMAP,
        "output": {"format": "json"},
        "state": {"dir": os.path.join(workdir, "state")},
        "status": {"listen": "127.0.0.1", "port": port},
        "log": {"level": "warn", "format": "text"},
    }


def status(port):
    import urllib.request
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/status", timeout=5) as r:
            return json.loads(r.read())
    except (OSError, ValueError):
        return None


def wait_status(proc, port, pred, timeout_s, what, interval_s=0.05):
    deadline = time.monotonic() + timeout_s
    last = None
    while True:
        if proc.poll() is not None:
            raise RuntimeError(f"oddsky exited {proc.returncode} waiting for {what}:\n"
                               f"{ku.oddsky_log(proc)[-3000:]}")
        doc = status(port)
        if doc is not None:
            last = doc
            if pred(doc):
                return doc
        if time.monotonic() > deadline:
            raise TimeoutError(f"{what}: last counts {last and last.get('counts')}")
        time.sleep(interval_s)


def simulate(build, broker, topic, n, fmt, seed, rate=None):
    cmd = [os.path.join(build, "oddsky"), "simulate", "--count", str(n), "--seed", str(seed),
           "--format", fmt, "--brokers", broker, "--topic", topic]
    if rate:
        cmd += ["--rate", str(rate)]
    t0 = time.monotonic()
    p = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    if p.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} exited {p.returncode}:\n{p.stderr}")
    return time.monotonic() - t0


def read_timestamps(broker, topic, n, timeout_s, headers):
    """Read n records of topic from the beginning; returns
    {(partition, offset): ts} or, with headers, {(in_partition,
    in_offset): ts} from the oddsky.input.* headers.  Checks every
    timestamp is a broker append time."""
    parts = ku.topic_partitions(broker, topic)
    c = Consumer({"bootstrap.servers": broker, "group.id": ku.unique_name("lat"),
                  "enable.auto.commit": False, "enable.partition.eof": False,
                  "auto.offset.reset": "earliest"})
    got = {}
    try:
        c.assign([TopicPartition(topic, p, OFFSET_BEGINNING) for p in parts])
        deadline = time.monotonic() + timeout_s
        seen = 0
        while seen < n:
            if time.monotonic() > deadline:
                raise TimeoutError(f"{topic}: read {seen} of {n}")
            for m in c.consume(num_messages=10000, timeout=0.5):
                if m.error() is not None:
                    if m.error().code() == KafkaError._PARTITION_EOF:
                        continue
                    raise KafkaException(m.error())
                kind, ts = m.timestamp()
                if kind != TIMESTAMP_LOG_APPEND_TIME:
                    raise RuntimeError(f"{topic}: timestamp type {kind}, not LogAppendTime")
                seen += 1
                if headers:
                    h = dict(m.headers() or [])
                    key = (int(h["oddsky.input.partition"]), int(h["oddsky.input.offset"]))
                else:
                    key = (m.partition(), m.offset())
                # At-least-once: keep the first delivery of a result.
                got.setdefault(key, ts)
    finally:
        c.close()
    return got


def append_span(broker, topic):
    """(seconds from the first to the last append time, records) of a
    LogAppendTime topic, over all its partitions."""
    c = Consumer({"bootstrap.servers": broker, "group.id": ku.unique_name("span"),
                  "enable.auto.commit": False})
    first, last, count = None, None, 0
    try:
        for pid in ku.topic_partitions(broker, topic):
            lo, hi = c.get_watermark_offsets(TopicPartition(topic, pid), timeout=10)
            if hi <= lo:
                continue
            count += hi - lo
            for off in (lo, hi - 1):
                c.assign([TopicPartition(topic, pid, off)])
                m = None
                deadline = time.monotonic() + 30
                while m is None or m.error() is not None:
                    if time.monotonic() > deadline:
                        raise TimeoutError(f"{topic}[{pid}]@{off}")
                    m = c.poll(1.0)
                kind, ts = m.timestamp()
                if kind != TIMESTAMP_LOG_APPEND_TIME:
                    raise RuntimeError(f"{topic}: timestamp type {kind}, not LogAppendTime")
                first = ts if first is None else min(first, ts)
                last = ts if last is None else max(last, ts)
    finally:
        c.close()
    return ((last - first) / 1000.0 if count else 0.0), count


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--build", required=True)
    ap.add_argument("--workdir", required=True)
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--format", default="avro-container")
    ap.add_argument("--rate", type=int, default=10_000)
    ap.add_argument("--seconds", type=int, default=60)
    ap.add_argument("--skip-e2e", action="store_true")
    ap.add_argument("--skip-latency", action="store_true")
    a = ap.parse_args()
    build = os.path.abspath(a.build)
    os.environ["BUILD"] = build
    work = os.path.abspath(a.workdir)
    # A fresh dir each run: a daemon state dir left from an earlier run
    # would resume that run's ledger.
    shutil.rmtree(work, ignore_errors=True)
    os.makedirs(work)
    # SIGTERM (make interrupted) still stops the daemon and the broker.
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(143))
    schema_dir = os.path.join(work, "schemas")
    os.makedirs(schema_dir, exist_ok=True)
    with open(SCHEMA) as f, open(os.path.join(schema_dir, "1.avsc"), "w") as g:
        g.write(f.read())

    kafka = ku.KafkaLocal(os.path.join(work, "kafka"))
    say(f"starting broker on {kafka.bootstrap} in {kafka.run_dir}")
    broker = kafka.up()
    say(f"broker up in {kafka.start_seconds:.1f} s")
    procs = []
    try:
        if not a.skip_e2e:
            e2e(a, build, broker, work, schema_dir, procs)
        if not a.skip_latency:
            latency(a, build, broker, work, schema_dir, procs)
    finally:
        for p in procs:
            ku.stop_oddsky(p, timeout_s=30)
        kafka.down()
        say("broker down")


def e2e(a, build, broker, work, schema_dir, procs):
    n = a.n
    in_t = ku.create_topic(broker, "e2e-in", 4)
    out_t = ku.create_topic(broker, "e2e-out", 4, config=APPEND_TIME)
    dlq_t = ku.create_topic(broker, "e2e-dlq", 1)
    relay_t = ku.create_topic(broker, "e2e-relay", 4, config=APPEND_TIME)
    say(f"preloading {n} {a.format} packets on {in_t} (4 partitions)")
    secs = simulate(build, broker, in_t, n, a.format, seed=7)
    held = sum(ku.end_offsets(broker, in_t).values())
    if held != n:
        raise RuntimeError(f"{in_t} holds {held} messages, expected {n}")
    out("e2e_packets", n)
    out("e2e_format", a.format)
    out("preload_per_s", f"{n / secs:.0f}")

    say("relay over the same input topic")
    t0 = time.monotonic()
    p = subprocess.run([os.path.join(build, "tests", "bench", "relay"), "-b", broker,
                        "-i", in_t, "-o", relay_t, "-n", str(n), "-t", "600"],
                       stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    relay_wall = time.monotonic() - t0
    if p.returncode != 0:
        raise RuntimeError(f"relay exited {p.returncode}: {p.stderr}")
    kv = dict(line.split("=", 1) for line in p.stdout.split() if "=" in line)
    relay_per_s = float(kv["relay_per_s"])
    out("relay_per_s", f"{relay_per_s:.0f}")
    out("relay_wall_per_s", f"{n / relay_wall:.0f}")

    port = ku.free_port()
    cfg = config(broker, in_t, out_t, dlq_t, ku.unique_name("e2e"),
                 os.path.join(work, "e2e-daemon"), port, schema_dir)
    say("oddsky run over the same input topic")
    t0 = time.monotonic()
    proc = ku.start_oddsky(cfg, workdir=os.path.join(work, "e2e-daemon"), binary=os.path.join(build, "oddsky"))
    procs.append(proc)
    deadline = t0 + 1200
    while True:
        doc = status(port)
        if proc.poll() is not None:
            raise RuntimeError(f"oddsky exited {proc.returncode}:\n{ku.oddsky_log(proc)[-3000:]}")
        if doc is not None:
            if doc["counts"]["results"] >= n:
                break
        if time.monotonic() > deadline:
            raise TimeoutError(f"e2e: {doc and doc['counts']} after 1200 s")
        time.sleep(0.05)
    t_end = time.monotonic()
    e2e_s = t_end - t0
    e2e_per_s = n / e2e_s
    out("e2e_seconds", f"{e2e_s:.2f}")
    out("e2e_per_s", f"{e2e_per_s:.0f}")
    out("e2e_vs_relay", f"{e2e_per_s / relay_per_s:.3f}")
    out("e2e_vs_relay_wall", f"{relay_wall / e2e_s:.3f}")
    out("e2e_dead_letters", sum(doc["counts"].get("dead_letters", {}).values())
        if isinstance(doc["counts"].get("dead_letters"), dict) else doc["counts"].get("dead_letters"))
    ku.stop_oddsky(proc, timeout_s=60)
    procs.remove(proc)
    held = sum(ku.end_offsets(broker, out_t).values())
    out("e2e_output_records", held)
    if held < n:
        raise RuntimeError(f"{out_t} holds {held} results, expected {n}")
    # Steady rates from the broker's side: first to last append time of
    # each output topic (no start-up, no group join in them).
    rates = []
    for name, topic in (("e2e_broker_span_per_s", out_t), ("relay_broker_span_per_s", relay_t)):
        span_s, count = append_span(broker, topic)
        rates.append(count / span_s if span_s > 0 else 0.0)
        out(name, f"{rates[-1]:.0f}")
    if rates[1] > 0:
        out("e2e_vs_relay_broker_span", f"{rates[0] / rates[1]:.3f}")


def latency(a, build, broker, work, schema_dir, procs):
    n = a.rate * a.seconds
    in_t = ku.create_topic(broker, "lat-in", 4, config=APPEND_TIME)
    out_t = ku.create_topic(broker, "lat-out", 4, config=APPEND_TIME)
    dlq_t = ku.create_topic(broker, "lat-dlq", 1)
    port = ku.free_port()
    wd = os.path.join(work, "lat-daemon")
    cfg = config(broker, in_t, out_t, dlq_t, ku.unique_name("lat"), wd, port, schema_dir)
    proc = ku.start_oddsky(cfg, workdir=wd, binary=os.path.join(build, "oddsky"))
    procs.append(proc)
    wait_status(proc, port, lambda d: len(d.get("partitions") or []) >= 4, 60,
                "the 4 partitions assigned")
    say(f"simulating {a.rate}/s for {a.seconds} s ({n} {a.format} packets) into the daemon")
    secs = simulate(build, broker, in_t, n, a.format, seed=9, rate=a.rate)
    out("latency_sim_rate_per_s", f"{n / secs:.0f}")
    wait_status(proc, port, lambda d: d["counts"]["results"] >= n, 300, f"{n} results")
    ku.stop_oddsky(proc, timeout_s=60)
    procs.remove(proc)
    say("reading both topics back")
    t_in = read_timestamps(broker, in_t, n, 300, headers=False)
    t_out = read_timestamps(broker, out_t, n, 300, headers=True)
    missing = [k for k in t_in if k not in t_out]
    if missing:
        raise RuntimeError(f"{len(missing)} inputs without a result, first {missing[:5]}")
    lat = np.array([t_out[k] - t_in[k] for k in t_in], dtype=np.float64)
    out("latency_packets", len(lat))
    out("latency_p50_ms", f"{np.percentile(lat, 50):.1f}")
    out("latency_p99_ms", f"{np.percentile(lat, 99):.1f}")
    out("latency_max_ms", f"{lat.max():.1f}")
    # The first seconds include the model's warm-up and seeding (2048 vectors).
    keys = sorted(t_in, key=t_in.get)
    tail = np.array([t_out[k] - t_in[k] for k in keys[len(keys) // 10:]], dtype=np.float64)
    out("latency_p99_ms_after_10pct", f"{np.percentile(tail, 99):.1f}")


if __name__ == "__main__":
    main()
