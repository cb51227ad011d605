"""ctypes bindings to libveer (include/veer/runtime.h) for the reference tests.

Only the calls the tests need, declared from the public header. The library is
$VEER_BUILD_DIR/libveer.so; arrays cross as contiguous float32 NumPy buffers.
"""
from __future__ import annotations

import ctypes as C
import os

import numpy as np

F32P = C.POINTER(C.c_float)
U32P = C.POINTER(C.c_uint32)


class VeerError(C.Structure):
    _fields_ = [("code", C.c_int), ("field", C.c_char * 96), ("message", C.c_char * 256)]


class ModelInfo(C.Structure):
    """veer_model_info, field for field in runtime.h's order."""
    _fields_ = [
        ("model_version", C.c_char_p), ("digest", C.POINTER(C.c_uint8)),
        ("state_dim", C.c_uint32), ("z_dim", C.c_uint32),
        ("discount", C.c_float), ("decision_step_s", C.c_float),
        ("feature_names", C.POINTER(C.c_char_p)),
        ("action_kind", C.c_int), ("action_dim", C.c_uint32), ("action_count", C.c_uint32),
        ("action_low", F32P), ("action_high", F32P), ("fallback_action", F32P),
        ("b_features", U32P), ("b_feature_count", C.c_uint32),
        ("rescale", C.c_int), ("rescale_norm", C.c_float), ("center_rewards", C.c_int),
        ("ridge", C.c_float),
        ("has_stats", C.c_int), ("stats_count", C.c_uint64),
        ("state_mean", F32P), ("state_cov", F32P), ("state_precision", F32P),
        ("cov_ridge", C.c_float), ("bins", C.c_uint32), ("quantile_edges", F32P),
        ("mahalanobis_p99", C.c_float), ("mahalanobis_p999", C.c_float),
        ("reference_count", C.c_uint32), ("reference_states", F32P), ("reference_b", F32P),
        ("cov_b", F32P),
        ("producer", C.c_char_p), ("created", C.c_char_p), ("source_digest", C.c_char_p),
        ("settings", C.c_char_p), ("notes", C.c_char_p),
    ]


class TaskSpec(C.Structure):
    _fields_ = [("source", C.c_int), ("count", C.c_uint32), ("states", F32P), ("values", F32P),
                ("rescale", C.c_int), ("center", C.c_int), ("cov_correction", C.c_int),
                ("ridge", C.c_float), ("max_count", C.c_uint32)]


class TaskReport(C.Structure):
    _fields_ = [("r2", C.c_double), ("norm_raw", C.c_double), ("mean_reward", C.c_double)]


UNWRITTEN = -7777.0
TASK_SAMPLES, TASK_GOALS, TASK_REFERENCE = 1, 2, 3
ACT_CLIPPED, ACT_FALLBACK, ACT_NONFINITE = 1, 2, 4

# Codes from include/veer/error.h (the numbers are stable by that header's rule).
CODES = {"EINVAL": -1, "ENOMEM": -2, "EIO": -3, "ENOTBUNDLE": -10, "EVERSION": -11,
         "ECHECKSUM": -12, "EDECODE": -13, "EDIMCHAIN": -14, "ENETMISSING": -15,
         "ENONFINITE": -16, "EBOUNDS": -17, "EREFSHAPE": -18, "ESTATSSIZE": -19, "EFIELD": -20,
         "EFALLBACK": -21, "EEMPTY": -30, "EDIM": -31, "ENOSIGNAL": -32, "ETOOMANY": -33,
         "ESINGULAR": -34}


def load_library():
    build = os.environ.get("VEER_BUILD_DIR")
    if not build:
        raise RuntimeError("VEER_BUILD_DIR is not set (run the tests through ctest)")
    lib = C.CDLL(os.path.join(build, "libveer.so"))
    V = C.c_void_p
    sig = {
        "veer_bundle_open": (C.c_int, [C.c_char_p, C.POINTER(V), C.POINTER(VeerError)]),
        "veer_bundle_open_mem": (C.c_int, [C.c_char_p, C.c_size_t, C.POINTER(V),
                                           C.POINTER(VeerError)]),
        "veer_bundle_close": (None, [V]),
        "veer_bundle_info": (C.POINTER(ModelInfo), [V]),
        "veer_workspace_create": (C.c_int, [V, C.c_uint32, C.POINTER(V), C.POINTER(VeerError)]),
        "veer_workspace_destroy": (None, [V]),
        "veer_act": (C.c_int, [V, F32P, F32P, F32P, F32P, U32P]),
        "veer_act_batch": (C.c_int, [V, C.c_size_t, F32P, F32P, F32P, F32P, U32P]),
        "veer_act_each": (C.c_int, [V, C.c_size_t, F32P, F32P, F32P, F32P, U32P]),
        "veer_eval_forward": (C.c_int, [V, C.c_size_t, F32P, F32P, F32P, F32P]),
        "veer_eval_backward": (C.c_int, [V, C.c_size_t, F32P, F32P]),
        "veer_eval_actor": (C.c_int, [V, C.c_size_t, F32P, F32P, F32P]),
        "veer_task_spec_init": (None, [C.POINTER(TaskSpec), C.c_int]),
        "veer_task_encode": (C.c_int, [V, C.POINTER(TaskSpec), F32P, C.POINTER(TaskReport),
                                       C.POINTER(VeerError)]),
        "veer_errname": (C.c_char_p, [C.c_int]),
    }
    for name, (res, args) in sig.items():
        fn = getattr(lib, name)
        fn.restype, fn.argtypes = res, args
    return lib


