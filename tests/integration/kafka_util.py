"""Helpers for oddsky's integration tests against a real Kafka broker.

The broker is the one deploy/kafka-local starts (Apache Kafka, KRaft, one
node on 127.0.0.1).  Topics are created, filled and read back with
confluent-kafka, a client independent of the daemon's code, and, where a
second opinion helps, with kcat (another process, another librdkafka build).
The daemon itself is started as a subprocess with a generated config:
start_oddsky() / stop_oddsky().

Every wait in here is bounded by a timeout and raises when it runs out, so a
test fails with a message instead of hanging.
"""
import json
import os
import signal
import socket
import subprocess
import tempfile
import time
import uuid
from collections import namedtuple

from confluent_kafka import (OFFSET_BEGINNING, Consumer, KafkaError,
                             KafkaException, Producer, TopicPartition)
from confluent_kafka.admin import AdminClient, NewTopic

TOP = os.environ.get("ODDSKY_TOP") or os.path.abspath(
    os.path.join(os.path.dirname(__file__), "..", ".."))
KAFKA_LOCAL = os.path.join(TOP, "deploy", "kafka-local")

Record = namedtuple("Record", "topic partition offset key value headers timestamp")


def free_port():
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_until(predicate, timeout_s, interval_s=0.1, what="condition"):
    """Call predicate() until it returns a true value; return that value.
    Raises TimeoutError naming `what` after timeout_s seconds."""
    deadline = time.monotonic() + timeout_s
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() >= deadline:
            raise TimeoutError(f"timed out after {timeout_s}s waiting for {what}")
        time.sleep(interval_s)


class KafkaLocal:
    """One broker run by deploy/kafka-local in its own run dir and ports.

    up() returns the bootstrap address and records how long the start took
    (start_seconds); kill() is SIGKILL with the data kept; restart() is a
    graceful stop and start on the same data; down(keep=False) stops and
    deletes the data.  Every call raises RuntimeError with the script's
    output when the script fails."""

    def __init__(self, run_dir, port=None, controller_port=None, timeout_s=90):
        self.run_dir = run_dir
        self.port = port or free_port()
        self.controller_port = controller_port or free_port()
        while self.controller_port == self.port:
            self.controller_port = free_port()
        self.timeout_s = timeout_s
        self.bootstrap = f"127.0.0.1:{self.port}"
        self.start_seconds = None

    def _run(self, verb, *extra, check=True):
        cmd = [KAFKA_LOCAL, verb, "--dir", self.run_dir,
               "--port", str(self.port),
               "--controller-port", str(self.controller_port),
               "--timeout", str(self.timeout_s), *extra]
        p = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                           text=True, timeout=self.timeout_s + 120)
        if check and p.returncode != 0:
            raise RuntimeError(f"{' '.join(cmd)} exited {p.returncode}\n"
                               f"stdout:\n{p.stdout}\nstderr:\n{p.stderr}")
        return p

    def up(self):
        t0 = time.monotonic()
        p = self._run("up")
        self.start_seconds = time.monotonic() - t0
        got = p.stdout.strip().splitlines()[-1]
        if got != self.bootstrap:
            raise RuntimeError(f"kafka-local up printed {got!r}, expected {self.bootstrap!r}")
        return self.bootstrap

    def down(self, keep=False):
        self._run("down", *(["--keep"] if keep else []))

    def kill(self):
        self._run("kill")

    def restart(self):
        t0 = time.monotonic()
        self._run("restart")
        self.start_seconds = time.monotonic() - t0
        return self.bootstrap

    def running(self):
        return self._run("status", check=False).returncode == 0

    def status_text(self):
        return self._run("status", check=False).stdout.strip()

    def log_tail(self, lines=40):
        path = os.path.join(self.run_dir, "kafka.log")
        try:
            with open(path, errors="replace") as f:
                return "".join(f.readlines()[-lines:])
        except OSError:
            return f"(no log at {path})"


# ----------------------------------------------------------------- admin

def admin(bootstrap):
    return AdminClient({"bootstrap.servers": bootstrap})


def unique_name(prefix="t"):
    return f"{prefix}-{uuid.uuid4().hex[:10]}"


def create_topic(bootstrap, name, partitions, config=None, timeout_s=30):
    """Create `name` with `partitions` partitions (replication factor 1) and
    wait until its metadata shows every partition with a leader."""
    # The client must outlive the future: a collected AdminClient cancels it.
    a = admin(bootstrap)
    fs = a.create_topics(
        [NewTopic(name, num_partitions=partitions, replication_factor=1,
                  config=dict(config or {}))],
        operation_timeout=timeout_s, request_timeout=timeout_s)
    fs[name].result(timeout=timeout_s)

    def ready():
        md = admin(bootstrap).list_topics(topic=name, timeout=5)
        t = md.topics.get(name)
        return (t is not None and t.error is None and len(t.partitions) == partitions
                and all(p.leader >= 0 for p in t.partitions.values()))
    wait_until(ready, timeout_s, what=f"topic {name} to have leaders")
    return name


