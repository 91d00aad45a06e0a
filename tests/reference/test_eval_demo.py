"""Evaluation on a simulated night: does oddsky rank the rare populations high?

One night of 200,000 demo packets (oddsky simulate, default rare rates:
5e-4 of the packets from each of the three rare populations, about 300
rare packets) is replayed through config/demo.json.  Over the warm results
the novelty score is compared with the simulator's truth: AUROC of the rare
populations (truth starting with "rare_") against everything else, computed
by scikit-learn (source: sklearn.metrics.roc_auc_score).  Printed beside it:
the flags raised at the default budget, the fraction of them that are rare
packets, and scikit-learn's IsolationForest (source:
sklearn.ensemble.IsolationForest, default settings, random_state=0) fitted
offline on exactly the same feature vectors (--vectors-out), with missing
values imputed by the column median (IsolationForest cannot take NaN).

Also printed, to show where the AUROC is lost: the rare packets split by
what the packet holds (read back with fastavro) -- a first detection (no
history), a detection on the source's first night (all history from the
same night) and later ones -- each with its mean share of common packets
scored below it (the category's contribution to the AUROC); and, as a
ceiling for what these features allow, a supervised classifier that SEES
the truth: scikit-learn's HistGradientBoostingClassifier (source:
sklearn.ensemble.HistGradientBoostingClassifier, 5-fold stratified
cross-validated probabilities, class_weight="balanced", random_state=0).
It is no competitor (oddsky never sees a label), only a bound.

The floor is the project's target, AUROC >= 0.90, on this seed-7 night.
The margin is small (0.914 here; development seeds 101, 202 and 303 gave
0.926, 0.914 and 0.925; README, "Performance"), so a change that moves
this figure by a hundredth is worth a look at other nights too.
"""
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
FLOOR = 0.90


def run(*args):
    p = subprocess.run([BIN, *args], capture_output=True, text=True)
    assert p.returncode == 0, f"{args}: exit {p.returncode}\n{p.stderr}"
    return p


@pytest.fixture(scope="module")
def evaluated(tmp_path_factory):
    from sklearn.ensemble import IsolationForest
    from sklearn.metrics import roc_auc_score
    d = tmp_path_factory.mktemp("eval")
    night, res, vec = d / "night.avro", d / "results.jsonl", d / "vectors.jsonl"
    run("simulate", "--seed", "7", "--count", "200000", "--format",
        "avro-container", "--output", str(night))
    p = run("replay", "--config", DEMO, "--input", str(night), "--output",
            str(res), "--label-field", "truth", "--vectors-out", str(vec))
    import fastavro
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.model_selection import StratifiedKFold, cross_val_predict
    recs = [json.loads(l) for l in open(res)]
    vecs = [json.loads(l) for l in open(vec)]
    assert len(recs) == len(vecs) == 200000
    warm = np.array([r["warm"] for r in recs])
    rare = np.array([r["label"].startswith("rare_") for r in recs])
    flag = np.array([r["flag"] for r in recs])
    nov = np.array([np.inf if r["novelty"] is None else r["novelty"]
                    for r in recs])
    X = np.array([[np.nan if v is None else v for v in r["x"]] for r in vecs],
                 dtype=float)
    med = np.nanmedian(X, axis=0)
    med = np.where(np.isnan(med), 0.0, med)
    Xi = np.where(np.isnan(X), med, X)
    iso = IsolationForest(random_state=0).fit(Xi)
    iso_score = -iso.score_samples(Xi)
    # What the packet holds: first detection, first night, later.
    cat = []
    with open(night, "rb") as f:
        for pk in fastavro.reader(f):  # source: fastavro
            h = pk["history"]
            cat.append("first detection" if not h else
                       "first night" if pk["obs"]["mjd"] - h[0]["mjd"] < 0.5 else
                       "later")
    cat = np.array(cat)
    commons = np.sort(nov[warm & ~rare])
    split = {}
    for c in ("first detection", "first night", "later"):
        m = warm & rare & (cat == c)
        split[c] = (int(m.sum()), float((np.searchsorted(commons, nov[m]) /
                                         len(commons)).mean()) if m.any() else float("nan"))
    clf = HistGradientBoostingClassifier(class_weight="balanced", random_state=0)
    sup = cross_val_predict(clf, X[warm], rare[warm], method="predict_proba",
                            cv=StratifiedKFold(5, shuffle=True, random_state=0))[:, 1]
    out = {
        "rare_warm": int(rare[warm].sum()),
        "auroc": roc_auc_score(rare[warm], nov[warm]),
        "iforest_auroc": roc_auc_score(rare[warm], iso_score[warm]),
        "supervised_auroc": roc_auc_score(rare[warm], sup),
        "split": split,
        "flags": int(flag[warm].sum()),
        "rare_flags": int((flag & rare)[warm].sum()),
        "rare_fraction": rare[warm].mean(),
        "summary": p.stderr.strip().splitlines()[-1],
    }
    out["rare_frac_of_flags"] = out["rare_flags"] / max(1, out["flags"])
    print(f"\n{out['summary']}\n"
          f"warm results with a rare truth: {out['rare_warm']} "
          f"({100 * out['rare_fraction']:.2f}%)\n"
          f"oddsky novelty AUROC {out['auroc']:.4f}; IsolationForest "
          f"(median-imputed, same vectors) AUROC {out['iforest_auroc']:.4f}\n"
          f"flags {out['flags']}, of them rare {out['rare_flags']} "
          f"({100 * out['rare_frac_of_flags']:.1f}%)\n"
          f"supervised ceiling (sees the truth; HistGradientBoosting, 5-fold CV) "
          f"AUROC {out['supervised_auroc']:.4f}\n"
          "rare packets by what they hold (count, mean share of common packets "
          "scored below): " +
          "; ".join(f"{c} {n} {v:.3f}" for c, (n, v) in split.items()))
    return out


def test_enough_rare_packets(evaluated):
    # The evaluation means little with only a handful of positives.
    assert evaluated["rare_warm"] >= 200


def test_flags_enrich_rare_packets(evaluated):
    # Weaker than the floor, but it can fail: flags must hold a larger
    # share of rare packets than the stream does.
    assert evaluated["rare_frac_of_flags"] > evaluated["rare_fraction"]


def test_novelty_auroc_floor(evaluated):
    assert evaluated["auroc"] >= FLOOR
