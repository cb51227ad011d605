/* The demo's .npy output goes through libveer's own writer (src/base/npy.c, the same code the
 * trainer reads logs with), so the log generator and `veer train` cannot disagree on the
 * format. This file only adapts the demo's 1-D/2-D float32 call to it. */
#include "npy_write.h"

#include <stdio.h>

#include "base/npy.h"

int veer_demo_npy_write_f32(const char *path, const float *data, size_t rows, size_t cols,
                            veer_error *err)
{
    uint64_t shape[2] = {rows, cols};
    int rc = veer__npy_write(path, VEER_NPY_F32, cols == 0 ? 1u : 2u, shape, data, err);
    /* The library names the file as the field; for the demo's callers the field is the path
     * argument, and the message already names the file. */
    if (rc != 0 && err != NULL)
        snprintf(err->field, sizeof err->field, "path");
    return rc;
}
