/* The FB training step: sample a batch and task vectors, pick next actions, compute the FB
 * and orthonormality losses against the target networks, step Adam, train the actor
 * (continuous actions), and move the targets by Polyak averaging.
 *
 * Choices where the papers leave room, each stated where it is made:
 *  - Task vectors: z ~ N(0, I) rescaled to norm sqrt(d); a fraction mix_ratio of the rows is
 *    replaced by B(s⁺) of next states drawn from the batch (online B, no gradient), also
 *    rescaled (ICLR 2023, §4 "sampling z").
 *  - Two F heads (continuous actions): the target is the AVERAGE of the two target heads, not
 *    their minimum. Our own runs on a continuous arm saw the minimum pull the loss steadily
 *    away from its theoretical value while the average stayed stable and scored best.
 *  - Discrete actions: next action argmax_a F̄(s⁺, a, z)·z with the target F.
 *  - Continuous actions: next action actor(s⁺, z) plus clipped Gaussian noise (the target
 *    policy smoothing of Fujimoto et al., ICML 2018, used by the ICLR 2023 implementation).
 */
#include "train/train.h"

#include <math.h>
#include <string.h>

#include "base/base.h"
#include "train/fbloss.h"

int veer__train_preset(veer_train_config *c, const char *name)
{
    /* Shared values. The published ones (Touati, Rapin & Ollivier, ICLR 2023, appendix
     * hyper-parameter table), quoted from memory: Adam with learning rate 1e-4, batch 1024,
     * d = 50, discount 0.98, target Polyak rate 0.01, orthonormality coefficient 1, z mixing
     * ratio 0.5, target-action noise 0.2 clipped at 0.3, hidden width 1024 for F and the actor
     * and 256 for B, B normalised to norm sqrt(d). Training length: 1M updates (from memory). */
    c->arch = VEER_TRAIN_MLP;
    c->z_dim = 50;
    c->hidden = 1024;
    c->b_hidden = 256;
    c->layers = 2;
    c->bilinear_k = 256;
    c->heads = 2;
    c->b_norm = 1;
    c->embed_std = 0.1f;
    c->batch = 1024;
    c->steps = 1000000;
    c->lr_f = c->lr_b = c->lr_actor = 1e-4f;
    c->discount = 0.98f;
    c->tau = 0.01f;
    c->ortho = 1.0f;
    c->mix_ratio = 0.5f;
    c->noise = 0.2f;
    c->noise_clip = 0.3f;
    c->rng_key = 1;
    c->threads = 1;
    c->holdout = 0.02f;
    c->ref_count = 4096;
    c->eval_every = 0; /* 0: steps / 50 */
    c->checkpoint_every = 0; /* 0: steps / 10 */
    if (strcmp(name, "published") == 0)
        return 0;
    if (strcmp(name, "small") == 0) {
        /* Scaled down for a 24-feature machine on 2 cores (our choice, no source): the SMALL
         * networks, a 3x larger step size that small networks tolerate (common practice). */
        c->z_dim = 32;
        c->hidden = c->b_hidden = 256;
        c->batch = 256;
        c->steps = 20000;
        c->lr_f = c->lr_b = c->lr_actor = 3e-4f;
        return 0;
    }
    if (strcmp(name, "tabular") == 0) {
        /* The warehouse floor: tables and the bilinear F that our reference experiments found
         * to fit successor measures (k = 256, d = 32, about 2,000 steps). */
        c->arch = VEER_TRAIN_TABLE;
        c->z_dim = 32;
        c->heads = 1;
        /* A large batch: the fit of a table is limited by minibatch noise, not by passes. On
         * the warehouse floor, 2,000 steps at batch 512 score 0.79 on goals, at 2,048 0.95 and
         * at 4,096 0.96, each step costing about proportionally more (our measurements). */
        c->batch = 2048;
        /* 3,000 steps with the parameters' average exported: on the warehouse floor the goal
         * score of the last parameters wobbles from run to run (0.82-0.89 slippery, 2,000-4,000
         * steps), the average's does not (0.966 deterministic, 0.928 and 0.932 slippery with two
         * training keys; our measurements, test_warehouse.py). */
        c->steps = 3000;
        c->average = 0.01f;
        c->lr_f = c->lr_b = 1e-3f;
        c->discount = 0.95f;
        /* Faster targets than the published 0.01: on the warehouse floor, 2,000 steps with
         * 0.01 score 0.54 on goals, with 0.1 score 0.79 (our measurements); a successor
         * measure with discount 0.95 needs many target refreshes to propagate. */
        c->tau = 0.1f;
        return 0;
    }
    return VEER_EINVAL;
}

/* ---- building ------------------------------------------------------------------------------ */

/* linear(h) → layer norm → tanh, then (layers − 1) × [linear(h) → relu], then linear(out):
 * the published networks' shape (a normalised first layer, ReLU after). */
