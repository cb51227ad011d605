"""ctypes bindings of libveer's histogram and drift monitors, for the reference tests.

The structures mirror include/veer/histogram.h and include/veer/drift.h field by field.
"""
import ctypes as C
import os

import numpy as np

VEER_EINVAL = -1
VEER_ENONFINITE = -16
VEER_EFIELD = -20
VEER_EEMPTY = -30
VEER_EDIM = -31

OK, WATCH, ALARM = 0, 1, 2
CHANGED_PSI, CHANGED_EXCEED, CHANGED_FEATURE = 1, 2, 4


def load():
    build = os.environ.get("VEER_BUILD_DIR")
    if not build:
        raise RuntimeError("VEER_BUILD_DIR is not set (run through ctest)")
    lib = C.CDLL(os.path.join(build, "libveer.so"))
    _declare(lib)
    return lib


class Error(C.Structure):
    _fields_ = [("code", C.c_int), ("field", C.c_char * 96), ("message", C.c_char * 256)]


class HistSummary(C.Structure):
    _fields_ = [("count", C.c_uint64), ("underflow", C.c_uint64), ("overflow", C.c_uint64),
                ("min", C.c_uint64), ("max", C.c_uint64), ("mean", C.c_double),
                ("p50", C.c_uint64), ("p90", C.c_uint64), ("p99", C.c_uint64),
                ("p999", C.c_uint64)]


class HistIter(C.Structure):
    _fields_ = [("hist", C.c_void_p), ("next_index", C.c_uint32), ("lowest_ns", C.c_uint64),
                ("highest_ns", C.c_uint64), ("count", C.c_uint64), ("cumulative", C.c_uint64)]


FP = C.POINTER(C.c_float)


class Training(C.Structure):
    _fields_ = [("state_dim", C.c_uint32), ("mean", FP), ("cov", FP), ("precision", FP),
                ("bins", C.c_uint32), ("quantile_edges", FP), ("mahalanobis_p99", C.c_float),
                ("mahalanobis_p999", C.c_float)]


class Config(C.Structure):
    _fields_ = [("window", C.c_uint32), ("psi_floor", C.c_double),
                ("psi_watch_raise", C.c_double), ("psi_watch_clear", C.c_double),
                ("psi_alarm_raise", C.c_double), ("psi_alarm_clear", C.c_double),
                ("exceed_raise", C.c_double), ("exceed_clear", C.c_double),
                ("publish_every", C.c_uint32)]


class Result(C.Structure):
    _fields_ = [("mahalanobis", C.c_double), ("out_of_coverage", C.c_int),
                ("changed", C.c_uint)]


class Report(C.Structure):
    _fields_ = [("state_dim", C.c_uint32), ("window", C.c_uint32), ("fill", C.c_uint32),
                ("states_total", C.c_uint64), ("out_of_coverage_total", C.c_uint64),
                ("out_of_coverage_window", C.c_uint32),
                ("psi", C.POINTER(C.c_double)), ("mean_shift", C.POINTER(C.c_double)),
                ("psi_level", C.POINTER(C.c_int)), ("psi_max", C.c_double),
                ("psi_max_feature", C.c_uint32), ("psi_overall", C.c_int),
                ("exceed_count", C.c_uint32), ("exceed_rate", C.c_double),
                ("exceed_level", C.c_int), ("level", C.c_int),
                ("level_changes", C.c_uint64), ("publish_seq", C.c_uint64)]


