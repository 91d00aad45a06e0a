"""The status endpoint of a running daemon: `oddsky demo` (embedded
in-memory Kafka, simulated packets, the daemon, the status page).

Two demos run side by side, fed 12000 packets each and then left with a
static model (feeding stopped, so event time stops moving):
  plain  - no status.token: read routes, /metrics, the live page, and the
           refusal of POST /checkpoint while no token is configured;
  token  - status.token set: 401 / 403 / 200 on POST /checkpoint and the
           checkpoint it writes.
Each check names its source beside it.  The live page is loaded in
headless Chromium and its DOM compared with /status fetched right after;
the screenshot is kept as $BUILD/web/livepage-daemon.png.

Run: BUILD=build/x build/venv/bin/python3 -m pytest tests/web/test_daemon_status.py
"""
import datetime
import json
import math
import os
import subprocess
import time

import numpy as np
import pytest

import daemon_page as dp

COUNT = 12000
TOKEN = "oddsky-web-test-token-0123456789"  # 32 characters
assert len(TOKEN) == 32
DEMO_ARGS = ["--rate", "3000", "--count", str(COUNT), "--seed", "3",
             "--set", "model.warmup_vectors=1024"]
OUT = os.path.join(dp.BUILD, "web")


def close(a, b, rel):
    return abs(a - b) <= rel * max(1.0, abs(a), abs(b))


def get_status(demo):
    r = demo.http("GET", "/status")
    assert r.status == 200, r.body
    return json.loads(r.body)


def wait_all_results(demo, limit_s=40.0):
    """Poll /status until counts.results reaches COUNT (a hang guard, not
    a timing check: the failure message gives the count reached)."""
    end = time.monotonic() + limit_s
    doc = None
    while time.monotonic() < end:
        doc = get_status(demo)
        if doc["counts"]["results"] >= COUNT:
            return doc
        time.sleep(0.2)
    raise AssertionError("counts.results reached %s of %d" % (doc and doc["counts"]["results"], COUNT))


@pytest.fixture(scope="module")
def demos():
    os.makedirs(OUT, exist_ok=True)
    assert os.access(dp.ODDSKY, os.X_OK), "build %s first" % dp.ODDSKY
    # --port 0 serves nothing at present (see test_demo_port_0_picks_a_free_port):
    # take a port that is free now and pass it.
    started = {
        "plain": dp.Demo(["--port", str(dp.free_port())] + DEMO_ARGS),
        "token": dp.Demo(["--port", str(dp.free_port())] + DEMO_ARGS +
                         ["--set", "status.token=" + TOKEN]),
    }
    try:
        for d in started.values():
            d.wait_banner()
        for d in started.values():
            wait_all_results(d)
        # One more tick of the metrics clock (1 s rows) so the 60 s latency
        # window holds every observation.
        time.sleep(1.2)
        yield started
    finally:
        for name, d in started.items():
            d.kill()
            with open(os.path.join(OUT, "demo-%s.stderr" % name), "w") as f:
                f.write(d.stderr_text())
            d.remove_state()


@pytest.fixture(scope="module")
def plain(demos):
    return demos["plain"]


@pytest.fixture(scope="module")
def status(plain):
    return get_status(plain)


# ---- `oddsky demo --port 0` ----------------------------------------------

def test_demo_port_0_picks_a_free_port():
    # source: `oddsky demo --help`: "--port N  status page port (0 = any free
    # port)"; the banner must name the port that is served.
    d = dp.Demo(["--port", "0", "--rate", "100", "--count", "100"])
    try:
        port = d.wait_banner()
        assert port != 0, "banner says http://127.0.0.1:0/ (no listener is opened)"
        assert d.http("GET", "/healthz").status == 200
    finally:
        d.sigint(15)
        d.kill()
        d.remove_state()


# ---- GET /healthz, GET /status ---------------------------------------------

def test_healthz(plain):
    r = plain.http("GET", "/healthz")
    # source: README "Status endpoint": "GET /healthz: 200 ok"; RFC 9110
    # §15.3.1 (200 OK).
    assert r.status == 200
    assert r.text().strip() == "ok"
    # source: RFC 9110 §9.3.2: HEAD answers the GET's header fields without
    # content; §8.6 Content-Length is the GET body's length.
    h = plain.http("HEAD", "/healthz")
    assert h.status == 200 and h.body == b""
    assert int(h.headers["content-length"]) == len(r.body)


