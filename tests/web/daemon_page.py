"""Helpers for the web test against a running `oddsky demo`.

Demo: starts `$BUILD/oddsky demo ...`, reads its stderr on a thread, waits
for the banner line "status page   http://127.0.0.1:PORT/", and stops it
with SIGINT.  The state directory the demo prints at exit is removed.
http(): one request on a fresh loopback connection (http.client), so any
method and header can be sent.  chromium(): headless Chromium with the
flags tests/web/check_page.py uses and a fresh profile.  Dom: every element
of a dumped DOM with its attributes and the <section> it sits in.
parse_metrics(): the Prometheus text format 0.0.4 samples (name, labels,
value), written from the format's description, not from our renderer.
"""
import http.client
import math
import os
import re
import signal
import socket
import subprocess
import tempfile
import threading
import time
from html.parser import HTMLParser

TOP = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
BUILD = os.path.join(TOP, os.environ.get("BUILD", "build"))
ODDSKY = os.path.join(BUILD, "oddsky")
CHROMIUM = os.environ.get("CHROMIUM", "/usr/bin/chromium")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
         "--no-first-run", "--disable-background-networking",
         "--disable-component-update", "--disable-sync",
         "--hide-scrollbars"]

BANNER = re.compile(r"status page\s+http://127\.0\.0\.1:(\d+)/")
LEFT_IN = re.compile(r"checkpoint left in (\S+)")