static int add_mlp(veer__nn *nn, uint32_t br, uint32_t hidden, uint32_t layers, uint32_t out,
                   int first_norm)
{
    int rc = veer__nn_add_layer(nn, br, VEER_NN_LINEAR, hidden, 0, NULL);
    if (first_norm) {
        rc |= veer__nn_add_layer(nn, br, VEER_NN_LAYER_NORM, 0, 0, NULL);
        rc |= veer__nn_add_layer(nn, br, VEER_NN_TANH, 0, 0, NULL);
    } else {
        rc |= veer__nn_add_layer(nn, br, VEER_NN_RELU, 0, 0, NULL);
    }
    for (uint32_t i = 1; i < layers; i++) {
        rc |= veer__nn_add_layer(nn, br, VEER_NN_LINEAR, hidden, 0, NULL);
        rc |= veer__nn_add_layer(nn, br, VEER_NN_RELU, 0, 0, NULL);
    }
    rc |= veer__nn_add_layer(nn, br, VEER_NN_LINEAR, out, 0, NULL);
    return rc ? VEER_EINVAL : 0;
}

static int build_f(const veer__trainer *t, veer__nn **out, veer__rng *rng, veer_error *err)
{
    const veer_train_config *c = &t->cfg;
    const veer__tlog *log = t->log;
    veer__nn *nn;
    int rc = veer__nn_new(log->state_dim, log->action_dim, c->action_count, t->d, t->n, &nn);
    if (rc != 0)
        return veer__error_set(err, rc, "forward", "cannot create F");
    if (c->arch == VEER_TRAIN_TABLE) {
        uint32_t counts[VEER_NN_MAX_COUNTS];
        memcpy(counts, c->state_counts, c->nstate_counts * sizeof *counts);
        counts[c->nstate_counts] = c->action_count;
        veer__nn_add_branch(nn, "table");
        veer__nn_add_branch(nn, "task");
        rc |= veer__nn_add_input(nn, 0, VEER_NN_IN_STATE, 0, NULL, 0);
        rc |= veer__nn_add_input(nn, 0, VEER_NN_IN_ACTION, 0, NULL, 1);
        rc |= veer__nn_add_layer(nn, 0, VEER_NN_EMBEDDING, (c->bilinear_k + 1) * t->d,
                                 c->nstate_counts + 1, counts);
        nn->branch[0].layers[0].init_std = c->embed_std;
        rc |= veer__nn_add_input(nn, 1, VEER_NN_IN_TASK, 0, NULL, 0);
        rc |= veer__nn_add_layer(nn, 1, VEER_NN_LINEAR, c->bilinear_k, 0, NULL);
        rc |= veer__nn_add_layer(nn, 1, VEER_NN_RELU, 0, 0, NULL);
        rc |= veer__nn_set_merge(nn, VEER_NN_BILINEAR, c->bilinear_k, 0, 1);
    } else if (c->arch == VEER_TRAIN_SPLIT) {
        /* Two embeddings of width `hidden`, then the head: (layers - 1) x [linear(hidden) →
         * ReLU] and linear(d). The published F (Touati, Rapin & Ollivier, ICLR 2023; from
         * memory) embeds (s, a) and (s, z) apart the same way. */
        for (uint32_t br = 0; br < 2; br++) {
            veer__nn_add_branch(nn, br == 0 ? "state-action" : "state-task");
            rc |= veer__nn_add_input(nn, br, VEER_NN_IN_STATE, 0, NULL, 0);
            rc |= veer__nn_add_input(nn, br, br == 0 ? VEER_NN_IN_ACTION : VEER_NN_IN_TASK, 0,
                                     NULL, 0);
            rc |= veer__nn_add_layer(nn, br, VEER_NN_LINEAR, c->hidden, 0, NULL);
            rc |= veer__nn_add_layer(nn, br, VEER_NN_LAYER_NORM, 0, 0, NULL);
            rc |= veer__nn_add_layer(nn, br, VEER_NN_TANH, 0, 0, NULL);
            rc |= veer__nn_add_layer(nn, br, VEER_NN_LINEAR, c->hidden, 0, NULL);
            rc |= veer__nn_add_layer(nn, br, VEER_NN_RELU, 0, 0, NULL);
        }
        rc |= veer__nn_set_merge(nn, VEER_NN_CONCAT, 0, 0, 0);
        for (uint32_t i = 1; i < c->layers; i++) {
            rc |= veer__nn_add_layer(nn, VEER_NN_HEAD, VEER_NN_LINEAR, c->hidden, 0, NULL);
            rc |= veer__nn_add_layer(nn, VEER_NN_HEAD, VEER_NN_RELU, 0, 0, NULL);
        }
        rc |= veer__nn_add_layer(nn, VEER_NN_HEAD, VEER_NN_LINEAR, t->d, 0, NULL);
    } else {
        veer__nn_add_branch(nn, "state-action-task");
        rc |= veer__nn_add_input(nn, 0, VEER_NN_IN_STATE, 0, NULL, 0);
        rc |= veer__nn_add_input(nn, 0, VEER_NN_IN_ACTION, 0, NULL, 0);
        rc |= veer__nn_add_input(nn, 0, VEER_NN_IN_TASK, 0, NULL, 0);
        rc |= add_mlp(nn, 0, c->hidden, c->layers, t->d, 1);
        rc |= veer__nn_set_merge(nn, VEER_NN_CONCAT, 0, 0, 0);
    }
    if (rc != 0) {
        veer__nn_free(nn);
        return veer__error_set(err, VEER_EINVAL, "forward", "F does not fit the log's shape");
    }
    if ((rc = veer__nn_finish(nn, rng, err)) != 0) {
        veer__nn_free(nn);
        return rc;
    }
    *out = nn;
    return 0;
}