def test_status_media_type(plain):
    r = plain.http("GET", "/status")
    # source: RFC 8259 §11 (application/json), RFC 9110 §8.3 (Content-Type).
    assert r.headers["content-type"].split(";")[0].strip() == "application/json"
    json.loads(r.body)  # source: RFC 8259: the body is one JSON text


def test_status_has_every_documented_field(status):
    # source: README "Status endpoint", the field table.
    for k in ("version", "uptime_s", "phase", "partitions", "rates_per_s", "latency_ms",
              "counts", "model", "recent_flags", "last_checkpoint", "config"):
        assert k in status, k
    for p in status["partitions"]:
        for k in ("topic", "partition", "stored", "committed", "high_watermark", "lag", "in_flight"):
            assert k in p, k
    for k in ("packets_1m", "packets_5m", "results_1m", "results_5m", "flags_1m", "flags_5m",
              "dead_letters_1m", "dead_letters_5m"):
        assert k in status["rates_per_s"], k
    for k in ("p50", "p99", "max", "window_s"):
        assert k in status["latency_ms"], k
    assert status["latency_ms"]["window_s"] == 60  # README: "over window_s (60)"
    for k in ("packets", "results", "flags", "learned", "rescored", "dead_letters", "errors",
              "input"):
        assert k in status["counts"], k
    assert isinstance(status["counts"]["dead_letters"], dict)
    assert isinstance(status["counts"]["errors"], dict)
    for k in ("offsets_skipped", "skips", "window_full", "untracked"):
        assert k in status["counts"]["input"], k
    for k in ("k", "dim", "warm", "learned", "scored", "flagged", "event_time", "bytes",
              "features", "clusters", "sketch_fill", "threshold", "tail_prob_at_threshold",
              "expected_flags_per_night", "score_histogram", "suggested_k"):
        assert k in status["model"], k
    for c in status["model"]["clusters"]:
        for k in ("weight", "centroid", "spread"):
            assert k in c, k
    for f in status["recent_flags"]:
        for k in ("packet_id", "source_id", "novelty", "tail_prob", "event_time", "drivers"):
            assert k in f, k
    # source: README: last_checkpoint is {time, path, bytes, ok} or null.
    ck = status["last_checkpoint"]
    assert ck is None or {"time", "path", "bytes", "ok"} <= set(ck)
    assert isinstance(status["config"], dict)


def test_status_phase_and_model(status):
    m = status["model"]
    # source: README: phase "scoring" once the model is warm (fed 12000 >
    # model.warmup_vectors=1024 vectors, nothing draining or paused).
    assert status["phase"] == "scoring"
    assert m["warm"] is True
    # source: README: k clusters, each with centroid[] and spread[] over the
    # dim features[].
    assert m["k"] == len(m["clusters"]) and m["k"] > 0
    assert m["dim"] == len(m["features"]) and m["dim"] > 0
    assert len(set(m["features"])) == len(m["features"])
    for c in m["clusters"]:
        assert len(c["centroid"]) == m["dim"] and len(c["spread"]) == m["dim"]
        assert all(isinstance(v, (int, float)) and math.isfinite(v) for v in c["centroid"])
        assert all(isinstance(v, (int, float)) and v >= 0 for v in c["spread"])
        assert math.isfinite(c["weight"]) and c["weight"] >= 0
    # source: README: learned / scored / flagged count vectors since start.
    assert m["learned"] == COUNT
    assert m["scored"] == COUNT
    assert math.isfinite(m["threshold"])
    # source: README: sketch_fill and tail_prob_at_threshold are fractions.
    assert 0.0 <= m["sketch_fill"] <= 1.0
    assert 0.0 <= m["tail_prob_at_threshold"] <= 1.0


def test_status_counts(status):
    c = status["counts"]
    # source: README counts: every packet read ends as a result or a dead
    # letter; the demo fed COUNT (`oddsky demo --count`).
    assert c["packets"] == COUNT
    assert c["packets"] == c["results"] + sum(c["dead_letters"].values())
    assert c["learned"] == COUNT
    assert c["rescored"] == 0  # README: only after a restart
    assert status["model"]["learned"] == COUNT
    assert c["flags"] == status["model"]["flagged"]
    assert all(v == 0 for v in c["errors"].values()), c["errors"]
    # Every offset the feeder produced was received: none skipped (the
    # in-memory bus deletes input a lagging consumer has not read).
    assert c["input"]["offsets_skipped"] == 0, c["input"]
    assert c["input"]["skips"] == 0, c["input"]


