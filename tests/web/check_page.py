#!/usr/bin/env python3
"""Load the live page in headless Chromium and check what it draws.

Usage: check_page.py --url http://127.0.0.1:PORT/ --served DIR --out DIR

The server (tests/web/serve_fake) writes every /status document it serves
into --served as <uptime_s>.json.  The page marks the document it drew
(body[data-uptime]); this script finds that document and checks that the
DOM carries its numbers: cluster bars, the score histogram and its
threshold, the flagged packets and their drivers, the partitions, the phase
and the time series.  The 2-D centroid view is checked against a weighted
PCA computed with numpy (source: numpy.linalg.eigh on the weighted
covariance of the standardised centroids, the method the page documents).
A screenshot is saved to --out/livepage.png.
"""
import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
from html.parser import HTMLParser

import numpy as np

CHROMIUM = os.environ.get("CHROMIUM", "/usr/bin/chromium")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
         "--no-first-run", "--disable-background-networking",
         "--disable-component-update", "--disable-sync",
         "--hide-scrollbars"]
failures = []


def check(cond, what):
    if not cond:
        failures.append(what)
        print("  FAIL", what)
    return cond


def close(a, b, rel=1e-9):
    return abs(a - b) <= rel * max(1.0, abs(a), abs(b))


def chromium(args, budget_ms):
    with tempfile.TemporaryDirectory(prefix="oddsky-web-") as prof:
        cmd = [CHROMIUM] + FLAGS + ["--user-data-dir=" + prof,
                                    "--virtual-time-budget=%d" % budget_ms] + args
        r = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
        if r.returncode != 0:
            print(r.stderr[-2000:], file=sys.stderr)
            raise SystemExit("chromium failed with exit code %d" % r.returncode)
        return r.stdout


class Dom(HTMLParser):
    """Every element with its attributes and the section it sits in."""
    VOID = {"meta", "link", "br", "hr", "img", "input", "source", "wbr"}

    def __init__(self):
        super().__init__()
        self.elems = []
        self.section = None
        self.body = {}
        self.text_of = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section":
            self.section = a.get("id")
        if tag == "body":
            self.body = a
        self.elems.append({"tag": tag, "attrs": a, "section": self.section,
                           "id": a.get("id"), "text": ""})
        self.text_of = self.elems[-1]

    def handle_endtag(self, tag):
        if tag == "section":
            self.section = None

    def handle_data(self, data):
        if self.text_of is not None:
            self.text_of["text"] += data

    def find(self, section=None, tag=None, attr=None, id=None):
        return [e for e in self.elems
                if (section is None or e["section"] == section)
                and (tag is None or e["tag"] == tag)
                and (attr is None or attr in e["attrs"])
                and (id is None or e["id"] == id)]


