/* Private to libveer's runtime: one thread's scratch memory for acting and evaluating networks
 * (the public veer_workspace). All buffers are carved from one 64-byte-aligned block sized at
 * creation for max_batch states, so acting allocates nothing. */
#ifndef VEER_RUNTIME_WORKSPACE_H
#define VEER_RUNTIME_WORKSPACE_H

#include <stddef.h>
#include <stdint.h>

#include "runtime/bundle.h"
#include "runtime/net.h"

struct veer_workspace {
    const struct veer_bundle *bundle;
    uint32_t max_batch;  /* states per slice */
    size_t f_rows;       /* rows F can take at once: max_batch x action_count (discrete) */
    veer__net_bufs bufs; /* sized for f_rows rows of F and max_batch rows of B and the actor */
    float *actions;      /* max_batch x action_dim: the clipped policy actions */
    float *values;       /* f_rows: F·z per row */
    float *slice_values; /* max_batch: values and flags for callers that want none */
    uint32_t *slice_flags;
    void *block; /* the one allocation behind every buffer */
};

#endif