def test_status_partitions(status):
    parts = status["partitions"]
    # source: the demo's input topic has 4 partitions (`oddsky demo`: topics
    # created with 4 partitions); all read, so lag 0.
    assert len(parts) == 4
    assert sorted(p["partition"] for p in parts) == [0, 1, 2, 3]
    assert len({p["topic"] for p in parts}) == 1
    for p in parts:
        # source: Kafka consumer lag = high watermark - committed offset
        # ("next offset to read", README).
        assert p["lag"] == 0
        assert p["committed"] == p["high_watermark"]
        assert p["in_flight"] == 0
    # source: Kafka: offsets of a new topic start at 0, so the high
    # watermarks add up to the messages produced (COUNT).
    assert sum(p["high_watermark"] for p in parts) == COUNT


def test_status_latency(status, plain):
    lat = status["latency_ms"]
    # source: README latency_ms: p50, p99, max over the last 60 s; the whole
    # run fits in the window.
    assert status["uptime_s"] < 55
    for k in ("p50", "p99", "max"):
        assert isinstance(lat[k], (int, float)) and math.isfinite(lat[k]) and lat[k] > 0, (k, lat)
    assert lat["p50"] <= lat["p99"]
    # source: README: p50/p99 are interpolated inside histogram buckets, as
    # Prometheus' histogram_quantile does, and never shown above the
    # largest latency seen; reference: Prometheus histogram_quantile() on
    # the /metrics buckets (all observations are inside the 60 s window),
    # capped at max.
    samples = dp.parse_metrics(plain.http("GET", "/metrics").text())
    buckets = [(float(lab["le"]) if lab["le"] != "+Inf" else math.inf, v)
               for n, lab, v in samples if n == "oddsky_latency_seconds_bucket"]
    assert buckets
    for q, k in ((0.5, "p50"), (0.99, "p99")):
        ref = min(1e3 * dp.histogram_quantile(q, buckets), lat["max"])
        assert close(lat[k], ref, 1e-9), (k, lat[k], ref)
    assert lat["p99"] <= lat["max"]


def test_status_recent_flags(status):
    m = status["model"]
    flags = status["recent_flags"]
    # source: README: recent_flags are flagged packets; the demo feeds rare
    # populations (--rare-rate 0.002 by default), so 12000 packets flag some.
    assert status["counts"]["flags"] > 0 and flags
    assert len(flags) <= status["counts"]["flags"]
    for f in flags:
        assert f["packet_id"] and f["source_id"]
        assert f["drivers"], f
        # source: README: drivers name features of the model.
        for d in f["drivers"]:
            assert d["feature"] in m["features"], d
            assert math.isfinite(d["z"])
        # source: probability axioms: a tail probability lies in [0, 1].
        assert 0.0 <= f["tail_prob"] <= 1.0
        assert math.isfinite(f["novelty"]) and math.isfinite(f["event_time"])
    # source: README: newest last; event time does not go back within one
    # partition, and the simulator's event time increases with packets, so
    # check only that every flag lies no later than the model's event time.
    for f in flags:
        assert f["event_time"] <= m["event_time"] + 1e-9


def test_status_score_histogram(status):
    h = status["model"]["score_histogram"]
    # source: README / status-fields.md: edges one longer than mass; mass is
    # the fraction of recent scores per bin, so it sums to 1.
    assert len(h["mass"]) > 0
    assert len(h["edges"]) == len(h["mass"]) + 1
    assert all(b > a for a, b in zip(h["edges"], h["edges"][1:])), "edges increase"
    assert all(m >= 0 for m in h["mass"])
    assert abs(sum(h["mass"]) - 1.0) < 1e-9
    # source: status-fields.md: tail_prob_at_threshold = fraction of recent
    # scores at or above the threshold; from the histogram, it lies between
    # the mass of the bins wholly above it and that of the bins reaching it.
    thr = status["model"]["threshold"]
    whole = sum(m for lo, m in zip(h["edges"], h["mass"]) if lo >= thr)
    reach = sum(m for hi, m in zip(h["edges"][1:], h["mass"]) if hi > thr)
    tp = status["model"]["tail_prob_at_threshold"]
    assert whole - 1e-12 <= tp <= reach + 1e-12, (whole, tp, reach)


