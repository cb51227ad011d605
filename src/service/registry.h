/* The task registry: tasks by name, each pointing at its content (a canonical specification,
 * its digest and, once encoded, its task vector). Identical specifications under different
 * names share one content, encoded once. Putting the same name with the same content again is
 * an idempotent success; with different content it is VEER_ENAMECONFLICT.
 *
 * A name is "pending" from its put until the worker pool has encoded it and the journal holds
 * it; only then is the put acknowledged and the task usable. The registry is owned by veerd's
 * loop thread and is not thread-safe; the act path never touches it (it reads the channel
 * table). Lookups are linear over at most --max-tasks entries: admin requests arrive at
 * supervisor rates, and a scan of a few thousand names costs microseconds beside the fsync. */
#ifndef VEER_SERVICE_REGISTRY_H
#define VEER_SERVICE_REGISTRY_H

#include <stddef.h>
#include <stdint.h>

#include "veer/runtime.h"
#include "veer_wire.pb-c.h"

typedef enum veer__content_state {
    VEER__CONTENT_PENDING = 0, /* queued for or being encoded */
    VEER__CONTENT_ENCODED = 1,
    VEER__CONTENT_FAILED = 2,  /* replayed from the journal but the loaded model cannot encode it */
} veer__content_state;

typedef struct veer__content {
    uint8_t digest[32];
    Veer__Wire__TaskSpec *spec; /* canonical; owned */
    veer__content_state state;
    float *z;                   /* z_dim values once encoded; owned */
    veer_task_report report;
    uint32_t refs;              /* names pointing here */
} veer__content;

typedef struct veer__task {
    char *name;
    veer__content *content;
    int acknowledged;           /* journaled and answered: visible to get, list, switch, drop */
    uint32_t active_on;         /* channels whose active task this is */
} veer__task;

typedef struct veer__registry veer__registry;

int veer__registry_create(uint32_t max_tasks, veer__registry **out);
void veer__registry_destroy(veer__registry *r);

/* The task called `name` (acknowledged or pending), or NULL. */
veer__task *veer__registry_find(veer__registry *r, const char *name);

/* Adds `name` with canonical `spec` (copied) and its digest. When the name exists: same digest
 * returns it with *created = 0; another digest is VEER_ENAMECONFLICT. When another name has the
 * same digest, the content is shared (and may already be encoded). VEER_ETOOMANY past max_tasks,
 * VEER_EFIELD for an empty or over-long name, VEER_ENOMEM. New tasks start unacknowledged. */
int veer__registry_put(veer__registry *r, const char *name, const Veer__Wire__TaskSpec *spec,
                       const uint8_t digest[32], veer__task **out, int *created, veer_error *err);

/* Removes the task (its content too when no other name shares it). The caller has checked
 * active_on == 0. */
void veer__registry_remove(veer__registry *r, veer__task *task);

/* Iteration in insertion order. */
uint32_t veer__registry_count(const veer__registry *r);
veer__task *veer__registry_at(veer__registry *r, uint32_t i);

/* Sets the content's task vector (z_dim values copied) and marks it encoded. 0 or VEER_ENOMEM. */
int veer__content_set_z(veer__content *c, const float *z, uint32_t z_dim, const veer_task_report *report);

#endif
