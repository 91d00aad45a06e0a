"""The calibrator's tail probability, stream rate and thresholds against
numpy computations on the same seeded stream.

Expected values (numpy, written here):
- decayed weights w_i = 2^(-(t - t_i)/H) (definition of the decay);
- tail fraction sum_{s_i >= s} w_i / sum_i w_i;
- weighted (1 - q) quantile: scores sorted in descending order, the first
  whose cumulative weight reaches q * sum w;
- steady-rate inversion: a rate r per day started T days ago leaves a
  decayed mass r H (1 - 2^(-T/H)) / ln 2 (integral of 2^(-u/H) over
  [0, T]), so r = W ln 2 / (H (1 - 2^(-T/H))).

Grid-resolution bound (derived from calib.h's definition): the estimate
agrees with the true tail at every cell edge, and inside a cell both lie
between mass(above the cell) and mass(above the cell) + mass(cell).  The
cell holding s spans one width w = 2 asinh(limit) / bins in asinh(s), so
|estimate - truth| <= (mass of scores with |asinh(s_i) - asinh(s)| <= w)/W.
For the quantile: the estimated and the true quantile lie in the same
cell, so |asinh(thr) - asinh(thr_numpy)| <= w.
"""
import ctypes
import math

import numpy as np
import pytest

from conftest import dptr

ALPHA, BUDGET = 0, 1


def _bind(core):
    c = core
    c.calib_new_flat.restype = ctypes.c_void_p
    c.calib_new_flat.argtypes = [ctypes.c_uint32, ctypes.c_double,
                                 ctypes.c_double, ctypes.c_int32,
                                 ctypes.c_double, ctypes.c_double,
                                 ctypes.c_double, ctypes.c_double]
    c.calib_free.argtypes = [ctypes.c_void_p]
    c.calib_observe_many.restype = ctypes.c_size_t
    c.calib_observe_many.argtypes = [ctypes.c_void_p,
                                     ctypes.POINTER(ctypes.c_double),
                                     ctypes.POINTER(ctypes.c_double),
                                     ctypes.c_size_t]
    for name in ("calib_tail_prob",):
        f = getattr(c, name)
        f.restype = ctypes.c_double
        f.argtypes = [ctypes.c_void_p, ctypes.c_double]
    for name in ("calib_mass", "calib_threshold", "calib_rate_per_hour",
                 "calib_target_fraction", "calib_expected_per_night"):
        f = getattr(c, name)
        f.restype = ctypes.c_double
        f.argtypes = [ctypes.c_void_p]
    c.calib_should_flag.restype = ctypes.c_int
    c.calib_should_flag.argtypes = [ctypes.c_void_p, ctypes.c_double]
    c.calib_histogram.restype = ctypes.c_uint32
    c.calib_histogram.argtypes = [ctypes.c_void_p,
                                  ctypes.POINTER(ctypes.c_double),
                                  ctypes.POINTER(ctypes.c_double),
                                  ctypes.c_uint32]
    return c


def stream(seed, n, H, days):
    """Scores: a Gaussian bulk, a heavy right tail and a few negatives far
    out; times: uniform over `days`, sorted."""
    rng = np.random.default_rng(seed)
    s = np.concatenate([rng.normal(5.0, 2.0, size=int(n * 0.9)),
                        rng.lognormal(3.0, 1.5, size=n - int(n * 0.9))])
    s[rng.integers(0, n, size=20)] = -rng.uniform(10, 1e4, size=20)
    rng.shuffle(s)
    t = np.sort(rng.uniform(60000.0, 60000.0 + days, size=n))
    return np.ascontiguousarray(s), np.ascontiguousarray(t)


def weights(t, H):
    return np.exp2(-(t[-1] - t) / H)


def np_tail(s, w, x):
    """source: numpy, decayed weighted tail fraction."""
    return w[s >= x].sum() / w.sum()


