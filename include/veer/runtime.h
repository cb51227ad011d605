/* libveer: load a frozen forward-backward (FB) model bundle, turn reward specifications into
 * task vectors, and compute actions for states.
 *
 * The three objects and their lifetimes:
 *
 *   veer_bundle     a loaded, validated model. Immutable once open: any number of threads may
 *                   share one and call every const function on it concurrently.
 *   veer_workspace  the scratch memory one thread needs to act. Sized when created, so acting
 *                   allocates nothing and takes no lock. One workspace per thread; never share
 *                   one between threads without your own synchronisation.
 *   z (float[z_dim]) a task vector, produced by veer_task_encode for one bundle. It belongs to
 *                   that bundle: re-encode the task after loading another model.
 *
 * The maths (Touati & Ollivier, NeurIPS 2021; Touati, Rapin & Ollivier, ICLR 2023):
 *   continuous actions: a = clip(actor(s, z)), discrete: a = argmax_a F(s, a, z)·z,
 *   value Q(s, a, z) = F(s, a, z)·z, task from reward samples z = (1/n) Σ r_i B(s_i).
 *
 * Errors: every function returning int returns 0 or a negative VEER_E* code (veer/error.h) and,
 * where it takes a `veer_error *` (NULL allowed), fills it with the field and a message.
 */
#ifndef VEER_RUNTIME_H
#define VEER_RUNTIME_H

#include <stddef.h>
#include <stdint.h>

#include "veer/alloc.h"
#include "veer/error.h"

