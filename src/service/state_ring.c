/* The act thread's ring of states for the drift monitor (see state_ring.h). Head and tail only
 * grow; a slot is head % capacity. The producer reads tail with acquire (the consumer is done with
 * the slot) and publishes head with release (the copy is visible); the consumer does the mirror
 * image. */
#include "service/state_ring.h"

#include <string.h>

#include "base/base.h"

int veer__state_ring_init(veer__state_ring *r, uint32_t dim, uint32_t capacity)
{
    uint32_t cap = 1;
    while (cap < capacity && cap < (1u << 30))
        cap <<= 1;
    memset(r, 0, sizeof *r);
    r->slots = veer__calloc((size_t)cap * (dim ? dim : 1), sizeof(float));
    r->tags = veer__calloc(cap, sizeof(uint32_t));
    if (r->slots == NULL || r->tags == NULL) {
        veer__state_ring_free(r);
        return VEER_ENOMEM;
    }
    r->dim = dim;
    r->capacity = cap;
    atomic_init(&r->head, 0);
    atomic_init(&r->tail, 0);
    atomic_init(&r->dropped, 0);
    return 0;
}

void veer__state_ring_free(veer__state_ring *r)
{
    veer__free(r->slots);
    veer__free(r->tags);
    r->slots = NULL;
    r->tags = NULL;
}

int veer__state_ring_push(veer__state_ring *r, const float *state)
{
    return veer__state_ring_push_tagged(r, state, VEER__STATE_RING_NO_TAG);
}

int veer__state_ring_push_tagged(veer__state_ring *r, const float *state, uint32_t tag)
{
    uint64_t head = atomic_load_explicit(&r->head, memory_order_relaxed);
    if (head - atomic_load_explicit(&r->tail, memory_order_acquire) >= r->capacity) {
        atomic_store_explicit(&r->dropped,
                              atomic_load_explicit(&r->dropped, memory_order_relaxed) + 1,
                              memory_order_relaxed);
        return 1;
    }
    size_t slot = (size_t)(head & (r->capacity - 1));
    memcpy(r->slots + slot * r->dim, state, r->dim * sizeof(float));
    r->tags[slot] = tag;
    atomic_store_explicit(&r->head, head + 1, memory_order_release);
    return 0;
}

const float *veer__state_ring_peek(veer__state_ring *r)
{
    return veer__state_ring_peek_tagged(r, NULL);
}

const float *veer__state_ring_peek_tagged(veer__state_ring *r, uint32_t *tag)
{
    uint64_t tail = atomic_load_explicit(&r->tail, memory_order_relaxed);
    if (tail == atomic_load_explicit(&r->head, memory_order_acquire))
        return NULL;
    size_t slot = (size_t)(tail & (r->capacity - 1));
    if (tag != NULL)
        *tag = r->tags[slot];
    return r->slots + slot * r->dim;
}

void veer__state_ring_release(veer__state_ring *r)
{
    uint64_t tail = atomic_load_explicit(&r->tail, memory_order_relaxed);
    atomic_store_explicit(&r->tail, tail + 1, memory_order_release);
}
