"""Helpers for the daemon's integration tests (test_daemon*.py).

A test builds a config for `oddsky run` with make_config() (unique topics
and group, state dir and status port of its own, the demo feature map),
fills the input with `oddsky simulate` (simulate_to_topic /
simulate_to_file) or with hand-made bytes, starts the daemon through the
`oddsky` fixture, waits on GET /status (status / wait_status), reads the
output and dead-letter topics back with confluent-kafka (read_results /
read_dead_letters) and compares them with what went in.

Every wait is bounded and raises with the daemon's log tail, so a test
fails with a message instead of hanging.
"""
import json
import os
import shutil
import signal
import subprocess
import time
import urllib.error
import urllib.request
from collections import Counter

import kafka_util as ku

FEATMAP = os.path.join(ku.TOP, "config", "demo-featmap.json")
PACKET_SCHEMA = os.path.join(ku.TOP, "config", "schemas", "oddsky-demo-packet.avsc")

# Fields of a result compared between `oddsky run` and `oddsky replay`.
SCORE_FIELDS = ("cluster", "novelty", "tail_prob", "flag", "distance")


def make_config(broker, inputs, output, dead_letters, group, state_dir,
                status_port=None, warmup=512, checkpoint_interval_s=2,
                schema_dir="", writer_schema="", max_message_bytes=None,
                consumer=None, producer=None, extra_model=None, featmap=None):
    """A complete `oddsky run` config dict; inputs is a list of topics.

    The feature map is config/demo-featmap.json copied next to state_dir
    (featmap.json, an absolute path) the first time, so a test that
    restarts the daemon keeps the same map even if the working copy of
    the file changes meanwhile."""
    if featmap is None:
        featmap = os.path.join(os.path.dirname(os.path.abspath(str(state_dir))),
                               "featmap.json")
        if not os.path.exists(featmap):
            shutil.copyfile(FEATMAP, featmap)
    cfg = {
        "model": {"warmup_vectors": warmup, "seed": 1},
        "kafka": {
            "brokers": broker,
            "group_id": group,
            "input_topics": list(inputs),
            "output_topic": output,
            "dead_letter_topic": dead_letters,
            "consumer": {"auto.offset.reset": "earliest",
                         "session.timeout.ms": 10000,
                         **(consumer or {})},
            "producer": {"linger.ms": 5, **(producer or {})},
        },
        "input": {"schema_dir": schema_dir, "writer_schema": writer_schema},
        "featmap": featmap,
        "output": {"format": "json"},
        "state": {"dir": str(state_dir), "checkpoint_interval_s": checkpoint_interval_s},
        "status": {"listen": "127.0.0.1",
                   "port": status_port if status_port is not None else ku.free_port()},
        "run": {"drain_deadline_ms": 20000, "select_interval_s": 0},
        "log": {"level": "info", "format": "text"},
    }
    if max_message_bytes is not None:
        cfg["input"]["max_message_bytes"] = max_message_bytes
    if extra_model:
        cfg["model"].update(extra_model)
    return cfg


def log_tail(proc, lines=40):
    text = ku.oddsky_log(proc)
    return "\n".join(text.splitlines()[-lines:])


# ----------------------------------------------------------------- simulate

def _simulate(args, timeout_s):
    cmd = [ku.oddsky_binary(), "simulate", *args]
    p = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                       text=True, timeout=timeout_s)
    if p.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} exited {p.returncode}:\n{p.stderr}")
    return p.stderr


def simulate_to_topic(broker, topic, count, seed=7, fmt="json", schema_id=None,
                      timeout_s=180):
    args = ["--count", str(count), "--seed", str(seed), "--format", fmt,
            "--brokers", broker, "--topic", topic]
    if schema_id is not None:
        args += ["--schema-id", str(schema_id)]
    return _simulate(args, timeout_s)


def simulate_to_file(path, count, seed=7, fmt="json", timeout_s=180):
    return _simulate(["--count", str(count), "--seed", str(seed), "--format", fmt,
                      "--output", str(path)], timeout_s)


def replay(config_path, inputs, output, timeout_s=300):
    cmd = [ku.oddsky_binary(), "replay", "--config", str(config_path), "--quiet",
           "--output", str(output)]
    for i in inputs:
        cmd += ["--input", str(i)]
    p = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                       text=True, timeout=timeout_s)
    if p.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} exited {p.returncode}:\n{p.stderr}")
    with open(output) as f:
        return [json.loads(line) for line in f if line.strip()]


# ----------------------------------------------------------------- status

def status(port, timeout_s=5):
    """GET /status as a dict, or None when the endpoint does not answer."""
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/status",
                                    timeout=timeout_s) as r:
            return json.loads(r.read())
    except (urllib.error.URLError, ConnectionError, OSError, ValueError):
        return None


