"""Shared fixtures for the reference checks.

The checks load build/libodcore.so with ctypes and compare what core/
computes against outside libraries (numpy, scipy, scikit-learn, astropy,
River) and published formulas.  Each test names its source beside the
check.
"""
import ctypes
import os

import pytest


@pytest.fixture(scope="session")
def core():
    path = os.environ.get("ODDSKY_CORE_LIB", "build/libodcore.so")
    if not os.path.exists(path):
        pytest.fail(f"{path} is missing: run make first")
    return ctypes.CDLL(path)


def dptr(a):
    """Pointer to a C-contiguous float64 numpy array."""
    import numpy as np
    assert a.dtype == np.float64 and a.flags["C_CONTIGUOUS"]
    return a.ctypes.data_as(ctypes.POINTER(ctypes.c_double))
