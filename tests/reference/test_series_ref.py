"""core/series against numpy, scipy and published formulas.

Each statistic is computed by libodcore.so through ctypes (series_compute)
and by an outside reference; tolerance 1e-9 relative (absolute 1e-12 near
zero).  The von Neumann ratio and Stetson J/K have no numpy/scipy function,
so they are written here independently from the papers' formulas.
"""
import ctypes
import warnings

import numpy as np
import pytest
import scipy.stats

from conftest import dptr

RTOL = 1e-9
ATOL = 1e-12


def setup(core):
    core.series_compute.restype = ctypes.c_double
    core.series_compute.argtypes = [
        ctypes.c_int,
        ctypes.POINTER(ctypes.c_double),
        ctypes.POINTER(ctypes.c_double),
        ctypes.POINTER(ctypes.c_double),
        ctypes.c_size_t,
        ctypes.POINTER(ctypes.c_double),
    ]
    core.series_stat_from_name.restype = ctypes.c_int
    core.series_stat_from_name.argtypes = [ctypes.c_char_p]
    core.series_min_points.restype = ctypes.c_size_t
    core.series_min_points.argtypes = [ctypes.c_int]


def stat(core, name, t, v, e):
    setup(core)
    k = core.series_stat_from_name(name.encode())
    assert k >= 0, name
    t = np.ascontiguousarray(t, dtype=np.float64)
    v = np.ascontiguousarray(v, dtype=np.float64)
    e = np.ascontiguousarray(e, dtype=np.float64)
    scratch = np.zeros(max(len(v), 1))
    return core.series_compute(k, dptr(t), dptr(v), dptr(e), len(v), dptr(scratch))


