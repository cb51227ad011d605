/* The channel table: named slots through which controllers act, each holding a pointer to the
 * immutable, fully encoded task that is active on it.
 *
 * Threads: the admin thread (veerd's libuv loop) creates channels and switches them; the act
 * thread finds channels and reads their active task without any lock. That works because
 *   - the table is a fixed array sized at start (open addressing, never resized, never
 *     shrunk), and a slot's name is written before the slot is published with a release store;
 *   - a switch builds a new veer__active_task and publishes it with one atomic exchange, so a
 *     reader sees the old task or the new one, whole (DESIGN.md invariant 2);
 *   - replaced tasks are freed by quiescent-state-based reclamation: the act thread announces
 *     after every request (and every idle wake-up) that it holds no task pointer, and the admin
 *     thread frees a replaced task only once such an announcement came after the exchange.
 *     Never freeing would be simpler but grows without bound on a service that switches every
 *     second for months; a reference count would put an atomic read-modify-write on the
 *     shared cache line in every act. QSBR costs the act path one store per request. It relies on
 *     there being exactly one act thread; a second one would need its own counter. */
#ifndef VEER_SERVICE_CHANNELS_H
#define VEER_SERVICE_CHANNELS_H

#include <stdatomic.h>
#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"

#define VEER__CHANNEL_NAME_MAX 64 /* bytes, including the terminating NUL */
#define VEER__TASK_NAME_MAX 128

/* What a controller's act reads: immutable once published. */
typedef struct veer__active_task {
    char task[VEER__TASK_NAME_MAX];
    uint64_t epoch;      /* the channel's switch count: 1 after the first switch */
    uint32_t z_dim;
    struct veer__active_task *retired_next; /* admin only: the reclamation list */
    uint64_t retired_at;                    /* admin only */
    float z[];
} veer__active_task;

typedef struct veer__channel {
    _Atomic int used;                  /* 1 once name is written: the publication flag */
    char name[VEER__CHANNEL_NAME_MAX];
    _Atomic(veer__active_task *) active;
    _Atomic uint64_t acts;             /* answered act requests (the act thread counts) */
    uint64_t epoch;                    /* admin's copy of the latest epoch */
} veer__channel;

typedef struct veer__channels veer__channels;

/* A table for up to `max_channels` channels. Returns 0 or VEER_ENOMEM. Admin thread. */
int veer__channels_create(uint32_t max_channels, veer__channels **out);

/* Frees every task still published or retired. No act thread may be running. NULL allowed. */
void veer__channels_destroy(veer__channels *t);

/* The channel called `name`, or NULL. Any thread; lock-free and allocation-free. */
veer__channel *veer__channels_find(const veer__channels *t, const char *name);

/* The channel called `name`, created when missing. Admin thread. VEER_EFIELD for an empty or
 * over-long name, VEER_ETOOMANY when the table holds max_channels already. */
int veer__channels_get_or_create(veer__channels *t, const char *name, veer__channel **out,
                                 veer_error *err);

/* Makes `task` (z_dim values of z copied) the channel's active task with the given epoch
 * (callers pass channel->epoch + 1, or the journaled epoch on replay). Admin thread. Returns 0 or
 * VEER_ENOMEM (nothing changed). The replaced task is retired, not freed. */
int veer__channels_switch(veer__channels *t, veer__channel *ch, const char *task, const float *z,
                          uint32_t z_dim, uint64_t epoch, veer_error *err);

/* The act thread's announcement that it holds no veer__active_task pointer. */
/* Leaves `ch` with no task (its acts get the fallback) at `epoch`; the old task is retired like
 * a switched-away one. Loop thread. */
void veer__channels_clear(veer__channels *t, veer__channel *ch, uint64_t epoch);

void veer__channels_quiescent(veer__channels *t);

/* Frees retired tasks the act thread can no longer be reading. Admin thread. Returns how many
 * are still waiting. */
size_t veer__channels_reclaim(veer__channels *t);

/* Iteration for listings (admin thread): slots 0..capacity-1, NULL for an unused slot. */
uint32_t veer__channels_capacity(const veer__channels *t);
uint32_t veer__channels_count(const veer__channels *t);
veer__channel *veer__channels_slot(veer__channels *t, uint32_t i);

/* The slot index of a channel of this table (0 .. capacity-1): a fixed small number that stands
 * for the channel, since channels never move or leave. Any thread; one subtraction. */
uint32_t veer__channels_index(const veer__channels *t, const veer__channel *ch);

#endif
