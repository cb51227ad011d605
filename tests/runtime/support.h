/* Shared by the runtime tests: building small bundles in C with protobuf-c, and an independent
 * reference forward pass.
 *
 * The reference evaluates a network straight from the decoded schema (not from libveer's own
 * structures) with plain loops in double precision, one row at a time, from the textbook
 * definitions of each layer (linear y = Wx + b; ReLU; tanh; layer normalisation, Ba et al. 2016
 * eq. 4 with the population variance; x·norm/||x||; table lookup) and of the merges documented
 * in proto/veer_bundle.proto. It shares no code with src/runtime. */
#ifndef VEER_TEST_RUNTIME_SUPPORT_H
#define VEER_TEST_RUNTIME_SUPPORT_H

#include <stddef.h>
#include <stdint.h>

#include "runtime/bundle_io.h"
#include "veer/runtime.h"

/* Everything fx_* allocates lives until fx_free_all(). */
void *fx_alloc(size_t n);
void fx_free_all(void);

/* A deterministic generator (xorshift64*, Vigna 2016), so failures reproduce. */
void fx_srand(uint64_t s);
double fx_uniform(double lo, double hi);
float *fx_random(size_t n, float scale);         /* uniform in [-scale, scale] */
float *fx_floats(size_t n, const float *values); /* a copy, or zeros when values is NULL */

Veer__Bundle__Layer *fx_linear(uint32_t in, uint32_t out, float scale);
Veer__Bundle__Layer *fx_linear_w(uint32_t in, uint32_t out, const float *w, const float *b);
Veer__Bundle__Layer *fx_simple(Veer__Bundle__LayerKind kind, uint32_t dim);
Veer__Bundle__Layer *fx_layer_norm(uint32_t dim, float eps, int affine);
Veer__Bundle__Layer *fx_rescale(uint32_t dim, float norm);
Veer__Bundle__Layer *fx_embedding(uint32_t n_idx, const uint32_t *counts, uint32_t out);
Veer__Bundle__Input *fx_input(Veer__Bundle__InputKind kind, size_t n_features,
                              const uint32_t *features, int as_index);
Veer__Bundle__Branch *fx_branch(size_t n_inputs, Veer__Bundle__Input *const *inputs,
                                size_t n_layers, Veer__Bundle__Layer *const *layers);
Veer__Bundle__Network *fx_net(size_t n_branches, Veer__Bundle__Branch *const *branches,
                              size_t n_head, Veer__Bundle__Layer *const *head);

/* A complete, valid model with every optional part (statistics, reference set, Cov(B),
 * provenance) around the given action space and networks. state_dim 4, z_dim 3. */
Veer__Bundle__Model *fx_continuous_model(void); /* action dim 2, bounds [-1,1] x [0,2] */
Veer__Bundle__Model *fx_discrete_model(void);   /* 5 actions, bilinear F with bias */

/* Writes and opens; fails the test on error. The returned buffer is the bundle's bytes
 * (release with free()). */
uint8_t *fx_pack(const Veer__Bundle__Model *m, size_t *len);
veer_bundle *fx_open(const Veer__Bundle__Model *m);

/* The reference forward pass for one row. `action` is action_dim floats (discrete: the index).
 * Returns the output width, or -1 when an embedding index is invalid. */
int ref_net(const Veer__Bundle__Network *net, const Veer__Bundle__Model *m, const float *state,
            const float *action, const float *z, double *out);

/* The reference policy: action (action_dim), Q, and whether the raw action was clipped. */
void ref_policy(const Veer__Bundle__Model *m, const float *state, const float *z, float *action,
                double *q, int *clipped);

/* Normwise relative error max|c - r| / max|r| (Higham, Accuracy and Stability of Numerical
 * Algorithms, 2nd ed., section 1.2). */
double rel_err(const float *c, const double *r, size_t n);

#endif
