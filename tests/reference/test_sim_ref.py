"""`oddsky simulate` output read back with outside libraries.

The binary ($ODDSKY_BIN, set by run.sh) writes an Avro object container
and JSON lines; fastavro (source: fastavro parse_schema, reader and
validation) checks that the schema parses, that the container's writer
schema is the schema file and that every record validates; Python's json
module parses the JSON lines, which must carry the same packets.  Exit
codes are checked against Python's os.EX_* constants (source: sysexits.h
as exposed by the os module).
"""
import hashlib
import json
import math
import os
import subprocess
from collections import Counter

import pytest

fastavro = pytest.importorskip("fastavro")
from fastavro.schema import to_parsing_canonical_form  # noqa: E402
from fastavro.validation import validate  # noqa: E402

TOP = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
SCHEMA = os.path.join(TOP, "config", "schemas", "oddsky-demo-packet.avsc")
FEATMAP = os.path.join(TOP, "config", "demo-featmap.json")
COUNT = 2000


@pytest.fixture(scope="module")
def oddsky():
    path = os.environ.get("ODDSKY_BIN", os.path.join(TOP, "build", "oddsky"))
    if not os.path.exists(path):
        pytest.fail(f"{path} is missing: run make first")
    return path


def run(oddsky, *args, timeout=120):
    return subprocess.run([oddsky, "simulate", *args], capture_output=True,
                          text=False, timeout=timeout)


@pytest.fixture(scope="module")
def schema():
    with open(SCHEMA) as f:
        return fastavro.parse_schema(json.load(f))  # source: fastavro.parse_schema


@pytest.fixture(scope="module")
def outputs(oddsky, tmp_path_factory):
    d = tmp_path_factory.mktemp("sim")
    avro_path, json_path = d / "x.avro", d / "x.jsonl"
    for fmt, path in (("avro-container", avro_path), ("json", json_path)):
        r = run(oddsky, "--seed", "5", "--count", str(COUNT), "--rare-rate", "0.01",
                "--format", fmt, "--output", str(path))
        assert r.returncode == 0, r.stderr.decode()
        assert f"{COUNT} packets".encode() in r.stderr
    return avro_path, json_path


@pytest.fixture(scope="module")
def records(outputs, schema):
    with open(outputs[0], "rb") as f:
        rd = fastavro.reader(f)  # source: fastavro.reader
        recs = list(rd)
        writer = rd.writer_schema
    return recs, writer


def test_schema_parses_and_matches_container(records, schema):
    _, writer = records
    # source: fastavro's Parsing Canonical Form (Avro spec) of both schemas.
    assert to_parsing_canonical_form(writer) == to_parsing_canonical_form(schema)


def test_every_record_validates(records, schema):
    recs, _ = records
    assert len(recs) == COUNT
    for r in recs:
        validate(r, schema, raise_errors=True)  # source: fastavro.validation


def test_json_lines_carry_the_same_packets(outputs, records):
    recs, _ = records
    with open(outputs[1]) as f:
        lines = [json.loads(line) for line in f]  # source: Python json
    assert len(lines) == COUNT
    # Same seed, same packets; numbers are quantised, so equal exactly.
    for a, j in zip(recs, lines):
        assert a == j
    # Named for the nullable host: the key is in every line (null or the
    # record), and both forms occur.
    assert all(j["host"] == a["host"] for a, j in zip(recs, lines))
    assert {j["host"] is None for j in lines} == {True, False}


def test_stream_properties(records):
    recs, _ = records
    assert [r["packet_id"] for r in recs] == list(range(1, COUNT + 1))
    mjd = [r["obs"]["mjd"] for r in recs]
    assert all(b >= a for a, b in zip(mjd, mjd[1:]))
    for r in recs:
        h = r["history"]
        assert len(h) <= 30
        times = [p["mjd"] for p in h]
        assert times == sorted(times)
        assert all(r["obs"]["mjd"] - 30.0 - 1e-9 <= t < r["obs"]["mjd"] for t in times)
        assert r["obs"]["band"] in "ugrizy" and len(r["obs"]["band"]) == 1
        assert 0.0 <= r["obs"]["quality"] <= 1.0
        if r["truth"] in ("moving", "artefact"):
            assert h == []
        # Schema docs of obs.mover_sep_arcsec and prior_limit: a separation
        # out to the 60 arcsec search radius; the limit an earlier visit
        # within the 30-day horizon at no time of a detection (detections
        # are at SNR >= 5, so a detection's magnitude would be brighter
        # than the limit of its own visit).
        assert 0.0 <= r["obs"]["mover_sep_arcsec"] <= 60.0
        lim = r["prior_limit"]
        if lim is not None:
            assert r["obs"]["mjd"] - 30.0 - 1e-9 <= lim["mjd"] < r["obs"]["mjd"]
            assert lim["band"] in "ugrizy" and len(lim["band"]) == 1
            assert lim["mjd"] not in times
        # Schema doc of host: the nearest catalogued galaxy within 10
        # arcsec, null when there is none; a galaxy's distance modulus
        # (30..50 covers z from about 0.002 to 4).
        host = r["host"]
        if host is not None:
            assert 0.0 <= host["sep_arcsec"] <= 10.0
            assert math.isfinite(host["dist_mod"]) and 30.0 < host["dist_mod"] < 50.0
        # Nuclear variables sit at their galaxy's centre.
        if r["truth"] == "nuclear_drw":
            assert host is not None and host["sep_arcsec"] < 1.0, r
    hosts = Counter(r["host"] is not None for r in recs)
    assert hosts[True] > 0 and hosts[False] > 0, hosts
    # A source keeps its host across its packets (moving bodies and
    # artefacts are new sources at every visit).
    host_of, kept = {}, 0
    for r in recs:
        if r["truth"] in ("moving", "artefact"):
            continue
        sid = r["source"]["id"]
        if sid in host_of:
            assert r["host"] == host_of[sid], (sid, r["host"], host_of[sid])
            kept += 1
        host_of[sid] = r["host"]
    assert kept > 100, kept
    pops = Counter(r["truth"] for r in recs)
    # Every common population shows up in 2000 packets.
    for p in ("sn_thermo", "sn_cc", "periodic", "nuclear_drw", "flare", "moving", "artefact"):
        assert pops[p] > 50, pops


