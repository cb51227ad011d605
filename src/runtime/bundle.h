/* Private to libveer's runtime: what a loaded bundle holds. Everything lives in one chain of
 * 64-byte-aligned blocks owned by the bundle (veer__bundle_alloc), so closing a bundle, or
 * abandoning a half-built one after an error, is one walk down the chain, and
 * veer_bundle_memory is an exact sum. Nothing changes after veer_bundle_open returns. */
#ifndef VEER_RUNTIME_BUNDLE_H
#define VEER_RUNTIME_BUNDLE_H

#include <stddef.h>
#include <stdint.h>

#include "runtime/net.h"
#include "veer/error.h"
#include "veer/runtime.h"
#include "veer_bundle.pb-c.h"

/* Limits that keep sizes computed from a bundle's fields far from overflow and workspaces
 * within reason; a real model is well inside them. */
#define VEER__MAX_DIM 65536u /* state_dim, z_dim, action dims and counts, layer widths */
#define VEER__MAX_EMBED_COUNT (1u << 24) /* per index: exact as a float */
#define VEER__MAX_LAYERS 256u            /* per branch or head */
#define VEER__MAX_BRANCHES 16u
#define VEER__MAX_INPUTS 16u

struct veer_bundle {
    veer_model_info info;
    veer__net forward, backward, actor;
    int has_actor;
    int actor_normalized;
    float *action_index; /* discrete: 0, 1, ..., count - 1 as floats (the F rows for acting) */
    /* State features that F or the actor look up in an embedding table, with the table's count
     * for each: acting checks them for every state before computing anything, so a bad index
     * is refused with nothing written. */
    uint32_t *index_features, *index_counts;
    uint32_t index_check_count;
    uint8_t digest[32];
    void *blocks;  /* the chain of blocks this bundle owns */
    size_t memory; /* bytes in the chain */
};

/* An aligned block of n bytes owned by `b`, or NULL when out of memory. */
void *veer__bundle_alloc(struct veer_bundle *b, size_t n);

/* Checks every field of a decoded Model. Returns 0 or a VEER_E* code with `err` naming the field
 * (for example "forward.branches[1].layers[0].in_dim"). */
int veer__bundle_check(const Veer__Bundle__Model *m, veer_error *err);

/* Fills `b` from a Model that passed veer__bundle_check: aligned copies of every weight and
 * statistic, the networks, the info block, the state precision matrix (LAPACK). Returns 0,
 * VEER_ENOMEM or VEER_ESINGULAR. On error the caller releases `b`'s blocks. */
int veer__bundle_build(struct veer_bundle *b, const Veer__Bundle__Model *m, veer_error *err);

#endif
