/* A linear layer over rows that repeat each state: discrete acting evaluates F for every action
 * of a state, so the rows of one state differ only in a few input columns (the action, and the
 * outputs of branches that read it) and the rest of the layer's product is the same for all of
 * them. The shared part W_s x_s + b is computed once per state and each row adds only its own
 * part: for the SMALL preset's F (state, one-hot action and z into a 256-wide layer, six actions)
 * the first layer costs one 56 x 256 product instead of six 62 x 256 ones; for a concat head
 * after a branch that runs once per state (STANDARD's state-task branch) half of the head's
 * first layer is computed once instead of six times. Algebraically the same layer; only the
 * float32 summation order differs (a few ulps). Allocates nothing. Prefix veer__rep_. */
#ifndef VEER_RUNTIME_NET_REPEAT_H
#define VEER_RUNTIME_NET_REPEAT_H

#include <stddef.h>
#include <stdint.h>

#include "runtime/net.h"

/* A layer's input row has at most this many blocks: one per branch input or per branch
 * (bundle.h's VEER__MAX_INPUTS and VEER__MAX_BRANCHES; net_repeat.c checks both). */
#define VEER__MAX_REP_BLOCKS 16u

enum veer__rep_vary {
    VEER__REP_SHARED = 1, /* the same in every row of a state */
    VEER__REP_PER_ROW = 2,
    VEER__REP_ONEHOT = 3, /* per row, mostly zeros (a one-hot action): only nonzeros are added */
};

/* A block of adjacent input columns of the layer. */
typedef struct veer__rep_block {
    uint32_t col, width;
    int vary;
} veer__rep_block;

/* The blocks of one layer's input row, in column order, covering it exactly. */
typedef struct veer__rep_cols {
    veer__rep_block blocks[VEER__MAX_REP_BLOCKS];
    uint32_t count;
} veer__rep_cols;

/* 1 when splitting pays: at least one SHARED block and rows that repeat (rep > 1). */
int veer__rep_worth(const veer__rep_cols *cols, uint32_t rep);

/* y = x Wᵀ + b for the LINEAR layer l over n rows, row r belonging to state r / rep (n a
 * multiple of rep). x is n x l->in_dim with row stride ldx; `shared` is scratch of
 * (n / rep) x l->out_dim floats; y is n x out, contiguous. x, shared and y must not overlap. */
void veer__rep_linear(const veer__layer *l, const veer__rep_cols *cols, size_t n, uint32_t rep,
                      const float *x, size_t ldx, float *shared, float *y);

#endif
