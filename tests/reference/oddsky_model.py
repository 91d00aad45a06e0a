"""ctypes view of core/model.h for the reference checks.

Parameters are set by name through model_params_set() so this file does
not mirror the C struct layout.
"""
import ctypes

import numpy as np

RESULT_FIELDS = ["warm", "cluster", "distance", "cluster_weight", "novelty",
                 "density_novelty", "space_novelty", "tail_prob", "threshold",
                 "flag", "seq"]


class Model:
    def __init__(self, lib, dim, **params):
        self.lib = lib
        self.dim = dim
        lib.model_params_size.restype = ctypes.c_size_t
        lib.model_params_set.argtypes = [ctypes.c_void_p, ctypes.c_char_p,
                                         ctypes.c_double]
        lib.model_params_set.restype = ctypes.c_int
        lib.model_params_default.argtypes = [ctypes.c_void_p, ctypes.c_uint32]
        lib.model_new.argtypes = [ctypes.c_void_p, ctypes.POINTER(ctypes.c_int)]
        lib.model_new.restype = ctypes.c_void_p
        lib.model_free.argtypes = [ctypes.c_void_p]
        lib.model_observe_flat.argtypes = [
            ctypes.c_void_p, ctypes.POINTER(ctypes.c_double),
            ctypes.POINTER(ctypes.c_double), ctypes.POINTER(ctypes.c_uint8),
            ctypes.c_double, ctypes.c_int, ctypes.POINTER(ctypes.c_double)]
        lib.model_observe_flat.restype = ctypes.c_int
        lib.model_observe_many.argtypes = [
            ctypes.c_void_p, ctypes.POINTER(ctypes.c_double),
            ctypes.POINTER(ctypes.c_double), ctypes.c_size_t, ctypes.c_int,
            ctypes.POINTER(ctypes.c_double)]
        lib.model_observe_many.restype = ctypes.c_int
        lib.model_bytes.argtypes = [ctypes.c_void_p]
        lib.model_bytes.restype = ctypes.c_size_t
        self._p = ctypes.create_string_buffer(lib.model_params_size())
        lib.model_params_default(self._p, dim)
        for k, v in params.items():
            rc = lib.model_params_set(self._p, k.encode(), float(v))
            if rc != 0:
                raise ValueError(f"model_params_set({k}) = {rc}")
        err = ctypes.c_int(0)
        self.m = lib.model_new(self._p, ctypes.byref(err))
        if not self.m:
            raise RuntimeError(f"model_new failed: {err.value}")

    def observe_many(self, X, t, learn=True):
        """Observe rows of X (NaN = missing) at times t; returns a dict of
        arrays named as RESULT_FIELDS."""
        X = np.ascontiguousarray(X, dtype=np.float64)
        t = np.ascontiguousarray(t, dtype=np.float64)
        n = X.shape[0]
        assert X.shape[1] == self.dim and t.shape == (n,)
        out = np.zeros((n, len(RESULT_FIELDS)), dtype=np.float64)
        dp = ctypes.POINTER(ctypes.c_double)
        rc = self.lib.model_observe_many(
            self.m, X.ctypes.data_as(dp), t.ctypes.data_as(dp), n,
            1 if learn else 0, out.ctypes.data_as(dp))
        assert rc == 0, rc
        return {k: out[:, i] for i, k in enumerate(RESULT_FIELDS)}

    def bytes(self):
        return self.lib.model_bytes(self.m)

    def close(self):
        if self.m:
            self.lib.model_free(self.m)
            self.m = None

    def __del__(self):
        self.close()