def _declare(lib):
    vp, u64, i = C.c_void_p, C.c_uint64, C.c_int
    sig = {
        "veer_hist_create": (i, [C.POINTER(vp)]),
        "veer_hist_destroy": (None, [vp]),
        "veer_hist_record": (None, [vp, u64]),
        "veer_hist_record_n": (None, [vp, u64, u64]),
        "veer_hist_merge": (i, [vp, vp]),
        "veer_hist_count": (u64, [vp]),
        "veer_hist_max": (u64, [vp]),
        "veer_hist_min": (u64, [vp]),
        "veer_hist_mean": (C.c_double, [vp]),
        "veer_hist_percentile": (i, [vp, C.c_double, C.POINTER(u64)]),
        "veer_hist_summarize": (i, [vp, C.POINTER(HistSummary)]),
        "veer_hist_count_le": (u64, [vp, u64]),
        "veer_hist_bucket_ceiling": (u64, [u64]),
        "veer_hist_iter_init": (None, [C.POINTER(HistIter), vp]),
        "veer_hist_iter_next": (i, [C.POINTER(HistIter)]),
        "veer_drift_config_init": (None, [C.POINTER(Config)]),
        "veer_drift_create": (i, [C.POINTER(Training), C.POINTER(Config), C.POINTER(vp),
                                  C.POINTER(Error)]),
        "veer_drift_destroy": (None, [vp]),
        "veer_drift_add": (i, [vp, FP, C.POINTER(Result), C.POINTER(Error)]),
        "veer_drift_check": (i, [vp, FP, C.POINTER(C.c_double)]),
        "veer_drift_reset": (None, [vp]),
        "veer_drift_read": (i, [vp, C.POINTER(Report)]),
        "veer_drift_publish": (None, [vp]),
        "veer_drift_snapshot": (i, [vp, C.POINTER(Report)]),
    }
    for name, (res, args) in sig.items():
        f = getattr(lib, name)
        f.restype = res
        f.argtypes = args


class Hist:
    def __init__(self, lib):
        self.lib = lib
        self.h = C.c_void_p()
        assert lib.veer_hist_create(C.byref(self.h)) == 0

    def __del__(self):
        self.lib.veer_hist_destroy(self.h)

    def record_all(self, values):
        rec = self.lib.veer_hist_record
        for v in values:
            rec(self.h, int(v))

    def percentile(self, p):
        out = C.c_uint64()
        rc = self.lib.veer_hist_percentile(self.h, p, C.byref(out))
        return rc, out.value

    def buckets(self):
        it = HistIter()
        self.lib.veer_hist_iter_init(C.byref(it), self.h)
        out = []
        while self.lib.veer_hist_iter_next(C.byref(it)):
            out.append((it.lowest_ns, it.highest_ns, it.count, it.cumulative))
        return out


def f32p(a):
    return a.ctypes.data_as(FP)


class Drift:
    """A drift monitor over float32 copies of the given statistics (kept alive here)."""

    def __init__(self, lib, mean, cov, precision, edges, p99, p999, config=None):
        self.lib = lib
        self.arrays = [np.ascontiguousarray(a, dtype=np.float32)
                       for a in (mean, cov, precision, edges)]
        n = self.arrays[0].size
        bins = self.arrays[3].shape[1] + 1
        self.n = n
        self.train = Training(n, f32p(self.arrays[0]), f32p(self.arrays[1]),
                              f32p(self.arrays[2]), bins, f32p(self.arrays[3]), p99, p999)
        self.d = C.c_void_p()
        self.err = Error()
        self.rc = lib.veer_drift_create(C.byref(self.train),
                                        C.byref(config) if config is not None else None,
                                        C.byref(self.d), C.byref(self.err))
        self.psi = np.zeros(n)
        self.shift = np.zeros(n)
        self.levels = np.zeros(n, dtype=np.int32)
        self.report = Report()
        self.report.state_dim = n
        self.report.psi = self.psi.ctypes.data_as(C.POINTER(C.c_double))
        self.report.mean_shift = self.shift.ctypes.data_as(C.POINTER(C.c_double))
        self.report.psi_level = self.levels.ctypes.data_as(C.POINTER(C.c_int))

    def __del__(self):
        if self.d:
            self.lib.veer_drift_destroy(self.d)

    def add(self, state):
        x = np.ascontiguousarray(state, dtype=np.float32)
        res = Result()
        err = Error()
        rc = self.lib.veer_drift_add(self.d, f32p(x), C.byref(res), C.byref(err))
        return rc, res, err

    def read(self, snapshot=False):
        fn = self.lib.veer_drift_snapshot if snapshot else self.lib.veer_drift_read
        assert fn(self.d, C.byref(self.report)) == 0
        return self.report
