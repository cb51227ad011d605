/* Replacing libveer's allocator. Intended for tests (fail the Nth allocation) and for embedders
 * with their own heap. Call before any other veer function; not thread-safe. */
#ifndef VEER_ALLOC_H
#define VEER_ALLOC_H

#include <stddef.h>

#ifdef __cplusplus
extern "C" {
#endif

typedef struct veer_allocator {
    void *(*malloc_fn)(size_t);
    void *(*calloc_fn)(size_t, size_t);
    void *(*realloc_fn)(void *, size_t);
    void (*free_fn)(void *);
} veer_allocator;

/* Installs `a` (copied); NULL restores the C library's functions. Returns 0 or VEER_EINVAL when
 * a function pointer is missing. */
int veer_set_allocator(const veer_allocator *a);

#ifdef __cplusplus
}
#endif
#endif
