/* veer's offline forward-backward trainer: a transition log in, a model bundle out.
 *
 * The method is FB representation learning (Touati & Ollivier, NeurIPS 2021; Touati, Rapin &
 * Ollivier, ICLR 2023): F, B and (continuous actions) an actor trained with the FB temporal-
 * difference loss, the orthonormality regulariser, target networks with Polyak averaging and
 * task vectors sampled on the sphere of radius sqrt(d) mixed with B of dataset states.
 * fbloss.h gives the loss exactly as implemented; train.c the step; export.c the bundle.
 *
 * Two network layouts:
 *   VEER_TRAIN_MLP   F over [state, action, z] (two heads for continuous actions, averaged),
 *                    B over the state (or the chosen features), an actor over [state, z].
 *   VEER_TRAIN_SPLIT as MLP, but F reads (state, action) and (state, z) in two branches, each
 *                    linear → layer norm → tanh → linear → ReLU, joined by concatenation and
 *                    a head of (layers) ReLU layers: the published F's shape, which embeds the
 *                    task apart from the action before mixing them.
 *   VEER_TRAIN_TABLE for small discrete problems whose state features are indices:
 *                    F(s,a,z) = W[s,a]·φ(z) + b[s,a] with φ(z) = ReLU(zU + c) (an embedding
 *                    branch and a task branch joined by the bundle's bilinear merge), B(s) an
 *                    embedding table.
 *
 * Determinism: with one OpenBLAS thread, the same log and the same configuration give the same
 * bundle byte for byte once the creation date is fixed (SOURCE_DATE_EPOCH, the reproducible-
 * builds convention). A checkpoint stores the random generator, so a resumed run is the same
 * run. Prefix veer__train_.
 */
#ifndef VEER_TRAIN_TRAIN_H
#define VEER_TRAIN_TRAIN_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"

enum { VEER_TRAIN_MLP = 1, VEER_TRAIN_TABLE = 2, VEER_TRAIN_SPLIT = 3 };

#define VEER_TRAIN_MAX_ACTION_DIM 64

typedef struct veer_train_config {
    /* The log and what it means. */
    const char *states_path, *actions_path, *next_states_path, *dones_path;
    int ends_truncated;           /* the dones are time-limit cuts, not terminal states */
    uint32_t action_count;        /* > 0: discrete */
    uint32_t action_dim;          /* continuous */
    float low[VEER_TRAIN_MAX_ACTION_DIM], high[VEER_TRAIN_MAX_ACTION_DIM];
    char **feature_names;         /* state_dim names, or NULL for f0, f1, ... */
    uint32_t nfeature_names;
    float decision_step_s;

    /* Outputs. */
    const char *out_path;         /* the bundle */
    const char *curve_path;       /* NULL: "<out>.curve.csv" */
    const char *checkpoint_path;  /* NULL: "<out>.ckpt" */
    const char *model_version;    /* NULL: "fb-<date>" */
    int progress;                 /* 1: progress bar on stderr */
    int have_fallback;
    float fallback[VEER_TRAIN_MAX_ACTION_DIM];

    /* Networks. */
    int arch;
    uint32_t state_counts[4], nstate_counts; /* TABLE: count per state feature */
    uint32_t b_features[64], nb_features;    /* the features B reads (0: all) */
    uint32_t z_dim, hidden, b_hidden, layers, bilinear_k, heads;
    int b_norm;                   /* rescale B's output to norm sqrt(d) */
    int input_norm;               /* 1: the networks see each state feature standardised by
                                     the log's mean and standard deviation; the export folds
                                     that into their first layers, so bundles read raw states */
    float embed_std;              /* TABLE: initial std of the tables */

    /* Optimisation. */
    uint32_t batch;
    uint64_t steps;
    float lr_f, lr_b, lr_actor, discount, tau, ortho, mix_ratio, noise, noise_clip;
    int lr_cosine;    /* 1: every learning rate decays to 0 along a half cosine over `steps` */
    float average;    /* 0: export the last parameters; else the rate of an exponential moving
                         average of the parameters, which is what the bundle gets */
    uint64_t rng_key; /* start value of the random streams */
    int threads;
    float holdout;                /* fraction of transitions held out for the Bellman residual */
    uint32_t ref_count;           /* reference states stored in the bundle */
    uint32_t eval_every, checkpoint_every;
} veer_train_config;