def np_quantile_upper(s, w, q):
    """source: numpy weighted (1 - q) quantile from the top."""
    order = np.argsort(-s, kind="stable")
    cum = np.cumsum(w[order])
    i = np.searchsorted(cum, q * w.sum(), side="left")
    return s[order][min(i, len(s) - 1)]


def np_rate_per_hour(t, w, H):
    """source: steady-rate closed form (module docstring)."""
    T = t[-1] - t[0]
    return w.sum() * math.log(2) / (H * -math.expm1(-T / H * math.log(2))) \
        / 24.0


@pytest.mark.parametrize("bins,H", [(2048, 3.0), (512, 0.5)])
def test_tail_prob_within_grid_resolution(core, bins, H):
    c = _bind(core)
    limit = 1e6
    cal = c.calib_new_flat(bins, limit, H, BUDGET, 1e-3, 10, 1e5, 0.01)
    try:
        s, t = stream(3, 20000, H, 10.0)
        assert c.calib_observe_many(cal, dptr(s), dptr(t), len(s)) == len(s)
        w = weights(t, H)
        assert c.calib_mass(cal) == pytest.approx(w.sum(), rel=1e-9)
        width = 2 * math.asinh(limit) / bins
        a = np.arcsinh(s)
        qs = np.concatenate([np.quantile(s, [0.001, 0.1, 0.5, 0.9, 0.99,
                                             0.999, 0.9999]),
                             [-50.0, 0.0, 1.0, 7.5, 100.0, 3e3]])
        for x in qs:
            got = c.calib_tail_prob(cal, float(x))
            want = np_tail(s, w, x)
            ax = math.asinh(x)
            bound = w[np.abs(a - ax) <= width * (1 + 1e-9)].sum() / w.sum()
            assert abs(got - want) <= bound + 1e-12, (x, got, want, bound)
        # beyond every score: only the (empty) overflow cell is left
        assert c.calib_tail_prob(cal, 2e6) == 0.0
        assert c.calib_tail_prob(cal, -2e6) == 1.0
    finally:
        c.calib_free(cal)


@pytest.mark.parametrize("budget", [10.0, 200.0, 5000.0])
def test_budget_threshold_is_weighted_quantile(core, budget):
    c = _bind(core)
    H, limit, bins = 2.0, 1e6, 2048
    cal = c.calib_new_flat(bins, limit, H, BUDGET, 1e-3, budget, 1e5, 0.01)
    try:
        s, t = stream(8, 30000, H, 6.0)
        c.calib_observe_many(cal, dptr(s), dptr(t), len(s))
        w = weights(t, H)
        rate = np_rate_per_hour(t, w, H)
        assert c.calib_rate_per_hour(cal) == pytest.approx(rate, rel=1e-9)
        q = min(1.0, budget / rate)
        assert c.calib_target_fraction(cal) == pytest.approx(q, rel=1e-12)
        thr = c.calib_threshold(cal)
        want = np_quantile_upper(s, w, q)
        width = 2 * math.asinh(limit) / bins
        # source: numpy weighted quantile; bound: one cell (docstring)
        assert abs(math.asinh(thr) - math.asinh(want)) <= width * (1 + 1e-9), \
            (thr, want)
        # flags follow the threshold, and the expected count per night
        assert c.calib_should_flag(cal, thr + abs(thr) * 1e-3 + 1e-9)
        assert not c.calib_should_flag(cal, thr - abs(thr) * 0.01 - 1e-6)
        exp_night = c.calib_expected_per_night(cal)
        assert exp_night == pytest.approx(rate * 10 * q, rel=1e-6)
    finally:
        c.calib_free(cal)


