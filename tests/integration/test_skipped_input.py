"""Input deleted before the daemon read it is counted and logged, never
skipped in silence.

The daemon reads and commits the first packets of a one-partition topic
and stops; more packets arrive; the oldest unread ones are deleted
(DeleteRecords, as retention would) while no member of the group runs;
the daemon starts again.  Kafka facts: after DeleteRecords the
partition's log start offset is the given offset and a fetch below it
fails with OFFSET_OUT_OF_RANGE (source: Apache Kafka documentation,
Admin API deleteRecords; KIP-107); the consumer then resets its position
by auto.offset.reset, here earliest: the new log start (source:
librdkafka CONFIGURATION.md, auto.offset.reset).  The daemon's contract
(daemon/bus.h, "Skipped input"): every offset between the committed one
and the first message received is counted in counts.input.offsets_skipped,
the jump in counts.input.skips, and one warning names the range.
"""
import urllib.request

import confluent_kafka
from confluent_kafka import TopicPartition

import daemon_util as du
import kafka_util as ku

FIRST = 200        # read and committed before the deletion
MORE = 300         # arrive while the daemon is stopped
DELETE_TO = 350    # the log starts here after the deletion


def _metrics(port):
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        return r.read().decode()


def test_input_deleted_before_it_was_read(broker, new_topic, oddsky, tmp_path):
    in_t, out_t, dlq_t = (new_topic(1, prefix="skip-in"), new_topic(1, prefix="skip-out"),
                          new_topic(1, prefix="skip-dlq"))
    group = ku.unique_name("g")
    port = ku.free_port()
    cfg = du.make_config(broker, [in_t], out_t, dlq_t, group, tmp_path / "state",
                         status_port=port)

    du.simulate_to_topic(broker, in_t, FIRST, seed=3)
    proc = oddsky(cfg)
    doc = du.wait_status(proc, port, lambda d: d["counts"]["results"] >= FIRST, 120,
                         f"{FIRST} results")
    assert doc["counts"]["input"]["offsets_skipped"] == 0, doc["counts"]["input"]
    rc, _, killed = du.stop(proc)
    assert (rc, killed) == (0, False), du.log_tail(proc)
    assert ku.committed_offsets(broker, group, in_t) == {0: FIRST}

    du.simulate_to_topic(broker, in_t, MORE, seed=4)
    a = ku.admin(broker)
    fs = a.delete_records([TopicPartition(in_t, 0, DELETE_TO)], request_timeout=30)
    for f in fs.values():
        f.result(timeout=30)
    wm = confluent_kafka.Consumer({"bootstrap.servers": broker,
                                   "group.id": ku.unique_name("wm")})
    lo, hi = wm.get_watermark_offsets(TopicPartition(in_t, 0), timeout=10)
    wm.close()
    assert (lo, hi) == (DELETE_TO, FIRST + MORE)

    proc = oddsky(cfg)
    left = FIRST + MORE - DELETE_TO
    doc = du.wait_status(proc, port, lambda d: d["counts"]["results"] >= left, 120,
                         f"{left} results after the restart")
    lost = DELETE_TO - FIRST
    got = doc["counts"]["input"]
    print(f"\nafter deleting offsets {FIRST}..{DELETE_TO - 1}: counts.input {got}")
    assert got["offsets_skipped"] == lost, got
    assert got["skips"] == 1, got
    assert doc["counts"]["packets"] == left
    # /metrics follows on the daemon's periodic tick.
    ku.wait_until(lambda: f"oddsky_input_offsets_skipped_total {lost}\n" in _metrics(port)
                  and "oddsky_input_skips_total 1\n" in _metrics(port), 10,
                  what="the skip counters on /metrics")
    log = ku.oddsky_log(proc)
    lines = [ln for ln in log.splitlines()
             if f"offsets {FIRST}..{DELETE_TO - 1} ({lost}) were never received" in ln]
    assert len(lines) == 1, du.log_tail(proc)
    assert "WARN" in lines[0].upper() and "retention" in lines[0], lines[0]
    assert in_t in lines[0] and "[0]" in lines[0], lines[0]
    rc, _, killed = du.stop(proc)
    assert (rc, killed) == (0, False), du.log_tail(proc)
