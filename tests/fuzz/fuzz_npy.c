/* Fuzz target: the .npy reader (src/base/npy.c), veer__npy_parse on arbitrary bytes.
 *
 * Beyond "no crash", it checks the reader's promises on every accepted input: the count is the
 * product of the shape, the data is count * itemsize readable bytes (the sanitizer sees a short
 * buffer), and a re-serialisation of the array parses back to the same shape and bytes. */
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"
#include "base/npy.h"

static volatile uint8_t sink;

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    veer__npy a;
    veer_error err;
    if (veer__npy_parse(data, size, &a, &err) != 0) {
        if (err.code >= 0 || a.data != NULL)
            abort(); /* a refusal must carry a code and leave nothing owned */
        return 0;
    }
    uint64_t count = 1;
    for (uint32_t i = 0; i < a.ndim; i++)
        count *= a.shape[i];
    if (a.ndim > VEER_NPY_MAX_DIMS || count != a.count)
        abort();
    /* Touch every byte: a short allocation shows up as a heap overflow. */
    for (size_t i = 0; i < a.count * a.itemsize; i++)
        sink ^= ((const uint8_t *)a.data)[i];

    void *again = NULL;
    size_t again_len = 0;
    if (veer__npy_serialize(a.dtype, a.ndim, a.shape, a.data, &again, &again_len, &err) == 0) {
        veer__npy b;
        if (veer__npy_parse(again, again_len, &b, &err) != 0)
            abort(); /* what the writer wrote, the reader must read */
        if (b.dtype != a.dtype || b.ndim != a.ndim || b.count != a.count ||
            memcmp(b.shape, a.shape, sizeof a.shape) != 0 ||
            (a.count && memcmp(a.data, b.data, a.count * a.itemsize) != 0))
            abort();
        veer__npy_free(&b);
        veer__free(again);
    }
    veer__npy_free(&a);
    return 0;
}