def delete_topic(bootstrap, name, timeout_s=30):
    a = admin(bootstrap)
    a.delete_topics([name], operation_timeout=timeout_s)[name].result(timeout=timeout_s)


def topic_partitions(bootstrap, name, timeout_s=10):
    """Sorted partition ids of `name`; KeyError if the broker does not know it."""
    md = admin(bootstrap).list_topics(topic=name, timeout=timeout_s)
    t = md.topics.get(name)
    if t is None or t.error is not None:
        raise KeyError(f"topic {name}: {t.error if t is not None else 'absent'}")
    return sorted(t.partitions)


def topic_exists(bootstrap, name, timeout_s=10):
    md = admin(bootstrap).list_topics(timeout=timeout_s)
    return name in md.topics


# ----------------------------------------------------------------- produce

def produce(bootstrap, topic, payloads, keys=None, headers=None, partition=None,
            timeout_s=60, extra_config=None):
    """Produce every payload (bytes) to `topic` with an idempotent producer.

    keys: None or a list of bytes/str (same length); headers: None or a list
    of lists of (name, bytes) pairs; partition: None (the partitioner picks,
    by key) or a fixed partition id.  Returns the delivered (partition,
    offset) per payload, in payload order.  Raises KafkaException on the
    first delivery error and TimeoutError if not all are delivered in time."""
    conf = {"bootstrap.servers": bootstrap, "enable.idempotence": True,
            "linger.ms": 5, "message.timeout.ms": int(timeout_s * 1000)}
    conf.update(extra_config or {})
    p = Producer(conf)
    n = len(payloads)
    result = [None] * n
    errors = []

    def make_cb(i):
        def cb(err, msg):
            if err is not None:
                errors.append((i, err))
            else:
                result[i] = (msg.partition(), msg.offset())
        return cb

    for i, value in enumerate(payloads):
        kw = {"value": value, "on_delivery": make_cb(i)}
        if keys is not None:
            kw["key"] = keys[i]
        if headers is not None and headers[i]:
            kw["headers"] = list(headers[i])
        if partition is not None:
            kw["partition"] = partition
        while True:
            try:
                p.produce(topic, **kw)
                break
            except BufferError:
                p.poll(0.05)
        p.poll(0)
    left = p.flush(timeout_s)
    if errors:
        i, err = errors[0]
        raise KafkaException(err)
    if left:
        raise TimeoutError(f"{left} of {n} messages to {topic} undelivered after {timeout_s}s")
    return result


# ----------------------------------------------------------------- consume

def _record(msg):
    return Record(msg.topic(), msg.partition(), msg.offset(), msg.key(), msg.value(),
                  list(msg.headers() or []), msg.timestamp()[1])


def consume_all(bootstrap, topic, n=None, timeout_s=30, partitions=None):
    """Read `topic` from the beginning of every partition (or of `partitions`)
    with a consumer that joins no group and commits nothing.

    With n: return as soon as n records arrived; TimeoutError with the count
    if fewer arrive in timeout_s.  With n None: read until every partition
    reached its end (high watermark at the start of the call).  Records come
    in arrival order, which is offset order within each partition."""
    parts = partitions if partitions is not None else topic_partitions(bootstrap, topic)
    c = Consumer({"bootstrap.servers": bootstrap,
                  "group.id": unique_name("reader"),
                  "enable.auto.commit": False,
                  "enable.partition.eof": True,
                  "auto.offset.reset": "earliest"})
    try:
        ends = {}
        if n is None:
            for pid in parts:
                lo, hi = c.get_watermark_offsets(TopicPartition(topic, pid), timeout=10)
                ends[pid] = hi
        c.assign([TopicPartition(topic, pid, OFFSET_BEGINNING) for pid in parts])
        out = []
        next_off = {pid: 0 for pid in parts}
        deadline = time.monotonic() + timeout_s
        while True:
            if n is not None and len(out) >= n:
                return out
            if n is None and all(next_off[p] >= ends[p] for p in parts):
                return out
            if time.monotonic() >= deadline:
                raise TimeoutError(f"read {len(out)} of {n if n is not None else ends} "
                                   f"records from {topic} in {timeout_s}s")
            for msg in c.consume(num_messages=1000, timeout=0.2):
                err = msg.error()
                if err is not None:
                    if err.code() == KafkaError._PARTITION_EOF:
                        continue
                    raise KafkaException(err)
                out.append(_record(msg))
                next_off[msg.partition()] = msg.offset() + 1
    finally:
        c.close()


def end_offsets(bootstrap, topic):
    """{partition: high watermark} of `topic`."""
    c = Consumer({"bootstrap.servers": bootstrap, "group.id": unique_name("wm"),
                  "enable.auto.commit": False})
    try:
        return {pid: c.get_watermark_offsets(TopicPartition(topic, pid), timeout=10)[1]
                for pid in topic_partitions(bootstrap, topic)}
    finally:
        c.close()


