/* A single-producer single-consumer ring of fixed-size states: the act thread hands each valid
 * act state to the drift monitor's writer (veerd's loop thread) without waiting and without
 * allocating. The producer copies the state into the next slot and publishes it with one release
 * store; when the consumer has fallen a whole ring behind, the state is dropped and counted
 * instead (the drift statistics then cover a sample of the states, which is what a monitor
 * needs; the act path must never wait for it). Sized once at creation.
 *
 * Each entry also carries a 32-bit tag beside the state (veerd: the slot of the acting channel
 * in the channel table, or VEER__STATE_RING_NO_TAG), so the consumer can feed per-channel
 * monitors too. The tags live in their own array, so pushing one costs a single 4-byte store
 * next to the state's copy; no name is copied and nothing is looked up again. */
#ifndef VEER_SERVICE_STATE_RING_H
#define VEER_SERVICE_STATE_RING_H

#include <stdatomic.h>
#include <stdint.h>

typedef struct veer__state_ring {
    uint32_t dim, capacity; /* capacity: a power of two */
    float *slots;           /* capacity x dim */
    uint32_t *tags;         /* capacity */
    _Atomic uint64_t head;  /* states pushed (the producer writes) */
    _Atomic uint64_t tail;  /* states popped (the consumer writes) */
    _Atomic uint64_t dropped;
} veer__state_ring;

/* capacity is rounded up to a power of two. 0 or VEER_ENOMEM. */
int veer__state_ring_init(veer__state_ring *r, uint32_t dim, uint32_t capacity);
void veer__state_ring_free(veer__state_ring *r);

/* The producer thread: copies `state` (dim floats) in; returns 0, or 1 when the ring was full and
 * the state was dropped. No lock, no allocation. */
int veer__state_ring_push(veer__state_ring *r, const float *state);

/* As veer__state_ring_push, with `tag` stored beside the state (veer__state_ring_push stores
 * VEER__STATE_RING_NO_TAG). */
#define VEER__STATE_RING_NO_TAG UINT32_MAX
int veer__state_ring_push_tagged(veer__state_ring *r, const float *state, uint32_t tag);

/* The consumer thread: the oldest state not yet taken, or NULL when empty. The pointer is valid
 * until veer__state_ring_release, which hands the slot back. */
const float *veer__state_ring_peek(veer__state_ring *r);

/* As veer__state_ring_peek, and writes the entry's tag to *tag (when not NULL and not empty). */
const float *veer__state_ring_peek_tagged(veer__state_ring *r, uint32_t *tag);
void veer__state_ring_release(veer__state_ring *r);

#endif