def test_status_config_masks_the_token(demos):
    # source: README: config holds "the options in force (secrets masked)".
    r = demos["token"].http("GET", "/status")
    assert r.status == 200
    assert TOKEN.encode() not in r.body
    assert "status" in json.loads(r.body)["config"]


# ---- GET /metrics ------------------------------------------------------------

def test_metrics_promtool(plain):
    r = plain.http("GET", "/metrics")
    assert r.status == 200
    with open(os.path.join(OUT, "metrics-daemon.txt"), "wb") as f:
        f.write(r.body)
    # source: Prometheus exposition format 0.0.4: Content-Type
    # "text/plain; version=0.0.4".
    ct = [p.strip() for p in r.headers["content-type"].split(";")]
    assert ct[0] == "text/plain" and "version=0.0.4" in ct
    # source: promtool check metrics (format and lint).
    p = subprocess.run(["promtool", "check", "metrics"], input=r.body,
                       capture_output=True, timeout=30)
    assert p.returncode == 0, p.stdout.decode() + p.stderr.decode()
    # source: README: "names prefixed oddsky_".
    names = {n for n, _, _ in dp.parse_metrics(r.text())}
    assert names and all(n.startswith("oddsky_") for n in names), names


def test_metrics_match_status(plain):
    samples = dp.parse_metrics(plain.http("GET", "/metrics").text())
    doc = get_status(plain)  # static after feeding stopped

    def one(name):
        v = [x for n, lab, x in samples if n == name and not lab]
        assert len(v) == 1, (name, v)
        return v[0]

    # source: the same totals as /status counts (README), read from the
    # Prometheus text (format 0.0.4: counters, histogram _count).
    assert one("oddsky_packets_total") == doc["counts"]["packets"] == COUNT
    assert one("oddsky_flags_total") == doc["counts"]["flags"]
    assert one("oddsky_latency_seconds_count") == doc["counts"]["results"]
    for k in ("offsets_skipped", "skips", "window_full", "untracked"):
        assert one("oddsky_input_%s_total" % k) == doc["counts"]["input"][k], k
    # source: Prometheus histogram: the +Inf bucket equals _count, buckets
    # are cumulative (non-decreasing in le).
    b = sorted((float(lab["le"]), v) for n, lab, v in samples
               if n == "oddsky_latency_seconds_bucket")
    assert b[-1][0] == math.inf and b[-1][1] == one("oddsky_latency_seconds_count")
    assert all(c1 <= c2 for (_, c1), (_, c2) in zip(b, b[1:]))


# ---- methods, paths, authorisation ---------------------------------------

def test_unknown_path_404(plain):
    # source: RFC 9110 §15.5.5 (404 Not Found).
    assert plain.http("GET", "/nope").status == 404


def test_wrong_method_405_with_allow(plain):
    r = plain.http("DELETE", "/status")
    # source: RFC 9110 §15.5.6: a 405 MUST carry an Allow header field
    # listing the methods the target supports (§10.2.1).
    assert r.status == 405
    allow = {m.strip() for m in r.headers.get("allow", "").split(",") if m.strip()}
    assert "GET" in allow and "DELETE" not in allow, r.headers


def test_checkpoint_refused_without_configured_token(plain):
    before = get_status(plain)["last_checkpoint"]
    r = plain.http("POST", "/checkpoint")
    # source: README / daemon/status.h: state-changing routes are refused
    # with 403 while no token is configured; RFC 9110 §15.5.4 (403).
    assert r.status == 403
    assert "status.token" in r.text()
    # Refused: nothing written (README last_checkpoint unchanged).
    assert get_status(plain)["last_checkpoint"] == before