#ifdef __cplusplus
extern "C" {
#endif

#define VEER_BUNDLE_FORMAT_VERSION 1
#define VEER_BUNDLE_MAGIC "VEERMDL1" /* the first 8 bytes of every bundle file */

typedef struct veer_bundle veer_bundle;
typedef struct veer_workspace veer_workspace;

typedef enum veer_action_kind {
    VEER_ACTION_CONTINUOUS = 1,
    VEER_ACTION_DISCRETE = 2,
} veer_action_kind;

/* ---- Bundles ------------------------------------------------------------------------- */

/* Reads, verifies (magic, version, checksum) and validates the bundle at `path`.
 * On success *out owns the model; release it with veer_bundle_close. On error *out is NULL and
 * `err` names the offending field. Any thread. */
int veer_bundle_open(const char *path, veer_bundle **out, veer_error *err);

/* The same from a buffer the caller owns; the bundle copies what it keeps. */
int veer_bundle_open_mem(const void *data, size_t len, veer_bundle **out, veer_error *err);

/* Releases the bundle. Every workspace made from it must be destroyed first. NULL is allowed. */
void veer_bundle_close(veer_bundle *bundle);

/* Everything a client or an operator may want to know about a loaded model. All pointers point
 * into the bundle and live as long as it does. */
typedef struct veer_model_info {
    const char *model_version;     /* the label the bundle carries */
    const uint8_t *digest;         /* 32-byte BLAKE2b of the payload: the model's identity */
    uint32_t state_dim;
    uint32_t z_dim;
    float discount;
    float decision_step_s;
    const char *const *feature_names; /* state_dim strings */

    veer_action_kind action_kind;
    uint32_t action_dim;           /* continuous: vector length; discrete: 1 */
    uint32_t action_count;         /* discrete: number of actions; continuous: 0 */
    const float *action_low;       /* continuous: action_dim values; discrete: NULL */
    const float *action_high;
    const float *fallback_action;  /* action_dim values (discrete: the index as a float) */

    const uint32_t *b_features;    /* the state features B reads, in order */
    uint32_t b_feature_count;

    int rescale;                   /* task defaults recorded in the bundle */
    float rescale_norm;            /* resolved: sqrt(z_dim) when the bundle says 0 */
    int center_rewards;
    float ridge;

    int has_stats;                 /* training-state statistics for drift, when present: */
    uint64_t stats_count;
    const float *state_mean;       /* state_dim */
    const float *state_cov;        /* state_dim x state_dim */
    const float *state_precision;  /* (cov + cov_ridge I)^-1, computed at load */
    float cov_ridge;
    uint32_t bins;                 /* quantile bins per feature */
    const float *quantile_edges;   /* state_dim x (bins - 1) */
    float mahalanobis_p99;
    float mahalanobis_p999;

    uint32_t reference_count;      /* reference set (0 when absent) */
    const float *reference_states; /* reference_count x state_dim */
    const float *reference_b;      /* reference_count x z_dim */
    const float *cov_b;            /* z_dim x z_dim second moment E[B Bᵀ]; NULL when absent */

    const char *producer, *created, *source_digest, *settings, *notes; /* provenance */
} veer_model_info;

/* Never NULL for an open bundle. Any thread. */
const veer_model_info *veer_bundle_info(const veer_bundle *bundle);

/* Size of the bundle's own memory (weights, statistics, reference set), in bytes. */
size_t veer_bundle_memory(const veer_bundle *bundle);

/* ---- Workspaces and acting --------------------------------------------------------------- */

/* Creates the scratch memory for one thread to act on `bundle` with batches of up to
 * `max_batch` states (at least 1). Allocates once; acting then allocates nothing.
 * The caller owns *out; destroy it before closing the bundle. */
int veer_workspace_create(const veer_bundle *bundle, uint32_t max_batch, veer_workspace **out,
                          veer_error *err);
void veer_workspace_destroy(veer_workspace *ws);

/* Flags describing an action. The runtime sets the first three; the service adds the rest. */
#define VEER_ACT_CLIPPED (1u << 0)         /* the policy's action was clipped to the bounds */
#define VEER_ACT_FALLBACK (1u << 1)        /* the fallback action was returned */
#define VEER_ACT_NONFINITE (1u << 2)       /* the network produced NaN or infinity */
#define VEER_ACT_DEADLINE (1u << 3)        /* the deadline passed (service) */
#define VEER_ACT_NO_TASK (1u << 4)         /* the channel had no task (service) */
#define VEER_ACT_OUT_OF_COVERAGE (1u << 5) /* state beyond the training p99.9 (monitor) */

/* Acts for one state: writes action_dim values to `action`, the value Q(s, a, z) to *value
 * (may be NULL) and flags to *flags (may be NULL).
 * Returns VEER_ENONFINITE when `state` or `z` holds NaN or infinity, and VEER_EINVAL when a
 * state feature read through an embedding layer is not a valid index (nothing is written). When
 * the network itself yields a non-finite action or value, the result is the fallback action,
 * value 0, flags VEER_ACT_FALLBACK | VEER_ACT_NONFINITE, and the return is 0: every action that
 * leaves this function is finite and within the bounds.
 * Allocates nothing, takes no lock. The thread that owns `ws`. */
int veer_act(veer_workspace *ws, const float *state, const float *z, float *action, float *value,
             uint32_t *flags);

/* Acts for `n` states (n x state_dim, row-major) with one task vector; writes n x action_dim
 * actions, and n values and flags where those pointers are not NULL. n may exceed the
 * workspace's max_batch (it is processed in slices). Same contract as veer_act per row. */
int veer_act_batch(veer_workspace *ws, size_t n, const float *states, const float *z,
                   float *actions, float *values, uint32_t *flags);

/* Acts for `n` states, each with its own task vector: zs is n x z_dim, row i the task of state
 * i (a service answering several channels at once). Same contract as veer_act_batch, and a
 * non-finite value anywhere in zs is VEER_ENONFINITE for the whole call. For a discrete bundle
 * one evaluation of F covers all n x action_count rows, which costs less than n calls of
 * veer_act; its values may differ from veer_act's in the last bits (a many-row product sums in
 * another order), so an argmax between two actions that tie to float precision may differ. */
int veer_act_each(veer_workspace *ws, size_t n, const float *states, const float *zs,
                  float *actions, float *values, uint32_t *flags);

/* ---- The networks themselves (for checks, tools and the trainer's evaluation) -------------- */

/* F(s, a, z) for n rows: states n x state_dim, actions n x action_dim (discrete: the index as a
 * float), zs n x z_dim; writes n x z_dim. */
int veer_eval_forward(veer_workspace *ws, size_t n, const float *states, const float *actions,
                      const float *zs, float *out);

/* B(s) for n states (n x state_dim, all features; B picks its own); writes n x z_dim. */
int veer_eval_backward(veer_workspace *ws, size_t n, const float *states, float *out);

/* The actor network's raw output for n rows (continuous bundles only; VEER_EINVAL otherwise):
 * n x action_dim, before the normalised-output mapping and before clipping. */
int veer_eval_actor(veer_workspace *ws, size_t n, const float *states, const float *zs, float *out);

/* ---- Task encoding ----------------------------------------------------------------------- */

typedef enum veer_task_source {
    VEER_TASK_SAMPLES = 1,   /* states with rewards: z = (1/n) Σ r_i B(s_i) */
    VEER_TASK_GOALS = 2,     /* goal states with weights: z = Σ w_k B(g_k) */
    VEER_TASK_REFERENCE = 3, /* rewards over the bundle's reference states: z = (1/m) Σ r_j B_j */
} veer_task_source;

#define VEER_OPT_DEFAULT (-1) /* take the option's value from the bundle's task defaults */

typedef struct veer_task_spec {
    veer_task_source source;
    uint32_t count;      /* samples, goals, or rewards (REFERENCE: must equal reference_count) */
    const float *states; /* count x state_dim; must be NULL for REFERENCE (VEER_EFIELD) */
    const float *values; /* count rewards (SAMPLES, REFERENCE) or weights (GOALS) */
    int rescale;         /* VEER_OPT_DEFAULT, 0 or 1: rescale z to the bundle's rescale_norm */
    int center;          /* VEER_OPT_DEFAULT, 0 or 1: subtract the mean reward first (not GOALS) */
    int cov_correction;  /* 0 or 1, SAMPLES only: z = Cov_train(B) (Cov_samples(B) + ridge I)^-1
                            (1/n) Σ r_i B(s_i), for samples not drawn like the training data */
    float ridge;         /* < 0: the bundle's ridge */
    uint32_t max_count;  /* 0: no limit beyond VEER_TASK_MAX_COUNT */
} veer_task_spec;

#define VEER_TASK_MAX_COUNT 1000000u

/* Fills a spec with the defaults: rescale, center and ridge from the bundle, no correction. */
void veer_task_spec_init(veer_task_spec *spec, veer_task_source source);

typedef struct veer_task_report {
    double r2;          /* expressiveness: R² of the least-squares fit of r on [B(s), 1];
                           NaN for GOALS, when count <= z_dim + 1, or when all rewards are
                           equal (nothing to explain); computed only when a report is asked */
    double norm_raw;    /* ||z|| before rescaling */
    double mean_reward; /* the mean subtracted when centring (0 otherwise) */
} veer_task_report;

/* Encodes `spec` against `bundle` into z (z_dim floats). `report` may be NULL.
 * Errors: VEER_EEMPTY (count 0), VEER_EDIM (state or count mismatch), VEER_ENONFINITE,
 * VEER_ENOSIGNAL (all-zero rewards or weights, or a zero z), VEER_ETOOMANY (count above the
 * limit), VEER_ESINGULAR (covariance singular even with the ridge), VEER_EFIELD (bad option),
 * VEER_ENOMEM. Allocates scratch memory for the call: never call it on an act path.
 * Any thread; it does not touch any workspace. */
int veer_task_encode(const veer_bundle *bundle, const veer_task_spec *spec, float *z,
                     veer_task_report *report, veer_error *err);

/* ---- Process-wide ------------------------------------------------------------------------ */

/* Sets OpenBLAS's thread count. libveer sets 1 when a workspace is created, because threading
 * a single-state product costs more than it saves and makes latency depend on the other core.
 * The trainer raises it. Returns the previous count. */
int veer_blas_threads(int n);

/* The OpenBLAS kernel in use ("Haswell", ...), for benchmark reports. */
const char *veer_blas_kernel(void);

#ifdef __cplusplus
}
#endif
#endif
