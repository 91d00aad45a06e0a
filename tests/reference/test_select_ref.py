"""Reference checks for core/select: batch k-means, silhouette, X-means BIC
and histogram bin widths, through libodcore.so."""
import ctypes

import numpy as np
import pytest

from conftest import dptr

I32P = ctypes.POINTER(ctypes.c_int32)


def _setup(core):
    core.select_kmeans_run.argtypes = [
        ctypes.POINTER(ctypes.c_double), ctypes.c_size_t, ctypes.c_uint32,
        ctypes.c_uint32, ctypes.c_uint32, ctypes.c_uint32, ctypes.c_uint32,
        ctypes.c_uint64, ctypes.POINTER(ctypes.c_double), I32P,
        ctypes.POINTER(ctypes.c_double)]
    core.select_kmeans_run.restype = ctypes.c_int
    core.select_silhouette_run.argtypes = [
        ctypes.POINTER(ctypes.c_double), ctypes.c_size_t, ctypes.c_uint32,
        I32P, ctypes.c_uint32, ctypes.POINTER(ctypes.c_double)]
    core.select_silhouette_run.restype = ctypes.c_int
    core.select_bic.argtypes = [
        ctypes.POINTER(ctypes.c_double), ctypes.c_size_t, ctypes.c_uint32,
        ctypes.POINTER(ctypes.c_double), I32P, ctypes.c_uint32]
    core.select_bic.restype = ctypes.c_double
    core.select_fd_width.argtypes = [
        ctypes.POINTER(ctypes.c_double), ctypes.c_size_t,
        ctypes.POINTER(ctypes.c_double)]
    core.select_fd_width.restype = ctypes.c_double
    core.select_scott_width.argtypes = [
        ctypes.POINTER(ctypes.c_double), ctypes.c_size_t]
    core.select_scott_width.restype = ctypes.c_double


def ours_kmeans(core, X, k, restarts=10, max_iter=300, seed=7):
    _setup(core)
    X = np.ascontiguousarray(X, dtype=np.float64)
    n, d = X.shape
    cen = np.zeros((k, d))
    lab = np.zeros(n, dtype=np.int32)
    inertia = ctypes.c_double()
    rc = core.select_kmeans_run(dptr(X), n, d, k, restarts, max_iter, 0, seed,
                                dptr(cen), lab.ctypes.data_as(I32P),
                                ctypes.byref(inertia))
    assert rc == 0
    return cen, lab, inertia.value


def _datasets():
    from sklearn import datasets
    from sklearn.preprocessing import StandardScaler
    iris = datasets.load_iris().data
    wine = StandardScaler().fit_transform(datasets.load_wine().data)
    digits = datasets.load_digits().data
    return [("iris", iris, 3, True), ("wine", wine, 3, True),
            ("digits", digits, 10, False)]


@pytest.mark.parametrize("name,X,k,check_ari", _datasets(),
                         ids=lambda v: v if isinstance(v, str) else "")
def test_batch_kmeans_vs_sklearn(core, name, X, k, check_ari):
    from sklearn.cluster import KMeans
    from sklearn.metrics import adjusted_rand_score
    cen, lab, inertia = ours_kmeans(core, X, k)
    # source: scikit-learn KMeans (k-means++ init, 10 restarts, Lloyd).
    ref = KMeans(n_clusters=k, n_init=10, random_state=0).fit(X)
    # Our reported inertia is the sum of squared distances of the labels.
    own = float(((X - cen[lab]) ** 2).sum())
    assert abs(own - inertia) <= 1e-9 * own
    ari = adjusted_rand_score(ref.labels_, lab)
    print(f"\n{name}: k={k} inertia ours={inertia:.6f} "
          f"sklearn={ref.inertia_:.6f} ratio={inertia / ref.inertia_:.6f} "
          f"ARI={ari:.4f}")
    # source: scikit-learn KMeans inertia_; our target is within 1%.
    assert inertia <= ref.inertia_ * 1.01
    assert inertia >= ref.inertia_ * 0.99
    if check_ari:
        # source: sklearn.metrics.adjusted_rand_score
        assert ari >= 0.9


def test_batch_kmeans_deterministic(core):
    X = _datasets()[0][1]
    a = ours_kmeans(core, X, 3, seed=11)
    b = ours_kmeans(core, X, 3, seed=11)
    assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1])


@pytest.mark.parametrize("name,X,k,check_ari", _datasets(),
                         ids=lambda v: v if isinstance(v, str) else "")
def test_silhouette_vs_sklearn(core, name, X, k, check_ari):
    from sklearn.cluster import KMeans
    from sklearn.metrics import silhouette_score
    _setup(core)
    X = np.ascontiguousarray(X, dtype=np.float64)
    lab = KMeans(n_clusters=k, n_init=3, random_state=1).fit(X).labels_
    lab = np.ascontiguousarray(lab, dtype=np.int32)
    out = ctypes.c_double()
    rc = core.select_silhouette_run(dptr(X), X.shape[0], X.shape[1],
                                    lab.ctypes.data_as(I32P), k,
                                    ctypes.byref(out))
    assert rc == 0
    # source: sklearn.metrics.silhouette_score on the full set.
    ref = silhouette_score(X, lab)
    print(f"\n{name}: silhouette ours={out.value:.12f} sklearn={ref:.12f}")
    assert abs(out.value - ref) <= 1e-9 * abs(ref)


