"""Fault tests of `oddsky run` against the real broker: the daemon killed
(SIGKILL, five times), the broker killed mid-stream, the broker down for
longer than the producer's retry window, the checkpoint folder full and
read-only, a corrupt checkpoint at start, and hostile input.

Every test is bounded (each wait raises on its timeout) and ends with a
ledger check against what went in: every input packet has a result (lost
= 0), the model learned each packet once (GET /status model.learned and
`oddsky inspect --json` of the final checkpoint equal the packets sent),
and the duplicates are counted and printed.  Each test adds its row to a
summary table printed at its end and kept in $BUILD/reliability-table.md.

Contracts checked and their sources:
- at-least-once output, learn once, what can duplicate, dead letters:
  README "Reliability" and daemon/service.h (start = min(committed,
  learned + 1); the beginning when nothing is committed);
- checkpoints: README "Operations" (temp file, fsync, rename; a failed
  write is logged and counted, the previous checkpoint stays intact; a
  corrupt checkpoint stops the daemon unless
  state.fresh_start_on_bad_checkpoint, which moves it aside), daemon/state.h;
  exit status 65 for an unusable checkpoint: `oddsky run --help`
  (sysexits.h EX_DATAERR);
- back-pressure: README "Operations" (kafka.max_in_flight bounds the
  results waiting for delivery);
- framings and refusal reasons: daemon/decode.h (detection order, guards,
  default max_json_depth 32 and max_items 100000) and daemon/packet.h;
  JSON has no NaN / Infinity tokens: RFC 8259 section 6;
- Kafka: a committed offset is the next offset the group reads (source:
  Apache Kafka documentation, consumer position); the simulator numbers
  packets 1..N (`oddsky simulate --help`, the schema doc of packet_id).
Results and inputs are read with confluent-kafka, independent of the
daemon's bus code.
"""
import hashlib
import io
import json
import os
import random
import re
import shutil
import signal
import struct
import subprocess
import time
import urllib.error
import urllib.request

import pytest

import daemon_util as du
import kafka_util as ku

SCHEMA_ID = 7
PARTS = 4

# ----------------------------------------------------------------- summary table

_FAULT_ORDER = ["kill -9 x5", "broker kill + restart", "broker down > retry window",
                "checkpoint folder full / read-only", "truncated checkpoint",
                "bit-flipped checkpoint", "hostile input"]


def _build_dir():
    b = os.environ.get("BUILD", "build")
    return b if os.path.isabs(b) else os.path.join(ku.TOP, b)


def _table_text(rows):
    lines = ["| fault | packets | lost | duplicates | learned == sent | notes |",
             "| --- | ---: | ---: | ---: | --- | --- |"]
    order = [f for f in _FAULT_ORDER if f in rows] + sorted(set(rows) - set(_FAULT_ORDER))
    for f in order:
        r = rows[f]
        lines.append(f"| {f} | {r['packets']:,} | {r['lost']:,} | {r['duplicates']:,} | "
                     f"{'yes' if r['learned'] == r['sent'] else 'NO'} "
                     f"({r['learned']:,} / {r['sent']:,}) | {r.get('notes', '')} |")
    return "\n".join(lines) + "\n"


@pytest.fixture(scope="module", autouse=True)
def _fresh_table():
    """The table holds the rows of this module's run only."""
    for name in ("reliability-rows.json", "reliability-table.md"):
        try:
            os.remove(os.path.join(_build_dir(), name))
        except OSError:
            pass
    yield


def record_row(fault, packets, lost, duplicates, learned, sent, notes=""):
    """Add (or replace) the row of `fault` in $BUILD/reliability-rows.json,
    rewrite $BUILD/reliability-table.md and print the table."""
    d = _build_dir()
    os.makedirs(d, exist_ok=True)
    rows_path = os.path.join(d, "reliability-rows.json")
    try:
        with open(rows_path) as f:
            rows = json.load(f)
    except (OSError, ValueError):
        rows = {}
    rows[fault] = {"packets": packets, "lost": lost, "duplicates": duplicates,
                   "learned": learned, "sent": sent, "notes": notes}
    with open(rows_path, "w") as f:
        json.dump(rows, f, indent=1)
    text = _table_text(rows)
    with open(os.path.join(d, "reliability-table.md"), "w") as f:
        f.write(text)
    print("\n" + text)


# ----------------------------------------------------------------- helpers

def _topics(new_topic, parts, tag, in_config=None, dlq_config=None):
    return (new_topic(parts, prefix=f"{tag}-in", config=in_config),
            new_topic(1, prefix=f"{tag}-out"),
            new_topic(1, prefix=f"{tag}-dlq", config=dlq_config))


def _out_total(broker, topic):
    return sum(ku.end_offsets(broker, topic).values())


def _caught_up(total, parts=PARTS, broker=None, group=None, topic=None):
    """Predicate on /status: `parts` partitions assigned, nothing in flight,
    the watermarks summing to `total`, and every partition's offset stored
    up to its high watermark; with broker/group/topic given, the stored
    offsets are read from the broker (the group's committed offsets equal
    the topic's end offsets) rather than from the status page."""
    def pred(doc):
        ps = doc.get("partitions") or []
        if not (len(ps) == parts and sum(p["high_watermark"] or 0 for p in ps) == total
                and all(p["in_flight"] == 0 for p in ps)):
            return False
        if broker is not None:
            ends = ku.end_offsets(broker, topic)
            return sum(ends.values()) == total and ku.committed_offsets(broker, group, topic) == ends
        return all(p["stored"] is not None and p["stored"] == p["high_watermark"] for p in ps)
    return pred


def _simulate_bg(broker, topic, count, seed, rate, fmt="avro-schema-id"):
    cmd = [ku.oddsky_binary(), "simulate", "--count", str(count), "--seed", str(seed),
           "--rate", str(rate), "--format", fmt, "--brokers", broker, "--topic", topic]
    if fmt == "avro-schema-id":
        cmd += ["--schema-id", str(SCHEMA_ID)]
    return subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


