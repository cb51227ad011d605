/* .npy writer (format notes in npy_write.h). */
#include "npy_write.h"

#include <errno.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"

#if defined(__BYTE_ORDER__) && __BYTE_ORDER__ != __ORDER_LITTLE_ENDIAN__
#error "npy_write.c writes host floats as '<f4' and supports little-endian hosts only"
#endif

int veer_demo_npy_write_f32(const char *path, const float *data, size_t rows, size_t cols,
                            veer_error *err)
{
    char dict[128];
    int n = cols ? snprintf(dict, sizeof dict,
                            "{'descr': '<f4', 'fortran_order': False, 'shape': (%zu, %zu), }", rows,
                            cols)
                 : snprintf(dict, sizeof dict,
                            "{'descr': '<f4', 'fortran_order': False, 'shape': (%zu,), }", rows);
    /* magic(6) + version(2) + length(2) + dict + padding + '\n' is a multiple of 64. */
    size_t total = 10 + (size_t)n + 1;
    size_t pad = (64 - total % 64) % 64;
    uint16_t hlen = (uint16_t)(n + pad + 1);
    char header[256];
    memcpy(header, "\x93NUMPY\x01\x00", 8);
    header[8] = (char)(hlen & 0xff);
    header[9] = (char)(hlen >> 8);
    memcpy(header + 10, dict, (size_t)n);
    memset(header + 10 + n, ' ', pad);
    header[10 + n + pad] = '\n';

    char tmp[4096];
    if (snprintf(tmp, sizeof tmp, "%s.part", path) >= (int)sizeof tmp)
        return veer__error_set(err, VEER_EIO, "path", "path too long: %s", path);
    FILE *f = fopen(tmp, "wb");
    if (f == NULL)
        return veer__error_set(err, VEER_EIO, "path", "cannot create %s: %s", tmp, strerror(errno));
    size_t count = cols ? rows * cols : rows;
    int ok = fwrite(header, 1, 10 + (size_t)hlen, f) == 10 + (size_t)hlen &&
             (count == 0 || fwrite(data, sizeof(float), count, f) == count);
    int saved = errno;
    if (fclose(f) != 0 && ok) {
        ok = 0;
        saved = errno;
    }
    if (!ok) {
        remove(tmp);
        return veer__error_set(err, VEER_EIO, "path", "cannot write %s: %s", tmp, strerror(saved));
    }
    if (rename(tmp, path) != 0) {
        saved = errno;
        remove(tmp);
        return veer__error_set(err, VEER_EIO, "path", "cannot rename %s to %s: %s", tmp, path,
                               strerror(saved));
    }
    return 0;
}
