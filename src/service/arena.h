/* protobuf-c allocators for veerd: a heap allocator that goes through veer__malloc (admin work,
 * the journal), and a bump arena preallocated once for the act thread, so decoding a request
 * there allocates nothing. */
#ifndef VEER_SERVICE_ARENA_H
#define VEER_SERVICE_ARENA_H

#include <stddef.h>
#include <stdint.h>

#include <protobuf-c/protobuf-c.h>

/* Allocations through veer__malloc / veer__free. */
extern ProtobufCAllocator veer__pb_heap;

typedef struct veer__arena {
    unsigned char *base;
    size_t size;
    size_t used;
    size_t high_water; /* the most bytes one request needed, for sizing */
    ProtobufCAllocator allocator; /* hands out arena memory; its free does nothing */
} veer__arena;

/* Allocates `size` bytes once. Returns 0 or VEER_ENOMEM. One thread owns an arena. */
int veer__arena_init(veer__arena *a, size_t size);
void veer__arena_free(veer__arena *a);

/* Forgets every allocation: call after each request, once nothing points into the arena. */
static inline void veer__arena_reset(veer__arena *a)
{
    if (a->used > a->high_water)
        a->high_water = a->used;
    a->used = 0;
}

#endif
