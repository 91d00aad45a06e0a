"""Reference check for core/scaler: decaying weighted mean and variance
against numpy, through scaler_ref_run in libodcore.so."""
import ctypes

import numpy as np
import pytest

from conftest import dptr


def run(core, X, t, H, missing=None):
    core.scaler_ref_run.argtypes = [
        ctypes.POINTER(ctypes.c_double), ctypes.POINTER(ctypes.c_uint8),
        ctypes.POINTER(ctypes.c_double), ctypes.c_size_t, ctypes.c_uint32,
        ctypes.c_double, ctypes.POINTER(ctypes.c_double),
        ctypes.POINTER(ctypes.c_double)]
    core.scaler_ref_run.restype = ctypes.c_int
    n, d = X.shape
    mean = np.zeros(d)
    var = np.zeros(d)
    mp = None
    if missing is not None:
        missing = np.ascontiguousarray(missing, dtype=np.uint8)
        mp = missing.ctypes.data_as(ctypes.POINTER(ctypes.c_uint8))
    assert core.scaler_ref_run(dptr(X), mp, dptr(t), n, d, H, dptr(mean),
                               dptr(var)) == 0
    return mean, var


def numpy_ref(x, t, H):
    # weights 2^(-(t - t_i)/H) at the last time; H = 0: equal weights.
    w = np.exp2(-(t[-1] - t) / H) if H > 0 else np.ones_like(t)
    # source: numpy.average (weighted mean) and the weighted population
    # variance (ddof = 0) np.average((x - mean)^2, weights=w).
    m = np.average(x, weights=w)
    v = np.average((x - m) ** 2, weights=w)
    return m, v


@pytest.mark.parametrize("H", [0.0, 0.5, 3.0, 40.0])
def test_scaler_vs_numpy(core, H):
    rng = np.random.default_rng(int(H * 10) + 1)
    n, d = 20_000, 5
    t = np.ascontiguousarray(np.sort(rng.uniform(59000.0, 59010.0, size=n)))
    # features with large offsets and very different scales
    X = np.ascontiguousarray(np.column_stack([
        rng.normal(1e4, 1.0, n), rng.normal(0, 1e-3, n),
        rng.exponential(2.0, n), rng.normal(-5, 50, n) + np.sin(t),
        rng.standard_t(3, n)]))
    mean, var = run(core, X, t, H)
    worst = 0.0
    for j in range(d):
        m, v = numpy_ref(X[:, j], t, H)
        rm = abs(mean[j] - m) / abs(m)
        rv = abs(var[j] - v) / abs(v)
        worst = max(worst, rm, rv)
        assert rm <= 1e-9, (j, mean[j], m)
        assert rv <= 1e-9, (j, var[j], v)
    print(f"\nscaler H={H}: worst relative error vs numpy {worst:.2e}")


def test_scaler_missing_vs_numpy(core):
    rng = np.random.default_rng(77)
    n, d = 5000, 3
    t = np.ascontiguousarray(np.sort(rng.uniform(0, 20, size=n)))
    X = np.ascontiguousarray(rng.normal(3, 2, size=(n, d)))
    miss = rng.random((n, d)) < 0.3
    X[:, 2][rng.random(n) < 0.2] = np.nan  # NaN is missing too
    mean, var = run(core, X, t, 2.0, missing=miss)
    for j in range(d):
        ok = ~miss[:, j] & np.isfinite(X[:, j])
        m, v = numpy_ref(X[ok, j], t[ok], 2.0)
        # the reference time for the weights is the last time overall:
        # it scales every weight alike, so the ratios are unchanged.
        assert abs(mean[j] - m) <= 1e-9 * abs(m)
        assert abs(var[j] - v) <= 1e-9 * abs(v)