def wait_status(proc, port, predicate, timeout_s, what):
    """Poll /status until predicate(doc) is true; returns the doc.  Fails
    early (RuntimeError with the log tail) when the daemon exits."""
    deadline = time.monotonic() + timeout_s
    last = None
    while True:
        if proc.poll() is not None:
            raise RuntimeError(f"oddsky exited {proc.returncode} while waiting for {what}; "
                               f"last status counts {last and last.get('counts')}\n"
                               f"--- log tail:\n{log_tail(proc)}")
        doc = status(port)
        if doc is not None:
            last = doc
            if predicate(doc):
                return doc
        if time.monotonic() >= deadline:
            raise TimeoutError(f"timed out after {timeout_s}s waiting for {what}; last "
                               f"counts {last and last.get('counts')}, model.learned "
                               f"{last and last.get('model', {}).get('learned')}\n"
                               f"--- log tail:\n{log_tail(proc)}")
        time.sleep(0.2)


def wait_ready(proc, port, timeout_s=30):
    """Until the status endpoint answers."""
    return wait_status(proc, port, lambda d: True, timeout_s, "the status endpoint")


def wait_assigned(proc, port, n_partitions, timeout_s=60):
    return wait_status(proc, port, lambda d: len(d.get("partitions") or []) >= n_partitions,
                       timeout_s, f"{n_partitions} assigned partitions")


def dead_letter_total(doc):
    return sum((doc.get("counts", {}).get("dead_letters") or {}).values())


def stop(proc, sig=signal.SIGTERM, timeout_s=40):
    """Signal the daemon and wait; returns (returncode, seconds, killed)."""
    t0 = time.monotonic()
    rc, killed = ku.stop_oddsky(proc, sig, timeout_s=timeout_s)
    return rc, time.monotonic() - t0, killed


# ----------------------------------------------------------------- reading back

def headers_dict(headers):
    out = {}
    for k, v in headers or []:
        out.setdefault(k, v.decode() if isinstance(v, (bytes, bytearray)) else v)
    return out


def parse_results(records):
    """[(record, result dict, headers dict)] of the output topic's records."""
    return [(r, json.loads(r.value), headers_dict(r.headers)) for r in records]


def read_topic(broker, topic, n=None, timeout_s=60):
    return ku.consume_all(broker, topic, n=n, timeout_s=timeout_s)


def input_index(broker, topic, timeout_s=60):
    """{(partition, offset): record} of the whole input topic."""
    return {(r.partition, r.offset): r
            for r in ku.consume_all(broker, topic, n=None, timeout_s=timeout_s)}


def packet_id_of_json(value):
    return str(json.loads(value)["packet_id"])


def duplicates(ids):
    """{id: times seen} of the ids seen more than once."""
    return {k: c for k, c in Counter(ids).items() if c > 1}


def summarize_dups(d, show=20):
    items = sorted(d.items(), key=lambda kv: int(kv[0]) if str(kv[0]).isdigit() else 0)
    extra = sum(c - 1 for c in d.values())
    shown = ", ".join(f"{k}x{c}" for k, c in items[:show])
    more = f" (+{len(items) - show} more ids)" if len(items) > show else ""
    return f"{len(d)} ids seen more than once, {extra} extra results: {shown}{more}"


def write_schema_dir(path, schema_id):
    os.makedirs(path, exist_ok=True)
    with open(PACKET_SCHEMA) as f:
        text = f.read()
    with open(os.path.join(path, f"{schema_id}.avsc"), "w") as f:
        f.write(text)
    return str(path)


# ----------------------------------------------------------------- framings
# An independent reading of the demo packets' framings with fastavro
# (source: Apache Avro specification 1.11, "Object Container Files" and
# "Binary Encoding"; the schema-id framing as in daemon/decode.h and
# `oddsky simulate --help`: byte 0, a 4-byte big-endian id, the datum).

def _parsed_schema():
    import fastavro
    with open(PACKET_SCHEMA) as f:
        return fastavro.parse_schema(json.load(f))


def avro_packet(value, framing):
    """The packet dict inside one message of the given framing."""
    import io

    import fastavro
    if framing == "json":
        return json.loads(value)
    if framing == "container":
        recs = list(fastavro.reader(io.BytesIO(value)))
        assert len(recs) == 1, f"container with {len(recs)} records"
        return recs[0]
    if framing == "schema_id":
        assert value[0] == 0
        return fastavro.schemaless_reader(io.BytesIO(value[5:]), _parsed_schema())
    if framing == "bare":
        return fastavro.schemaless_reader(io.BytesIO(value), _parsed_schema())
    raise ValueError(framing)


def bare_avro(packet):
    """The bare Avro datum of a packet dict (fastavro)."""
    import io

    import fastavro
    buf = io.BytesIO()
    fastavro.schemaless_writer(buf, _parsed_schema(), packet)
    return buf.getvalue()


def inspect_checkpoint(state_dir, timeout_s=60):
    """`oddsky inspect --json STATE_DIR` as a dict."""
    cmd = [ku.oddsky_binary(), "inspect", "--json", str(state_dir)]
    p = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                       timeout=timeout_s)
    if p.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} exited {p.returncode}:\n{p.stderr}")
    return json.loads(p.stdout)


# Dead letters carry at most this many bytes of the original message (the
# rest is cut, and the header oddsky.original.bytes gives the full size):
# README, "Input: framings and the feature map"; daemon/service.c
# DEAD_LETTER_MAX_BYTES.
DEAD_LETTER_MAX_BYTES = 1000000 - 64 * 1024