/* Fills `c` with the preset's values: "published" (the ICLR 2023 paper's, see train.c),
 * "small" (a 24-feature arm on 2 cores) or "tabular" (the warehouse floor).
 * Returns 0 or VEER_EINVAL for an unknown name. Paths and the action space are left unset. */
int veer__train_preset(veer_train_config *c, const char *name);

/* Trains and writes the bundle, the curve and checkpoints. Resumes from the checkpoint when one
 * for the same log and configuration exists; refuses (VEER_ECONFIG) one that does not match.
 * Returns 0 or a VEER_E* code with `err` naming the file or flag at fault. */
int veer__train_run(const veer_train_config *c, veer_error *err);

/* ---- the trainer object, for the run loop, the export and the benchmark ------------------ */

#include "train/adam.h"
#include "train/nn.h"
#include "train/rng.h"
#include "train/tlog.h"

#define VEER_TRAIN_MAX_HEADS 2

typedef struct veer__train_losses {
    double fb, fb_offdiag, fb_diag, orth, actor_q;
} veer__train_losses;

typedef struct veer__trainer {
    veer_train_config cfg;
    const veer__tlog *log;
    uint32_t d, n;                 /* z_dim, batch */
    uint32_t heads;
    veer__nn *f[VEER_TRAIN_MAX_HEADS], *ft[VEER_TRAIN_MAX_HEADS], *b, *bt, *actor;
    /* With --average: the parameter averages the bundle gets (NULL otherwise). */
    veer__nn *fa[VEER_TRAIN_MAX_HEADS], *ba, *aa;
    veer__adam opt_f[VEER_TRAIN_MAX_HEADS], opt_b, opt_actor;
    veer__rng rng;
    uint64_t step;
    size_t *train_idx, ntrain, *hold_idx, nhold;
    /* batch buffers */
    size_t *idx;
    float *s, *a, *sn, *an, *cont, *z, *zmix, *u, *ft_mean, *fbuf, *df, *db, *da, *work, *q, *qbest;
    float *hold_z;                 /* nhold x d task vectors fixed for the held-out residual */
    float act_center[VEER_TRAIN_MAX_ACTION_DIM], act_half[VEER_TRAIN_MAX_ACTION_DIM];
    /* With --input-norm: per state feature, the log's mean and 1 / standard deviation; batches
     * are standardised as they are gathered (NULL otherwise). */
    float *in_mean, *in_scale;
} veer__trainer;

/* Builds the networks and optimisers for `log` (which must outlive the trainer). */
int veer__trainer_create(const veer_train_config *c, const veer__tlog *log, veer__trainer **out,
                         veer_error *err);
void veer__trainer_destroy(veer__trainer *t);

/* One gradient step on a fresh batch; `losses` may be NULL. */
int veer__trainer_step(veer__trainer *t, veer__train_losses *losses);

/* The networks a bundle is made of: the parameter averages with --average, else the networks
 * being trained. `f` gets `heads` entries; `actor` is NULL for discrete actions. With
 * --input-norm they read standardised states (in_mean, in_scale); the export folds that in. */
void veer__trainer_outputs(const veer__trainer *t, veer__nn *f[VEER_TRAIN_MAX_HEADS], veer__nn **b,
                           veer__nn **actor);

/* The FB Bellman residual on the held-out transitions, with the online networks on both sides
 * and fixed task vectors (the FB loss up to a constant independent of F and B). NaN when no
 * transitions were held out. */
double veer__trainer_bellman(veer__trainer *t);

/* Checkpoints: every parameter, target, optimiser moment, the generator and the step. `fp`
 * is a fingerprint of the log and configuration that a resume must match. */
int veer__trainer_save(const veer__trainer *t, const char *path, const char *fp,
                       const void *extra, size_t extra_len, veer_error *err);
int veer__trainer_load(veer__trainer *t, const char *path, const char *fp, void **extra,
                       size_t *extra_len, veer_error *err);

/* Writes the bundle (export.c). */
int veer__train_export(const veer__trainer *t, const char *path, const char *settings,
                       const char *created, veer_error *err);

#endif