def _warm_coordinator(broker):
    # An idempotent producer first, so the broker's transaction coordinator
    # (which hands out producer ids, the daemon's included) is loaded.
    ku.produce(broker, ku.create_topic(broker, ku.unique_name("warm"), 1), [b"warm-up"])


def ledger_check(broker, in_t, out_t, n_sent, doc, state_dir, fault, notes="",
                 expected_ids=None):
    """Read the whole output topic and check it against the input: every
    packet id has a result, a duplicate names the same input coordinates,
    the model learned each packet once (status and final checkpoint).
    Records the table row, then asserts; returns (results, dups)."""
    ends = ku.end_offsets(broker, in_t)
    assert sum(ends.values()) == n_sent, f"input topic holds {sum(ends.values())}, sent {n_sent}"
    results = du.parse_results(du.read_topic(broker, out_t, n=None, timeout_s=240))
    ids = [res["packet_id"] for _, res, _ in results]
    dups = du.duplicates(ids)
    n_extra = sum(c - 1 for c in dups.values())
    expected = expected_ids if expected_ids is not None else {str(i) for i in range(1, n_sent + 1)}
    got = set(ids)
    missing = expected - got
    unknown = got - expected
    learned = doc["model"]["learned"]
    ck = du.inspect_checkpoint(state_dir)
    ck_learned = ck["model"]["learned"]
    print(f"[{fault}] {len(results)} results for {n_sent} packets; lost {len(missing)}; "
          f"duplicates: {du.summarize_dups(dups) if dups else 'none'}; model.learned "
          f"{learned} (status), {ck_learned} (final checkpoint)")
    record_row(fault, n_sent, len(missing), n_extra,
               learned if learned != n_sent else ck_learned, n_sent, notes)
    assert not missing, (f"[{fault}] {len(missing)} packets without a result, e.g. "
                         f"{sorted(missing, key=lambda x: int(x) if x.isdigit() else 0)[:10]}")
    assert not unknown, f"[{fault}] results for ids never sent: {sorted(unknown)[:10]}"
    assert len(results) == len(expected) + n_extra
    coords = {}
    for _, res, hdr in results:
        c = (hdr["oddsky.input.partition"], hdr["oddsky.input.offset"])
        assert coords.setdefault(res["packet_id"], c) == c, \
            f"[{fault}] packet {res['packet_id']} came from two inputs {coords[res['packet_id']]} and {c}"
    assert learned == n_sent, f"[{fault}] model.learned {learned} (status), {n_sent} packets sent"
    assert ck_learned == n_sent, \
        f"[{fault}] final checkpoint model.learned {ck_learned}, {n_sent} packets sent"
    led = {(e["topic"], e["partition"]): e["learned"] for e in ck["ledger"] if e["topic"] == in_t}
    assert led == {(in_t, p): e - 1 for p, e in ends.items() if e > 0}, \
        f"[{fault}] checkpoint ledger {led}, end offsets {ends}"
    return results, dups


def _http(port, path, timeout_s=5):
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=timeout_s) as r:
            return r.status, r.read().decode(errors="replace")
    except urllib.error.HTTPError as e:
        return e.code, e.read().decode(errors="replace")
    except (urllib.error.URLError, ConnectionError, OSError):
        return None, ""


def _metric(text, name, labels=""):
    """Value of one sample of a Prometheus text exposition, matched by the
    metric name's suffix (any namespace prefix) and exact label text."""
    pat = re.compile(r"^(\w*" + re.escape(name) + r")" + re.escape(labels) + r" (\S+)$", re.M)
    m = pat.search(text)
    return float(m.group(2)) if m else None


def _vm(pid, key):
    try:
        with open(f"/proc/{pid}/status") as f:
            for line in f:
                if line.startswith(key + ":"):
                    return int(line.split()[1]) / 1024.0  # MB
    except OSError:
        return None
    return None


def _base_config(broker, in_t, out_t, dlq_t, group, state_dir, port, schema_dir, **kw):
    consumer = {"session.timeout.ms": 6000, "heartbeat.interval.ms": 1000,
                "auto.commit.interval.ms": 1000, **kw.pop("consumer", {})}
    return du.make_config(broker, [in_t], out_t, dlq_t, group, state_dir,
                          status_port=port, schema_dir=schema_dir, consumer=consumer, **kw)


# ----------------------------------------------------------------- 1. kill -9 x5