def committed_offsets(bootstrap, group, topic, timeout_s=10):
    """{partition: committed offset} of consumer group `group` on `topic`;
    a partition with nothing committed maps to None.  Reads only, never
    joins the group."""
    parts = topic_partitions(bootstrap, topic)
    c = Consumer({"bootstrap.servers": bootstrap, "group.id": group,
                  "enable.auto.commit": False})
    try:
        got = c.committed([TopicPartition(topic, pid) for pid in parts], timeout=timeout_s)
    finally:
        c.close()
    out = {}
    for tp in got:
        if tp.error is not None:
            raise KafkaException(tp.error)
        out[tp.partition] = tp.offset if tp.offset >= 0 else None
    return out


def kcat_consume(bootstrap, topic, timeout_s=60):
    """Read the whole of `topic` with kcat (exits at the end of every
    partition).  Returns [(partition, offset, key bytes, value bytes)].
    Values and keys must not contain a newline or a tab (kcat's text
    output is split on them)."""
    p = subprocess.run(
        ["kcat", "-C", "-b", bootstrap, "-t", topic, "-o", "beginning", "-e", "-q",
         "-f", "%p\t%o\t%k\t%s\n"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, timeout=timeout_s)
    if p.returncode != 0:
        raise RuntimeError(f"kcat exited {p.returncode}: {p.stderr.decode(errors='replace')}")
    out = []
    for line in p.stdout.split(b"\n"):
        if not line:
            continue
        part, off, key, value = line.split(b"\t", 3)
        out.append((int(part), int(off), key, value))
    return out


def kcat_produce(bootstrap, topic, lines, keys=None, timeout_s=60):
    """Produce text lines (bytes without newlines) with kcat; keys, when
    given, go through kcat's key delimiter (a tab)."""
    if keys is not None:
        data = b"".join(k + b"\t" + v + b"\n" for k, v in zip(keys, lines))
        cmd = ["kcat", "-P", "-b", bootstrap, "-t", topic, "-K", "\t"]
    else:
        data = b"".join(v + b"\n" for v in lines)
        cmd = ["kcat", "-P", "-b", bootstrap, "-t", topic]
    p = subprocess.run(cmd, input=data, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                       timeout=timeout_s)
    if p.returncode != 0:
        raise RuntimeError(f"kcat exited {p.returncode}: {p.stderr.decode(errors='replace')}")


# ----------------------------------------------------------------- the daemon

def oddsky_binary():
    path = os.environ.get("ODDSKY_BIN")
    if path:
        return path
    build = os.environ.get("BUILD", "build")
    return os.path.join(build if os.path.isabs(build) else os.path.join(TOP, build), "oddsky")


def start_oddsky(config_dict, args=(), workdir=None, env=None, binary=None):
    """Write config_dict as JSON into a fresh work dir and start
    `oddsky run --config <dir>/oddsky.json ARGS...` in its own session,
    stdout to <dir>/stdout.log and stderr to <dir>/stderr.log.

    Returns the subprocess.Popen with extra attributes: workdir,
    config_path, log_path (stderr), stdout_path.  The caller stops it with
    stop_oddsky()."""
    binary = binary or oddsky_binary()
    if not os.access(binary, os.X_OK):
        raise FileNotFoundError(f"{binary} is missing or not executable: run make first")
    workdir = workdir or tempfile.mkdtemp(prefix="oddsky-it-")
    os.makedirs(workdir, exist_ok=True)
    config_path = os.path.join(workdir, "oddsky.json")
    with open(config_path, "w") as f:
        json.dump(config_dict, f, indent=2)
    log_path = os.path.join(workdir, "stderr.log")
    stdout_path = os.path.join(workdir, "stdout.log")
    run_env = dict(os.environ)
    run_env.update(env or {})
    with open(log_path, "ab") as err, open(stdout_path, "ab") as out:
        proc = subprocess.Popen([binary, "run", "--config", config_path, *args],
                                stdout=out, stderr=err, stdin=subprocess.DEVNULL,
                                cwd=workdir, env=run_env, start_new_session=True)
    proc.workdir = workdir
    proc.config_path = config_path
    proc.log_path = log_path
    proc.stdout_path = stdout_path
    return proc


def stop_oddsky(proc, sig=signal.SIGTERM, timeout_s=30):
    """Send `sig` to the daemon and wait up to timeout_s for it to exit;
    SIGKILL it if it is still there.  Returns (returncode, killed): killed
    is True when SIGKILL was needed (a failed drain)."""
    if proc.poll() is not None:
        return proc.returncode, False
    proc.send_signal(sig)
    try:
        return proc.wait(timeout=timeout_s), False
    except subprocess.TimeoutExpired:
        proc.kill()
        return proc.wait(timeout=10), True


def oddsky_log(proc):
    """The daemon's stderr so far, as text (for assertion messages)."""
    try:
        with open(proc.log_path, errors="replace") as f:
            return f.read()
    except OSError:
        return ""
