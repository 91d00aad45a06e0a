"""Decay of the space sketch's counters and of the calibrator's mass against
the closed form sum_i 2^(-(t - t_i)/H), computed in numpy.

Source of the expected values: the definition of an exponentially decaying
count with half-life H (DESIGN.md "decay"; the closed form is evaluated
directly in numpy float64 / math.fsum, independent of core/decay.c's
scaled-counter scheme).  The streams run for more than 60 half-lives (so
the counters are renormalised by 2^-60 at least once) and include a gap of
more than 1000 half-lives.
"""
import ctypes
import math

import numpy as np
import pytest

from conftest import dptr

REL = 1e-9


def _bind(core):
    c = core
    c.sketch_new_flat.restype = ctypes.c_void_p
    c.sketch_new_flat.argtypes = [ctypes.c_uint32] * 6 + [ctypes.c_double,
                                                          ctypes.c_uint64]
    c.sketch_free.argtypes = [ctypes.c_void_p]
    c.sketch_fit.argtypes = [ctypes.c_void_p, ctypes.POINTER(ctypes.c_double),
                             ctypes.c_void_p, ctypes.c_size_t]
    c.sketch_advance.argtypes = [ctypes.c_void_p, ctypes.c_double]
    c.sketch_update.argtypes = [ctypes.c_void_p,
                                ctypes.POINTER(ctypes.c_double),
                                ctypes.c_void_p]
    c.sketch_bin_count.restype = ctypes.c_double
    c.sketch_bin_count.argtypes = [ctypes.c_void_p,
                                   ctypes.POINTER(ctypes.c_double),
                                   ctypes.c_void_p, ctypes.c_uint32,
                                   ctypes.c_uint32]
    c.sketch_mass.restype = ctypes.c_double
    c.sketch_mass.argtypes = [ctypes.c_void_p]
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
    c.calib_advance.argtypes = [ctypes.c_void_p, ctypes.c_double]
    c.calib_mass.restype = ctypes.c_double
    c.calib_mass.argtypes = [ctypes.c_void_p]
    return c


def closed_form(times, t, H):
    """sum_i 2^(-(t - t_i)/H) over t_i <= t, summed exactly (math.fsum)."""
    ti = np.asarray(times, dtype=np.float64)
    ti = ti[ti <= t]
    return math.fsum(np.exp2(-(t - ti) / H))


def event_times(H, seed):
    """A stream of ~70 half-lives with irregular spacing, a gap of 1010
    half-lives, then ~70 half-lives more."""
    rng = np.random.default_rng(seed)
    a = np.cumsum(rng.exponential(H / 40, size=2800)) + 60000.0
    gap_end = a[-1] + 1010.0 * H
    b = gap_end + np.cumsum(rng.exponential(H / 40, size=2800))
    return a, b


def check_points(a, b, H):
    """Times at which to compare: inside the first run, after it crosses
    60 half-lives, right after the gap (before new inserts), and later."""
    return [a[100], a[1200], a[2500], a[-1], a[-1] + 1010.0 * H - 1e-9 * H,
            b[0], b[1500], b[-1]]


@pytest.mark.parametrize("H", [0.5, 3.0])
def test_sketch_counter_decay_matches_closed_form(core, H):
    c = _bind(core)
    sk = c.sketch_new_flat(2, 4, 3, 5, 64, 2, H, 7)
    assert sk
    try:
        rng = np.random.default_rng(1)
        warm = np.ascontiguousarray(rng.normal(size=(64, 2)))
        assert c.sketch_fit(sk, dptr(warm), None, 64) == 0
        z0 = np.array([0.3, -0.2])
        a, b = event_times(H, 11)
        stream = np.concatenate([a, b])
        assert (a[-1] - a[0]) / H > 60  # crosses a renormalisation
        checks = sorted(check_points(a, b, H))
        ci = 0
        seen = []
        for t in stream:
            while ci < len(checks) and checks[ci] < t:
                tc = checks[ci]
                c.sketch_advance(sk, tc)
                want = closed_form(seen, tc, H)
                for chain in range(3):
                    for level in (0, 4):
                        got = c.sketch_bin_count(sk, dptr(z0), None, chain,
                                                 level)
                        # source: closed form sum 2^(-(t - t_i)/H), numpy
                        assert got == pytest.approx(want, rel=REL, abs=0), \
                            (tc, chain, level, got, want)
                assert c.sketch_mass(sk) == pytest.approx(want, rel=REL,
                                                          abs=0)
                ci += 1
            c.sketch_advance(sk, t)
            c.sketch_update(sk, dptr(z0), None)
            seen.append(t)
        want = closed_form(seen, stream[-1], H)
        got = c.sketch_bin_count(sk, dptr(z0), None, 1, 2)
        assert got == pytest.approx(want, rel=REL, abs=0)
    finally:
        c.sketch_free(sk)


def test_sketch_value_right_after_long_gap(core):
    """After 1010 half-lives of silence the count is about 2^-1010 times
    what it was: still a normal double, and it must match."""
    c = _bind(core)
    H = 1.0
    sk = c.sketch_new_flat(1, 1, 1, 1, 16, 1, H, 3)
    try:
        z = np.array([0.1])
        times = [100.0 + 0.37 * i for i in range(200)]  # 73.6 half-lives
        for t in times:
            c.sketch_advance(sk, t)
            c.sketch_update(sk, dptr(z), None)
        t_end = times[-1] + 1010.25
        c.sketch_advance(sk, t_end)
        want = closed_form(times, t_end, H)
        assert want > 0 and want < 1e-300
        got = c.sketch_bin_count(sk, dptr(z), None, 0, 0)
        # source: closed form, numpy exp2
        assert got == pytest.approx(want, rel=REL, abs=0)
    finally:
        c.sketch_free(sk)


@pytest.mark.parametrize("H", [0.25, 3.0])
def test_calib_mass_decay_matches_closed_form(core, H):
    c = _bind(core)
    cal = c.calib_new_flat(256, 1e6, H, 1, 1e-3, 10, 1e5, 0.01)
    assert cal
    try:
        a, b = event_times(H, 5)
        rng = np.random.default_rng(9)
        for part in (a, b):
            # check inside the part, then at its end
            cut = len(part) // 2
            for lo, hi in ((0, cut), (cut, len(part))):
                t = np.ascontiguousarray(part[lo:hi])
                s = np.ascontiguousarray(rng.standard_cauchy(size=len(t)))
                assert c.calib_observe_many(cal, dptr(s), dptr(t),
                                            len(t)) == len(t)
                upto = t[-1]
                allt = np.concatenate([a, b])
                want = closed_form(allt[allt <= upto], upto, H)
                # source: closed form sum 2^(-(t - t_i)/H), numpy
                assert c.calib_mass(cal) == pytest.approx(want, rel=REL,
                                                          abs=0)
        # right after a further gap of 1005 half-lives, no new data
        t_end = b[-1] + 1005.5 * H
        c.calib_advance(cal, t_end)
        want = closed_form(np.concatenate([a, b]), t_end, H)
        assert want > 0
        assert c.calib_mass(cal) == pytest.approx(want, rel=REL, abs=0)
    finally:
        c.calib_free(cal)
