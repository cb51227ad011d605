/* Private to libveer's runtime: one thread's scratch memory for acting and evaluating networks
 * (the public veer_workspace). All buffers are carved from one 64-byte-aligned block sized at
 * creation for max_batch states, so acting allocates nothing. A backward-only workspace (for the
 * task encoder) is sized for B alone; every call that would run F or the actor on it is refused
 * with VEER_EINVAL, since its buffers may be narrower than those networks need. */
#ifndef VEER_RUNTIME_WORKSPACE_H
#define VEER_RUNTIME_WORKSPACE_H

#include <stddef.h>
#include <stdint.h>

#include "runtime/bundle.h"
#include "runtime/net.h"
#include "veer/error.h"

struct veer_workspace {
    const struct veer_bundle *bundle;
    uint32_t max_batch;  /* states per slice */
    int backward_only;   /* sized for B alone: F, the actor and acting are refused */
    size_t f_rows;       /* rows F can take at once: max_batch x action_count (discrete); 0 when
                            backward_only */
    veer__net_bufs bufs; /* sized for f_rows rows of F and max_batch rows of B and the actor
                            (backward_only: max_batch rows of B alone) */
    float *actions;      /* max_batch x action_dim: the clipped policy actions */
    float *values;       /* f_rows: F·z per row */
    float *zproj;        /* Wᵀz for F's final linear layer W (its in_dim), discrete acting */
    float *slice_values; /* max_batch: values and flags for callers that want none */
    uint32_t *slice_flags;
    void *block; /* the one allocation behind every buffer */
};

/* Creates a workspace for veer_eval_backward alone, sized for B on up to max_batch states
 * (1..2^20). It needs neither F's action_count x max_batch rows nor the actor's buffers.
 * veer_eval_forward, veer_eval_actor, veer_act and veer_act_batch return VEER_EINVAL on it. Free it
 * with veer_workspace_destroy. Errors as veer_workspace_create. */
int veer__workspace_create_backward(const struct veer_bundle *bundle, uint32_t max_batch,
                                    struct veer_workspace **out, veer_error *err);

#endif
