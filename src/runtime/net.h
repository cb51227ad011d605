/* The networks F, B and the actor as the runtime holds them, and their evaluation.
 *
 * A network is one or more branches merged into a head. A branch concatenates its inputs
 * (state features, the action, the task vector z) into one row and runs its layers over it;
 * the branch outputs are merged (concatenated, or bilinear: one branch's output read as a
 * (k + bias) x out matrix M applied to the other branch's k-vector v, out = vᵀM with v given a
 * trailing 1 when there is a bias row) and the head's layers produce the output.
 *
 * Layers (matching the bundle schema; a NumPy reference must do the same):
 *   LINEAR      y = W x + b, W out x in row-major; no bias when the bundle's bias is empty
 *   EMBEDDING   y = table row of the mixed-radix joint index of the in_dim integer inputs
 *   RELU, TANH  element-wise
 *   LAYER_NORM  y = gain (x - mean) / sqrt(var + eps) + bias, population variance; empty gain
 *               means 1, empty bias means 0
 *   RESCALE     y = x norm / ||x||; an all-zero row stays all zeros (see kernels.h)
 *
 * Networks are built once by the loader (weights in the bundle's aligned memory) and never
 * change, so one network serves every thread; each thread brings its own buffers (veer__net_bufs).
 * Evaluation allocates nothing. Prefix veer__net_. */
#ifndef VEER_RUNTIME_NET_H
#define VEER_RUNTIME_NET_H

#include <stddef.h>
#include <stdint.h>

enum veer__layer_kind {
    VEER__LAYER_LINEAR = 1,
    VEER__LAYER_EMBEDDING = 2,
    VEER__LAYER_RELU = 3,
    VEER__LAYER_TANH = 4,
    VEER__LAYER_LAYER_NORM = 5,
    VEER__LAYER_RESCALE = 6,
};

enum veer__input_kind {
    VEER__INPUT_STATE = 1,         /* features[] of the state, or all when features is NULL */
    VEER__INPUT_ACTION = 2,        /* continuous action vector */
    VEER__INPUT_ACTION_ONEHOT = 3, /* discrete action as one-hot of length action_count */
    VEER__INPUT_ACTION_INDEX = 4,  /* discrete action as its index (one float) */
    VEER__INPUT_TASK = 5,          /* z */
};

enum veer__merge_kind {
    VEER__MERGE_CONCAT = 1,
    VEER__MERGE_BILINEAR = 2,
};

typedef struct veer__layer {
    int kind;
    uint32_t in_dim, out_dim;
    const float *weight;    /* LINEAR: out x in; EMBEDDING: rows x out; LAYER_NORM: gain or NULL */
    const float *bias;      /* LINEAR, LAYER_NORM: out values or NULL */
    float eps;              /* LAYER_NORM */
    float norm;             /* RESCALE, resolved (never 0) */
    const uint32_t *counts; /* EMBEDDING: in_dim counts */
} veer__layer;

typedef struct veer__input {
    int kind;
    uint32_t width;           /* columns this input adds to the branch's input row */
    const uint32_t *features; /* STATE: `width` feature indices, or NULL for all, in order */
} veer__input;

typedef struct veer__branch {
    veer__input *inputs;
    uint32_t input_count;
    uint32_t in_width; /* sum of input widths */
    veer__layer *layers;
    uint32_t layer_count;
    uint32_t out_dim; /* last layer's out_dim, or in_width with no layers */
    int reads_action, reads_task;
} veer__branch;

typedef struct veer__net {
    veer__branch *branches;
    uint32_t branch_count;
    int merge;
    uint32_t bilinear_k;    /* BILINEAR: length of the vector branch's output */
    uint32_t matrix_branch; /* BILINEAR: which branch is the matrix */
    int bilinear_bias;
    uint32_t branch_width; /* sum of the branch outputs (they sit side by side) */
    uint32_t merged_width; /* CONCAT: branch_width; BILINEAR: the out of vᵀM */
    veer__layer *head;
    uint32_t head_count;
    uint32_t out_dim;
    uint32_t max_in_width; /* widest branch input row */
    uint32_t max_width;    /* widest layer output or merged row */
} veer__net;

/* Where each row's inputs come from. Row r reads state row r / state_rep, action row
 * (action_cycle ? r % action_cycle : r), and z row r / z_rep (z_rep 0 counts as 1), or z row 0
 * when z_shared. Discrete acting uses state_rep = action_cycle = action_count to evaluate every
 * action for each state at once, with z_rep = action_count when each state has its own task. */
typedef struct veer__rows {
    size_t n;
    uint32_t state_dim;
    const float *states;
    uint32_t state_rep;
    const float *actions;
    uint32_t action_dim;
    uint32_t action_cycle;
    const float *zs;
    uint32_t z_dim;
    uint32_t z_rep;
    int z_shared;
} veer__rows;

/* One thread's scratch for evaluating networks on up to `rows` rows. All 64-byte aligned. */
typedef struct veer__net_bufs {
    size_t rows;
    float *in;       /* rows x max_in_width */
    float *ping;     /* rows x max_width */
    float *pong;     /* rows x max_width */
    float *branches; /* rows x max branch_width */
} veer__net_bufs;

/* Floats each buffer needs for `net` at `rows` rows, folded into *sizes with max():
 * sizes[0] in, sizes[1] ping and pong, sizes[2] branches. */
void veer__net_buf_sizes(const veer__net *net, size_t rows, size_t sizes[3]);

/* Evaluates `net` on rows->n rows (at most bufs->rows). On success *out points into bufs at the
 * n x out_dim result (valid until the next evaluation with these buffers) and 0 is returned.
 * Returns VEER_EINVAL when an embedding layer meets an index that is not an integer within its
 * count (nothing is read out of bounds). Allocates nothing. */
int veer__net_eval(const veer__net *net, const veer__net_bufs *bufs, const veer__rows *rows,
                   const float **out);

/* The net's final layer when it is LINEAR and veer__net_eval_inner can stop just before it:
 * the head's last layer, or with no head the last layer of the only branch when that branch
 * reads the action (so runs on every row). NULL otherwise. With it, F·z = h·(Wᵀz) + b·z for
 * the rows' inner outputs h: discrete acting projects z through W once per state instead of
 * multiplying every action's row by W (policy.c). */
const veer__layer *veer__net_final_linear(const veer__net *net);

/* As veer__net_eval, but stops before veer__net_final_linear(net): *out is n x that layer's
 * in_dim. Returns VEER_EINVAL when that layer is NULL. */
int veer__net_eval_inner(const veer__net *net, const veer__net_bufs *bufs, const veer__rows *rows,
                         const float **out);

#endif
