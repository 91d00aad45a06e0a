"""oddsky replay: files in, results out, through the shared pipeline.

Checks: byte-identical output on a second run (hashlib); every result line
validates against config/schemas/oddsky-result.avsc (fastavro); an Avro
container and the same packets as JSON lines give the same results apart
from the input coordinates (the container is read with avro-c's file reader,
the JSON lines by the decoder's JSON framing); refused packets appear with
their reasons; vector lines with labels carried through; --vectors-out
matches the packet fields it copies (numpy) and scores the same when fed
back; usage errors exit with sysexits.h codes.
"""
import hashlib
import json
import os
import subprocess

import numpy as np
import pytest

TOP = os.environ.get("ODDSKY_TOP",
                     os.path.dirname(os.path.dirname(os.path.dirname(
                         os.path.abspath(__file__)))))
BIN = os.environ.get("ODDSKY_BIN", os.path.join(TOP, "build", "oddsky"))
DEMO = os.path.join(TOP, "config", "demo.json")
RESULT_AVSC = os.path.join(TOP, "config", "schemas", "oddsky-result.avsc")
WARM = ["--set", "model.warmup_vectors=400"]

# sysexits.h (BSD / glibc): EX_USAGE 64, EX_DATAERR 65, EX_NOINPUT 66,
# EX_CANTCREAT 73, EX_CONFIG 78.
EX_USAGE, EX_DATAERR, EX_NOINPUT, EX_CANTCREAT, EX_CONFIG = 64, 65, 66, 73, 78


def run(*args, check=True):
    p = subprocess.run([BIN, *args], capture_output=True, text=True)
    if check and p.returncode != 0:
        raise AssertionError(f"{args}: exit {p.returncode}\n{p.stderr}")
    return p


def lines(path):
    with open(path) as f:
        return [json.loads(l) for l in f]


