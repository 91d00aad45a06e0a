"""`oddsky run` against a real Kafka broker: every packet in gets a result
out that names its input, the daemon agrees with `oddsky replay` of the
same packets, and no packet is lost or learned twice across a SIGTERM or
a SIGKILL and a restart; two instances in one group split the partitions.

Inputs come from `oddsky simulate` (the invented demo survey); outputs
are read back with confluent-kafka, a client independent of the daemon's
bus code.  Expected facts and their sources:
- Kafka offsets: every message of a partition gets the next offset, and
  a consumer sees them in stored order (source: Apache Kafka
  documentation, Design, "Guarantees").
- Consumer groups: the partitions of a subscribed topic are divided among
  the members, each partition to exactly one member (source: Apache Kafka
  documentation, "Consumers" / consumer group protocol).
- The daemon's own contracts (at-least-once output, learn once, headers,
  dead-letter reasons) are those written in DESIGN.md, daemon/service.h
  and daemon/packet.h: the test checks the daemon against them, never
  against numbers the daemon produced.

Figures (counts, duplicates, durations) are printed; run with -s to see
them as they happen.
"""
import json
import os
import signal
import time

import pytest

import daemon_util as du
import kafka_util as ku

N_BIG = 50_000
SEED = 424242


def _topics(new_topic, parts, tag):
    return (new_topic(parts, prefix=f"{tag}-in"), new_topic(1, prefix=f"{tag}-out"),
            new_topic(1, prefix=f"{tag}-dlq"))


def _check_results_against_input(broker, in_topic, results, n_expected):
    """Every input message has a result naming it (headers and the record's
    input field), with the same packet id; returns {packet_id: result}."""
    inputs = du.input_index(broker, in_topic, timeout_s=120)
    assert len(inputs) == n_expected, f"input topic holds {len(inputs)} messages"
    by_coord = {}
    for rec, res, hdr in results:
        coord = (int(hdr["oddsky.input.partition"]), int(hdr["oddsky.input.offset"]))
        assert hdr["oddsky.input.topic"] == in_topic, hdr
        assert res["input"] == {"topic": in_topic, "partition": coord[0],
                                "offset": coord[1]}, (res["input"], hdr)
        assert coord in inputs, f"result names input {coord} that does not exist"
        src = inputs[coord]
        assert res["packet_id"] == du.packet_id_of_json(src.value), (coord, res["packet_id"])
        # Key = source id (DESIGN "Output record").
        assert rec.key == res["source_id"].encode()
        by_coord.setdefault(coord, res)
    missing = sorted(set(inputs) - set(by_coord))
    assert not missing, f"{len(missing)} input messages without a result, first {missing[:10]}"
    return {res["packet_id"]: res for res in by_coord.values()}


