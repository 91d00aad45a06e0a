"""daemon/encode against fastavro and Python's json module.

encode.o (built by make into $BUILD/daemon) depends only on libc/libm, so
the test links it into a small shared object and calls it with ctypes.
Checks:
- Avro: fastavro.schemaless_reader decodes our bytes with
  config/schemas/oddsky-result.avsc to the record we meant, and
  fastavro.schemaless_writer produces byte-identical output (source:
  fastavro, Avro specification binary encoding).
- JSON: json.loads parses our text (source: Python json, RFC 8259) to the
  same record; every double reads back to the same bits.
"""
import ctypes
import io
import json
import math
import os
import subprocess

import fastavro
import numpy as np
import pytest

TOP = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))
SCHEMA = os.path.join(TOP, "config", "schemas", "oddsky-result.avsc")
MODEL_DRIVERS = 3


class Driver(ctypes.Structure):
    _fields_ = [("feature", ctypes.c_int32), ("z", ctypes.c_double)]


class ModelResult(ctypes.Structure):
    # mirrors core/model.h model_result
    _fields_ = [
        ("warm", ctypes.c_int),
        ("cluster", ctypes.c_int32),
        ("distance", ctypes.c_double),
        ("cluster_weight", ctypes.c_double),
        ("novelty", ctypes.c_double),
        ("density_novelty", ctypes.c_double),
        ("space_novelty", ctypes.c_double),
        ("tail_prob", ctypes.c_double),
        ("threshold", ctypes.c_double),
        ("flag", ctypes.c_int),
        ("n_drivers", ctypes.c_uint32),
        ("drivers", Driver * MODEL_DRIVERS),
        ("n_missing", ctypes.c_uint32),
        ("seq", ctypes.c_uint64),
    ]


class EncodeRecord(ctypes.Structure):
    # mirrors daemon/encode.h encode_record
    _fields_ = [
        ("packet_id", ctypes.c_char_p),
        ("source_id", ctypes.c_char_p),
        ("event_time_days", ctypes.c_double),
        ("time_from_packet", ctypes.c_int),
        ("res", ctypes.POINTER(ModelResult)),
        ("feature_names", ctypes.POINTER(ctypes.c_char_p)),
        ("dim", ctypes.c_uint32),
        ("missing", ctypes.POINTER(ctypes.c_uint8)),
        ("topic", ctypes.c_char_p),
        ("partition", ctypes.c_int32),
        ("offset", ctypes.c_int64),
        ("label", ctypes.c_char_p),
    ]


@pytest.fixture(scope="module")
def enc(tmp_path_factory):
    build = os.environ.get("ODDSKY_CORE_LIB", os.path.join(TOP, "build", "libodcore.so"))
    obj = os.path.join(os.path.dirname(build), "daemon", "encode.o")
    if not os.path.exists(obj):
        pytest.fail(f"{obj} is missing: run make first")
    so = str(tmp_path_factory.mktemp("enc") / "libencode.so")
    subprocess.check_call(["cc", "-shared", "-o", so, obj, "-lm"])
    lib = ctypes.CDLL(so)
    for fn in (lib.encode_json, lib.encode_avro):
        fn.restype = ctypes.c_int
        fn.argtypes = [ctypes.POINTER(EncodeRecord), ctypes.c_void_p,
                       ctypes.c_size_t, ctypes.POINTER(ctypes.c_size_t)]
    return lib


@pytest.fixture(scope="module")
def schema():
    with open(SCHEMA) as f:
        return fastavro.parse_schema(json.load(f))


NAMES = ["mag", "r_amp", "g-r", "naïve_ω", "q\"uote", "back\\slash"]


def finite_or_none(x):
    return x if math.isfinite(x) else None