def test_silhouette_singleton_cluster(core):
    from sklearn.metrics import silhouette_score
    _setup(core)
    rng = np.random.default_rng(3)
    X = np.ascontiguousarray(rng.normal(size=(40, 3)))
    lab = np.zeros(40, dtype=np.int32)
    lab[20:] = 1
    lab[39] = 2  # a cluster of one point scores 0
    out = ctypes.c_double()
    assert core.select_silhouette_run(dptr(X), 40, 3, lab.ctypes.data_as(I32P),
                                      3, ctypes.byref(out)) == 0
    # source: sklearn.metrics.silhouette_score
    ref = silhouette_score(X, lab)
    assert abs(out.value - ref) <= 1e-9 * abs(ref)
    one = np.zeros(40, dtype=np.int32)
    assert core.select_silhouette_run(dptr(X), 40, 3, one.ctypes.data_as(I32P),
                                      3, ctypes.byref(out)) < 0


def bic_pelleg_moore(X, labels, centers):
    """X-means BIC written out from Pelleg & Moore (2000), section 3.2:
    sigma^2 = 1/(R-K) sum_i (x_i - mu_(i))^2;
    l(D_n) = -R_n/2 log(2 pi) - R_n M/2 log(sigma^2) - (R_n - K)/2
             + R_n log R_n - R_n log R;
    p_j = (K - 1) + M K + 1;  BIC = l(D) - p_j/2 log R."""
    R, M = X.shape
    K = centers.shape[0]
    resid = X - centers[labels]
    sigma2 = np.sum(resid * resid) / (R - K)
    ll = 0.0
    for c in range(K):
        Rn = np.count_nonzero(labels == c)
        if Rn == 0:
            continue
        ll += (-Rn / 2 * np.log(2 * np.pi) - Rn * M / 2 * np.log(sigma2)
               - (Rn - K) / 2 + Rn * np.log(Rn) - Rn * np.log(R))
    p = (K - 1) + M * K + 1
    return ll - p / 2 * np.log(R)


@pytest.mark.parametrize("k", [2, 3, 5, 8])
def test_bic_vs_paper_formula(core, k):
    from sklearn.datasets import make_blobs
    _setup(core)
    X, _ = make_blobs(n_samples=600, centers=4, n_features=5, random_state=4)
    X = np.ascontiguousarray(X)
    cen, lab, _ = ours_kmeans(core, X, k)
    got = core.select_bic(dptr(X), X.shape[0], X.shape[1], dptr(cen),
                          lab.ctypes.data_as(I32P), k)
    # source: Pelleg & Moore 2000, X-means, BIC formula (numpy, above).
    ref = bic_pelleg_moore(X, lab, cen)
    print(f"\nBIC k={k}: ours={got:.10f} paper formula={ref:.10f}")
    assert abs(got - ref) <= 1e-9 * abs(ref)


@pytest.mark.parametrize("n,dist", [(1, "normal"), (2, "normal"),
                                    (7, "normal"), (1000, "normal"),
                                    (5001, "exponential"), (64, "ties")])
def test_bin_widths_vs_astropy(core, n, dist):
    from astropy.stats import freedman_bin_width, scott_bin_width
    _setup(core)
    rng = np.random.default_rng(n)
    if dist == "normal":
        x = rng.normal(3.0, 2.0, size=n)
    elif dist == "exponential":
        x = rng.exponential(1.5, size=n)
    else:
        x = np.round(rng.normal(size=n))
    x = np.ascontiguousarray(x)
    scratch = np.zeros(n)
    fd = core.select_fd_width(dptr(x), n, dptr(scratch))
    sc = core.select_scott_width(dptr(x), n)
    # source: astropy.stats.freedman_bin_width / scott_bin_width
    ref_sc = scott_bin_width(x)
    if n < 4:
        # source: astropy.stats.freedman_bin_width raises for n < 4.
        with pytest.raises(ValueError):
            freedman_bin_width(x)
        assert np.isnan(fd)
        assert abs(sc - ref_sc) <= 1e-9 * max(abs(ref_sc), 1e-300)
        return
    ref_fd = freedman_bin_width(x)
    print(f"\nn={n} {dist}: FD ours={fd:.12g} astropy={ref_fd:.12g}; "
          f"Scott ours={sc:.12g} astropy={ref_sc:.12g}")
    assert abs(fd - ref_fd) <= 1e-9 * max(abs(ref_fd), 1e-300)
    assert abs(sc - ref_sc) <= 1e-9 * max(abs(ref_sc), 1e-300)
