/* Trainable networks with the same shape as the bundle's (proto/veer_bundle.proto): branches
 * over named inputs (state features, action, task vector), each a chain of layers, merged by
 * concatenation or bilinearly, then an optional head. Forward passes keep every activation so
 * the backward pass (reverse-mode differentiation, written out per layer kind) can accumulate
 * parameter gradients and, for continuous actions, the gradient with respect to the action
 * input that the actor needs.
 *
 * Key choice: all parameters of one network live in one contiguous float array (and so do
 * their gradients). Adam, Polyak averaging of target networks, checkpoints and export then
 * work on flat arrays, and a layer only records offsets into them. Batched products go through
 * veer__tgemm (cblas_sgemm), which a benchmark can record to time the same products bare.
 * Prefix veer__nn_.
 */
#ifndef VEER_TRAIN_NN_H
#define VEER_TRAIN_NN_H

#include <stddef.h>
#include <stdint.h>

#include "train/rng.h"
#include "veer/error.h"

/* The numbers match proto/veer_bundle.proto's InputKind, LayerKind and MergeKind. */
enum { VEER_NN_IN_STATE = 1, VEER_NN_IN_ACTION = 2, VEER_NN_IN_TASK = 3 };
enum {
    VEER_NN_LINEAR = 1,
    VEER_NN_EMBEDDING = 2,
    VEER_NN_RELU = 3,
    VEER_NN_TANH = 4,
    VEER_NN_LAYER_NORM = 5,
    VEER_NN_RESCALE_NORM = 6
};
enum { VEER_NN_CONCAT = 1, VEER_NN_BILINEAR = 2 };

#define VEER_NN_MAX_INPUTS 4
#define VEER_NN_MAX_LAYERS 12
#define VEER_NN_MAX_BRANCHES 4
#define VEER_NN_MAX_COUNTS 4

typedef struct veer__nn_input {
    int kind;
    uint32_t nfeat;    /* STATE: number of picked features (0 = all) */
    uint32_t *features; /* STATE: the picked feature indices (owned) */
    int as_index;      /* ACTION, discrete: the index itself instead of one-hot */
    uint32_t width;    /* resolved width in the branch input */
} veer__nn_input;

typedef struct veer__nn_layer {
    int kind;
    uint32_t in, out;
    size_t w_off, nw; /* weight: offset and count in the network's params (nw 0: none) */
    size_t b_off, nb;
    float eps, norm;   /* layer norm epsilon; rescale target norm (0: sqrt(out)) */
    float init_std;    /* embedding initial standard deviation */
    uint32_t ncounts, counts[VEER_NN_MAX_COUNTS];
    float *y;          /* max_batch x out activations of the last forward pass */
    float *aux;        /* layer norm: mean and 1/std per row; rescale: the row norms */
} veer__nn_layer;

typedef struct veer__nn_chain {
    char name[32];
    veer__nn_input inputs[VEER_NN_MAX_INPUTS];
    uint32_t ninputs;
    uint32_t in_dim;
    float *x;          /* max_batch x in_dim: the assembled input (branches) or the merge */
    veer__nn_layer layers[VEER_NN_MAX_LAYERS];
    uint32_t nlayers;
} veer__nn_chain;

typedef struct veer__nn {
    uint32_t state_dim, action_dim, action_count, z_dim; /* action_count 0: continuous */
    uint32_t max_batch;
    veer__nn_chain branch[VEER_NN_MAX_BRANCHES];
    uint32_t nbranches;
    int merge;
    uint32_t bilinear_k, matrix_branch;
    int bilinear_bias;
    veer__nn_chain head; /* its x is the merged vector */
    uint32_t out_dim;
    float *params, *grads;
    size_t nparams;
    float *scratch[2];   /* max_batch x widest, for gradients flowing backward */
    /* Bilinear merge whose matrix branch is a lone embedding: the merge reads the table rows
     * in place (fused_rows holds each row's table index) instead of copying (k + 1) x out
     * values per row, and the backward pass adds the outer products straight into the table's
     * gradient. Same results, a fraction of the memory traffic. */
    int fused;
    long *fused_rows;
    uint32_t widest;
} veer__nn;

