/* The act thread's decoding memory. protobuf-c asks its allocator for every message, string and
 * repeated field it unpacks; with the default allocator that is several malloc calls per request.
 * A bump arena, reset after each request, turns those into pointer increments over memory
 * allocated once at start. When a request needs more than the arena holds, the allocation
 * fails, protobuf-c reports a decoding failure and the request gets an EBADMSG reply: a
 * pathological message costs its sender an error, never the process its memory. */
#include "service/arena.h"

#include "base/base.h"

static void *heap_alloc(void *data, size_t n) { return veer__malloc(n); }
static void heap_free(void *data, void *p) { veer__free(p); }

ProtobufCAllocator veer__pb_heap = {heap_alloc, heap_free, NULL};

static void *arena_alloc(void *data, size_t n)
{
    veer__arena *a = data;
    size_t start = (a->used + 15u) & ~(size_t)15u; /* 16: the strictest alignment protobuf-c needs */
    if (start > a->size || n > a->size - start)
        return NULL;
    a->used = start + n;
    return a->base + start;
}

static void arena_free(void *data, void *p) {}

int veer__arena_init(veer__arena *a, size_t size)
{
    a->base = veer__malloc(size);
    if (a->base == NULL)
        return VEER_ENOMEM;
    a->size = size;
    a->used = 0;
    a->high_water = 0;
    a->allocator = (ProtobufCAllocator){arena_alloc, arena_free, a};
    return 0;
}

void veer__arena_free(veer__arena *a)
{
    veer__free(a->base);
    a->base = NULL;
    a->size = a->used = 0;
}