def test_checkpoint_with_token(demos):
    d = demos["token"]
    before = get_status(d)["last_checkpoint"]
    r = d.http("POST", "/checkpoint")
    # source: RFC 9110 §15.5.2: 401 without credentials, and it MUST carry
    # WWW-Authenticate; RFC 6750 §3: the Bearer scheme.
    assert r.status == 401
    assert r.headers.get("www-authenticate", "").split()[0] == "Bearer", r.headers
    # source: RFC 9110 §15.5.4: credentials given but not sufficient: 403.
    r = d.http("POST", "/checkpoint", {"Authorization": "Bearer " + TOKEN[:-1] + "x"})
    assert r.status == 403
    r = d.http("POST", "/checkpoint", {"Authorization": "Basic " + TOKEN})
    assert r.status in (401, 403)
    assert get_status(d)["last_checkpoint"] == before, "a refused request wrote nothing"
    # source: RFC 6750 §2.1: "Authorization: Bearer <token>".
    r = d.http("POST", "/checkpoint", {"Authorization": "Bearer " + TOKEN})
    assert r.status == 200, r.body
    ck = get_status(d)["last_checkpoint"]
    # source: README last_checkpoint: time, path, bytes, ok.
    assert ck is not None and ck["ok"] is True, ck
    assert "error" not in ck
    # source: README / status-fields.md: time is ISO-8601 UTC.
    t = datetime.datetime.fromisoformat(ck["time"].replace("Z", "+00:00"))
    assert t.utcoffset() == datetime.timedelta(0)
    assert before is None or ck["time"] >= before["time"]
    # source: os.stat: the file named is there with the size reported
    # (README: last_checkpoint "path, bytes").
    assert os.path.isfile(ck["path"])
    assert os.path.getsize(ck["path"]) == ck["bytes"] > 0, \
        "last_checkpoint.bytes %d, file %s is %d bytes" % (ck["bytes"], ck["path"], os.path.getsize(ck["path"]))


# ---- the live page ---------------------------------------------------------

def reference_pca(X, w):
    """Weighted PCA of the centroids after standardising each feature by its
    weighted spread (numpy.average, numpy.linalg.eigh): the method the page
    documents (livepage.html, "PCA of the centroids")."""
    X = np.asarray(X, float)
    w = np.asarray(w, float)
    mean = np.average(X, axis=0, weights=w)
    sd = np.sqrt(np.average((X - mean) ** 2, axis=0, weights=w))
    sd[sd == 0] = 1.0
    Z = (X - mean) / sd
    C = (Z * w[:, None]).T @ Z / w.sum()
    vals, vecs = np.linalg.eigh(C)
    order = np.argsort(vals)[::-1]
    return Z @ vecs[:, order[0]], Z @ vecs[:, order[1]], vals[order]


@pytest.fixture(scope="module")
def page(plain):
    # Three polls of 2.5 s of virtual time (the page polls every 2.5 s).
    html = dp.chromium(["--dump-dom", plain.url("/")], 6000)
    with open(os.path.join(OUT, "livepage-daemon-dom.html"), "w") as f:
        f.write(html)
    doc = get_status(plain)  # fetched right after; the model is static
    return dp.Dom(html), doc


def test_page_drew_status(page):
    dom, doc = page
    # source: livepage.html: body[data-updates] counts drawn documents,
    # body[data-uptime] is the uptime_s of the last one.
    assert int(dom.body.get("data-updates") or 0) >= 2
    assert 0 < float(dom.body["data-uptime"]) <= doc["uptime_s"]
    ph = dom.find(id="phase")
    assert ph and ph[0]["attrs"].get("data-phase") == "scoring"


def test_page_cluster_view(page):
    dom, doc = page
    clusters = doc["model"]["clusters"]
    # source: livepage.html drawClusters: one rect per cluster (top 64),
    # data-index = position in model.clusters, data-weight = String(weight).
    assert len(clusters) <= 64
    bars = dom.find(section="clusters", tag="rect", attr="data-weight")
    assert len(bars) == len(clusters)
    shown = {int(b["attrs"]["data-index"]): float(b["attrs"]["data-weight"]) for b in bars}
    assert set(shown) == set(range(len(clusters)))
    for i, c in enumerate(clusters):
        # source: /status model.clusters[].weight (String() of a double
        # round-trips; rel 1e-6 asked, far looser than needed).
        assert close(shown[i], c["weight"], 1e-6), (i, shown[i], c["weight"])
    heights = {int(b["attrs"]["data-index"]): float(b["attrs"]["height"]) for b in bars}
    heavy = max(range(len(clusters)), key=lambda i: clusters[i]["weight"])
    assert max(heights, key=heights.get) == heavy