static int build_b(const veer__trainer *t, veer__nn **out, veer__rng *rng, veer_error *err)
{
    const veer_train_config *c = &t->cfg;
    veer__nn *nn;
    int rc = veer__nn_new(t->log->state_dim, t->log->action_dim, c->action_count, t->d, t->n, &nn);
    if (rc != 0)
        return veer__error_set(err, rc, "backward", "cannot create B");
    veer__nn_add_branch(nn, "state");
    rc |= veer__nn_add_input(nn, 0, VEER_NN_IN_STATE, c->nb_features, c->b_features, 0);
    if (c->arch == VEER_TRAIN_TABLE) {
        rc |= veer__nn_add_layer(nn, 0, VEER_NN_EMBEDDING, t->d, c->nstate_counts, c->state_counts);
    } else {
        rc |= add_mlp(nn, 0, c->b_hidden, c->layers, t->d, 0);
    }
    if (c->b_norm)
        rc |= veer__nn_add_layer(nn, 0, VEER_NN_RESCALE_NORM, 0, 0, NULL);
    rc |= veer__nn_set_merge(nn, VEER_NN_CONCAT, 0, 0, 0);
    if (rc != 0) {
        veer__nn_free(nn);
        return veer__error_set(err, VEER_EINVAL, "--b-features",
                               "B does not fit the log's shape (check --b-features)");
    }
    if ((rc = veer__nn_finish(nn, rng, err)) != 0) {
        veer__nn_free(nn);
        return rc;
    }
    *out = nn;
    return 0;
}

static int build_actor(const veer__trainer *t, veer__nn **out, veer__rng *rng, veer_error *err)
{
    const veer_train_config *c = &t->cfg;
    veer__nn *nn;
    int rc = veer__nn_new(t->log->state_dim, t->log->action_dim, 0, t->d, t->n, &nn);
    if (rc != 0)
        return veer__error_set(err, rc, "actor", "cannot create the actor");
    veer__nn_add_branch(nn, "state-task");
    rc |= veer__nn_add_input(nn, 0, VEER_NN_IN_STATE, 0, NULL, 0);
    rc |= veer__nn_add_input(nn, 0, VEER_NN_IN_TASK, 0, NULL, 0);
    rc |= add_mlp(nn, 0, c->hidden, c->layers, t->log->action_dim, 1);
    rc |= veer__nn_add_layer(nn, 0, VEER_NN_TANH, 0, 0, NULL); /* normalised output */
    rc |= veer__nn_set_merge(nn, VEER_NN_CONCAT, 0, 0, 0);
    if (rc == 0)
        rc = veer__nn_finish(nn, rng, err);
    if (rc != 0) {
        veer__nn_free(nn);
        return veer__error_set(err, rc, "actor", "cannot build the actor");
    }
    *out = nn;
    return 0;
}