def f32(a) -> np.ndarray:
    return np.ascontiguousarray(np.asarray(a, dtype=np.float32))


def ptr(a: np.ndarray):
    return a.ctypes.data_as(F32P)


class LoadError(Exception):
    def __init__(self, code, field, message):
        super().__init__(f"{code} {field}: {message}")
        self.code, self.field, self.message = code, field, message


class Runtime:
    """One open bundle and one workspace in libveer."""

    def __init__(self, lib, data: bytes, max_batch: int = 64):
        self.lib = lib
        self.bundle = C.c_void_p()
        self.ws = C.c_void_p()
        err = VeerError()
        rc = lib.veer_bundle_open_mem(data, len(data), C.byref(self.bundle), C.byref(err))
        if rc != 0:
            raise LoadError(rc, err.field.decode(), err.message.decode())
        rc = lib.veer_workspace_create(self.bundle, max_batch, C.byref(self.ws), C.byref(err))
        if rc != 0:
            lib.veer_bundle_close(self.bundle)
            raise LoadError(rc, err.field.decode(), err.message.decode())
        self.info = lib.veer_bundle_info(self.bundle).contents
        self.z_dim = self.info.z_dim
        self.adim = self.info.action_dim

    def close(self):
        if self.ws:
            self.lib.veer_workspace_destroy(self.ws)
            self.ws = C.c_void_p()
        if self.bundle:
            self.lib.veer_bundle_close(self.bundle)
            self.bundle = C.c_void_p()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def _check(self, rc, what):
        if rc != 0:
            raise RuntimeError(f"{what} returned {rc} ({self.lib.veer_errname(rc).decode()})")

    def F(self, states, actions, zs):
        s, a, z = f32(states), f32(actions), f32(zs)
        out = np.zeros((s.shape[0], self.z_dim), np.float32)
        self._check(self.lib.veer_eval_forward(self.ws, s.shape[0], ptr(s), ptr(a), ptr(z),
                                               ptr(out)), "veer_eval_forward")
        return out

    def B(self, states):
        s = f32(states)
        out = np.zeros((s.shape[0], self.z_dim), np.float32)
        self._check(self.lib.veer_eval_backward(self.ws, s.shape[0], ptr(s), ptr(out)),
                    "veer_eval_backward")
        return out

    def actor(self, states, zs):
        s, z = f32(states), f32(zs)
        out = np.zeros((s.shape[0], self.adim), np.float32)
        self._check(self.lib.veer_eval_actor(self.ws, s.shape[0], ptr(s), ptr(z), ptr(out)),
                    "veer_eval_actor")
        return out

    def _act_rows(self, name, states, zs):
        s, zz = f32(states), f32(zs)
        n = s.shape[0]
        a = np.zeros((n, self.adim), np.float32)
        v = np.zeros(n, np.float32)
        fl = np.zeros(n, np.uint32)
        self._check(getattr(self.lib, name)(self.ws, n, ptr(s), ptr(zz), ptr(a), ptr(v),
                                            fl.ctypes.data_as(U32P)), name)
        return a, v, fl

    def act_batch(self, states, z):
        """veer_act_batch: one task vector z for every state."""
        return self._act_rows("veer_act_batch", states, z)

    def act_each(self, states, zs):
        """veer_act_each: row i of zs is the task of state i."""
        return self._act_rows("veer_act_each", states, zs)

    def act(self, state, z):
        s, zz = f32(state), f32(z)
        a = np.full(self.adim, UNWRITTEN, np.float32)  # to see whether libveer wrote it
        v = C.c_float()
        fl = C.c_uint32()
        rc = self.lib.veer_act(self.ws, ptr(s), ptr(zz), ptr(a), C.byref(v), C.byref(fl))
        return rc, a, v.value, fl.value

    def encode(self, source, states=None, values=None, **opts):
        spec = TaskSpec()
        self.lib.veer_task_spec_init(C.byref(spec), source)
        keep = []
        if states is not None:
            s = f32(states)
            keep.append(s)
            spec.states = ptr(s)
        v = f32(values)
        keep.append(v)
        spec.values = ptr(v)
        spec.count = v.shape[0]
        for k, val in opts.items():
            setattr(spec, k, val)
        z = np.zeros(self.z_dim, np.float32)
        rep = TaskReport()
        err = VeerError()
        rc = self.lib.veer_task_encode(self.bundle, C.byref(spec), ptr(z), C.byref(rep),
                                       C.byref(err))
        return rc, z, rep, err