def test_sky_limited_errors(records):
    """source: sky-limited noise (common practice): sigma_m = 1.0857/SNR,
    growing with magnitude; detections at SNR >= 5 give sigma_m <= 0.2171
    (plus a 0.005 floor in quadrature).  Rank correlation by scipy."""
    from scipy.stats import spearmanr
    recs, _ = records
    real = [r for r in recs if r["truth"] != "artefact"]
    limit = math.hypot(2.5 / math.log(10) / 5.0, 0.005)
    assert all(r["obs"]["mag_err"] <= limit + 1e-4 for r in real)
    for band in "griz":
        pts = [(r["obs"]["mag"], r["obs"]["mag_err"]) for r in real
               if r["obs"]["band"] == band]
        if len(pts) < 30:
            continue
        rho = spearmanr([p[0] for p in pts], [p[1] for p in pts]).statistic
        assert rho > 0.8, (band, rho)


def test_same_seed_same_bytes(oddsky, tmp_path, outputs):
    again = tmp_path / "again.avro"
    r = run(oddsky, "--seed", "5", "--count", str(COUNT), "--rare-rate", "0.01",
            "--format", "avro-container", "--output", str(again))
    assert r.returncode == 0
    h = lambda p: hashlib.sha256(open(p, "rb").read()).hexdigest()
    assert h(again) == h(outputs[0])
    other = tmp_path / "other.avro"
    assert run(oddsky, "--seed", "6", "--count", str(COUNT), "--format",
               "avro-container", "--output", str(other)).returncode == 0
    assert h(other) != h(outputs[0])


def test_featmap_paths_exist_and_skip_truth():
    with open(FEATMAP) as f:
        text = f.read()
    fm = json.loads(text)
    assert "truth" not in text
    with open(SCHEMA) as f:
        sch = json.load(f)

    def fields(rec):
        return {f["name"]: f["type"] for f in rec["fields"]}

    def resolve(path, rec=sch):
        # A union ["null", record] is followed into its record branch (Avro
        # 1.11 specification, "Unions"; null reads as missing).
        t = rec
        for part in path.split("."):
            if isinstance(t, list):
                recs = [b for b in t if isinstance(b, dict) and b.get("type") == "record"]
                assert len(recs) == 1 and all(b == "null" or b in recs for b in t), path
                t = recs[0]
            assert isinstance(t, dict) and t.get("type") == "record", path
            t = fields(t)[part]
        return t

    for key in ("id", "source", "time"):
        resolve(fm[key])
    hist = resolve(fm["history"]["path"])
    assert hist["type"] == "array"
    item = fields(hist["items"])
    for key in ("time", "value", "err", "band"):
        assert fm["history"][key] in item
    for key in ("time", "value", "err", "band"):
        resolve(fm["current"][key])
    names = set()
    for f in fm["features"]:
        for key in ("field", "minus"):
            if key in f:
                assert resolve(f[key]) in ("double", "float", "int", "long")
        for ref in f.get("diff", []) + f.get("ratio", []):
            assert ref in names  # defined earlier
        names.add(f["name"])
    assert 10 <= len(fm["features"]) <= 20


def test_cli_errors_and_help(oddsky, tmp_path):
    r = run(oddsky, "--help")
    assert r.returncode == 0
    assert b"schema_dir" in r.stdout and b"<id>.avsc" in r.stdout
    assert run(oddsky, "--count", "x").returncode == os.EX_USAGE
    assert run(oddsky, "--no-such-option").returncode == os.EX_USAGE
    assert run(oddsky, "--format", "avro-bare", "--output",
               str(tmp_path / "y")).returncode == os.EX_USAGE
    assert run(oddsky, "--brokers", "127.0.0.1:9").returncode == os.EX_USAGE  # no --topic
    assert run(oddsky, "--output", str(tmp_path / "no" / "dir" / "z")).returncode == os.EX_CANTCREAT


def test_unreachable_broker_is_reported(oddsky):
    # Loopback port 1: nothing listens; the producer gives up after its probe.
    r = run(oddsky, "--brokers", "127.0.0.1:1", "--topic", "t", "--count", "3", timeout=60)
    assert r.returncode == os.EX_UNAVAILABLE
    assert b"no Kafka broker answered" in r.stderr