static int check_config(const veer_train_config *c, const veer__tlog *log, veer_error *err)
{
#define REQUIRE(cond, flag, ...)                                                               \
    do {                                                                                       \
        if (!(cond))                                                                           \
            return veer__error_set(err, VEER_ECONFIG, flag, __VA_ARGS__);                      \
    } while (0)
    REQUIRE(c->z_dim >= 2 && c->z_dim <= 4096, "--z-dim", "--z-dim must be in 2..4096");
    REQUIRE(c->batch >= 2 && c->batch <= 65536, "--batch", "--batch must be in 2..65536");
    REQUIRE(c->steps >= 1, "--steps", "--steps must be at least 1");
    REQUIRE(c->hidden >= 1 && c->b_hidden >= 1 && c->layers >= 1 && c->layers <= 4, "--layers",
            "--hidden must be positive and --layers in 1..4");
    REQUIRE(c->discount >= 0.0f && c->discount < 1.0f, "--discount",
            "--discount must be in [0, 1)");
    REQUIRE(c->tau > 0.0f && c->tau <= 1.0f, "--tau", "--tau must be in (0, 1]");
    REQUIRE(c->average >= 0.0f && c->average <= 1.0f, "--average",
            "--average must be in [0, 1] (0: export the last parameters)");
    REQUIRE(c->mix_ratio >= 0.0f && c->mix_ratio <= 1.0f, "--mix-ratio",
            "--mix-ratio must be in [0, 1]");
    REQUIRE(c->ortho >= 0.0f && isfinite(c->ortho), "--ortho", "--ortho must be >= 0");
    REQUIRE(c->lr_f > 0.0f && c->lr_b > 0.0f && c->lr_actor > 0.0f, "--lr",
            "learning rates must be positive");
    REQUIRE(c->noise >= 0.0f && c->noise_clip >= 0.0f, "--noise", "--noise must be >= 0");
    REQUIRE(c->holdout >= 0.0f && c->holdout < 0.5f, "--holdout", "--holdout must be in [0, 0.5)");
    REQUIRE(c->heads >= 1 && c->heads <= VEER_TRAIN_MAX_HEADS, "--heads", "--heads must be 1 or 2");
    if (c->arch == VEER_TRAIN_TABLE) {
        REQUIRE(c->action_count > 0, "--arch", "--arch table needs discrete actions");
        REQUIRE(c->nstate_counts == log->state_dim && c->nstate_counts < VEER_NN_MAX_COUNTS,
                "--state-counts", "--arch table needs one --state-counts value per state "
                                  "feature (at most %d features)", VEER_NN_MAX_COUNTS - 1);
        REQUIRE(c->heads == 1, "--heads", "--arch table trains one F head");
        REQUIRE(c->bilinear_k >= 1 && c->bilinear_k <= 4096, "--k", "--k must be in 1..4096");
        REQUIRE(!c->input_norm, "--input-norm",
                "--arch table reads states as indices; they cannot be standardised");
    }
    for (uint32_t i = 0; i < c->nb_features; i++)
        REQUIRE(c->b_features[i] < log->state_dim, "--b-features",
                "--b-features lists feature %u; the state has %u", c->b_features[i],
                log->state_dim);
    return 0;
#undef REQUIRE
}

/* --input-norm: each state feature's mean and population standard deviation over the log's
 * states, in double. The first layers then see features of comparable size: with the demo
 * arm's log the joint velocities spread 4-7 rad/s and the gripper position 0.3-0.4 m, so raw
 * inputs let the velocities dominate the first layer at initialisation (input standardisation
 * is common practice, no source). A feature that barely varies keeps scale 1: dividing by a
 * near-zero spread would turn rounding into signal. One allocation holds both arrays. */
static int input_stats(veer__trainer *t, veer_error *err)
{
    const veer__tlog *log = t->log;
    size_t N = log->n, D = log->state_dim;
    t->in_mean = veer__malloc(2 * D * sizeof(float));
    if (t->in_mean == NULL)
        return veer__error_set(err, VEER_ENOMEM, "--input-norm", NULL);
    t->in_scale = t->in_mean + D;
    for (size_t j = 0; j < D; j++) {
        double m = 0, v = 0;
        for (size_t i = 0; i < N; i++)
            m += log->states[i * D + j];
        m /= (double)N;
        for (size_t i = 0; i < N; i++) {
            double e = log->states[i * D + j] - m;
            v += e * e;
        }
        double sd = sqrt(v / (double)N);
        t->in_mean[j] = (float)m;
        t->in_scale[j] = sd > 1e-6 * fmax(1.0, fabs(m)) ? (float)(1.0 / sd) : 1.0f;
    }
    return 0;
}