@pytest.mark.parametrize("partitions", [1, 4])
def test_every_packet_scored_once(broker, new_topic, oddsky, tmp_path, partitions):
    in_t, out_t, dlq_t = _topics(new_topic, partitions, f"all{partitions}")
    t0 = time.monotonic()
    du.simulate_to_topic(broker, in_t, N_BIG, seed=SEED)
    t_sim = time.monotonic() - t0
    port = ku.free_port()
    cfg = du.make_config(broker, [in_t], out_t, dlq_t, ku.unique_name("g"),
                         tmp_path / "state", status_port=port)
    t0 = time.monotonic()
    proc = oddsky(cfg)
    doc = du.wait_status(proc, port, lambda d: d["counts"]["results"] >= N_BIG, 240,
                         f"{N_BIG} results")
    t_run = time.monotonic() - t0
    records = du.read_topic(broker, out_t, n=None, timeout_s=120)
    print(f"\n[{partitions} partition(s)] simulate {N_BIG} to topic {t_sim:.1f} s; daemon "
          f"to {N_BIG} results {t_run:.1f} s ({N_BIG / t_run:.0f}/s incl. start); "
          f"output records {len(records)}")
    # source: DESIGN.md "How one packet walks": one result per packet;
    # nothing was restarted, so no duplicate is expected either.
    assert len(records) == N_BIG
    results = du.parse_results(records)
    ids = [res["packet_id"] for _, res, _ in results]
    dups = du.duplicates(ids)
    assert not dups, du.summarize_dups(dups)
    by_id = _check_results_against_input(broker, in_t, results, N_BIG)
    # The simulator numbers packets 1..N (cmd_simulate.c --help, schema doc
    # of packet_id: "unique per packet, increasing in emission order").
    assert set(by_id) == {str(i) for i in range(1, N_BIG + 1)}
    assert doc["counts"]["learned"] == N_BIG
    assert doc["model"]["learned"] == N_BIG
    assert du.dead_letter_total(doc) == 0, doc["counts"]["dead_letters"]
    assert du.read_topic(broker, dlq_t, n=None, timeout_s=30) == []

    if partitions != 1:
        rc, secs, killed = du.stop(proc)
        assert (rc, killed) == (0, False), du.log_tail(proc)
        return

    # The same packets through `oddsky replay` give the same scores: the
    # same config, the same packets in the same order (one partition).
    sim_file = tmp_path / "same.jsonl"
    du.simulate_to_file(sim_file, N_BIG, seed=SEED)
    with open(sim_file, "rb") as f:
        lines = [line.rstrip(b"\n") for line in f if line.strip()]
    inputs = du.input_index(broker, in_t)
    assert [inputs[(0, o)].value for o in range(N_BIG)] == lines, \
        "simulate to a file and to a topic gave different packets"
    rc, secs, killed = du.stop(proc)
    assert (rc, killed) == (0, False), du.log_tail(proc)
    t0 = time.monotonic()
    rep = du.replay(proc.config_path, [sim_file], tmp_path / "replay.jsonl")
    print(f"replay of {N_BIG}: {time.monotonic() - t0:.1f} s")
    assert len(rep) == N_BIG
    assert not [r for r in rep if "refused" in r]
    diffs = []
    for r in rep:
        live = by_id[r["packet_id"]]
        for k in du.SCORE_FIELDS:
            if live[k] != r[k]:
                diffs.append((r["packet_id"], k, live[k], r[k]))
    print(f"run vs replay: {len(diffs)} field differences")
    assert not diffs, f"{len(diffs)} differences, first {diffs[:10]}"


# ----------------------------------------------------------------- framings and poison

BIG_TOPIC = {"max.message.bytes": "8388608"}  # room for the 2 MB messages
BIG_PRODUCER = {"message.max.bytes": 8388608}


def _json_text(pkt, **replace):
    """json.dumps of pkt, then each placeholder string "__K__" replaced by
    the raw text replace[K] (for tokens Python would not write)."""
    text = json.dumps(pkt)
    for k, v in replace.items():
        text = text.replace(f'"__{k}__"', v)
    return text.encode()


def _rand_bytes(rng, n, first):
    return bytes([first]) + bytes(rng.randrange(256) for _ in range(n - 1))


