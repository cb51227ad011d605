/* The one allocation hook. Every allocation in libveer goes through these functions so that a
 * test can make the Nth allocation fail and check that each error path unwinds cleanly (the
 * technique of SQLite's test_malloc.c and libuv's test-loop-oom.c). */
#include "base.h"

#include <stdlib.h>
#include <string.h>

static veer_allocator veer__alloc = {malloc, calloc, realloc, free};

int veer_set_allocator(const veer_allocator *a)
{
    if (a == NULL) {
        veer__alloc = (veer_allocator){malloc, calloc, realloc, free};
        return 0;
    }
    if (!a->malloc_fn || !a->calloc_fn || !a->realloc_fn || !a->free_fn)
        return VEER_EINVAL;
    veer__alloc = *a;
    return 0;
}

void *veer__malloc(size_t n) { return veer__alloc.malloc_fn(n ? n : 1); }
void *veer__calloc(size_t n, size_t size) { return veer__alloc.calloc_fn(n ? n : 1, size ? size : 1); }
void *veer__realloc(void *p, size_t n) { return veer__alloc.realloc_fn(p, n ? n : 1); }
void veer__free(void *p) { veer__alloc.free_fn(p); }

char *veer__strdup(const char *s)
{
    size_t n = strlen(s) + 1;
    char *d = veer__malloc(n);
    if (d != NULL)
        memcpy(d, s, n);
    return d;
}

/* Aligned to 64 bytes so OpenBLAS reads whole cache lines; the original pointer is stored just
 * before the returned block so veer__free_aligned can release it through the hook. */
void *veer__malloc_aligned(size_t n)
{
    unsigned char *raw = veer__malloc(n + 64 + sizeof(void *));
    if (raw == NULL)
        return NULL;
    uintptr_t p = ((uintptr_t)(raw + sizeof(void *)) + 63u) & ~(uintptr_t)63u;
    ((void **)p)[-1] = raw;
    return (void *)p;
}

void veer__free_aligned(void *p)
{
    if (p != NULL)
        veer__free(((void **)p)[-1]);
}
