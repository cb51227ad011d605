/* Private to libveer's monitor area (src/monitor): the pieces the drift monitor is built from.
 * Not installed and not for clients; the public API is veer/histogram.h and veer/drift.h. */
#ifndef VEER_MONITOR_H
#define VEER_MONITOR_H

#include <pthread.h>
#include <stdatomic.h>

#include "veer/drift.h"

/* Checks the training statistics, then the configuration; returns 0 or the first problem as a
 * VEER_E* code with the field named in `err` (drift_validate.c). */
int veer__drift_validate(const veer_drift_training *train, const veer_drift_config *cfg,
                         veer_error *err);

/* A triple buffer (tribuf.c): the latest value handed from one writer thread to reader threads
 * with no waiting on either side. Three slots the caller allocates: the writer fills the back
 * slot and publishes it, which swaps it with the middle slot; a reader that finds the middle
 * slot fresh swaps it with its front slot and reads there. Readers are serialised among
 * themselves by a mutex the writer never takes. */
typedef struct veer__tribuf {
    void *slot[3];
    unsigned back;           /* the writer's slot */
    _Atomic unsigned middle; /* slot index, | VEER__TRIBUF_FRESH when not yet taken */
    unsigned front;          /* the readers' slot, under read_lock */
    pthread_mutex_t read_lock;
} veer__tribuf;

/* Takes the three slots (not their ownership). Returns 0 or VEER_ENOMEM (mutex). */
int veer__tribuf_init(veer__tribuf *t, void *a, void *b, void *c);
void veer__tribuf_destroy(veer__tribuf *t);

/* The writer's slot, to fill before publishing. The writer thread. */
void *veer__tribuf_back(veer__tribuf *t);

/* Hands the back slot to readers; the writer gets a free slot as its new back. The writer. */
void veer__tribuf_publish(veer__tribuf *t);

/* The most recently published slot, held until veer__tribuf_read_end. Any reader thread. */
const void *veer__tribuf_read_begin(veer__tribuf *t);
void veer__tribuf_read_end(veer__tribuf *t);

#endif