int veer__trainer_create(const veer_train_config *c, const veer__tlog *log, veer__trainer **out,
                         veer_error *err)
{
    *out = NULL;
    int rc = check_config(c, log, err);
    if (rc != 0)
        return rc;
    veer__trainer *t = veer__calloc(1, sizeof *t);
    if (t == NULL)
        return veer__error_set(err, VEER_ENOMEM, "trainer", NULL);
    t->cfg = *c;
    t->log = log;
    t->d = c->z_dim;
    t->n = c->batch;
    t->heads = c->action_count ? 1 : c->heads;
    if (c->arch == VEER_TRAIN_TABLE)
        t->heads = 1;
    veer__rng_init(&t->rng, c->rng_key);
    for (uint32_t j = 0; j < log->action_dim && c->action_count == 0; j++) {
        t->act_center[j] = 0.5f * (c->low[j] + c->high[j]);
        t->act_half[j] = 0.5f * (c->high[j] - c->low[j]);
    }

    if (c->input_norm && (rc = input_stats(t, err)) != 0) {
        veer__free(t);
        return rc;
    }

    /* Hold out a fixed random subset for the Bellman residual (at most 4096 transitions). */
    size_t N = log->n;
    t->train_idx = veer__malloc(N * sizeof *t->train_idx);
    if (t->train_idx == NULL) {
        veer__free(t->in_mean);
        veer__free(t);
        return veer__error_set(err, VEER_ENOMEM, "trainer", NULL);
    }
    for (size_t i = 0; i < N; i++)
        t->train_idx[i] = i;
    for (size_t i = N - 1; i > 0; i--) { /* Fisher-Yates */
        size_t j = (size_t)veer__rng_below(&t->rng, i + 1), tmp = t->train_idx[i];
        t->train_idx[i] = t->train_idx[j];
        t->train_idx[j] = tmp;
    }
    size_t nh = (size_t)((double)N * c->holdout);
    if (nh > 4096)
        nh = 4096;
    if (nh < 2 || N - nh < 2)
        nh = 0;
    t->hold_idx = t->train_idx + (N - nh);
    t->nhold = nh;
    t->ntrain = N - nh;

    size_t n = t->n, d = t->d, D = log->state_dim, A = log->action_dim;
    t->idx = veer__malloc(n * sizeof *t->idx);
    float **bufs[] = {&t->s, &t->sn, &t->a, &t->an, &t->cont, &t->z, &t->zmix, &t->u,
                      &t->ft_mean, &t->fbuf, &t->df, &t->db, &t->da, &t->work, &t->q, &t->qbest,
                      &t->hold_z};
    size_t sizes[] = {n * D, n * D, n * A, n * A, n, n * d, n * D, n * A + n,
                      n * d, n * d, n * d, n * d, n * A, 2 * n * n, n * d, n,
                      (nh ? nh : 1) * d};
    int bad = t->idx == NULL;
    for (size_t i = 0; i < sizeof sizes / sizeof sizes[0]; i++) {
        *bufs[i] = veer__malloc_aligned(sizes[i] * sizeof(float));
        bad |= *bufs[i] == NULL;
    }
    if (bad) {
        veer__trainer_destroy(t);
        return veer__error_set(err, VEER_ENOMEM, "trainer", "no memory for the batch buffers");
    }

    for (uint32_t h = 0; h < t->heads && rc == 0; h++) {
        rc = build_f(t, &t->f[h], &t->rng, err);
        if (rc == 0 && veer__nn_clone(t->f[h], &t->ft[h]) != 0)
            rc = veer__error_set(err, VEER_ENOMEM, "forward", NULL);
        if (rc == 0 && veer__adam_init(&t->opt_f[h], t->f[h]->nparams, c->lr_f) != 0)
            rc = veer__error_set(err, VEER_ENOMEM, "forward", NULL);
    }
    if (rc == 0)
        rc = build_b(t, &t->b, &t->rng, err);
    if (rc == 0 && veer__nn_clone(t->b, &t->bt) != 0)
        rc = veer__error_set(err, VEER_ENOMEM, "backward", NULL);
    if (rc == 0 && veer__adam_init(&t->opt_b, t->b->nparams, c->lr_b) != 0)
        rc = veer__error_set(err, VEER_ENOMEM, "backward", NULL);
    if (rc == 0 && c->action_count == 0) {
        rc = build_actor(t, &t->actor, &t->rng, err);
        if (rc == 0 && veer__adam_init(&t->opt_actor, t->actor->nparams, c->lr_actor) != 0)
            rc = veer__error_set(err, VEER_ENOMEM, "actor", NULL);
    }
    if (rc == 0 && c->average > 0.0f) {
        /* The averages start at the initial parameters; a checkpoint overwrites them. */
        for (uint32_t h = 0; h < t->heads && rc == 0; h++)
            if (veer__nn_clone(t->f[h], &t->fa[h]) != 0)
                rc = veer__error_set(err, VEER_ENOMEM, "forward", NULL);
        if (rc == 0 && veer__nn_clone(t->b, &t->ba) != 0)
            rc = veer__error_set(err, VEER_ENOMEM, "backward", NULL);
        if (rc == 0 && t->actor && veer__nn_clone(t->actor, &t->aa) != 0)
            rc = veer__error_set(err, VEER_ENOMEM, "actor", NULL);
    }
    if (rc != 0) {
        veer__trainer_destroy(t);
        return rc;
    }
    /* Fixed task vectors for the held-out residual: the sphere of radius sqrt(d). */
    veer__rng hr;
    veer__rng_init(&hr, c->rng_key ^ 0x5DEECE66Dull);
    for (size_t i = 0; i < nh; i++) {
        double ss = 0;
        for (size_t j = 0; j < d; j++) {
            t->hold_z[i * d + j] = (float)veer__rng_normal(&hr);
            ss += (double)t->hold_z[i * d + j] * t->hold_z[i * d + j];
        }
        float s = (float)(sqrt((double)d) / sqrt(ss));
        for (size_t j = 0; j < d; j++)
            t->hold_z[i * d + j] *= s;
    }
    *out = t;
    return 0;
}