def _run_mixed(broker, new_topic, oddsky, tmp_path, tag, segments, cfg_kw):
    """Fill a 1-partition topic with the segments in order, run the daemon
    over it and check every message's outcome.

    A segment is ("sim", format, count, seed, framing, extra simulate kw)
    or ("raw", callable(inputs so far) -> [(bytes, expected)]) where
    expected is ("result", framing) or ("dead", reason)."""
    in_t = new_topic(1, prefix=f"{tag}-in", config=BIG_TOPIC)
    out_t = new_topic(1, prefix=f"{tag}-out")
    dlq_t = new_topic(1, prefix=f"{tag}-dlq", config=BIG_TOPIC)
    expect = {}  # offset -> ("result", framing) | ("dead", reason)
    raw_bytes = {}
    for seg in segments:
        start = ku.end_offsets(broker, in_t)[0]
        if seg[0] == "sim":
            _, fmt, count, seed, framing, kw = seg
            du.simulate_to_topic(broker, in_t, count, seed=seed, fmt=fmt, **kw)
            end = ku.end_offsets(broker, in_t)[0]
            assert end - start == count
            for o in range(start, end):
                expect[o] = ("result", framing)
        else:
            so_far = du.input_index(broker, in_t)
            items = seg[1](so_far, expect)
            got = ku.produce(broker, in_t, [b for b, _ in items], partition=0,
                             extra_config=BIG_PRODUCER)
            for (b, e), (p, o) in zip(items, got):
                expect[o] = e
                raw_bytes[o] = b
    inputs = du.input_index(broker, in_t)
    assert sorted(o for _, o in inputs) == sorted(expect)
    n_good = sum(1 for e in expect.values() if e[0] == "result")
    n_dead = len(expect) - n_good
    want_reasons = {}
    for e in expect.values():
        if e[0] == "dead":
            want_reasons[e[1]] = want_reasons.get(e[1], 0) + 1

    port = ku.free_port()
    cfg = du.make_config(broker, [in_t], out_t, dlq_t, ku.unique_name("g"),
                         tmp_path / "state", status_port=port,
                         producer=BIG_PRODUCER, **cfg_kw)
    proc = oddsky(cfg)
    t0 = time.monotonic()
    # Wait on the topics themselves (not on the daemon's counters).
    du.wait_status(proc, port, lambda d: d["counts"]["packets"] >= len(expect)
                   and sum(ku.end_offsets(broker, out_t).values()) >= n_good
                   and sum(ku.end_offsets(broker, dlq_t).values()) >= n_dead,
                   90, f"{n_good} results and {n_dead} dead letters on the topics")
    # Let any late (wrong) extra output arrive before reading back.
    time.sleep(1.0)
    doc = du.status(port)
    print(f"\n[{tag}] {len(expect)} messages ({n_good} good, {n_dead} poison) handled in "
          f"{time.monotonic() - t0:.1f} s; status results {doc['counts']['results']}, "
          f"dead letters {du.dead_letter_total(doc)}")
    results = du.parse_results(du.read_topic(broker, out_t, n=None))
    dead = du.read_topic(broker, dlq_t, n=None)
    rc, secs, killed = du.stop(proc)
    assert (rc, killed) == (0, False), du.log_tail(proc)

    # Every good message: exactly one result, naming it, with the packet id
    # fastavro / json read from the input bytes.
    seen = {}
    for rec, res, hdr in results:
        o = int(hdr["oddsky.input.offset"])
        assert hdr["oddsky.input.topic"] == in_t and hdr["oddsky.input.partition"] == "0"
        assert o in expect, f"result for unknown offset {o}"
        assert expect[o][0] == "result", \
            f"offset {o} (expected dead letter {expect[o][1]}) got a result {res}"
        pkt = du.avro_packet(inputs[(0, o)].value, expect[o][1])
        assert res["packet_id"] == str(pkt["packet_id"]), (o, expect[o])
        assert res["source_id"] == str(pkt["source"]["id"])
        seen[o] = seen.get(o, 0) + 1
    no_result = [(o, expect[o][1]) for o, e in sorted(expect.items())
                 if e[0] == "result" and o not in seen]
    twice = {o: c for o, c in seen.items() if c > 1}
    assert not no_result, f"{len(no_result)} good packets without a result: {no_result[:10]}"
    assert not twice, f"results seen twice: {twice}"

    # Every poison message: one dead letter, original bytes, its reason.
    got_dead = {}
    wrong = []
    for r in dead:
        hdr = du.headers_dict(r.headers)
        o = int(hdr["oddsky.input.offset"])
        assert hdr["oddsky.input.topic"] == in_t and hdr["oddsky.input.partition"] == "0"
        assert o in expect
        got_dead[o] = got_dead.get(o, 0) + 1
        if expect[o][0] != "dead" or hdr.get("oddsky.reason") != expect[o][1]:
            wrong.append((o, expect[o], hdr.get("oddsky.reason"), hdr.get("oddsky.reason.text")))
            continue
        assert inputs[(0, o)].value == raw_bytes[o]
        original = raw_bytes[o]
        if len(original) > du.DEAD_LETTER_MAX_BYTES:
            # source: README (dead letters): a message larger than the
            # dead-letter cut carries its first bytes and says its size.
            assert hdr.get("oddsky.original.bytes") == str(len(original)), hdr
            original = original[:du.DEAD_LETTER_MAX_BYTES]
        else:
            assert "oddsky.original.bytes" not in hdr, hdr
        assert (r.value or b"") == original, \
            f"dead letter {o} does not carry the original bytes"
        assert hdr.get("oddsky.reason.text"), f"dead letter {o} has no reason text"
    assert not wrong, f"dead letters with the wrong reason (offset, expected, got, text): {wrong}"
    missing_dead = [(o, expect[o][1]) for o, e in expect.items()
                    if e[0] == "dead" and o not in got_dead]
    assert not missing_dead, f"poison messages with no dead letter: {missing_dead}"
    assert all(c == 1 for c in got_dead.values()), got_dead

    # The status counters agree with the topics (all compared, then one
    # assertion naming every mismatch).
    dl = {k: v for k, v in doc["counts"]["dead_letters"].items() if v}
    print(f"[{tag}] dead letters by reason: {dl}")
    bad = []
    if dl != want_reasons:
        bad.append(f"counts.dead_letters {dl} != dead-letter topic {want_reasons}")
    if doc["counts"]["packets"] != len(expect):
        bad.append(f"counts.packets {doc['counts']['packets']} != {len(expect)} messages")
    if doc["counts"]["results"] != n_good:
        # integ-bugs.md #1: results_total also counts dead letters.
        bad.append(f"counts.results {doc['counts']['results']} != {n_good} results on the "
                   f"output topic (it counts the {n_dead} dead letters too)")
    assert not bad, "; ".join(bad)


