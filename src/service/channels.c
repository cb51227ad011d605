/* The channel table and its reclamation (see channels.h for the threading argument).
 *
 * Lookup is open addressing with linear probing over a power-of-two array at least twice
 * max_channels, hashed with FNV-1a: probes stay short, and because slots are only ever added the
 * act thread can probe while the admin thread inserts. The memory orders: a slot's `used` flag
 * is stored with release after its name is written and loaded with acquire before the name is
 * read. The active-task exchange, the act thread's load of it and the quiescence counter are
 * sequentially consistent: reclamation needs "the counter moved after my exchange" to imply
 * "the reader's later loads see the new task", which release/acquire alone does not give. */
#include "service/channels.h"

#include <string.h>

#include "base/base.h"

struct veer__channels {
    uint32_t capacity; /* power of two */
    uint32_t max_channels;
    uint32_t count;
    veer__channel *slots;
    _Atomic uint64_t quiescent; /* the act thread's announcement counter */
    veer__active_task *retired; /* newest first */
    size_t retired_count;
};

static uint64_t fnv1a(const char *s)
{
    uint64_t h = 14695981039346656037ull;
    for (; *s; s++) {
        h ^= (unsigned char)*s;
        h *= 1099511628211ull;
    }
    return h;
}

int veer__channels_create(uint32_t max_channels, veer__channels **out)
{
    veer__channels *t = veer__calloc(1, sizeof *t);
    if (t == NULL)
        return VEER_ENOMEM;
    uint32_t cap = 8;
    while (cap < 2u * max_channels)
        cap *= 2;
    t->slots = veer__calloc(cap, sizeof *t->slots);
    if (t->slots == NULL) {
        veer__free(t);
        return VEER_ENOMEM;
    }
    t->capacity = cap;
    t->max_channels = max_channels;
    for (uint32_t i = 0; i < cap; i++) {
        atomic_init(&t->slots[i].used, 0);
        atomic_init(&t->slots[i].active, NULL);
        atomic_init(&t->slots[i].acts, 0);
    }
    atomic_init(&t->quiescent, 0);
    *out = t;
    return 0;
}

void veer__channels_destroy(veer__channels *t)
{
    if (t == NULL)
        return;
    for (uint32_t i = 0; i < t->capacity; i++)
        veer__free(atomic_load(&t->slots[i].active));
    while (t->retired != NULL) {
        veer__active_task *next = t->retired->retired_next;
        veer__free(t->retired);
        t->retired = next;
    }
    veer__free(t->slots);
    veer__free(t);
}

veer__channel *veer__channels_find(const veer__channels *t, const char *name)
{
    uint32_t mask = t->capacity - 1;
    for (uint32_t i = (uint32_t)fnv1a(name) & mask, n = 0; n < t->capacity; i = (i + 1) & mask, n++) {
        veer__channel *ch = &t->slots[i];
        if (!atomic_load_explicit(&ch->used, memory_order_acquire))
            return NULL; /* slots fill in probe order, so an empty one ends the search */
        if (strcmp(ch->name, name) == 0)
            return ch;
    }
    return NULL;
}

int veer__channels_get_or_create(veer__channels *t, const char *name, veer__channel **out,
                                 veer_error *err)
{
    size_t len = strlen(name);
    if (len == 0)
        return veer__error_set(err, VEER_EFIELD, "channel", "the channel name is empty");
    if (len >= VEER__CHANNEL_NAME_MAX)
        return veer__error_set(err, VEER_EFIELD, "channel", "channel names are at most %d bytes; this one has %zu",
                               VEER__CHANNEL_NAME_MAX - 1, len);
    veer__channel *ch = veer__channels_find(t, name);
    if (ch != NULL) {
        *out = ch;
        return 0;
    }
    if (t->count >= t->max_channels)
        return veer__error_set(err, VEER_ETOOMANY, "channel",
                               "the channel table is full (%u channels; raise --max-channels)", t->max_channels);
    uint32_t mask = t->capacity - 1;
    uint32_t i = (uint32_t)fnv1a(name) & mask;
    while (atomic_load_explicit(&t->slots[i].used, memory_order_relaxed))
        i = (i + 1) & mask;
    ch = &t->slots[i];
    memcpy(ch->name, name, len + 1);
    ch->epoch = 0;
    atomic_store_explicit(&ch->used, 1, memory_order_release);
    t->count++;
    *out = ch;
    return 0;
}

/* The act thread may still hold `old`: it is freed only after every act in flight has passed a
 * quiescent point (veer__channels_reclaim). */
static void retire(veer__channels *t, veer__active_task *old)
{
    if (old == NULL)
        return;
    old->retired_at = atomic_load_explicit(&t->quiescent, memory_order_seq_cst);
    old->retired_next = t->retired;
    t->retired = old;
    t->retired_count++;
}

int veer__channels_switch(veer__channels *t, veer__channel *ch, const char *task, const float *z,
                          uint32_t z_dim, uint64_t epoch, veer_error *err)
{
    size_t len = strlen(task);
    if (len >= VEER__TASK_NAME_MAX)
        return veer__error_set(err, VEER_EFIELD, "task", "task name too long");
    veer__active_task *a = veer__malloc(sizeof *a + (size_t)z_dim * sizeof(float));
    if (a == NULL)
        return veer__error_set(err, VEER_ENOMEM, "task", NULL);
    memset(a, 0, sizeof *a);
    memcpy(a->task, task, len + 1);
    a->epoch = epoch;
    a->z_dim = z_dim;
    memcpy(a->z, z, (size_t)z_dim * sizeof(float));
    veer__active_task *old = atomic_exchange_explicit(&ch->active, a, memory_order_seq_cst);
    ch->epoch = epoch;
    retire(t, old);
    return 0;
}

void veer__channels_clear(veer__channels *t, veer__channel *ch, uint64_t epoch)
{
    veer__active_task *old = atomic_exchange_explicit(&ch->active, NULL, memory_order_seq_cst);
    ch->epoch = epoch;
    retire(t, old);
}

void veer__channels_quiescent(veer__channels *t)
{
    atomic_fetch_add_explicit(&t->quiescent, 1, memory_order_seq_cst);
}

size_t veer__channels_reclaim(veer__channels *t)
{
    uint64_t now = atomic_load_explicit(&t->quiescent, memory_order_seq_cst);
    veer__active_task **link = &t->retired;
    while (*link != NULL) {
        veer__active_task *a = *link;
        if (now > a->retired_at) {
            *link = a->retired_next;
            veer__free(a);
            t->retired_count--;
        } else {
            link = &a->retired_next;
        }
    }
    return t->retired_count;
}

uint32_t veer__channels_capacity(const veer__channels *t) { return t->capacity; }
uint32_t veer__channels_count(const veer__channels *t) { return t->count; }

uint32_t veer__channels_index(const veer__channels *t, const veer__channel *ch)
{
    return (uint32_t)(ch - t->slots);
}

veer__channel *veer__channels_slot(veer__channels *t, uint32_t i)
{
    veer__channel *ch = &t->slots[i];
    return atomic_load_explicit(&ch->used, memory_order_acquire) ? ch : NULL;
}