def sha(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


@pytest.fixture(scope="module")
def night(tmp_path_factory):
    d = tmp_path_factory.mktemp("replay")
    for fmt, name in (("avro-container", "n.avro"), ("json", "n.jsonl")):
        run("simulate", "--seed", "5", "--count", "3000", "--format", fmt,
            "--output", str(d / name))
    return d


def test_help_and_usage_errors(tmp_path):
    p = run("replay", "--help")
    assert "--input" in p.stdout and "--vectors-out" in p.stdout
    assert run("replay", "--bogus", check=False).returncode == EX_USAGE
    assert run("replay", "--input", "x", check=False).returncode == EX_USAGE
    assert run("replay", "--output", "y", check=False).returncode == EX_USAGE
    out = str(tmp_path / "o.jsonl")
    p = run("replay", "--input", str(tmp_path / "absent"), "--output", out,
            check=False)
    assert p.returncode == EX_NOINPUT
    src = tmp_path / "v.jsonl"
    src.write_text('{"id": 1, "time": 1, "x": [1, 2]}\n')
    p = run("replay", "--input", str(src), "--output",
            str(tmp_path / "no" / "such" / "dir.jsonl"), check=False)
    assert p.returncode == EX_CANTCREAT
    p = run("replay", "--input", str(src), "--output", out, "--set",
            "model.k=0", check=False)
    assert p.returncode == EX_CONFIG


def test_twice_byte_identical_and_schema_valid(night):
    import fastavro
    from fastavro.validation import validate
    outs = []
    for i in range(2):
        out = night / f"r{i}.jsonl"
        run("replay", "--config", DEMO, "--input", str(night / "n.avro"),
            "--output", str(out), "--label-field", "truth", "--quiet", *WARM)
        outs.append(out)
    # source: hashlib.sha256 over both files
    assert sha(outs[0]) == sha(outs[1])
    recs = lines(outs[0])
    assert len(recs) == 3000
    assert sum(r["warm"] for r in recs) > 2000
    with open(RESULT_AVSC) as f:
        schema = fastavro.parse_schema(json.load(f))
    doubles = {"event_time", "distance", "cluster_weight", "novelty",
               "space_novelty", "tail_prob"}
    for r in recs:
        for k in doubles:
            if isinstance(r[k], int):
                r[k] = float(r[k])
        for d in r["drivers"]:
            if isinstance(d["z"], int):
                d["z"] = float(d["z"])
        # source: fastavro.validation.validate against the result schema
        assert validate(r, schema, raise_errors=True)
    # source: the simulator's packets carry truth (sim.h); labels are names
    assert {r["label"] for r in recs} <= {
        "sn_thermo", "sn_cc", "periodic", "nuclear_drw", "flare", "moving",
        "artefact", "rare_fast_blue", "rare_fast_red", "rare_slow_riser"}


def test_container_equals_json_lines(night):
    a, b = night / "ca.jsonl", night / "cb.jsonl"
    run("replay", "--config", DEMO, "--input", str(night / "n.avro"),
        "--output", str(a), "--label-field", "truth", "--quiet", *WARM)
    run("replay", "--config", DEMO, "--input", str(night / "n.jsonl"),
        "--output", str(b), "--label-field", "truth", "--quiet", *WARM)
    ra, rb = lines(a), lines(b)
    assert len(ra) == len(rb) == 3000
    for i, (x, y) in enumerate(zip(ra, rb)):
        assert x["input"] == {"topic": str(night / "n.avro"), "partition": 0,
                              "offset": i}
        assert y["input"]["offset"] == i
        x.pop("input"), y.pop("input")
        assert x == y, i


def test_refused_packets_are_lines_with_reasons(night, tmp_path):
    with open(night / "n.jsonl") as f:
        good = [next(f) for _ in range(5)]
    src = tmp_path / "mixed.jsonl"
    # Reasons as packet.h names them: '{' that does not parse -> bad_json;
    # an object without the feature map's id -> missing_id; neither JSON
    # nor Avro framing (no writer schema configured) -> unknown_framing.
    src.write_text(good[0] + "{not json\n" + good[1] + '{"obs": {"mjd": 1}}\n'
                   + "\n" + "plain text\n" + good[2])
    out = tmp_path / "o.jsonl"
    p = run("replay", "--config", DEMO, "--input", str(src), "--output",
            str(out))
    recs = lines(out)
    assert len(recs) == 6  # the blank line is skipped, nothing else is
    refused = [(r["refused"], r["line"]) for r in recs if "refused" in r]
    assert refused == [("bad_json", 2), ("missing_id", 4),
                       ("unknown_framing", 6)]
    assert [r["packet_id"] for r in recs if "refused" not in r] == \
        [json.loads(g)["packet_id"].__str__() for g in good[:3]]
    assert "3 refused" in p.stderr and "bad_json 1" in p.stderr


def test_vectors_in_labels_carried(tmp_path):
    rng = np.random.default_rng(3)
    src = tmp_path / "v.jsonl"
    labels = []
    with open(src, "w") as f:
        for i in range(1500):
            c = 4.0 if i % 3 == 0 else -4.0
            x = [float(v) for v in rng.normal(c, 1.0, 4)]
            if i % 7 == 0:
                x[2] = None
            lab = "a" if c > 0 else {"side": "b"}
            labels.append(lab)
            f.write(json.dumps({"id": f"v{i}" if i % 2 else i,
                                "time": 61000 + i / 1000, "x": x,
                                "label": lab}) + "\n")
    out = tmp_path / "o.jsonl"
    run("replay", "--input", str(src), "--output", str(out), "--quiet",
        "--set", "model.warmup_vectors=200", "--set", "model.k=4")
    recs = lines(out)
    assert len(recs) == 1500
    for i, r in enumerate(recs):
        assert r["packet_id"] == (f"v{i}" if i % 2 else str(i))
        want = labels[i] if isinstance(labels[i], str) else \
            json.dumps(labels[i], separators=(",", ":"))
        assert r["label"] == want
        assert r["missing"] == (["f2"] if i % 7 == 0 else [])
        assert r["time_source"] == "packet"
    # a line of another length is an error naming the line
    bad = tmp_path / "bad.jsonl"
    with open(src) as f:
        head = [next(f) for _ in range(3)]
    bad.write_text("".join(head) + '{"id": 9, "time": 1, "x": [1, 2]}\n')
    p = run("replay", "--input", str(bad), "--output", str(out), check=False)
    assert p.returncode == EX_DATAERR
    assert ":4:" in p.stderr


def test_vectors_out_matches_packets_and_scores_the_same(night):
    res, vec = night / "p.jsonl", night / "pv.jsonl"
    run("replay", "--config", DEMO, "--input", str(night / "n.jsonl"),
        "--output", str(res), "--vectors-out", str(vec), "--label-field",
        "truth", "--quiet", *WARM)
    vecs = lines(vec)
    pk = lines(night / "n.jsonl")
    assert len(vecs) == len(pk) == 3000
    with open(os.path.join(TOP, "config", "demo-featmap.json")) as f:
        names = [ft["name"] for ft in json.load(f)["features"]]
    j_mag, j_q = names.index("mag"), names.index("quality")
    for v, p in zip(vecs, pk):
        assert v["id"] == str(p["packet_id"]) and v["label"] == p["truth"]
        assert v["time"] == p["obs"]["mjd"]
        assert v["x"][j_mag] == p["obs"]["mag"]
        # source: the mag error travels as the feature's error (featmap.h)
        assert v["err"][j_mag] == p["obs"]["mag_err"]
        assert v["x"][j_q] == p["obs"]["quality"]
    # Fed back as vector lines, the same features give the same scores.
    again = night / "again.jsonl"
    run("replay", "--config", DEMO, "--input", str(vec), "--output",
        str(again), "--quiet", *WARM)
    keys = ("cluster", "distance", "novelty", "space_novelty", "tail_prob",
            "flag", "drivers", "missing", "warm", "model_seq", "label",
            "event_time", "packet_id")
    for x, y in zip(lines(res), lines(again)):
        assert {k: x.get(k) for k in keys} == {k: y.get(k) for k in keys}