def test_kill9_five_times_during_200k(broker, new_topic, oddsky, tmp_path):
    """Five SIGKILLs of the daemon at seeded random points of a 200,000
    packet stream on 4 partitions, each followed by a restart on the same
    state dir and group."""
    n, kills, seed = 200_000, 5, 20250101
    in_t, out_t, dlq_t = _topics(new_topic, PARTS, "k9")
    schema_dir = du.write_schema_dir(tmp_path / "schemas", SCHEMA_ID)
    port, group = ku.free_port(), ku.unique_name("g")
    state = tmp_path / "state"
    cfg = _base_config(broker, in_t, out_t, dlq_t, group, state, port, schema_dir,
                       checkpoint_interval_s=1)
    # Kill points: one uniform draw in each fifth of [5 %, 95 %] of the
    # stream, on the count of packets on the input topic (a clock that
    # restarts and duplicates do not move); a kill also waits until the
    # current run has consumed something.
    rng = random.Random(seed)
    lo, slot = n * 0.05, n * 0.9 / kills
    points = [int(lo + i * slot + rng.random() * slot) for i in range(kills)]
    print(f"\n[kill9] kill points (input packets): {points}")
    _warm_coordinator(broker)
    t_start = time.monotonic()
    proc = oddsky(cfg)
    du.wait_assigned(proc, port, PARTS, timeout_s=60)
    # 200,000 packets at 5,000/s (40 s): each kill falls while input
    # arrives, some while the daemon catches up on the backlog the
    # previous restart left.
    sim = _simulate_bg(broker, in_t, n, seed=17, rate=5_000)
    try:
        for k, point in enumerate(points):
            doc = du.wait_status(
                proc, port, lambda d: d["counts"]["packets"] > 0
                and _out_total(broker, in_t) >= point, 180,
                f"kill {k + 1}: {point} packets on the input topic")
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(timeout=10)
            assert proc.returncode == -signal.SIGKILL
            at = _out_total(broker, out_t)
            at_in = _out_total(broker, in_t)
            committed = ku.committed_offsets(broker, group, in_t)
            print(f"[kill9] kill {k + 1} at {time.monotonic() - t_start:.1f} s: input "
                  f"{at_in} packets, output {at} records, this run consumed {doc['counts']['packets']}+, "
                  f"model.learned {doc['model']['learned']}+, committed {committed}")
            proc = oddsky(cfg)
        rc_sim = sim.wait(timeout=120)
        assert rc_sim == 0, sim.stderr.read()
        doc = du.wait_status(proc, port, _caught_up(n), 180,
                             "the last run to reach the end of the input")
        t_all = time.monotonic() - t_start
        rc, secs, killed = du.stop(proc)
        assert (rc, killed) == (0, False), du.log_tail(proc)
    finally:
        if sim.poll() is None:
            sim.kill()
            sim.wait()
    print(f"[kill9] {kills} kills and restarts, all {n} packets done in {t_all:.1f} s; "
          f"last run: packets {doc['counts']['packets']}, learned {doc['counts']['learned']}, "
          f"rescored {doc['counts']['rescored']}")
    assert doc["counts"]["learned"] + doc["counts"]["rescored"] == doc["counts"]["packets"]
    assert du.dead_letter_total(doc) == 0
    results, dups = ledger_check(broker, in_t, out_t, n, doc, state, "kill -9 x5",
                                 notes=f"5 SIGKILLs, 4 partitions, {t_all:.0f} s")
    assert ku.committed_offsets(broker, group, in_t) == ku.end_offsets(broker, in_t)


# ----------------------------------------------------------------- 2. broker kill

def _wait_end_or_stall(proc, port, n, broker, group, in_t, timeout_s=180):
    """Wait for the end of the input; a daemon that did not get there with
    partitions assigned and nothing in flight fails naming each
    partition's progress."""
    try:
        return du.wait_status(proc, port, _caught_up(n, PARTS, broker, group, in_t), timeout_s,
                              "the end of the input (committed offsets at the end)")
    except TimeoutError as e:
        doc = du.status(port) or {}
        ps = doc.get("partitions") or []
        if (len(ps) == PARTS and all(p["in_flight"] == 0 for p in ps)
                and doc.get("counts", {}).get("packets", 0) < n):
            lines = [ln for ln in ku.oddsky_log(proc).splitlines()
                     if "partition assigned" in ln or "partition revoked" in ln]
            pytest.fail(f"DAEMON BUG: after the broker outage the daemon did not reach the "
                        f"end of the input in {timeout_s} s: {doc['counts']['packets']} of {n} "
                        f"packets consumed, {len(ps)} partitions assigned, nothing in flight, "
                        f"phase {doc.get('phase')}; (partition, stored, high watermark): "
                        f"{[(p['partition'], p['stored'], p['high_watermark']) for p in ps]}"
                        f"\n" + "\n".join(lines[-8:]),
                        pytrace=False)
        raise e


def _ensure_broker(kafka_local):
    if not kafka_local.running():
        kafka_local.restart()


def test_broker_killed_and_restarted_mid_stream(broker, kafka_local, new_topic, oddsky,
                                                tmp_path):
    """SIGKILL of the broker (data kept) while packets flow, then a start
    on the same data dir: no loss, each packet learned once."""
    n = 60_000
    in_t, out_t, dlq_t = _topics(new_topic, PARTS, "bk")
    schema_dir = du.write_schema_dir(tmp_path / "schemas", SCHEMA_ID)
    port, group = ku.free_port(), ku.unique_name("g")
    state = tmp_path / "state"
    cfg = _base_config(broker, in_t, out_t, dlq_t, group, state, port, schema_dir,
                       checkpoint_interval_s=2)
    _warm_coordinator(broker)
    proc = oddsky(cfg)
    du.wait_assigned(proc, port, PARTS, timeout_s=60)
    sim = _simulate_bg(broker, in_t, n, seed=23, rate=5_000)
    t0 = time.monotonic()
    try:
        doc = du.wait_status(proc, port, lambda d: d["counts"]["results"] >= n // 4, 90,
                             "a quarter of the results")
        assert sim.poll() is None, "the simulator finished before the broker kill"
        kafka_local.kill()
        t_kill = time.monotonic() - t0
        print(f"\n[broker-kill] broker SIGKILLed at {t_kill:.1f} s with "
              f"{doc['counts']['results']}+ results")
        time.sleep(2)
        assert proc.poll() is None, f"oddsky exited {proc.returncode} after the broker kill\n" \
            + du.log_tail(proc)
        t1 = time.monotonic()
        kafka_local.restart()
        down = time.monotonic() - t1 + 2
        print(f"[broker-kill] broker back after {down:.1f} s down")
        rc_sim = sim.wait(timeout=180)
        assert rc_sim == 0, f"the simulator failed across the broker restart: {sim.stderr.read()}"
        doc = _wait_end_or_stall(proc, port, n, broker, group, in_t)
        print(f"[{in_t}] status partitions at the end (partition, stored, high): "
              f"{[(p['partition'], p['stored'], p['high_watermark']) for p in doc['partitions']]}")
        t_all = time.monotonic() - t0
        rc, secs, killed = du.stop(proc)
        assert (rc, killed) == (0, False), du.log_tail(proc)
    finally:
        if sim.poll() is None:
            sim.kill()
            sim.wait()
        _ensure_broker(kafka_local)
    errs = doc["counts"]["errors"]
    print(f"[broker-kill] done in {t_all:.1f} s; redelivered {errs['redelivered']}, "
          f"consumer errors {errs['consumer']}, delivery failed {errs['delivery_failed']}")
    assert errs["delivery_failed"] == 0
    ledger_check(broker, in_t, out_t, n, doc, state, "broker kill + restart",
                 notes=f"broker down {down:.0f} s, redelivered {errs['redelivered']}")


