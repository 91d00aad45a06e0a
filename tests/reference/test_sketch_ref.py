"""Space sketch sanity against outside references.

- Ranking: on a seeded Gaussian stream with a few far outliers, scored
  prequentially (score, then learn), the outliers' space_novelty must rank
  above the inliers'.  AUROC from scikit-learn's roc_auc_score (source:
  sklearn.metrics.roc_auc_score).  River's HalfSpaceTrees (river 0.26.1,
  the half-space-tree detector of Tan, Ting & Liu 2011) is run on the same
  stream and its AUROC printed beside ours, for information only.
- Floor: the outliers sit 8 sd out along a random direction; a projected
  axis is a sum of about d/3 features times sqrt(3), so an outlier lands
  several level-1 bin widths (half the warm-up range) beyond where inliers
  ever fall on most axes, and its count is 0 from the first level that
  splits such an axis, giving a chain score near -(level) against
  -(log2(n) + ...) for inliers.  With 16 chains the mean separates them
  nearly always; 0.95 leaves room for chains whose early levels all split
  axes along which the outlier is unremarkable.
- Bounds: -(log2(N + 1) + 1) <= space_novelty <= -1 (sketch.h), with N the
  decayed mass, from the definition min_l (log2(c_l + 1) + l), l >= 1,
  c_1 <= N (common practice: count-min never underestimates, and no bin
  holds more than everything).
"""
import ctypes
import math

import numpy as np
import pytest

from conftest import dptr


def _bind(core):
    c = core
    c.sketch_new_flat.restype = ctypes.c_void_p
    c.sketch_new_flat.argtypes = [ctypes.c_uint32] * 6 + [ctypes.c_double,
                                                          ctypes.c_uint64]
    c.sketch_free.argtypes = [ctypes.c_void_p]
    c.sketch_fit.argtypes = [ctypes.c_void_p, ctypes.POINTER(ctypes.c_double),
                             ctypes.c_void_p, ctypes.c_size_t]
    c.sketch_advance.argtypes = [ctypes.c_void_p, ctypes.c_double]
    c.sketch_observe.restype = ctypes.c_double
    c.sketch_observe.argtypes = [ctypes.c_void_p,
                                 ctypes.POINTER(ctypes.c_double),
                                 ctypes.c_void_p, ctypes.c_int]
    c.sketch_mass.restype = ctypes.c_double
    c.sketch_mass.argtypes = [ctypes.c_void_p]
    return c


def make_stream(d, n, n_out, seed, radius=8.0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, d))
    y = np.zeros(n, dtype=int)
    warm = 512
    idx = rng.choice(np.arange(warm, n), size=n_out, replace=False)
    dirs = rng.normal(size=(n_out, d))
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    X[idx] = dirs * radius
    y[idx] = 1
    return np.ascontiguousarray(X), y, warm


def sketch_scores(c, X, warm, H=7.0, seed=1):
    n, d = X.shape
    sk = c.sketch_new_flat(d, 16, 16, 12, 1024, 1, H, seed)
    assert sk
    try:
        W = np.ascontiguousarray(X[:warm])
        assert c.sketch_fit(sk, dptr(W), None, warm) == 0
        out = np.empty(n)
        mass = np.empty(n)
        for i in range(n):
            c.sketch_advance(sk, 60000.0 + i / 86400.0)
            mass[i] = c.sketch_mass(sk)
            row = np.ascontiguousarray(X[i])
            out[i] = c.sketch_observe(sk, dptr(row), None, 1)
        return out, mass
    finally:
        c.sketch_free(sk)


def river_auroc(X, y, warm):
    try:
        from river import anomaly
    except ImportError:
        return None
    from sklearn.metrics import roc_auc_score
    lo = X[:warm].min(axis=0)
    hi = X[:warm].max(axis=0)
    span = np.where(hi > lo, hi - lo, 1.0)
    # river's defaults (10 trees of height 8, window 250), fixed seed
    hst = anomaly.HalfSpaceTrees(n_trees=10, height=8, window_size=250,
                                 seed=42)
    scores = []
    for i, row in enumerate(X):
        u = np.clip((row - lo) / span, 0.0, 1.0)
        x = {f"f{j}": float(v) for j, v in enumerate(u)}
        if i >= warm:
            scores.append(hst.score_one(x))
        hst.learn_one(x)
    return roc_auc_score(y[warm:], scores)


@pytest.mark.parametrize("d,seed", [(8, 5), (2, 6), (16, 7)])
def test_outliers_rank_above_inliers(core, d, seed):
    from sklearn.metrics import roc_auc_score
    c = _bind(core)
    X, y, warm = make_stream(d, 6000, 40, seed)
    s, mass = sketch_scores(c, X, warm)
    # bounds from the definition (module docstring)
    assert np.all(s <= -1.0 + 1e-12)
    assert np.all(s >= -(np.log2(mass + 1) + 1) - 1e-9)
    auc = roc_auc_score(y[warm:], s[warm:])  # source: scikit-learn
    ref = river_auroc(X, y, warm)
    print(f"\nd={d}: space sketch AUROC {auc:.4f}; river HalfSpaceTrees "
          f"AUROC {ref if ref is None else round(ref, 4)}")
    assert auc >= 0.95, auc


def test_dense_region_scores_lower_than_sparse(core):
    """A point at the mode of the stream scores lower (denser) than one in
    the thin tail, after learning: source, common practice for density
    sketches (counts grow with the local density)."""
    c = _bind(core)
    X, y, warm = make_stream(4, 4000, 1, 9)
    sk = c.sketch_new_flat(4, 16, 16, 12, 1024, 1, 7.0, 3)
    try:
        W = np.ascontiguousarray(X[:warm])
        c.sketch_fit(sk, dptr(W), None, warm)
        for i in range(len(X)):
            c.sketch_advance(sk, 60000.0 + i / 86400.0)
            c.sketch_observe(sk, dptr(np.ascontiguousarray(X[i])), None, 1)
        centre = np.zeros(4)
        tail = np.full(4, 2.5)
        far = np.full(4, 40.0)
        sc = c.sketch_observe(sk, dptr(centre), None, 0)
        st = c.sketch_observe(sk, dptr(tail), None, 0)
        sf = c.sketch_observe(sk, dptr(far), None, 0)
        assert sc < st < sf
        assert sf > -3.0  # the far point's bins are (nearly) empty
    finally:
        c.sketch_free(sk)