def make_case(rng, i):
    dim = len(NAMES)
    res = ModelResult()
    res.warm = int(i % 3 != 0)
    res.cluster = int(rng.integers(0, 32)) if res.warm else -1
    vals = [rng.normal() * 10.0 ** int(rng.integers(-8, 8)) for _ in range(6)]
    if i % 4 == 1:
        vals[0] = float("nan")
        vals[3] = float("inf")
    res.distance, res.cluster_weight, res.novelty, res.space_novelty, res.tail_prob = (
        vals[0], vals[1], vals[2], vals[3], abs(vals[4]))
    res.flag = int(i % 2)
    res.n_drivers = i % (MODEL_DRIVERS + 1)
    for k in range(res.n_drivers):
        res.drivers[k].feature = int(rng.integers(0, dim))
        res.drivers[k].z = float("-inf") if (i == 5 and k == 0) else rng.normal() * 3
    res.seq = int(rng.integers(0, 2**40))
    missing = (ctypes.c_uint8 * dim)(*[int(rng.random() < 0.3) for _ in range(dim)])
    names = (ctypes.c_char_p * dim)(*[n.encode() for n in NAMES])
    pid = f"pkt-{i}\t\"é\"\n\x01".encode()
    rec = EncodeRecord(
        packet_id=pid, source_id=f"src/{i}".encode(),
        event_time_days=60000.0 + rng.random() * 100, time_from_packet=i % 2,
        res=ctypes.pointer(res), feature_names=names, dim=dim, missing=missing,
        topic=b"alerts-in", partition=int(i % 7), offset=int(rng.integers(0, 2**50)),
        label=(f"label{i}".encode() if i % 3 == 2 else None))
    expected = {
        "packet_id": pid.decode(),
        "source_id": f"src/{i}",
        "event_time": rec.event_time_days,
        "time_source": "packet" if i % 2 else "kafka",
        "cluster": res.cluster if res.cluster >= 0 else None,
        "distance": finite_or_none(res.distance),
        "cluster_weight": finite_or_none(res.cluster_weight),
        "novelty": finite_or_none(res.novelty),
        "space_novelty": finite_or_none(res.space_novelty),
        "tail_prob": finite_or_none(res.tail_prob),
        "flag": bool(res.flag),
        "drivers": [{"feature": NAMES[res.drivers[k].feature],
                     "z": finite_or_none(res.drivers[k].z)} for k in range(res.n_drivers)],
        "missing": [NAMES[j] for j in range(dim) if missing[j]],
        "warm": bool(res.warm),
        "model_seq": res.seq,
        "input": {"topic": "alerts-in", "partition": i % 7, "offset": rec.offset},
        "label": f"label{i}" if i % 3 == 2 else None,
    }
    # keep the ctypes objects alive with the record
    return rec, expected, (res, missing, names)


def call(fn, rec, cap=4096):
    buf = ctypes.create_string_buffer(cap)
    n = ctypes.c_size_t(0)
    rc = fn(ctypes.byref(rec), buf, cap, ctypes.byref(n))
    return rc, buf.raw[: n.value] if rc == 0 else None, n.value


def test_avro_matches_fastavro(enc, schema):
    rng = np.random.default_rng(3)
    for i in range(40):
        rec, expected, _keep = make_case(rng, i)
        rc, data, _ = call(enc.encode_avro, rec)
        assert rc == 0
        # source: fastavro.schemaless_reader
        got = fastavro.schemaless_reader(io.BytesIO(data), schema)
        assert got == expected, i
        # source: fastavro.schemaless_writer (Avro binary encoding)
        ref = io.BytesIO()
        fastavro.schemaless_writer(ref, schema, expected)
        assert data == ref.getvalue(), i


def test_json_parses_to_the_same_record(enc):
    rng = np.random.default_rng(4)
    for i in range(40):
        rec, expected, _keep = make_case(rng, i)
        rc, data, _ = call(enc.encode_json, rec)
        assert rc == 0
        # source: Python json (RFC 8259)
        got = json.loads(data.decode("utf-8"))
        if expected["label"] is None:
            assert "label" not in got
            expected = {k: v for k, v in expected.items() if k != "label"}
        assert got == expected, (i, data)
        assert list(got) == list(expected), "keys in schema order"
        rc2, data2, _ = call(enc.encode_json, rec)
        assert data2 == data, "deterministic bytes"


def test_json_doubles_round_trip_exactly(enc):
    # common practice: 17 significant digits always round-trip IEEE doubles
    rng = np.random.default_rng(9)
    for i in range(200):
        rec, _exp, keep = make_case(rng, 4 * i)  # case 0 mod 4: all finite
        x = float(rng.normal() * 10.0 ** int(rng.integers(-300, 300)))
        keep[0].novelty = x
        rc, data, _ = call(enc.encode_json, rec)
        assert json.loads(data)["novelty"] == x


def test_short_buffer_reports_size(enc):
    rng = np.random.default_rng(1)
    rec, _exp, _keep = make_case(rng, 2)
    for fn in (enc.encode_json, enc.encode_avro):
        rc, full, _ = call(fn, rec)
        assert rc == 0
        rc, _, need = call(fn, rec, cap=10)
        assert rc == -1 and need == len(full)