# ----------------------------------------------------------------- 3. broker down long

def test_broker_down_longer_than_the_retry_window(broker, kafka_local, new_topic, oddsky,
                                                  tmp_path):
    """message.timeout.ms 5000 and the broker down about three times that,
    with results waiting: the daemon keeps running, pauses its input at
    kafka.max_in_flight, produces the timed-out results again and resumes
    when the broker returns."""
    n, timeout_ms, max_in_flight = 200_000, 5000, 1000
    in_t, out_t, dlq_t = _topics(new_topic, PARTS, "bd")
    schema_dir = du.write_schema_dir(tmp_path / "schemas", SCHEMA_ID)
    port, group = ku.free_port(), ku.unique_name("g")
    state = tmp_path / "state"
    cfg = _base_config(broker, in_t, out_t, dlq_t, group, state, port, schema_dir,
                       checkpoint_interval_s=2,
                       # linger.ms holds each batch of results for 1 s, so
                       # results are waiting whenever the broker dies.
                       producer={"message.timeout.ms": timeout_ms, "linger.ms": 1000,
                                 "batch.size": 900000})
    cfg["kafka"]["max_in_flight"] = max_in_flight
    poll_batch = cfg["kafka"].get("poll_batch", 1024)  # config.c default
    _warm_coordinator(broker)
    du.simulate_to_topic(broker, in_t, n, seed=29, fmt="avro-schema-id", schema_id=SCHEMA_ID)
    proc = oddsky(cfg)
    t0 = time.monotonic()
    seen = {"phases": set(), "in_flight_max": 0, "healthz": set()}
    try:
        # Kill the broker as soon as the first results reach the output
        # topic (watched on the broker: the status page answers from the
        # daemon's loop, which is busy with the backlog): the consumer has
        # fetched far more than max_in_flight packets by then.
        from confluent_kafka import Consumer, TopicPartition
        watch = Consumer({"bootstrap.servers": broker, "group.id": ku.unique_name("w")})
        deadline = time.monotonic() + 60
        try:
            while watch.get_watermark_offsets(TopicPartition(out_t, 0), timeout=5,
                                              cached=False)[1] <= 0:
                assert proc.poll() is None, du.log_tail(proc)
                assert time.monotonic() < deadline, "no result in 60 s"
                time.sleep(0.01)
        finally:
            watch.close()
        kafka_local.kill()
        t_kill = time.monotonic()
        doc = du.status(port)
        print(f"\n[broker-down] broker SIGKILLed {t_kill - t0:.1f} s after the start with "
              f"{doc['counts']['packets']} packets consumed, {doc['counts']['results']} results")
        down_for = 3 * timeout_ms / 1000.0
        while time.monotonic() - t_kill < down_for:
            assert proc.poll() is None, (f"DAEMON BUG: oddsky exited {proc.returncode} while "
                                         f"the broker was down\n{du.log_tail(proc)}")
            d = du.status(port, timeout_s=2)
            if d:
                seen["phases"].add(d["phase"])
                # counts.in_flight holds across a revoke (the partitions
                # list is empty while the group has none assigned).
                seen["in_flight_max"] = max(seen["in_flight_max"],
                                            sum(p["in_flight"] for p in d["partitions"]),
                                            d["counts"].get("in_flight", 0))
            code, _ = _http(port, "/healthz")
            seen["healthz"].add(code)
            time.sleep(0.5)
        mid = du.status(port)
        t1 = time.monotonic()
        kafka_local.restart()
        down = time.monotonic() - t_kill
        print(f"[broker-down] broker back after {down:.1f} s down (restart took "
              f"{time.monotonic() - t1:.1f} s); while down: phases {sorted(seen['phases'])}, "
              f"in flight at most {seen['in_flight_max']}, /healthz {sorted(seen['healthz'], key=str)}, "
              f"redelivered {mid['counts']['errors']['redelivered']}")
        doc = _wait_end_or_stall(proc, port, n, broker, group, in_t)
        print(f"[{in_t}] status partitions at the end (partition, stored, high): "
              f"{[(p['partition'], p['stored'], p['high_watermark']) for p in doc['partitions']]}")
        t_all = time.monotonic() - t0
        rc, secs, killed = du.stop(proc)
        assert (rc, killed) == (0, False), du.log_tail(proc)
    finally:
        _ensure_broker(kafka_local)
    errs = doc["counts"]["errors"]
    print(f"[broker-down] done in {t_all:.1f} s; redelivered {errs['redelivered']}, "
          f"delivery failed {errs['delivery_failed']}")
    # README "Operations": kafka.max_in_flight bounds the results waiting
    # for delivery; the bus holds max_in_flight + poll_batch tickets
    # (daemon/bus.c), the most one poll can overshoot by.
    assert "paused" in seen["phases"], \
        f"input never paused with the broker down (phases {seen['phases']})"
    assert seen["in_flight_max"] <= max_in_flight + poll_batch, seen
    # The results waited longer than message.timeout.ms: produced again.
    assert mid["counts"]["errors"]["redelivered"] > 0
    assert errs["delivery_failed"] == 0
    ledger_check(broker, in_t, out_t, n, doc, state, "broker down > retry window",
                 notes=f"message.timeout.ms {timeout_ms}, down {down:.0f} s, max_in_flight "
                       f"{max_in_flight}, paused, redelivered {errs['redelivered']}")


# ----------------------------------------------------------------- 4. checkpoint folder

def _sha(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


def _run(cmd):
    p = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                       timeout=30)
    return p.returncode, p.stdout


