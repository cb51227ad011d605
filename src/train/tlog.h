/* The transition log the trainer learns from: states, actions, next states and optional
 * episode ends, each a .npy file, checked in full before training starts.
 *
 * Every problem is refused with VEER_ELOG (or VEER_ENPY / VEER_EIO for an unreadable file) and
 * a message that names the file and the row: a wrong dtype or shape, lengths that disagree,
 * an empty log, NaN or infinity, actions outside the declared bounds or count, episode ends
 * that are not 0 or 1, and (for tabular networks) states that are not whole-number indices
 * within the declared counts. Nothing is silently clipped, cast or dropped.
 * Prefix veer__tlog_. */
#ifndef VEER_TRAIN_TLOG_H
#define VEER_TRAIN_TLOG_H

#include <stddef.h>
#include <stdint.h>

#include "base/base.h"

typedef struct veer__tlog_spec {
    const char *states_path, *actions_path, *next_states_path;
    const char *dones_path;  /* NULL: no episode ends */
    int ends_truncated;      /* 1: the ends are time-limit cuts whose next states are real, so
                                the successor measure continues through them (checked, hashed,
                                but they do not stop the bootstrap); 0: true terminal states */
    uint32_t action_count;   /* > 0: discrete actions 0..count-1 */
    uint32_t action_dim;     /* continuous: the width; discrete: 1 */
    const float *low, *high; /* continuous bounds, action_dim each */
    uint32_t nstate_counts;  /* > 0: states are indices, feature i within [0, counts[i]) */
    const uint32_t *state_counts;
} veer__tlog_spec;

typedef struct veer__tlog {
    size_t n;               /* transitions */
    uint32_t state_dim, action_dim;
    float *states;          /* n x state_dim (owned) */
    float *actions;         /* n x action_dim; discrete: the index as a float */
    float *next_states;     /* n x state_dim */
    float *cont;            /* n: 0 after an episode end, else 1 */
    char digest[4 * 80];    /* "states=<hex> actions=<hex> ..." BLAKE2b-256 of each file */
} veer__tlog;

int veer__tlog_load(const veer__tlog_spec *spec, veer__tlog *log, veer_error *err);
void veer__tlog_free(veer__tlog *log);

#endif