def test_alpha_policy_flags_by_tail_probability(core):
    c = _bind(core)
    H, limit, bins, alpha = 1.0, 1e6, 2048, 0.01
    cal = c.calib_new_flat(bins, limit, H, ALPHA, alpha, 10, 1e5, 0.01)
    try:
        s, t = stream(21, 20000, H, 4.0)
        c.calib_observe_many(cal, dptr(s), dptr(t), len(s))
        w = weights(t, H)
        thr = c.calib_threshold(cal)
        want = np_quantile_upper(s, w, alpha)
        width = 2 * math.asinh(limit) / bins
        # source: numpy weighted quantile at q = alpha
        assert abs(math.asinh(thr) - math.asinh(want)) <= width * (1 + 1e-9)
        for x in np.quantile(s, [0.5, 0.98, 0.995, 0.9999]):
            flag = c.calib_should_flag(cal, float(x))
            assert flag == (c.calib_tail_prob(cal, float(x)) <= alpha)
            # far from the threshold the numpy tail decides the same way
            if abs(np_tail(s, w, x) - alpha) > 0.002:
                assert flag == (np_tail(s, w, x) <= alpha), x
    finally:
        c.calib_free(cal)


def test_rate_before_data_and_early(core):
    """Prior rate before any score and before min_span; then the elapsed
    time (r = W ln2 / (H (1 - 2^(-T/H))), which tends to n / T for T << H:
    source: the closed form above, and its first-order limit)."""
    c = _bind(core)
    H = 7.0
    cal = c.calib_new_flat(256, 1e6, H, BUDGET, 1e-3, 10, 1234.0, 0.01)
    try:
        assert c.calib_rate_per_hour(cal) == 1234.0
        assert c.calib_tail_prob(cal, 3.0) == 1.0
        assert c.calib_threshold(cal) == math.inf
        assert c.calib_expected_per_night(cal) == 0.0
        # 600 scores over 0.005 d: still under min_span -> prior
        t = np.ascontiguousarray(60000.0 + np.linspace(0, 0.005, 600))
        s = np.ascontiguousarray(np.linspace(0, 1, 600))
        c.calib_observe_many(cal, dptr(s), dptr(t), 600)
        assert c.calib_rate_per_hour(cal) == 1234.0
        # 2400 more over the next 0.045 d: 3000 scores in 0.05 d = 1.2 h
        t2 = np.ascontiguousarray(60000.005 + np.linspace(1e-6, 0.045, 2400))
        s2 = np.ascontiguousarray(np.linspace(0, 1, 2400))
        c.calib_observe_many(cal, dptr(s2), dptr(t2), 2400)
        tt = np.concatenate([t, t2])
        w = weights(tt, H)
        assert c.calib_rate_per_hour(cal) == pytest.approx(
            np_rate_per_hour(tt, w, H), rel=1e-9)
        assert c.calib_rate_per_hour(cal) == pytest.approx(
            3000 / (0.05 * 24), rel=5e-3)
    finally:
        c.calib_free(cal)


def test_histogram_export_sums_to_grid_mass(core):
    c = _bind(core)
    H = 3.0
    cal = c.calib_new_flat(2048, 1e6, H, BUDGET, 1e-3, 10, 1e5, 0.01)
    try:
        s, t = stream(4, 5000, H, 2.0)
        c.calib_observe_many(cal, dptr(s), dptr(t), len(s))
        n = 64
        edges = np.zeros(n + 1)
        mass = np.zeros(n)
        k = c.calib_histogram(cal, dptr(edges), dptr(mass), n)
        assert 0 < k <= n
        w = weights(t, H)
        # source: numpy histogram of the weighted scores on the same edges
        ref, _ = np.histogram(s, bins=edges[:k + 1], weights=w)
        assert np.all(np.diff(edges[:k + 1]) > 0)
        assert edges[0] <= s.min() and edges[k] >= s.max()
        assert mass[:k].sum() == pytest.approx(w.sum(), rel=1e-9)
        # interior edges are cell edges; only rounding at an edge can move
        # a score to the neighbouring group
        assert np.abs(mass[:k] - ref).max() <= w.max() * 2 + 1e-9
    finally:
        c.calib_free(cal)
