"""Detection quality: AUROC of oddsky against River and scikit-learn.

Shuttle: the copy of the Statlog (Shuttle) data that ships inside the
pinned River package (river/datasets/shuttle.csv.gz, read with
river.datasets.Shuttle): 49,097 rows, 9 integer features, target
`anomaly` = 1 for the rare classes, 0 for the majority "Rad Flow" class,
the second-largest class removed (River's docstring, after the ODDS
benchmark).  The streaming methods run prequentially over the whole stream
in file order: score each row, then learn it.
- oddsky: the core model through ctypes (tests/reference/oddsky_model.py)
  with default parameters, event time advancing 1 s per row, the score
  `novelty`, on features min-max scaled prequentially (the minimum and
  maximum of the rows before each row: what River's MinMaxScaler gives
  the River detectors below; the model then standardises with its own
  decaying scaler).  Also shown: auroc_shuttle_oddsky_raw (unscaled
  features) and auroc_shuttle_oddsky_combined (model.score = combined,
  min-max scaled), which are not the default.  The model scores
  nothing during its warm-up (the first warmup_vectors rows, NaN): those
  rows rank below every scored row in auroc_shuttle_oddsky; the
  *_after_warmup figures use only the rows after it, for every method.
- River HalfSpaceTrees(seed=42) and LODA(seed=42), each behind River's
  online preprocessing.MinMaxScaler (as in River's Shuttle docstring;
  HalfSpaceTrees assumes features in [0, 1]).
- scikit-learn IsolationForest(random_state=0, defaults) fitted offline on
  all rows and scored on them (-score_samples), a batch reference.
AUROC by sklearn.metrics.roc_auc_score (source: scikit-learn).

Demo: a seeded night of `oddsky simulate` (Avro container file) through
`oddsky replay --config config/demo.json --label-field truth
--vectors-out`; positives are the rare populations (truth starting with
"rare_"); oddsky's score is each result's `novelty` (prequential inside
replay: score, then learn); IsolationForest is fitted offline on the
vectors replay wrote, missing values replaced by the feature's median
plus one 0/1 missing-indicator column per feature (scikit-learn
SimpleImputer(add_indicator=True)).

    quality.py --build DIR --workdir DIR [--demo-count N] [--demo-seed S]
prints key=value lines.
"""
import argparse
import ctypes
import json
import os
import subprocess
import sys
import time

import numpy as np
from sklearn.ensemble import IsolationForest
from sklearn.impute import SimpleImputer
from sklearn.metrics import roc_auc_score

HERE = os.path.dirname(os.path.abspath(__file__))
TOP = os.path.abspath(os.path.join(HERE, "..", ".."))
sys.path.insert(0, os.path.join(TOP, "tests", "reference"))

from oddsky_model import Model  # noqa: E402


def out(k, v):
    print(f"{k}={v}", flush=True)


def say(msg):
    print(f"[quality] {msg}", file=sys.stderr, flush=True)


def unscored_lowest(score):
    """Rows the model could not score yet (its warm-up: NaN / null) rank
    below every scored row, as an unflagged packet would."""
    s = np.array([np.nan if v is None else v for v in score], dtype=float)
    lo = np.nanmin(s) if np.isfinite(s).any() else 0.0
    return np.where(np.isfinite(s), s, lo - 1.0)


def prequential_minmax(X):
    """Min-max scaling with the minimum and maximum of the rows BEFORE each
    row (the first row scales by itself), as River's online MinMaxScaler
    does when a pipeline scores before it learns; constant columns -> 0."""
    lo = np.minimum.accumulate(X, axis=0)
    hi = np.maximum.accumulate(X, axis=0)
    lo = np.vstack([X[:1], lo[:-1]])
    hi = np.vstack([X[:1], hi[:-1]])
    span = hi - lo
    return np.where(span > 0, (X - lo) / np.where(span > 0, span, 1.0), 0.0)


