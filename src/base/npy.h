/* Reading and writing NumPy .npy files (format versions 1.0, 2.0 and 3.0).
 *
 * The trainer reads its transition logs from .npy files and tests exchange arrays with NumPy
 * through them. The format is small and fully specified (numpy.lib.format: magic "\x93NUMPY",
 * a version, a little-endian header length, then a Python dict literal with 'descr',
 * 'fortran_order' and 'shape', padded so the data starts on a 64-byte boundary). No Debian C
 * library reads it, so it is hand-written here, with a strict parser: any header that is not
 * exactly a dict of those three keys is refused with VEER_ENPY and a message naming the key.
 *
 * Arrays are always handed out in C order and native byte order: big-endian and Fortran-order
 * files are converted on load. The writer produces the same bytes as numpy.save for C-order,
 * little-endian arrays (checked in tests/train/test_npy.c against files numpy wrote).
 */
#ifndef VEER_NPY_H
#define VEER_NPY_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"

#define VEER_NPY_MAX_DIMS 8
#define VEER_NPY_MAX_HEADER (1u << 20) /* a header longer than 1 MiB is refused as corrupt */

typedef enum veer__npy_dtype {
    VEER_NPY_F32 = 1, /* '<f4' */
    VEER_NPY_F64 = 2, /* '<f8' */
    VEER_NPY_I32 = 3, /* '<i4' */
    VEER_NPY_I64 = 4, /* '<i8' */
    VEER_NPY_U8 = 5,  /* '|u1' */
    VEER_NPY_BOOL = 6 /* '|b1' */
} veer__npy_dtype;

typedef struct veer__npy {
    veer__npy_dtype dtype;
    uint32_t ndim;                   /* 0 for a scalar */
    uint64_t shape[VEER_NPY_MAX_DIMS];
    uint64_t count;                  /* product of the shape (1 for a scalar) */
    size_t itemsize;
    void *data;                      /* count * itemsize bytes, C order, native byte order;
                                        owned by the struct, released by veer__npy_free */
} veer__npy;

/* The dtype's NumPy name ("float32", ...) for messages. */
const char *veer__npy_dtype_name(veer__npy_dtype dtype);

/* Parses a whole .npy file held in `buf`. On success `out` owns a copy of the data.
 * On error `out` is zeroed and `err` names the header key ("descr", "shape", "fortran_order"),
 * "magic", "version", "header" or "data". Any thread. */
int veer__npy_parse(const void *buf, size_t len, veer__npy *out, veer_error *err);

/* Reads and parses the file at `path`; messages start with the path. VEER_EIO when the file
 * cannot be read. */
int veer__npy_read(const char *path, veer__npy *out, veer_error *err);

/* Releases the data and zeroes the struct. NULL is allowed. */
void veer__npy_free(veer__npy *a);

/* Writes `data` (C order, native little-endian) as a .npy file, version 1.0 (2.0 when the
 * header needs it). `ndim` may be 0 (scalar). Writes to a temporary file and renames it, so a
 * crash never leaves a half-written array under `path`. */
int veer__npy_write(const char *path, veer__npy_dtype dtype, uint32_t ndim,
                    const uint64_t *shape, const void *data, veer_error *err);

/* Serialises into a buffer the caller frees with veer__free (*len receives the size). */
int veer__npy_serialize(veer__npy_dtype dtype, uint32_t ndim, const uint64_t *shape,
                        const void *data, void **buf, size_t *len, veer_error *err);

#endif