def curves():
    """Invented light curves: sorted times, magnitudes with a trend and a
    flare, heteroscedastic errors."""
    rng = np.random.default_rng(20240611)
    out = []
    for n in (5, 8, 17, 60, 301):
        t = np.sort(rng.uniform(60000.0, 60000.0 + 40.0 * rng.uniform(0.2, 3.0), n))
        e = rng.uniform(0.02, 0.3, n)
        v = 18.0 + 0.01 * (t - t[0]) + rng.normal(0.0, 1.0, n) * e
        v[n // 2] -= 1.5  # a brightening
        out.append((t, v, e))
    return out


def close(a, b):
    return np.isclose(a, b, rtol=RTOL, atol=ATOL)


# --- independent references written from the papers ----------------------

def wmean_ref(v, e):
    w = 1.0 / e**2
    return np.sum(w * v) / np.sum(w)


def von_neumann_ref(v):
    # von Neumann 1941: delta^2 = sum (x_{i+1}-x_i)^2 / (n-1),
    # s^2 = sum (x_i - mean)^2 / n.
    n = len(v)
    delta2 = np.sum(np.diff(v) ** 2) / (n - 1)
    s2 = np.sum((v - v.mean()) ** 2) / n
    return delta2 / s2


def stetson_delta(v, e):
    # Stetson 1996 eq. 2 with the weighted mean as the mean.
    n = len(v)
    return np.sqrt(n / (n - 1.0)) * (v - wmean_ref(v, e)) / e


def stetson_j_ref(v, e):
    # Stetson 1996 eq. 1, successive pairs, unit weights.
    d = stetson_delta(v, e)
    p = d[:-1] * d[1:]
    return np.mean(np.sign(p) * np.sqrt(np.abs(p)))


def stetson_k_ref(v, e):
    # Stetson 1996 eq. 3.
    d = stetson_delta(v, e)
    return np.mean(np.abs(d)) / np.sqrt(np.mean(d**2))


REFS = {
    # source: common practice (len)
    "count": lambda t, v, e: float(len(v)),
    # source: numpy.ptp
    "span": lambda t, v, e: np.ptp(t),
    "amplitude": lambda t, v, e: np.ptp(v),
    # source: numpy.average with weights 1/err^2
    "wmean": lambda t, v, e: np.average(v, weights=1.0 / e**2),
    # source: numpy.std ddof=1
    "std": lambda t, v, e: np.std(v, ddof=1),
    # source: scipy.stats.skew bias=False (adjusted Fisher-Pearson G1)
    "skew": lambda t, v, e: scipy.stats.skew(v, bias=False),
    # source: scipy.stats.kurtosis fisher=True bias=False (G2)
    "kurtosis": lambda t, v, e: scipy.stats.kurtosis(v, fisher=True, bias=False),
    # source: von Neumann 1941, written above
    "von_neumann": lambda t, v, e: von_neumann_ref(v),
    # source: Stetson 1996 eq. 1-3, written above
    "stetson_j": lambda t, v, e: stetson_j_ref(v, e),
    "stetson_k": lambda t, v, e: stetson_k_ref(v, e),
    # source: numpy.polyfit deg 1
    "slope": lambda t, v, e: np.polyfit(t, v, 1)[0],
    # source: numpy.diff (definition in series.c: steepest successive slope)
    "rise_rate": lambda t, v, e: np.max(-np.diff(v) / np.diff(t)),
    "fade_rate": lambda t, v, e: np.max(np.diff(v) / np.diff(t)),
    # source: common practice, chi^2 about the weighted mean over n-1 dof
    "chi2_red": lambda t, v, e: np.sum(((v - wmean_ref(v, e)) / e) ** 2) / (len(v) - 1),
    # source: common practice (fraction beyond 1 std, ddof=1, of the weighted mean)
    "beyond_1sigma": lambda t, v, e: np.mean(np.abs(v - wmean_ref(v, e)) > np.std(v, ddof=1)),
    # source: numpy.median
    "mad": lambda t, v, e: np.median(np.abs(v - np.median(v))),
    # source: numpy.mean
    "latest_minus_mean": lambda t, v, e: v[-1] - np.mean(v),
}


@pytest.mark.parametrize("name", sorted(REFS))
def test_statistic_matches_reference(core, name):
    for t, v, e in curves():
        ours = stat(core, name, t, v, e)
        ref = float(REFS[name](t, v, e))
        assert close(ours, ref), f"{name} n={len(v)}: ours {ours!r} ref {ref!r}"


def test_mad_even_and_odd_against_numpy_median(core):
    # source: numpy.median (mean of the two middle values for even n)
    rng = np.random.default_rng(7)
    for n in (1, 2, 3, 4, 10, 11, 1000, 1001):
        v = rng.normal(size=n)
        v[: n // 3] = np.round(v[: n // 3], 1)  # ties
        ref = np.median(np.abs(v - np.median(v)))
        ours = stat(core, "mad", np.arange(n, dtype=float), v, np.ones(n))
        assert close(ours, ref), f"n={n}: ours {ours!r} ref {ref!r}"


@pytest.mark.parametrize("name", sorted(REFS))
def test_too_few_points_is_nan(core, name):
    setup(core)
    k = core.series_stat_from_name(name.encode())
    m = core.series_min_points(k)
    if m == 0:
        # Defined for every n, the empty history included: it must equal
        # the reference on no points (for count: len([]) = 0).
        empty = np.zeros(0)
        assert stat(core, name, empty, empty, empty) == REFS[name](empty, empty, empty)
        return
    t = np.arange(m - 1, dtype=float)
    v = np.linspace(1.0, 2.0, m - 1)
    e = np.full(m - 1, 0.1)
    assert np.isnan(stat(core, name, t, v, e)), f"{name} with {m - 1} points"


def test_constant_series_moments_nan(core):
    # source: scipy.stats.skew/kurtosis give nan for zero variance
    t = np.arange(6, dtype=float)
    v = np.full(6, 17.0)
    e = np.full(6, 0.1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        assert np.isnan(scipy.stats.skew(v, bias=False))
    for name in ("skew", "kurtosis", "von_neumann"):
        assert np.isnan(stat(core, name, t, v, e)), name


def test_bad_errors_make_weighted_stats_nan(core):
    # common practice: inverse-variance weights need every err > 0
    t = np.arange(5, dtype=float)
    v = np.array([1.0, 2.0, 1.5, 1.2, 1.9])
    e = np.array([0.1, 0.0, 0.1, 0.1, 0.1])
    for name in ("wmean", "stetson_j", "stetson_k", "chi2_red", "beyond_1sigma"):
        assert np.isnan(stat(core, name, t, v, e)), name
    assert close(stat(core, "std", t, v, e), np.std(v, ddof=1))


def test_von_neumann_expectation_for_white_noise(core):
    # source: von Neumann 1941: for independent normal values
    # E[delta^2 / s^2] = 2n/(n-1).  20000 draws of n=10; the sample mean's
    # standard error is about 0.005, tolerance 0.03.
    rng = np.random.default_rng(11)
    n = 10
    vals = []
    t = np.arange(n, dtype=float)
    e = np.ones(n)
    for _ in range(20000):
        vals.append(stat(core, "von_neumann", t, rng.normal(size=n), e))
    assert abs(np.mean(vals) - 2 * n / (n - 1)) < 0.03, np.mean(vals)


def test_stetson_k_for_gaussian_noise(core):
    # source: Stetson 1996: K -> sqrt(2/pi) = 0.798 for Gaussian residuals
    rng = np.random.default_rng(5)
    n = 20000
    e = np.full(n, 0.1)
    v = 15.0 + rng.normal(size=n) * e
    k = stat(core, "stetson_k", np.arange(n, dtype=float), v, e)
    assert abs(k - np.sqrt(2 / np.pi)) < 0.01, k


def test_rise_and_fade_skip_equal_times(core):
    # definition in series.c: pairs with equal times are skipped
    t = np.array([0.0, 1.0, 1.0, 3.0])
    v = np.array([18.0, 17.0, 10.0, 11.0])
    # successive pairs with dt > 0: (0,1): -1/1 ; (2,3): +1/2
    assert close(stat(core, "rise_rate", t, v, np.ones(4)), 1.0)
    assert close(stat(core, "fade_rate", t, v, np.ones(4)), 0.5)


def pooled_slope(core, t, v, band):
    core.series_pooled_slope.restype = ctypes.c_double
    core.series_pooled_slope.argtypes = [
        ctypes.POINTER(ctypes.c_double),
        ctypes.POINTER(ctypes.c_double),
        ctypes.POINTER(ctypes.c_int),
        ctypes.c_size_t,
    ]
    t = np.ascontiguousarray(t, dtype=np.float64)
    v = np.ascontiguousarray(v, dtype=np.float64)
    b = np.ascontiguousarray(band, dtype=np.intc)
    return core.series_pooled_slope(
        dptr(t), dptr(v), b.ctypes.data_as(ctypes.POINTER(ctypes.c_int)), len(v))


def ancova_slope_ref(t, v, band):
    # source: numpy.linalg.lstsq with band dummy columns (ANCOVA common
    # slope): v ~ slope * t + sum_b c_b [band == b]; the t coefficient.
    # Times are shifted by their mean first so the design is well
    # conditioned (a shift only moves the intercepts).
    bands = np.unique(band)
    x = np.column_stack([t - t.mean()] + [(band == b).astype(float) for b in bands])
    coef, *_ = np.linalg.lstsq(x, v, rcond=None)
    return coef[0]


def test_pooled_slope_matches_lstsq_with_band_dummies(core):
    rng = np.random.default_rng(31)
    offsets = np.array([0.0, 0.8, -0.5, 1.7, 0.3])  # colour offsets
    for n, nb in ((6, 2), (25, 3), (120, 5), (400, 4)):
        t = np.sort(rng.uniform(60000.0, 60060.0, n))
        band = rng.integers(0, nb, n)
        band[: nb] = np.arange(nb)  # every band present
        v = 18.0 + offsets[band] + 0.02 * (t - t[0]) + rng.normal(0.0, 0.05, n)
        ours = pooled_slope(core, t, v, band)
        ref = ancova_slope_ref(t, v, band)
        assert close(ours, ref), f"n={n} bands={nb}: ours {ours!r} ref {ref!r}"

        # A band with a single point: its dummy fits it exactly in lstsq,
        # so it must not change the result (ours skips it by rule).
        t1 = np.append(t, 60030.0)
        v1 = np.append(v, 5.0)
        b1 = np.append(band, nb)
        assert close(pooled_slope(core, t1, v1, b1), ref)
        assert close(ancova_slope_ref(t1, v1, b1), ref)


def test_pooled_slope_undefined_cases(core):
    # definition in series.c: NaN when no band has 2 points at distinct
    # times (the lstsq design would be rank deficient in t)
    nan = np.isnan
    assert nan(pooled_slope(core, [1.0, 2.0, 3.0], [1.0, 2.0, 3.0], [0, 1, 2]))
    assert nan(pooled_slope(core, [1.0, 1.0, 3.0], [1.0, 2.0, 3.0], [0, 0, 1]))
    assert nan(pooled_slope(core, np.zeros(0), np.zeros(0), np.zeros(0, dtype=np.intc)))
    # one band: the plain OLS slope (source: numpy.polyfit deg 1)
    t = np.array([0.0, 1.0, 2.5, 4.0])
    v = np.array([1.0, 1.3, 2.1, 2.2])
    assert close(pooled_slope(core, t, v, [3, 3, 3, 3]), np.polyfit(t, v, 1)[0])