def shuttle(build):
    from river import anomaly, datasets, preprocessing
    import river
    ds = datasets.Shuttle()
    rows, ys = [], []
    for x, y in ds:
        rows.append(x)
        ys.append(int(y))
    names = sorted(rows[0], key=lambda s: int(s[1:]))
    X = np.array([[float(r[k]) for k in names] for r in rows])
    y = np.array(ys)
    out("shuttle_rows", len(y))
    out("shuttle_anomalies", int(y.sum()))
    out("river_version", river.__version__)

    lib = ctypes.CDLL(os.path.join(build, "libodcore.so"))
    t = 60000.0 + np.arange(len(X)) / 86400.0  # 1 s per row
    Xmm = prequential_minmax(X)
    warm = None
    for tag, XX, params in (("", Xmm, {}), ("_raw", X, {}),
                            ("_combined", Xmm, {"score": 2})):
        m = Model(lib, X.shape[1], **params)
        t0 = time.perf_counter()
        res = m.observe_many(XX, t, learn=True)
        el = time.perf_counter() - t0
        m.close()
        nov = res["novelty"]
        if warm is None:
            warm = np.isfinite(nov)
            out("shuttle_oddsky_warmup_rows", int((~warm).sum()))
            out("shuttle_oddsky_seconds", f"{el:.2f}")
        out(f"auroc_shuttle_oddsky{tag}", f"{roc_auc_score(y, unscored_lowest(nov)):.4f}")
        out(f"auroc_shuttle_oddsky{tag}_after_warmup",
            f"{roc_auc_score(y[warm], nov[warm]):.4f}")

    for name, make in (("hst", lambda: anomaly.HalfSpaceTrees(seed=42)),
                       ("loda", lambda: anomaly.LODA(seed=42))):
        model = preprocessing.MinMaxScaler() | make()
        scores = np.empty(len(rows))
        t0 = time.perf_counter()
        for i, x in enumerate(rows):
            scores[i] = model.score_one(x)
            model.learn_one(x)
        el = time.perf_counter() - t0
        out(f"auroc_shuttle_river_{name}", f"{roc_auc_score(y, scores):.4f}")
        out(f"auroc_shuttle_river_{name}_after_warmup",
            f"{roc_auc_score(y[warm], scores[warm]):.4f}")
        out(f"shuttle_river_{name}_seconds", f"{el:.1f}")

    f = IsolationForest(random_state=0).fit(X)
    out("auroc_shuttle_iforest", f"{roc_auc_score(y, -f.score_samples(X)):.4f}")


def demo(build, work, count, seed):
    night = os.path.join(work, "demo-night.avro")
    res_path = os.path.join(work, "demo-results.jsonl")
    vec_path = os.path.join(work, "demo-vectors.jsonl")
    oddsky = os.path.join(build, "oddsky")
    subprocess.run([oddsky, "simulate", "--count", str(count), "--seed", str(seed),
                    "--format", "avro-container", "--output", night],
                   check=True, stderr=subprocess.DEVNULL)
    subprocess.run([oddsky, "replay", "--config", os.path.join(TOP, "config", "demo.json"),
                    "--input", night, "--output", res_path, "--label-field", "truth",
                    "--vectors-out", vec_path, "--quiet"], check=True)
    nov, lab = [], []
    with open(res_path) as f:
        for line in f:
            r = json.loads(line)
            if "refused" in r:
                continue
            nov.append(r["novelty"])
            lab.append(str(r.get("label", "")).startswith("rare_"))
    X = []
    vlab = []
    with open(vec_path) as f:
        for line in f:
            v = json.loads(line)
            X.append([np.nan if a is None else a for a in v["x"]])
            vlab.append(str(v.get("label", "")).startswith("rare_"))
    y = np.array(lab)
    out("demo_packets", len(y))
    out("demo_rare", int(y.sum()))
    nov = unscored_lowest(nov)
    out("auroc_demo_oddsky", f"{roc_auc_score(y, nov):.4f}")
    X = SimpleImputer(strategy="median", add_indicator=True,
                      keep_empty_features=True).fit_transform(np.array(X, dtype=float))
    f = IsolationForest(random_state=0).fit(X)
    out("auroc_demo_iforest", f"{roc_auc_score(np.array(vlab), -f.score_samples(X)):.4f}")
    for p in (night, res_path, vec_path):
        os.remove(p)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--build", required=True)
    ap.add_argument("--workdir", required=True)
    ap.add_argument("--demo-count", type=int, default=200_000)
    ap.add_argument("--demo-seed", type=int, default=11)
    a = ap.parse_args()
    os.makedirs(a.workdir, exist_ok=True)
    say("Shuttle")
    shuttle(os.path.abspath(a.build))
    say(f"demo night ({a.demo_count} packets, seed {a.demo_seed})")
    demo(os.path.abspath(a.build), os.path.abspath(a.workdir), a.demo_count, a.demo_seed)


if __name__ == "__main__":
    main()