void veer__trainer_destroy(veer__trainer *t)
{
    if (t == NULL)
        return;
    for (uint32_t h = 0; h < VEER_TRAIN_MAX_HEADS; h++) {
        veer__nn_free(t->f[h]);
        veer__nn_free(t->ft[h]);
        veer__nn_free(t->fa[h]);
        veer__adam_free(&t->opt_f[h]);
    }
    veer__nn_free(t->b);
    veer__nn_free(t->bt);
    veer__nn_free(t->ba);
    veer__nn_free(t->actor);
    veer__nn_free(t->aa);
    veer__adam_free(&t->opt_b);
    veer__adam_free(&t->opt_actor);
    float *bufs[] = {t->s, t->sn, t->a, t->an, t->cont, t->z, t->zmix, t->u, t->ft_mean,
                     t->fbuf, t->df, t->db, t->da, t->work, t->q, t->qbest, t->hold_z};
    for (size_t i = 0; i < sizeof bufs / sizeof bufs[0]; i++)
        veer__free_aligned(bufs[i]);
    veer__free(t->idx);
    veer__free(t->train_idx);
    veer__free(t->in_mean);
    veer__free(t);
}

/* ---- the step -------------------------------------------------------------------------------- */

static void rescale_rows(float *z, size_t n, uint32_t d)
{
    float target = sqrtf((float)d);
    for (size_t r = 0; r < n; r++) {
        double ss = 0;
        for (uint32_t j = 0; j < d; j++)
            ss += (double)z[r * d + j] * z[r * d + j];
        float s = ss > 0 ? (float)(target / sqrt(ss)) : 0.0f;
        for (uint32_t j = 0; j < d; j++)
            z[r * d + j] *= s;
    }
}

static void gather(const veer__trainer *t, const size_t *rows, size_t n, float *s, float *a,
                   float *sn, float *cont)
{
    const veer__tlog *log = t->log;
    size_t D = log->state_dim, A = log->action_dim;
    for (size_t r = 0; r < n; r++) {
        size_t i = rows[r];
        memcpy(s + r * D, log->states + i * D, D * sizeof(float));
        memcpy(sn + r * D, log->next_states + i * D, D * sizeof(float));
        memcpy(a + r * A, log->actions + i * A, A * sizeof(float));
        cont[r] = log->cont[i];
    }
    if (t->in_mean)
        for (size_t r = 0; r < n; r++)
            for (size_t j = 0; j < D; j++) {
                s[r * D + j] = (s[r * D + j] - t->in_mean[j]) * t->in_scale[j];
                sn[r * D + j] = (sn[r * D + j] - t->in_mean[j]) * t->in_scale[j];
            }
}

/* mean over heads of F(s, a, z) into out (n x d). */
static int f_mean(veer__nn *const *f, uint32_t heads, size_t n, const float *s, const float *a,
                  const float *z, float *out, uint32_t d)
{
    for (uint32_t h = 0; h < heads; h++) {
        const float *y;
        int rc = veer__nn_forward(f[h], n, s, a, z, &y);
        if (rc != 0)
            return rc;
        for (size_t i = 0; i < n * d; i++)
            out[i] = h ? out[i] + y[i] / (float)heads : y[i] / (float)heads;
    }
    return 0;
}

/* Discrete: next action argmax_a mean_h F_h(s⁺, a, z)·z; writes the action indices to `an` and
 * the F rows at those actions to `fbest`. `tmp` and `q` are scratch (n x d, n). */
static int argmax_next(veer__trainer *t, veer__nn *const *f, size_t n, const float *sn,
                       const float *z, float *an, float *fbest, float *tmp, float *q, float *qb)
{
    uint32_t d = t->d;
    float *cand = t->u; /* n values: the candidate action per row */
    for (uint32_t c = 0; c < t->cfg.action_count; c++) {
        for (size_t r = 0; r < n; r++)
            cand[r] = (float)c;
        int rc = f_mean(f, t->heads, n, sn, cand, z, tmp, d);
        if (rc != 0)
            return rc;
        for (size_t r = 0; r < n; r++) {
            double v = 0;
            for (uint32_t j = 0; j < d; j++)
                v += (double)tmp[r * d + j] * z[r * d + j];
            q[r] = (float)v;
            if (c == 0 || q[r] > qb[r]) {
                qb[r] = q[r];
                an[r] = (float)c;
                memcpy(fbest + r * d, tmp + r * d, d * sizeof(float));
            }
        }
    }
    return 0;
}

