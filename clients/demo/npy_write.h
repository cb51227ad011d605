/* Writing float32 arrays as NumPy .npy files (format version 1.0), through libveer's writer.
 * libveer's writer (src/base/npy.h) is hand-written because Debian carries no maintained C
 * library for .npy; it writes under a temporary name and renames, so a reader never sees half a
 * file.
 */
#ifndef VEER_DEMO_NPY_WRITE_H
#define VEER_DEMO_NPY_WRITE_H

#include <stddef.h>

#include "veer/error.h"

/* Writes `data` (rows × cols float32 in C order; cols 0 writes a 1-D array of `rows`) to `path`.
 * Returns 0, or VEER_EIO with `err` naming the path and the system's reason. The caller owns
 * `data`. */
int veer_demo_npy_write_f32(const char *path, const float *data, size_t rows, size_t cols,
                            veer_error *err);

#endif
