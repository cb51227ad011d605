"""ctypes bindings for veer's task encoder (include/veer/runtime.h), shared by the encoder's
reference tests. Only the few functions the tests call are declared."""
import ctypes

import numpy as np

SAMPLES, GOALS, REFERENCE = 1, 2, 3
OPT_DEFAULT = -1


class Spec(ctypes.Structure):
    _fields_ = [
        ("source", ctypes.c_int),
        ("count", ctypes.c_uint32),
        ("states", ctypes.POINTER(ctypes.c_float)),
        ("values", ctypes.POINTER(ctypes.c_float)),
        ("rescale", ctypes.c_int),
        ("center", ctypes.c_int),
        ("cov_correction", ctypes.c_int),
        ("ridge", ctypes.c_float),
        ("max_count", ctypes.c_uint32),
    ]


class Report(ctypes.Structure):
    _fields_ = [("r2", ctypes.c_double), ("norm_raw", ctypes.c_double),
                ("mean_reward", ctypes.c_double)]


class Error(ctypes.Structure):
    _fields_ = [("code", ctypes.c_int), ("field", ctypes.c_char * 96),
                ("message", ctypes.c_char * 256)]


class EncodeError(Exception):
    def __init__(self, code, field, message):
        super().__init__(f"{code} {field}: {message}")
        self.code, self.field, self.message = code, field, message


def bind(lib):
    """Declares the encoder's signatures on a loaded libveer."""
    lib.veer_task_spec_init.argtypes = [ctypes.POINTER(Spec), ctypes.c_int]
    lib.veer_task_spec_init.restype = None
    lib.veer_task_encode.argtypes = [ctypes.c_void_p, ctypes.POINTER(Spec),
                                     ctypes.POINTER(ctypes.c_float), ctypes.POINTER(Report),
                                     ctypes.POINTER(Error)]
    lib.veer_task_encode.restype = ctypes.c_int
    return lib


def _fptr(a):
    return a.ctypes.data_as(ctypes.POINTER(ctypes.c_float))


def encode(lib, bundle, z_dim, source, values, states=None, **options):
    """Runs veer_task_encode; returns (z, report) or raises EncodeError.
    `options` sets spec fields (rescale, center, cov_correction, ridge, max_count)."""
    spec = Spec()
    lib.veer_task_spec_init(ctypes.byref(spec), source)
    values = np.ascontiguousarray(values, dtype=np.float32)
    spec.count = options.pop("count", len(values))
    spec.values = _fptr(values)
    if states is not None:
        states = np.ascontiguousarray(states, dtype=np.float32)
        spec.states = _fptr(states)
    for k, v in options.items():
        setattr(spec, k, v)
    z = np.zeros(z_dim, dtype=np.float32)
    report, err = Report(), Error()
    rc = lib.veer_task_encode(bundle, ctypes.byref(spec), _fptr(z), ctypes.byref(report),
                              ctypes.byref(err))
    if rc != 0:
        raise EncodeError(rc, err.field.decode(), err.message.decode())
    return z, report