/* Continuous: a = center + half * clip(actor(s, z) + clip(noise), -1, 1). */
static int actor_next(veer__trainer *t, size_t n, const float *s, const float *z, float *an,
                      float noise, float noise_clip)
{
    const float *u;
    int rc = veer__nn_forward(t->actor, n, s, NULL, z, &u);
    if (rc != 0)
        return rc;
    uint32_t A = t->log->action_dim;
    for (size_t r = 0; r < n; r++)
        for (uint32_t j = 0; j < A; j++) {
            float e = 0.0f;
            if (noise > 0.0f) {
                e = (float)veer__rng_normal(&t->rng) * noise;
                e = e > noise_clip ? noise_clip : e < -noise_clip ? -noise_clip : e;
            }
            float v = u[r * A + j] + e;
            v = v > 1.0f ? 1.0f : v < -1.0f ? -1.0f : v;
            an[r * A + j] = t->act_center[j] + t->act_half[j] * v;
        }
    return 0;
}

int veer__trainer_step(veer__trainer *t, veer__train_losses *L)
{
    const veer_train_config *c = &t->cfg;
    size_t n = t->n, D = t->log->state_dim, A = t->log->action_dim;
    uint32_t d = t->d;
    int rc;

    for (size_t r = 0; r < n; r++)
        t->idx[r] = t->train_idx[veer__rng_below(&t->rng, t->ntrain)];
    gather(t, t->idx, n, t->s, t->a, t->sn, t->cont);

    /* Task vectors: the sphere, some rows replaced by B of a shuffled next state. */
    for (size_t i = 0; i < n * d; i++)
        t->z[i] = (float)veer__rng_normal(&t->rng);
    size_t nmix = 0;
    for (size_t r = 0; r < n; r++) {
        if (veer__rng_uniform(&t->rng) < c->mix_ratio) {
            size_t j = (size_t)veer__rng_below(&t->rng, n);
            memcpy(t->zmix + nmix * D, t->sn + j * D, D * sizeof(float));
            t->idx[nmix++] = r; /* idx is free again: reuse it for the mixed rows */
        }
    }
    if (nmix > 0) {
        const float *bm;
        if ((rc = veer__nn_forward(t->b, nmix, t->zmix, NULL, NULL, &bm)) != 0)
            return rc;
        for (size_t m = 0; m < nmix; m++)
            memcpy(t->z + t->idx[m] * d, bm + m * d, d * sizeof(float));
    }
    rescale_rows(t->z, n, d);

    /* Targets: next actions, F̄ (mean of the target heads) and B̄ at the next states. */
    if (c->action_count)
        rc = argmax_next(t, t->ft, n, t->sn, t->z, t->an, t->ft_mean, t->fbuf, t->q, t->qbest);
    else if ((rc = actor_next(t, n, t->sn, t->z, t->an, c->noise, c->noise_clip)) == 0)
        rc = f_mean(t->ft, t->heads, n, t->sn, t->an, t->z, t->ft_mean, d);
    if (rc != 0)
        return rc;
    const float *Bt, *B;
    if ((rc = veer__nn_forward(t->bt, n, t->sn, NULL, NULL, &Bt)) != 0 ||
        (rc = veer__nn_forward(t->b, n, t->sn, NULL, NULL, &B)) != 0)
        return rc;

    if (c->lr_cosine) {
        /* Cosine annealing without restarts (Loshchilov & Hutter, "SGDR", ICLR 2017, eq. 5
         * with eta_min = 0): small late steps let minibatch noise average out. Not a default:
         * on the slippery warehouse floor it scored 0.72 against 0.87 for a constant rate
         * (batch 2,048, 2,000 steps; our measurement), the temporal-difference targets still
         * moving when the rate has nearly gone. */
        double f = 0.5 * (1.0 + cos(M_PI * (double)t->step / (double)c->steps));
        for (uint32_t h = 0; h < t->heads; h++)
            t->opt_f[h].lr = (float)(c->lr_f * f);
        t->opt_b.lr = (float)(c->lr_b * f);
        t->opt_actor.lr = (float)(c->lr_actor * f);
    }
    veer__nn_zero_grad(t->b);
    memset(t->db, 0, n * d * sizeof(float));
    double fb = 0, off = 0, dg = 0;
    for (uint32_t h = 0; h < t->heads; h++) {
        const float *F;
        veer__nn_zero_grad(t->f[h]);
        if ((rc = veer__nn_forward(t->f[h], n, t->s, t->a, t->z, &F)) != 0)
            return rc;
        double o, g;
        fb += veer__fb_loss(n, d, F, B, t->ft_mean, Bt, c->discount, t->cont, t->df, t->db,
                            t->work, &o, &g);
        off += o;
        dg += g;
        veer__nn_backward(t->f[h], n, t->df, NULL);
        veer__adam_step(&t->opt_f[h], t->f[h]->params, t->f[h]->grads);
    }
    double orth = veer__fb_orth(n, d, B, c->ortho, t->db, t->work);
    veer__nn_backward(t->b, n, t->db, NULL);
    veer__adam_step(&t->opt_b, t->b->params, t->b->grads);

    /* Actor: maximise mean_h F_h(s, actor(s, z), z)·z through the updated F. */
    double qsum = 0;
    if (t->actor) {
        const float *u;
        veer__nn_zero_grad(t->actor);
        if ((rc = veer__nn_forward(t->actor, n, t->s, NULL, t->z, &u)) != 0)
            return rc;
        float *api = t->an; /* the next actions are no longer needed */
        for (size_t r = 0; r < n; r++)
            for (size_t j = 0; j < A; j++)
                api[r * A + j] = t->act_center[j] + t->act_half[j] * u[r * A + j];
        float *dsum = t->u;
        memset(dsum, 0, n * A * sizeof(float));
        float scale = -1.0f / ((float)t->heads * (float)n);
        for (uint32_t h = 0; h < t->heads; h++) {
            const float *F;
            if ((rc = veer__nn_forward(t->f[h], n, t->s, api, t->z, &F)) != 0)
                return rc;
            for (size_t r = 0; r < n; r++) {
                double v = 0;
                for (uint32_t j = 0; j < d; j++)
                    v += (double)F[r * d + j] * t->z[r * d + j];
                qsum += v / t->heads;
            }
            for (size_t i = 0; i < n * d; i++)
                t->df[i] = scale * t->z[i];
            veer__nn_backward(t->f[h], n, t->df, t->da);
            for (size_t i = 0; i < n * A; i++)
                dsum[i] += t->da[i];
        }
        for (size_t r = 0; r < n; r++)
            for (size_t j = 0; j < A; j++)
                dsum[r * A + j] *= t->act_half[j];
        veer__nn_backward(t->actor, n, dsum, NULL);
        veer__adam_step(&t->opt_actor, t->actor->params, t->actor->grads);
    }

    for (uint32_t h = 0; h < t->heads; h++)
        veer__nn_polyak(t->ft[h], t->f[h], c->tau);
    veer__nn_polyak(t->bt, t->b, c->tau);
    if (t->ba) {
        /* Polyak-Ruppert averaging (Polyak & Juditsky, "Acceleration of stochastic
         * approximation by averaging", SIAM J. Control Optim. 30(4), 1992), in its exponential
         * form: the bundle gets the average, which smooths out the last steps' minibatch noise.
         * On the slippery warehouse floor it lifted the goal score from 0.88 to 0.91 at 2,000
         * steps and to 0.93 at 3,000 (rate 0.01; our measurement). */
        for (uint32_t h = 0; h < t->heads; h++)
            veer__nn_polyak(t->fa[h], t->f[h], c->average);
        veer__nn_polyak(t->ba, t->b, c->average);
        if (t->actor)
            veer__nn_polyak(t->aa, t->actor, c->average);
    }
    t->step++;
    if (L) {
        L->fb = fb;
        L->fb_offdiag = off;
        L->fb_diag = dg;
        L->orth = orth;
        L->actor_q = t->actor ? qsum / (double)n : NAN;
    }
    return 0;
}