def reference_pca(X, w):
    """Weighted PCA of the centroids after standardising each feature by
    its weighted spread (numpy.average, numpy.linalg.eigh)."""
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


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--url", required=True)
    ap.add_argument("--served", required=True)
    ap.add_argument("--out", required=True)
    opt = ap.parse_args()
    os.makedirs(opt.out, exist_ok=True)

    # About four polls of 2.5 s of virtual time.
    html = chromium(["--dump-dom", opt.url], 9000)
    with open(os.path.join(opt.out, "livepage-dom.html"), "w") as f:
        f.write(html)
    dom = Dom()
    dom.feed(html)

    uptime = dom.body.get("data-uptime", "")
    updates = int(dom.body.get("data-updates", "0") or 0)
    print("page drew %d documents, the last at uptime %s" % (updates, uptime))
    check(updates >= 2, "page polled /status at least twice (got %d)" % updates)
    if not check(uptime != "", "body[data-uptime] is set"):
        return
    path = os.path.join(opt.served, "%.1f.json" % float(uptime))
    if not check(os.path.exists(path), "served document %s exists" % path):
        return
    with open(path) as f:
        doc = json.load(f)
    model = doc["model"]

    phase = dom.find(id="phase")
    check(phase and phase[0]["attrs"].get("data-phase") == doc["phase"],
          "phase shown is %s" % doc["phase"])

    # Cluster bars: one per cluster, the served weights.
    bars = dom.find(section="clusters", tag="rect", attr="data-weight")
    served_w = {i: c["weight"] for i, c in enumerate(model["clusters"])}
    shown_w = {int(b["attrs"]["data-index"]): float(b["attrs"]["data-weight"]) for b in bars}
    check(len(bars) == len(served_w), "%d cluster bars (got %d)" % (len(served_w), len(bars)))
    check(set(shown_w) == set(served_w), "cluster bar indices match")
    for i, w in served_w.items():
        check(i in shown_w and close(shown_w[i], w), "cluster %d weight %r" % (i, w))
    # Heights rank like the weights (tallest = heaviest).
    heights = {int(b["attrs"]["data-index"]): float(b["attrs"]["height"]) for b in bars}
    heavy = max(served_w, key=served_w.get)
    check(max(heights, key=heights.get) == heavy, "tallest bar is cluster %d" % heavy)

    # Score histogram: every bin, its edges, and the threshold line.
    hist = model["score_histogram"]
    rects = dom.find(section="histogram", tag="rect", attr="data-mass")
    check(len(rects) == len(hist["mass"]), "%d histogram bins (got %d)" % (len(hist["mass"]), len(rects)))
    for i, (r, m) in enumerate(zip(rects, hist["mass"])):
        a = r["attrs"]
        check(close(float(a["data-mass"]), m) and close(float(a["data-lo"]), hist["edges"][i])
              and close(float(a["data-hi"]), hist["edges"][i + 1]), "histogram bin %d" % i)
    thr = dom.find(section="histogram", attr="data-threshold")
    check(len(thr) == 1 and close(float(thr[0]["attrs"]["data-threshold"]), model["threshold"]),
          "threshold line at %r" % model["threshold"])
    # The threshold line sits between the bins around it.
    if thr and rects:
        x = float(thr[0]["attrs"]["x1"])
        left = [float(r["attrs"]["x"]) for r in rects if float(r["attrs"]["data-hi"]) <= model["threshold"]]
        right = [float(r["attrs"]["x"]) for r in rects if float(r["attrs"]["data-lo"]) >= model["threshold"]]
        check(not left or max(left) < x, "threshold line right of the bins below it")
        check(not right or min(right) >= x - 1.0, "threshold line left of the bins above it")

    # Centroid view against numpy's weighted PCA (sign of each axis free).
    pts = dom.find(section="pca", tag="circle", attr="data-pc1")
    X = [c["centroid"] for c in model["clusters"]]
    w = [c["weight"] for c in model["clusters"]]
    pc1, pc2, vals = reference_pca(X, w)
    print("reference eigenvalues", np.round(vals, 4))
    check(len(pts) == len(X), "%d centroid points (got %d)" % (len(X), len(pts)))
    shown = {int(p["attrs"]["data-index"]): (float(p["attrs"]["data-pc1"]), float(p["attrs"]["data-pc2"]))
             for p in pts}
    for comp, ref in ((0, pc1), (1, pc2)):
        got = np.array([shown.get(i, (math.nan, math.nan))[comp] for i in range(len(X))])
        sign = 1.0 if np.dot(got, ref) >= 0 else -1.0
        err = np.max(np.abs(sign * got - ref))
        check(err < 1e-6 * max(1.0, np.max(np.abs(ref))),
              "PC%d coordinates match numpy (max error %.3g)" % (comp + 1, err))

    # Flagged packets, in order, with their drivers.
    rows = dom.find(section="flags", tag="tr", attr="data-packet-id")
    ids = [r["attrs"]["data-packet-id"] for r in rows]
    check(ids == [str(f["packet_id"]) for f in doc["recent_flags"]], "flagged packet ids %s" % ids)
    chips = dom.find(section="flags", tag="span", attr="data-z")
    want = [(d["feature"], d["z"]) for f in doc["recent_flags"] for d in f["drivers"]]
    got = [(c["attrs"]["data-feature"], float(c["attrs"]["data-z"])) for c in chips]
    check(len(got) == len(want) and all(a[0] == b[0] and close(a[1], b[1]) for a, b in zip(got, want)),
          "driver chips match (%d)" % len(want))

    # Partitions and the lag series.
    prow = dom.find(section="partitions", tag="tr", attr="data-lag")
    check([int(r["attrs"]["data-lag"]) for r in prow] == [p["lag"] for p in doc["partitions"]],
          "partition lags")
    lag_line = dom.find(section="ts-lag", tag="polyline")
    total_lag = sum(p["lag"] for p in doc["partitions"])
    check(lag_line and close(float(lag_line[0]["attrs"]["data-last"]), total_lag),
          "lag series ends at %d" % total_lag)
    tput = dom.find(section="ts-throughput", tag="polyline")
    check(tput and close(float(tput[0]["attrs"]["data-last"]), doc["rates_per_s"]["packets_1m"])
          and int(tput[0]["attrs"]["data-count"]) == updates,
          "throughput series: %d points ending at the served 1 min rate" % updates)
    tile = [e for e in dom.find(attr="data-tile") if e["attrs"]["data-tile"] == "packets_1m"]
    check(tile and close(float(tile[0]["attrs"]["data-value"]), doc["rates_per_s"]["packets_1m"]),
          "packets/s tile")

    # The screenshot, for a person to look at.
    shot = os.path.abspath(os.path.join(opt.out, "livepage.png"))
    chromium(["--window-size=1440,1100", "--screenshot=" + shot, opt.url], 9000)
    with open(shot, "rb") as f:
        head = f.read(24)
    check(head[:8] == b"\x89PNG\r\n\x1a\n", "screenshot is a PNG")
    width, height = int.from_bytes(head[16:20], "big"), int.from_bytes(head[20:24], "big")
    check((width, height) == (1440, 1100), "screenshot is 1440x1100 (got %dx%d)" % (width, height))
    print("screenshot:", shot)


if __name__ == "__main__":
    main()
    if failures:
        print("%d check(s) failed" % len(failures))
        sys.exit(1)
    print("all page checks passed")