def free_port():
    """A loopback port that was free a moment ago (bound to 0, closed)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Demo:
    def __init__(self, args):
        self.cmd = [ODDSKY, "demo"] + list(args)
        self.proc = subprocess.Popen(self.cmd, stdin=subprocess.DEVNULL,
                                     stdout=subprocess.DEVNULL,
                                     stderr=subprocess.PIPE, text=True)
        self.lines = []
        self.cond = threading.Condition()
        self.reader = threading.Thread(target=self._read, daemon=True)
        self.reader.start()
        self.port = None
        self.state_dir = None

    def _read(self):
        for line in self.proc.stderr:
            with self.cond:
                self.lines.append(line)
                self.cond.notify_all()
        with self.cond:
            self.lines.append(None)  # end of stream
            self.cond.notify_all()

    def stderr_text(self):
        with self.cond:
            return "".join(l for l in self.lines if l is not None)

    def wait_banner(self, limit_s=30.0):
        """The port printed on the banner; raises if the demo exits first."""
        end = time.monotonic() + limit_s
        with self.cond:
            while True:
                for l in self.lines:
                    m = l and BANNER.search(l)
                    if m:
                        self.port = int(m.group(1))
                        return self.port
                if None in self.lines:
                    raise RuntimeError("demo exited before its banner:\n" + self.stderr_text())
                left = end - time.monotonic()
                if left <= 0:
                    raise RuntimeError("no banner after %.0f s:\n%s" % (limit_s, self.stderr_text()))
                self.cond.wait(left)

    def url(self, path="/"):
        return "http://127.0.0.1:%d%s" % (self.port, path)

    def http(self, method, path, headers=None, body=None):
        return http_request(self.port, method, path, headers, body)

    def sigint(self, limit_s):
        """SIGINT, then wait up to limit_s; returns (exit code or None, s)."""
        t0 = time.monotonic()
        self.proc.send_signal(signal.SIGINT)
        try:
            rc = self.proc.wait(limit_s)
        except subprocess.TimeoutExpired:
            rc = None
        took = time.monotonic() - t0
        self.reader.join(5)
        m = LEFT_IN.search(self.stderr_text())
        if m:
            self.state_dir = m.group(1)
        return rc, took

    def kill(self):
        """Last-resort stop for a demo a test left running."""
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(10)
        self.reader.join(5)
        if self.state_dir is None:
            m = LEFT_IN.search(self.stderr_text())
            self.state_dir = m.group(1) if m else None

    def remove_state(self):
        d = self.state_dir
        if d and d.startswith("/tmp/oddsky-demo-") and os.path.isdir(d):
            for f in os.listdir(d):
                os.unlink(os.path.join(d, f))
            os.rmdir(d)


class Response:
    def __init__(self, status, headers, body):
        self.status = status
        self.headers = headers  # lower-case name -> value
        self.body = body

    def text(self):
        return self.body.decode("utf-8")


def http_request(port, method, path, headers=None, body=None, timeout=10):
    c = http.client.HTTPConnection("127.0.0.1", port, timeout=timeout)
    try:
        c.request(method, path, body=body, headers=headers or {})
        r = c.getresponse()
        data = r.read()
        return Response(r.status, {k.lower(): v for k, v in r.getheaders()}, data)
    finally:
        c.close()


def chromium(args, budget_ms):
    with tempfile.TemporaryDirectory(prefix="oddsky-web-") as prof:
        cmd = [CHROMIUM] + FLAGS + ["--user-data-dir=" + prof,
                                    "--virtual-time-budget=%d" % budget_ms] + args
        r = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
        if r.returncode != 0:
            raise RuntimeError("chromium exit code %d:\n%s" % (r.returncode, r.stderr[-2000:]))
        return r.stdout


class Dom(HTMLParser):
    """Every element with its attributes and the section it sits in."""

    def __init__(self, html):
        super().__init__()
        self.elems = []
        self.section = None
        self.body = {}
        self.feed(html)

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section":
            self.section = a.get("id")
        if tag == "body":
            self.body = a
        self.elems.append({"tag": tag, "attrs": a, "section": self.section, "id": a.get("id")})

    def handle_endtag(self, tag):
        if tag == "section":
            self.section = None

    def find(self, section=None, tag=None, attr=None, id=None):
        return [e for e in self.elems
                if (section is None or e["section"] == section)
                and (tag is None or e["tag"] == tag)
                and (attr is None or attr in e["attrs"])
                and (id is None or e["id"] == id)]


# source: Prometheus "Exposition formats", text format 0.0.4: a sample line
# is  metric_name [ "{" label_name "=" `"` label_value `"` { "," ... } "}" ]
# value [ timestamp ]; label values escape \\, \" and \n; values are Go
# floats (also NaN, +Inf, -Inf).
_SAMPLE = re.compile(r'^([a-zA-Z_:][a-zA-Z0-9_:]*)(\{(.*)\})?\s+(\S+)(\s+-?\d+)?$')
_LABEL = re.compile(r'\s*([a-zA-Z_][a-zA-Z0-9_]*)="((?:[^"\\]|\\.)*)"\s*,?')


def _float(s):
    return {"+Inf": math.inf, "-Inf": -math.inf, "NaN": math.nan}.get(s) or float(s)


def parse_metrics(text):
    """[(name, {label: value}, float)] for every sample line."""
    out = []
    for line in text.splitlines():
        if not line.strip() or line.startswith("#"):
            continue
        m = _SAMPLE.match(line)
        if not m:
            raise ValueError("not a 0.0.4 sample line: %r" % line)
        labels = {}
        if m.group(3):
            pos, body = 0, m.group(3)
            while pos < len(body):
                lm = _LABEL.match(body, pos)
                if not lm:
                    raise ValueError("bad labels in %r" % line)
                v = lm.group(2).replace('\\n', '\n').replace('\\"', '"').replace('\\\\', '\\')
                labels[lm.group(1)] = v
                pos = lm.end()
        out.append((m.group(1), labels, _float(m.group(4))))
    return out


def histogram_quantile(q, buckets):
    """Prometheus' histogram_quantile on [(le, cumulative count)]: linear
    interpolation inside the bucket holding rank q*total, the first bucket's
    lower bound 0, a rank in the +Inf bucket answered with the largest
    finite bound (source: Prometheus docs, "histogram_quantile()")."""
    b = sorted(buckets)
    total = b[-1][1]
    if total == 0:
        return math.nan
    rank = q * total
    i = next(j for j, (_, c) in enumerate(b) if c >= rank)
    if math.isinf(b[i][0]):
        return b[-2][0]
    lo, lo_count = (0.0, 0.0) if i == 0 else b[i - 1]
    hi, hi_count = b[i]
    if hi_count == lo_count:
        return hi
    return lo + (hi - lo) * (rank - lo_count) / (hi_count - lo_count)