def test_mixed_framings_with_schema_dir_and_poison(broker, new_topic, oddsky, tmp_path):
    """JSON, Avro container and schema-id framing on one topic (schema
    directory configured, no bare writer schema), with poison messages in
    between and good packets after them."""
    import random
    schema_dir = du.write_schema_dir(tmp_path / "schemas", 7)
    rng = random.Random(20240601)

    def poison(so_far, expect):
        by = {}
        for (p, o), r in sorted(so_far.items()):
            by.setdefault(expect[o][1], r.value)
        js = json.loads(by["json"])
        cont, sid = by["container"], by["schema_id"]
        nan = dict(js, obs=dict(js["obs"], mag="__X__"))
        big_id = dict(js, packet_id="__X__")
        no_id = {k: v for k, v in js.items() if k != "packet_id"}
        huge = dict(js, note="x" * (2 * 1024 * 1024))
        deep = b'{"a":' * 10000 + b"1" + b"}" * 10000
        return [
            # source: daemon/packet.h reasons; common practice for the cases.
            (b"", ("dead", "empty")),
            (_rand_bytes(rng, 300, 0x7F), ("dead", "unknown_framing")),
            (cont[:len(cont) // 2], ("dead", "bad_container")),
            (cont[:12], ("dead", "bad_container")),
            (b"\x00\x00\x00\x00\x63" + sid[5:], ("dead", "unknown_schema_id")),
            (sid[:len(sid) - 7], ("dead", "bad_avro")),
            (sid + b"\x00", ("dead", "bad_avro")),  # trailing byte
            # source: RFC 8259 section 6 (no NaN / Infinity tokens);
            # from memory: jansson refuses a real that overflows a double
            # ("real number overflow") and an integer beyond json_int_t.
            (_json_text(nan, X="NaN"), ("dead", "bad_json")),
            (_json_text(nan, X="Infinity"), ("dead", "bad_json")),
            (_json_text(nan, X="1e400"), ("dead", "bad_json")),
            (_json_text(big_id, X="1" + "0" * 30), ("dead", "bad_json")),
            (b"{not json", ("dead", "bad_json")),
            (deep, ("dead", "json_too_deep")),
            (json.dumps(huge).encode(), ("dead", "too_large")),
            (b"[1, 2, 3]", ("dead", "not_an_object")),
            (json.dumps(no_id).encode(), ("dead", "missing_id")),
        ]

    segments = [
        ("sim", "json", 600, 101, "json", {}),
        ("sim", "avro-container", 600, 102, "container", {}),
        ("sim", "avro-schema-id", 600, 103, "schema_id", {"schema_id": 7}),
        ("raw", poison),
        ("sim", "json", 400, 104, "json", {}),
        ("sim", "avro-schema-id", 200, 105, "schema_id", {"schema_id": 7}),
    ]
    _run_mixed(broker, new_topic, oddsky, tmp_path, "mixA", segments,
               {"schema_dir": schema_dir})


def test_bare_avro_with_writer_schema_and_poison(broker, new_topic, oddsky, tmp_path):
    """Bare Avro (only input.writer_schema configured, so a leading 0x00 is
    bare Avro, daemon/decode.h rule 2), JSON and containers on one topic,
    a 2 MB JSON packet within max_message_bytes, poison in between."""
    import random
    rng = random.Random(777)

    def mixed(so_far, expect):
        by = {}
        for (p, o), r in sorted(so_far.items()):
            by.setdefault(expect[o][1], r.value)
        bare = by["bare"]
        pkt = du.avro_packet(bare, "bare")
        zero = du.bare_avro(dict(pkt, packet_id=0))
        # source: Avro specification, binary encoding: long 0 zig-zags to 0x00.
        assert zero[0] == 0
        js = json.loads(by["json"])
        huge = json.dumps(dict(js, note="y" * (2 * 1024 * 1024))).encode()
        assert 2 * 1024 * 1024 < len(huge) < 4 * 1024 * 1024
        return [
            (zero, ("result", "bare")),
            (huge, ("result", "json")),
            (bare[:len(bare) - 5], ("dead", "bad_avro")),
            (bare + b"\x01\x02", ("dead", "bad_avro")),
            (_rand_bytes(rng, 300, 0x7F), ("dead", "bad_avro")),
            (b"\x00\x00\x00\x00\x07" + bare, ("dead", "bad_avro")),
            (b"x" * (5 * 1024 * 1024), ("dead", "too_large")),
        ]

    segments = [
        ("sim", "avro-bare", 600, 201, "bare", {}),
        ("sim", "json", 300, 202, "json", {}),
        ("sim", "avro-container", 300, 203, "container", {}),
        ("raw", mixed),
        ("sim", "avro-bare", 400, 204, "bare", {}),
    ]
    _run_mixed(broker, new_topic, oddsky, tmp_path, "mixB", segments,
               {"writer_schema": du.PACKET_SCHEMA, "max_message_bytes": 4 * 1024 * 1024})


# ----------------------------------------------------------------- two instances

def _parts(doc):
    return sorted(p["partition"] for p in doc.get("partitions") or [])


def test_two_instances_split_the_partitions(broker, new_topic, oddsky, tmp_path):
    """Two daemons in one consumer group on a 4-partition topic: each gets
    some partitions, none shares one, every packet is scored."""
    n = 20_000
    in_t, out_t, dlq_t = _topics(new_topic, 4, "pair")
    group = ku.unique_name("g")
    ports = [ku.free_port(), ku.free_port()]
    while ports[1] == ports[0]:
        ports[1] = ku.free_port()
    cfgs = [du.make_config(broker, [in_t], out_t, dlq_t, group, tmp_path / f"state-{x}",
                           status_port=ports[i]) for i, x in enumerate("ab")]
    t0 = time.monotonic()
    a = oddsky(cfgs[0])
    du.wait_assigned(a, ports[0], 4)
    b = oddsky(cfgs[1])

    def split(_):
        da, db = du.status(ports[0]), du.status(ports[1])
        if not da or not db:
            return False
        pa, pb = _parts(da), _parts(db)
        return pa and pb and sorted(pa + pb) == [0, 1, 2, 3]
    du.wait_status(b, ports[1], split, 90, "the two instances to split 4 partitions")
    before = (_parts(du.status(ports[0])), _parts(du.status(ports[1])))
    print(f"\n[pair] split after {time.monotonic() - t0:.1f} s: a {before[0]}, b {before[1]}")
    # source: Apache Kafka documentation (consumer groups): each partition
    # is consumed by exactly one member of the group.
    assert before[0] and before[1] and not set(before[0]) & set(before[1])

    du.simulate_to_topic(broker, in_t, n, seed=31337)
    ends = ku.end_offsets(broker, in_t)
    assert sum(ends.values()) == n

    def caught_up(port):
        def pred(doc):
            ps = doc.get("partitions") or []
            return ps and all(p["stored"] == ends[p["partition"]] for p in ps)
        return pred
    da = du.wait_status(a, ports[0], caught_up(ports[0]), 120, "instance a to catch up")
    db = du.wait_status(b, ports[1], caught_up(ports[1]), 120, "instance b to catch up")
    after = (_parts(da), _parts(db))
    results = du.parse_results(du.read_topic(broker, out_t, n=None))
    ids = [res["packet_id"] for _, res, _ in results]
    dups = du.duplicates(ids)
    print(f"[pair] {len(results)} results for {n} packets; a: partitions {after[0]} packets "
          f"{da['counts']['packets']} learned {da['model']['learned']}; b: partitions "
          f"{after[1]} packets {db['counts']['packets']} learned {db['model']['learned']}; "
          f"duplicates: {du.summarize_dups(dups) if dups else 'none'}")
    for proc in (a, b):
        rc, secs, killed = du.stop(proc)
        assert (rc, killed) == (0, False), du.log_tail(proc)

    missing = {str(i) for i in range(1, n + 1)} - set(ids)
    assert not missing, f"{len(missing)} packets without a result"
    by_id = _check_results_against_input(broker, in_t, results, n)
    assert len(by_id) == n
    assert after[0] and after[1] and not set(after[0]) & set(after[1])
    assert sorted(after[0] + after[1]) == [0, 1, 2, 3]
    if after == before:
        # No rebalance while the packets flowed: each instance read exactly
        # its partitions, each packet once.
        assert not dups, du.summarize_dups(dups)
        for doc, parts in ((da, after[0]), (db, after[1])):
            want = sum(ends[p] for p in parts)
            assert doc["counts"]["packets"] == want
            assert doc["model"]["learned"] == want
    else:
        print(f"[pair] the assignment changed during the stream: {before} -> {after}")
    assert committed_all(broker, group, in_t, ends)


def committed_all(broker, group, topic, ends):
    got = ku.committed_offsets(broker, group, topic)
    assert got == ends, f"committed {got}, end offsets {ends}"
    return True


@pytest.mark.parametrize("size,reason", [(1_020_000, "bad_json"), (3 * 1024 * 1024, "too_large")],
                         ids=["bad_json-1020000", "too_large-3MiB"])
def test_poison_larger_than_the_producer_limit(broker, new_topic, oddsky, tmp_path, size, reason):
    """A refused message bigger than the daemon's producer accepts
    (librdkafka's default message.max.bytes is 1,000,000, source: librdkafka
    CONFIGURATION.md; the broker's default max.message.bytes 1048588 and
    input.max_message_bytes 1048576 let a 1,020,000-byte message in, so
    with every default a bad 1,020,000-byte JSON text is such a message).
    One poison message must not stop the daemon: the good packets after it
    are scored, it is counted and dead-lettered with its reason (its bytes
    may not fit), and the daemon keeps running."""
    in_t = new_topic(1, prefix="oversize-in", config=BIG_TOPIC)
    out_t, dlq_t = new_topic(1, prefix="oversize-out"), new_topic(1, prefix="oversize-dlq")
    du.simulate_to_topic(broker, in_t, 100, seed=61)
    poison = b"{" + b" " * (size - 1)  # unterminated object
    ku.produce(broker, in_t, [poison], partition=0, extra_config=BIG_PRODUCER)
    du.simulate_to_topic(broker, in_t, 100, seed=62)
    port = ku.free_port()
    group = ku.unique_name("g")
    cfg = du.make_config(broker, [in_t], out_t, dlq_t, group, tmp_path / "state",
                         status_port=port)
    proc = oddsky(cfg)
    doc = du.wait_status(proc, port, lambda d: d["counts"]["packets"] >= 201, 60,
                         "201 packets consumed")
    time.sleep(3)  # a few housekeeping ticks, where a fatal error stops it
    if proc.poll() is not None:
        log = [ln for ln in ku.oddsky_log(proc).splitlines()
               if "refused" in ln or "fatal" in ln or "stopped" in ln or "ERROR" in ln]
        pytest.fail(f"DAEMON BUG (integ-bugs.md #4): one {size}-byte poison message "
                    f"({reason}) stopped the daemon, exit status {proc.returncode}; "
                    f"committed {ku.committed_offsets(broker, group, in_t)} (past the "
                    f"poison at offset 100), dead-letter topic holds "
                    f"{sum(ku.end_offsets(broker, dlq_t).values())}; log:\n"
                    + "\n".join(log), pytrace=False)
    doc = du.status(port)
    assert doc["counts"]["dead_letters"][reason] == 1
    results = du.read_topic(broker, out_t, n=None)
    assert len(results) == 200
    dead = du.read_topic(broker, dlq_t, n=None)
    rc, _, killed = du.stop(proc)
    assert (rc, killed) == (0, False), du.log_tail(proc)
    assert len(dead) == 1
    hdr = du.headers_dict(dead[0].headers)
    assert hdr["oddsky.reason"] == reason and hdr["oddsky.input.offset"] == "100"
