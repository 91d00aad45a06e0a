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
