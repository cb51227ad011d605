/* The stored state's operations: what a task put, a drop and a switch do to the registry, the
 * channel table, the journal and the events socket, in the order that keeps DESIGN.md's
 * invariants (journal first, then the visible change, then the event). The admin socket and
 * the journal replay at start both go through here, so a restart rebuilds exactly what the
 * running service had built. Loop thread only, except veer__store_encode (any thread). */
#ifndef VEER_SERVICE_STORE_H
#define VEER_SERVICE_STORE_H

#include <stdint.h>

#include "service/channels.h"
#include "service/events.h"
#include "service/journal.h"
#include "service/registry.h"
#include "veer/runtime.h"
#include "veer_journal.pb-c.h"

typedef struct veer__store {
    const veer_bundle *bundle;
    const veer_model_info *info;
    veer__registry *registry;
    veer__channels *channels;
    veer__journal *journal; /* NULL while replaying */
    veer__events *events;   /* NULL until the sockets are up */
    uint32_t max_samples;
    uint64_t journal_compact_bytes;
    uint64_t journal_live_bytes; /* size right after the last compaction */
} veer__store;

/* Checks `spec` and encodes it against `bundle` into z (z_dim floats). Pure: touches nothing but
 * its arguments, so it runs on the worker pool. Errors as veer__spec_check and veer_task_encode,
 * fields under "put_task.spec". */
int veer__store_encode(const veer_bundle *bundle, const Veer__Wire__TaskSpec *spec, uint32_t max_samples,
                       float *z, veer_task_report *report, veer_error *err);

/* Journals a put of `task` (whose content is encoded), marks it acknowledged, announces it. On a
 * journal failure nothing is acknowledged and VEER_EIO is returned. */
int veer__store_acknowledge(veer__store *s, veer__task *task, veer_error *err);

/* Drops the acknowledged task `name`: VEER_ENOTASK, VEER_ENOTREADY (still being encoded),
 * VEER_ETASKACTIVE (naming the channels), VEER_EIO (journal). Fields under "drop_task". */
int veer__store_drop(veer__store *s, const char *name, veer_error *err);

/* Switches `channel` to task `name`, with the next epoch. VEER_EFIELD (channel name),
 * VEER_ENOTASK, VEER_ENOTREADY, VEER_ETOOMANY (channel table full), VEER_EIO (journal), with
 * fields under "switch_channel". *out is the switched channel. */
int veer__store_switch(veer__store *s, const char *channel, const char *name, veer__channel **out,
                       veer_error *err);

/* The journal replay callback (ctx is a veer__store with journal == NULL): re-encodes puts
 * synchronously against the loaded model, restores drops and switches with their epochs. */
int veer__store_replay(void *ctx, const Veer__Journal__JournalRecord *rec);

/* Rewrites the journal with the live tasks and the channels' current tasks when it has grown
 * past journal_compact_bytes and to twice its size after the last compaction (or always, with
 * force). 0, or the journal's error (the old
 * journal then stays in use). */
int veer__store_compact(veer__store *s, int force, veer_error *err);

/* Puts `prefix` (e.g. "put_task.") in front of err->field unless it is there already. */
void veer__store_prefix_field(veer_error *err, const char *prefix);

/* The channel names whose active task is `name`, into `out` (up to max); returns how many. */
uint32_t veer__store_active_on(veer__store *s, const char *name, const char **out, uint32_t max);

#endif