/* Building: new, then branches, inputs and layers, the merge, then finish (which allocates
 * and initialises the parameters from `rng`). Errors are VEER_EINVAL with a message. */
int veer__nn_new(uint32_t state_dim, uint32_t action_dim, uint32_t action_count, uint32_t z_dim,
                 uint32_t max_batch, veer__nn **out);
int veer__nn_add_branch(veer__nn *nn, const char *name);
int veer__nn_add_input(veer__nn *nn, uint32_t branch, int kind, uint32_t nfeat,
                       const uint32_t *features, int as_index);
/* branch < nbranches adds to that branch; branch == UINT32_MAX adds to the head. `out` is
 * ignored for element-wise kinds. `counts` only for embeddings. */
int veer__nn_add_layer(veer__nn *nn, uint32_t branch, int kind, uint32_t out, uint32_t ncounts,
                       const uint32_t *counts);
#define VEER_NN_HEAD UINT32_MAX
int veer__nn_set_merge(veer__nn *nn, int merge, uint32_t k, uint32_t matrix_branch, int bias);
int veer__nn_finish(veer__nn *nn, veer__rng *rng, veer_error *err);

/* A structural copy with the same parameters (the target network). */
int veer__nn_clone(const veer__nn *src, veer__nn **out);
void veer__nn_free(veer__nn *nn);

/* Forward for n <= max_batch rows: states n x state_dim, actions n x action_dim (discrete: the
 * index as a float; may be NULL when no branch reads the action), zs n x z_dim (NULL when
 * unused). *out points at n x out_dim values owned by the network, valid until the next pass.
 * VEER_EINVAL when an embedding index is out of range. */
int veer__nn_forward(veer__nn *nn, size_t n, const float *states, const float *actions,
                     const float *zs, const float **out);

/* Backward through the last forward pass: dout is n x out_dim (dLoss/dOutput). Parameter
 * gradients are ADDED to nn->grads. When `dactions` is not NULL (continuous actions only), it
 * receives dLoss/dAction, n x action_dim. */
void veer__nn_backward(veer__nn *nn, size_t n, const float *dout, float *dactions);

void veer__nn_zero_grad(veer__nn *nn);

/* Folds the standardisation x' = (x - mean[f]) * scale[f] of every state feature f into the
 * first linear layer of each branch that reads the state (W' = W diag(scale), b' = b - W' mean),
 * so that on raw states the network computes what it computed on standardised ones. For
 * export: the bundle keeps its plain layers. VEER_EINVAL when a branch reads the state through
 * anything but a linear first layer (an embedding reads indices). */
int veer__nn_fold_state_affine(veer__nn *nn, const float *mean, const float *scale);

/* target <- (1 - tau) target + tau online, over all parameters (Polyak averaging). */
void veer__nn_polyak(veer__nn *target, const veer__nn *online, float tau);

/* The product every batched layer uses: C = alpha op(A) op(B) + beta C, row-major, through
 * cblas_sgemm. When a recorder is installed each call's shape is appended to it. */
typedef struct veer__gemm_shape {
    int ta, tb;
    uint32_t m, n, k;
} veer__gemm_shape;
typedef struct veer__gemm_log {
    veer__gemm_shape *shapes;
    size_t count, cap;
} veer__gemm_log;
void veer__tgemm(int ta, int tb, uint32_t m, uint32_t n, uint32_t k, float alpha, const float *a,
                 uint32_t lda, const float *b, uint32_t ldb, float beta, float *c, uint32_t ldc);
void veer__tgemm_record(veer__gemm_log *log); /* NULL stops recording */

#endif