def test_checkpoint_folder_full_and_read_only(broker, new_topic, oddsky, tmp_path):
    """state.dir on a small tmpfs: filled up, then remounted read-only,
    then given its space back.  Checkpoints are written on SIGUSR1 (the
    interval is an hour), so each write is one known attempt."""
    mnt = tmp_path / "ckfs"
    mnt.mkdir()
    rc, out = _run(["mount", "-t", "tmpfs", "-o", "size=64m,mode=0755", "tmpfs", str(mnt)])
    assert rc == 0, (f"mount -t tmpfs failed ({out.strip()}); this test needs root and "
                     f"mount permission for the full / read-only folder")
    try:
        _checkpoint_folder_faults(broker, new_topic, oddsky, tmp_path, mnt)
    finally:
        _run(["umount", "-l", str(mnt)])


def _checkpoint_folder_faults(broker, new_topic, oddsky, tmp_path, mnt):
    n1, n2, n3 = 3000, 3000, 2000
    n = n1 + n2 + n3
    in_t, out_t, dlq_t = _topics(new_topic, 1, "ckfs")
    sim = tmp_path / "pk.jsonl"
    du.simulate_to_file(sim, n, seed=41)
    with open(sim, "rb") as f:
        lines = [ln.rstrip(b"\n") for ln in f if ln.strip()]
    assert len(lines) == n
    state = mnt / "state"
    port, group = ku.free_port(), ku.unique_name("g")
    cfg = _base_config(broker, in_t, out_t, dlq_t, group, state, port, "",
                       checkpoint_interval_s=3600)
    proc = oddsky(cfg)
    ck_path = state / "oddsky.ckpt"

    def metrics():
        code, text = _http(port, "/metrics")
        assert code == 200, code
        return (_metric(text, "checkpoints_total", '{result="ok"}'),
                _metric(text, "checkpoints_total", '{result="failed"}'))

    def checkpoint_now(what, want_ok, before):
        ok0, failed0 = before
        os.kill(proc.pid, signal.SIGUSR1)
        key = 0 if want_ok else 1
        du.wait_status(proc, port, lambda d: metrics()[key] == (before[key] or 0) + 1, 20,
                       f"checkpoint {what} counted")
        doc = du.status(port)
        return doc, metrics()

    def feed(chunk, total):
        ku.produce(broker, in_t, chunk, partition=0)
        return du.wait_status(proc, port, lambda d: d["counts"]["results"] >= total
                              and d["model"]["learned"] >= total, 60, f"{total} results")

    du.wait_ready(proc, port)
    feed(lines[:n1], n1)
    m0 = metrics()
    doc, m1 = checkpoint_now("before the fault", True, m0)
    assert doc["last_checkpoint"]["ok"] is True, doc["last_checkpoint"]
    good = _sha(ck_path)
    good_bytes = os.path.getsize(ck_path)
    print(f"\n[ckfs] good checkpoint {good_bytes} bytes, metrics ok/failed {m1}")

    # Full: a filler leaves less room than half a checkpoint.
    st = os.statvfs(mnt)
    free = st.f_bavail * st.f_frsize
    filler = mnt / "filler"
    with open(filler, "wb") as f:
        left = free - good_bytes // 2
        while left > 0:
            k = min(left, 1 << 20)
            f.write(b"\xa5" * k)
            left -= k
    st = os.statvfs(mnt)
    print(f"[ckfs] filled: {st.f_bavail * st.f_frsize} bytes free")
    feed(lines[n1:n1 + n2 // 2], n1 + n2 // 2)
    doc, m2 = checkpoint_now("on a full folder", False, m1)
    lc = doc["last_checkpoint"]
    print(f"[ckfs] full: last_checkpoint {lc}, metrics ok/failed {m2}")
    assert lc["ok"] is False and lc.get("error"), lc
    assert _sha(ck_path) == good, "the last good checkpoint changed after a failed write"
    assert not (state / "oddsky.ckpt.tmp").exists(), "a partial temp file was left behind"

    # Read-only.
    rc, out = _run(["mount", "-o", "remount,ro", str(mnt)])
    assert rc == 0, out
    feed(lines[n1 + n2 // 2:n1 + n2], n1 + n2)
    doc, m3 = checkpoint_now("on a read-only folder", False, m2)
    lc = doc["last_checkpoint"]
    print(f"[ckfs] read-only: last_checkpoint {lc}, metrics ok/failed {m3}")
    assert lc["ok"] is False and lc.get("error"), lc
    assert _sha(ck_path) == good, "the last good checkpoint changed on a read-only folder"
    assert proc.poll() is None, du.log_tail(proc)
    log = ku.oddsky_log(proc)
    assert log.count("checkpoint (SIGUSR1) failed") >= 2, du.log_tail(proc)
    # The kept checkpoint is still a whole one.
    ck = du.inspect_checkpoint(state)
    assert ck["model"]["learned"] == n1

    # Space back: read-write, filler removed.
    rc, out = _run(["mount", "-o", "remount,rw", str(mnt)])
    assert rc == 0, out
    filler.unlink()
    feed(lines[n1 + n2:], n)
    doc, m4 = checkpoint_now("after space returned", True, m3)
    lc = doc["last_checkpoint"]
    print(f"[ckfs] recovered: last_checkpoint ok {lc['ok']} {lc['bytes']} bytes, "
          f"metrics ok/failed {m4}")
    assert lc["ok"] is True
    assert _sha(ck_path) != good
    assert du.inspect_checkpoint(state)["model"]["learned"] == n
    rc, secs, killed = du.stop(proc)
    assert (rc, killed) == (0, False), du.log_tail(proc)
    ledger_check(broker, in_t, out_t, n, doc, state, "checkpoint folder full / read-only",
                 notes=f"2 failed writes (ENOSPC, EROFS), good file kept byte-identical, "
                       f"then ok")


# ----------------------------------------------------------------- 5. bad checkpoint

@pytest.mark.parametrize("damage", ["truncated", "bit-flipped"])
def test_bad_checkpoint_at_start(broker, new_topic, oddsky, tmp_path, damage):
    n = 3000
    in_t, out_t, dlq_t = _topics(new_topic, 1, f"bad-{damage[:5]}")
    du.simulate_to_topic(broker, in_t, n, seed=43)
    state = tmp_path / "state"
    port, group = ku.free_port(), ku.unique_name("g")
    cfg = _base_config(broker, in_t, out_t, dlq_t, group, state, port, "")
    proc = oddsky(cfg)
    du.wait_status(proc, port, _caught_up(n, 1), 60, f"{n} packets")
    rc, _, killed = du.stop(proc)
    assert (rc, killed) == (0, False), du.log_tail(proc)
    ck_path = state / "oddsky.ckpt"
    data = bytearray(ck_path.read_bytes())
    if damage == "truncated":
        data = data[:len(data) // 2]
    else:
        rng = random.Random(47)
        pos = rng.randrange(len(data))
        data[pos] ^= 1 << rng.randrange(8)
    ck_path.write_bytes(bytes(data))
    bad_sha = hashlib.sha256(bytes(data)).hexdigest()

    # Refuses to start: exit 65 (`oddsky run --help`), naming the file and
    # the option that would start fresh.
    out2 = tmp_path / "out2"
    p = oddsky(cfg)
    try:
        rc = p.wait(timeout=30)
    except subprocess.TimeoutExpired:
        pytest.fail(f"DAEMON BUG: started on a {damage} checkpoint\n{du.log_tail(p)}")
    err = ku.oddsky_log(p)
    print(f"\n[{damage}] exit {rc}; log: "
          + " | ".join(ln for ln in err.splitlines() if "checkpoint" in ln)[:600])
    assert rc == 65, f"exit {rc}\n{err}"
    assert str(ck_path) in err, err
    assert "state.fresh_start_on_bad_checkpoint" in err, err
    assert _sha(ck_path) == bad_sha, "the refused checkpoint was changed"

    # With the option: a fresh model, the bad file moved aside, and every
    # packet scored and learned once (a new group and output topic, so the
    # fresh model reads the whole input).
    out_t2 = new_topic(1, prefix=f"bad-{damage[:5]}-out2")
    cfg2 = _base_config(broker, in_t, out_t2, dlq_t, ku.unique_name("g"), state, port, "")
    p = oddsky(cfg2, ["--set", "state.fresh_start_on_bad_checkpoint=true"],
               workdir=str(out2))
    doc = du.wait_status(p, port, _caught_up(n, 1), 60, f"{n} packets after a fresh start")
    asides = [f for f in os.listdir(state) if f.startswith("oddsky.ckpt.bad-")]
    assert len(asides) == 1, os.listdir(state)
    assert _sha(state / asides[0]) == bad_sha, "the file moved aside is not the bad one"
    assert doc["counts"]["rescored"] == 0
    rc, _, killed = du.stop(p)
    assert (rc, killed) == (0, False), du.log_tail(p)
    ledger_check(broker, in_t, out_t2, n, doc, state, f"{damage} checkpoint",
                 notes="exit 65 naming file and option; fresh start moved it aside")


# ----------------------------------------------------------------- 6. hostile input

def _zz(v):
    """Avro zig-zag varint of a long (source: Avro specification 1.11,
    Binary Encoding)."""
    u = (v << 1) ^ (v >> 63)
    u &= (1 << 64) - 1
    out = bytearray()
    while True:
        b = u & 0x7F
        u >>= 7
        if u:
            out.append(b | 0x80)
        else:
            out.append(b)
            return bytes(out)


def _avro_prefix(pkt):
    """Bare Avro of the fields before obs.band (packet_id, source, obs.mjd)."""
    return (_zz(pkt["packet_id"]) + _zz(pkt["source"]["id"])
            + struct.pack("<d", pkt["source"]["ra_deg"]) + struct.pack("<d", pkt["source"]["dec_deg"])
            + struct.pack("<d", pkt["obs"]["mjd"]))


def _hostile_corpus(js_line, sid_msg, cont_msg, bare_msg, rng):
    """[(bytes, expectation)]: ("dead", reason or None for any documented
    reason) or ("one", None): exactly one outcome, a result or a dead
    letter.  Reasons named only where decode.h / packet.h / RFC 8259 say."""
    js = json.loads(js_line)
    pkt = du.avro_packet(sid_msg, "schema_id")
    hdr = sid_msg[:5]
    out = []

    def dead(b, reason=None):
        out.append((b, ("dead", reason)))

    def one(b):
        out.append((b, ("one", None)))

    def jtext(d, **raw):
        t = json.dumps(d)
        for k, v in raw.items():
            t = t.replace(f'"__{k}__"', v)
        return t.encode()
    # JSON
    dead(js_line[:len(js_line) // 2], "bad_json")
    dead(b"{" + bytes(rng.randrange(256) for _ in range(400)), "bad_json")
    for tok in ("NaN", "Infinity", "-Infinity"):
        dead(jtext(dict(js, obs=dict(js["obs"], mag="__X__")), X=tok), "bad_json")
    dead(json.dumps(dict(js, packet_id={"x": 1})).encode(), "missing_id")
    dead(json.dumps(dict(js, packet_id=None)).encode(), "missing_id")
    dead(json.dumps(dict(js, source=dict(js["source"], id=[1, 2]))).encode(), "missing_source")
    dead(json.dumps(dict(js, packet_id="p" * 5000)).encode(), "id_too_long")
    one(json.dumps(dict(js, obs=dict(js["obs"], mag="bright"))).encode())
    one(json.dumps(dict(js, obs=dict(js["obs"], mjd="yesterday"))).encode())
    one(json.dumps(dict(js, history={"not": "an array"})).encode())
    one(json.dumps(dict(js, history=[1, "x", None, [2]])).encode())
    one(jtext(dict(js, obs=dict(js["obs"], mag="__X__")), X="1e308"))
    dead(jtext(dict(js, history="__X__"), X="[" + ",".join(["0"] * 1_000_000) + "]"),
         "too_many_items")
    dead(b'{"a":' * 100_000 + b"1" + b"}" * 100_000, "json_too_deep")
    dead(b"[" * 100_000 + b"]" * 100_000)  # not '{': bare Avro with a writer schema
    dead(json.dumps(dict(js, note="z" * (20 * 1024 * 1024))).encode(), "too_large")
    one(json.dumps(dict(js, note="q" * (6 * 1024 * 1024))).encode())
    dead(b"", "empty")
    # Schema-id framing
    dead(sid_msg[:len(sid_msg) - 7], "bad_avro")
    dead(sid_msg[:3])
    dead(sid_msg + b"\x00\x01", "bad_avro")
    dead(b"\x00\x00\x00\x00\x63" + sid_msg[5:], "unknown_schema_id")
    dead(b"\x00\x7f\xff\xff\xff" + sid_msg[5:], "unknown_schema_id")
    dead(hdr + bytes(rng.randrange(256) for _ in range(300)))
    # obs.band string length 2^40 with 3 bytes left: past the buffer.
    dead(hdr + _avro_prefix(pkt) + _zz(1 << 40) + b"abc", "bad_avro")
    # A negative string length.
    dead(hdr + _avro_prefix(pkt) + _zz(-5) + b"abc", "bad_avro")
    # history claims 1,000,000 items and carries none.
    obs_tail = (_zz(1) + b"r" + struct.pack("<d", 20.0) + struct.pack("<d", 0.1)
                + struct.pack("<d", 0.9) + _zz(3))
    dead(hdr + _avro_prefix(pkt) + obs_tail + _zz(1_000_000) + b"\x00")
    # ... and a block count of 2^62.
    dead(hdr + _avro_prefix(pkt) + obs_tail + _zz(1 << 62) + b"\x00")
    # A negative block count with a byte size past the end.
    dead(hdr + _avro_prefix(pkt) + obs_tail + _zz(-3) + _zz(1 << 40) + b"\x00")
    # NaN and infinities are valid Avro doubles.
    for v in (float("nan"), float("inf"), float("-inf")):
        p2 = dict(pkt, obs=dict(pkt["obs"], mag=v, mag_err=v))
        one(hdr + du.bare_avro(p2))
        p3 = dict(pkt, obs=dict(pkt["obs"], mjd=v))
        one(hdr + du.bare_avro(p3))
    # An enum index out of range (truth is the last field).
    good_body = du.bare_avro(pkt)
    dead(hdr + good_body[:-1] + _zz(99), "bad_avro")
    # Container
    dead(cont_msg[:len(cont_msg) // 2], "bad_container")
    dead(cont_msg[:12], "bad_container")
    dead(b"Obj\x01" + bytes(rng.randrange(256) for _ in range(500)))
    dead(cont_msg + b"\x00" * 40)
    # Bare Avro (input.writer_schema configured: decode.h rule 4)
    dead(bare_msg[:len(bare_msg) - 5], "bad_avro")
    dead(bare_msg + b"\x01\x02", "bad_avro")
    dead(bytes([0x7F]) + bytes(rng.randrange(256) for _ in range(300)), "bad_avro")
    dead(b"\xff" * 64, "bad_avro")
    return out


def test_hostile_input(broker, new_topic, oddsky, tmp_path):
    """Bad packets of every framing interleaved with good ones on one
    partition: each bad one gets one dead letter with its reason, every
    good one a result, and the daemon's RSS stays bounded."""
    big = {"max.message.bytes": str(64 * 1024 * 1024)}
    big_producer = {"message.max.bytes": 64 * 1024 * 1024}
    in_t, out_t, dlq_t = _topics(new_topic, 1, "hostile", in_config=big)
    schema_dir = du.write_schema_dir(tmp_path / "schemas", SCHEMA_ID)
    # Good packets of each framing, from the simulator.
    stage = {}
    for fmt, seed in (("avro-schema-id", 51), ("avro-container", 52), ("avro-bare", 53)):
        t = new_topic(1, prefix="stage")
        du.simulate_to_topic(broker, t, 600, seed=seed, fmt=fmt,
                             schema_id=SCHEMA_ID if fmt == "avro-schema-id" else None)
        stage[fmt] = [r.value for r in du.read_topic(broker, t, n=None)]
    du.simulate_to_file(tmp_path / "good.jsonl", 1200, seed=54)
    with open(tmp_path / "good.jsonl", "rb") as f:
        stage["json"] = [ln.rstrip(b"\n") for ln in f if ln.strip()]
    good = [(v, "schema_id") for v in stage["avro-schema-id"]] + \
           [(v, "container") for v in stage["avro-container"]] + \
           [(v, "bare") for v in stage["avro-bare"]] + [(v, "json") for v in stage["json"]]
    rng = random.Random(20240917)
    rng.shuffle(good)
    bad = _hostile_corpus(stage["json"][0], stage["avro-schema-id"][0],
                          stage["avro-container"][0], stage["avro-bare"][0], rng)
    rng.shuffle(bad)
    # Interleave: a run of good packets, one bad one, ... good ones last.
    msgs = []
    per = len(good) // (len(bad) + 1)
    gi = 0
    for b in bad:
        for _ in range(per):
            msgs.append((good[gi][0], ("good", good[gi][1])))
            gi += 1
        msgs.append(b)
    msgs += [(v, ("good", fr)) for v, fr in good[gi:]]

    port, group = ku.free_port(), ku.unique_name("g")
    state = tmp_path / "state"
    cfg = _base_config(broker, in_t, out_t, dlq_t, group, state, port, schema_dir,
                       producer=big_producer, max_message_bytes=16 * 1024 * 1024)
    cfg["input"]["writer_schema"] = du.PACKET_SCHEMA
    # 200 good packets go in before the daemon starts, so the "before"
    # RSS is of a daemon that has already scored packets.
    pre = stage["json"][:200]
    ku.produce(broker, in_t, pre, partition=0)
    proc = oddsky(cfg)
    du.wait_status(proc, port, lambda d: d["counts"]["results"] >= len(pre), 60,
                   "the first 200 results")
    rss_before = _vm(proc.pid, "VmRSS")
    t0 = time.monotonic()
    got = ku.produce(broker, in_t, [b for b, _ in msgs], partition=0,
                     extra_config=big_producer, timeout_s=120)
    expect = {o: e for (_, e), (_, o) in zip(msgs, got)}
    raw = {o: b for (b, _), (_, o) in zip(msgs, got)}
    for o in range(len(pre)):
        expect[o] = ("good", "json")
    total = len(expect)
    n_bad = sum(1 for e in expect.values() if e[0] == "dead")
    rss = [rss_before]

    def done(d):
        rss.append(_vm(proc.pid, "VmRSS") or 0)
        return d["counts"]["packets"] >= total and _caught_up(total, 1)(d)
    doc = du.wait_status(proc, port, done, 180, f"{total} messages handled")
    t_run = time.monotonic() - t0
    time.sleep(1.0)
    doc = du.status(port)
    rss_after = _vm(proc.pid, "VmRSS")
    hwm = _vm(proc.pid, "VmHWM")
    results = du.parse_results(du.read_topic(broker, out_t, n=None, timeout_s=120))
    dead = du.read_topic(broker, dlq_t, n=None, timeout_s=60)
    rc, _, killed = du.stop(proc)
    assert (rc, killed) == (0, False), du.log_tail(proc)
    print(f"\n[hostile] {total} messages ({n_bad} bad, "
          f"{sum(1 for e in expect.values() if e[0] == 'one')} odd-but-maybe-fine) in "
          f"{t_run:.1f} s; {len(results)} results, {len(dead)} dead letters; VmRSS before "
          f"{rss_before:.1f} MB, after {rss_after:.1f} MB, max sampled {max(rss):.1f} MB, "
          f"VmHWM {hwm:.1f} MB")

    reasons = set(re.findall(r'X\(\w+, -\d+, "(\w+)"',
                             open(os.path.join(ku.TOP, "daemon", "packet.h")).read()))
    res_at, dead_at, wrong = {}, {}, []
    for rec, res, hdr in results:
        o = int(hdr["oddsky.input.offset"])
        res_at[o] = res_at.get(o, 0) + 1
        if expect[o][0] == "good":
            pkt = du.avro_packet(raw.get(o) if o in raw else pre[o], expect[o][1])
            if res["packet_id"] != str(pkt["packet_id"]):
                wrong.append((o, "id", res["packet_id"], pkt["packet_id"]))
    by_reason = {}
    for r in dead:
        hdr = du.headers_dict(r.headers)
        o = int(hdr["oddsky.input.offset"])
        dead_at[o] = dead_at.get(o, 0) + 1
        reason = hdr.get("oddsky.reason")
        by_reason[reason] = by_reason.get(reason, 0) + 1
        want = expect[o]
        if want[0] == "good":
            wrong.append((o, "good packet dead-lettered", reason, hdr.get("oddsky.reason.text")))
        elif reason not in reasons or not hdr.get("oddsky.reason.text"):
            wrong.append((o, "reason", reason, hdr.get("oddsky.reason.text")))
        elif want[0] == "dead" and want[1] is not None and reason != want[1]:
            wrong.append((o, f"expected {want[1]}", reason, hdr.get("oddsky.reason.text"),
                          raw[o][:40]))
        elif (r.value or b"") != raw[o][:du.DEAD_LETTER_MAX_BYTES]:
            wrong.append((o, "dead letter does not carry the original bytes"))
    print(f"[hostile] dead letters by reason: {dict(sorted(by_reason.items(), key=str))}")
    no_result = [o for o, e in expect.items() if e[0] == "good" and res_at.get(o) != 1]
    no_dead = [(o, expect[o][1], raw[o][:40]) for o, e in expect.items()
               if e[0] == "dead" and (dead_at.get(o) != 1 or o in res_at)]
    not_one = [(o, res_at.get(o, 0), dead_at.get(o, 0), raw[o][:40]) for o, e in expect.items()
               if e[0] == "one" and res_at.get(o, 0) + dead_at.get(o, 0) != 1]
    n_results = len(res_at)
    print(f"[hostile] odd-but-valid packets: "
          f"{sum(1 for o, e in expect.items() if e[0] == 'one' and o in res_at)} results, "
          f"{sum(1 for o, e in expect.items() if e[0] == 'one' and o in dead_at)} dead letters")
    learned = doc["model"]["learned"]
    record_row("hostile input", total, len(no_result), sum(max(0, c - 1) for c in res_at.values()),
               learned, n_results,
               notes=f"{n_bad} bad of every framing, all dead-lettered: "
                     f"{'yes' if not no_dead else 'NO'}; RSS {rss_before:.0f} -> "
                     f"{rss_after:.0f} MB (max {max(rss):.0f})")
    assert not wrong, f"{len(wrong)} wrong outcomes: {wrong[:10]}"
    assert not no_result, f"{len(no_result)} good packets without exactly one result: {no_result[:10]}"
    assert not no_dead, f"{len(no_dead)} bad packets without exactly one dead letter: {no_dead[:10]}"
    assert not not_one, f"messages with other than one outcome: {not_one[:10]}"
    assert learned == n_results, f"model.learned {learned}, {n_results} packets with results"
    assert du.dead_letter_total(doc) == len(dead_at)
    assert max(rss) < 200 and rss_after < 200, \
        f"RSS before {rss_before:.1f} MB, after {rss_after:.1f} MB, max {max(rss):.1f} MB"