void veer__trainer_outputs(const veer__trainer *t, veer__nn *f[VEER_TRAIN_MAX_HEADS], veer__nn **b,
                           veer__nn **actor)
{
    int avg = t->ba != NULL;
    for (uint32_t h = 0; h < t->heads; h++)
        f[h] = avg ? t->fa[h] : t->f[h];
    *b = avg ? t->ba : t->b;
    *actor = avg && t->actor ? t->aa : t->actor;
}

double veer__trainer_bellman(veer__trainer *t)
{
    if (t->nhold < 2)
        return NAN;
    size_t n = t->n, d = t->d;
    double total = 0;
    size_t rows = 0;
    for (size_t at = 0; at < t->nhold;) {
        size_t m = t->nhold - at < n ? t->nhold - at : n;
        if (m < 2)
            break;
        gather(t, t->hold_idx + at, m, t->s, t->a, t->sn, t->cont);
        const float *z = t->hold_z + at * d;
        int rc;
        if (t->cfg.action_count)
            rc = argmax_next(t, t->f, m, t->sn, z, t->an, t->ft_mean, t->fbuf, t->q, t->qbest);
        else if ((rc = actor_next(t, m, t->sn, z, t->an, 0.0f, 0.0f)) == 0)
            rc = f_mean(t->f, t->heads, m, t->sn, t->an, z, t->ft_mean, (uint32_t)d);
        if (rc == 0)
            rc = f_mean(t->f, t->heads, m, t->s, t->a, z, t->fbuf, (uint32_t)d);
        const float *B;
        if (rc == 0)
            rc = veer__nn_forward(t->b, m, t->sn, NULL, NULL, &B);
        if (rc != 0)
            return NAN;
        memset(t->db, 0, m * d * sizeof(float));
        double l = veer__fb_loss(m, (uint32_t)d, t->fbuf, B, t->ft_mean, B, t->cfg.discount,
                                 t->cont, t->df, t->db, t->work, NULL, NULL);
        total += l * (double)m;
        rows += m;
        at += m;
    }
    return rows ? total / (double)rows : NAN;
}