def test_page_centroid_view(page):
    dom, doc = page
    clusters = [c for c in doc["model"]["clusters"] if c["weight"] > 0]
    pts = dom.find(section="pca", tag="circle", attr="data-pc1")
    assert len(pts) == len(clusters)
    idx = [i for i, c in enumerate(doc["model"]["clusters"]) if c["weight"] > 0]
    pc1, pc2, _ = reference_pca([c["centroid"] for c in clusters], [c["weight"] for c in clusters])
    shown = {int(p["attrs"]["data-index"]): (float(p["attrs"]["data-pc1"]), float(p["attrs"]["data-pc2"]))
             for p in pts}
    # source: numpy.linalg.eigh on the weighted covariance (sign of each
    # axis free).
    for comp, ref in ((0, pc1), (1, pc2)):
        got = np.array([shown.get(i, (math.nan, math.nan))[comp] for i in idx])
        sign = 1.0 if np.dot(got, ref) >= 0 else -1.0
        err = np.max(np.abs(sign * got - ref))
        assert err < 1e-6 * max(1.0, np.max(np.abs(ref))), ("PC%d" % (comp + 1), err)


def test_page_histogram_view(page):
    dom, doc = page
    m = doc["model"]
    h = m["score_histogram"]
    # source: livepage.html drawHistogram: one rect per bin with data-lo,
    # data-hi, data-mass = String() of the served numbers; /status values.
    rects = dom.find(section="histogram", tag="rect", attr="data-mass")
    assert len(rects) == len(h["mass"])
    for i, r in enumerate(rects):
        a = r["attrs"]
        assert close(float(a["data-mass"]), h["mass"][i], 1e-9), i
        assert close(float(a["data-lo"]), h["edges"][i], 1e-9), i
        assert close(float(a["data-hi"]), h["edges"][i + 1], 1e-9), i
    # source: livepage.html: the threshold marker (#threshold-line) carries
    # data-threshold = String(model.threshold).
    thr = dom.find(section="histogram", attr="data-threshold")
    assert len(thr) == 1 and thr[0]["id"] == "threshold-line"
    assert close(float(thr[0]["attrs"]["data-threshold"]), m["threshold"], 1e-9)
    x = float(thr[0]["attrs"]["x1"])
    left = [float(r["attrs"]["x"]) for r in rects if float(r["attrs"]["data-hi"]) <= m["threshold"]]
    right = [float(r["attrs"]["x"]) for r in rects if float(r["attrs"]["data-lo"]) >= m["threshold"]]
    assert not left or max(left) < x
    assert not right or min(right) >= x - 1.0


def test_page_flags_and_partitions(page):
    dom, doc = page
    # source: /status recent_flags (static: no packets since) and partitions.
    rows = dom.find(section="flags", tag="tr", attr="data-packet-id")
    assert [r["attrs"]["data-packet-id"] for r in rows] == [str(f["packet_id"]) for f in doc["recent_flags"]]
    chips = dom.find(section="flags", tag="span", attr="data-feature")
    assert [c["attrs"]["data-feature"] for c in chips] == \
        [d["feature"] for f in doc["recent_flags"] for d in f["drivers"]]
    lags = [int(r["attrs"]["data-lag"]) for r in dom.find(section="partitions", tag="tr", attr="data-lag")]
    assert lags == [p["lag"] for p in doc["partitions"]]


def test_page_screenshot(plain):
    shot = os.path.abspath(os.path.join(OUT, "livepage-daemon.png"))
    if os.path.exists(shot):
        os.unlink(shot)
    dp.chromium(["--window-size=1440,1100", "--screenshot=" + shot, plain.url("/")], 6000)
    # source: PNG spec (ISO/IEC 15948): signature, then IHDR width/height.
    with open(shot, "rb") as f:
        head = f.read(24)
    assert head[:8] == b"\x89PNG\r\n\x1a\n"
    assert (int.from_bytes(head[16:20], "big"), int.from_bytes(head[20:24], "big")) == (1440, 1100)
    print("screenshot:", shot)


# ---- SIGINT ------------------------------------------------------------------

@pytest.mark.parametrize("name", ["plain", "token"])
def test_sigint_exits_0_within_drain_deadline(demos, name):
    d = demos[name]
    deadline_ms = get_status(d)["config"]["run"]["drain_deadline_ms"]
    # source: config run.drain_deadline_ms (`oddsky check-config
    # --defaults`) and README "Operations": a stop signal drains within the
    # deadline, checkpoints and exits 0 (sysexits EX_OK).
    rc, took = d.sigint(deadline_ms / 1000.0)
    assert rc == 0, "exit code %r after %.1f s\n%s" % (rc, took, d.stderr_text()[-2000:])
