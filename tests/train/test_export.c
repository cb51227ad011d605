/* The trainer's bundles as the runtime serves them, and its run-level promises.
 *
 *  - Round trip: a bundle written by the trainer is opened by libveer (veer_bundle_open, which
 *    validates it) and the runtime's F, B and actor give the trainer's own outputs on fresh
 *    inputs (for two F heads: their average, which the export folds into one network).
 *  - Drift statistics against a direct double-precision computation here (mean, population
 *    covariance, NumPy-style linear-interpolation quantiles), Cov(B) = E[BBᵀ] against B
 *    evaluated by the runtime over the log's next states.
 *  - Determinism: two runs with the same flags on one thread give byte-identical bundles, and
 *    a run stopped half-way and resumed from its checkpoint gives the same bundle again.
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <cmocka.h>

#include "base/base.h"
#include "base/npy.h"
#include "train/train.h"
#include "veer/runtime.h"

static char dir[256];

static void path_in(char *out, size_t cap, const char *name)
{
    snprintf(out, cap, "%s/%s", dir, name);
}

static double rnd(uint64_t *s)
{
    *s = *s * 6364136223846793005ull + 1442695040888963407ull;
    return (double)(*s >> 11) / 9007199254740992.0;
}

/* A log of n transitions of a 5-feature state with 2 continuous actions in [-1, 2] x [0, 1]. */
static void write_cont_log(size_t n)
{
    float *s = malloc(n * 5 * sizeof *s), *a = malloc(n * 2 * sizeof *a);
    float *ns = malloc(n * 5 * sizeof *ns);
    uint64_t st = 42;
    for (size_t i = 0; i < n; i++) {
        for (int j = 0; j < 5; j++)
            s[i * 5 + j] = (float)(rnd(&st) * (j + 1));
        a[i * 2] = (float)(-1.0 + 3.0 * rnd(&st));
        a[i * 2 + 1] = (float)rnd(&st);
        for (int j = 0; j < 5; j++)
            ns[i * 5 + j] = s[i * 5 + j] + 0.1f * a[i * 2 + (j & 1)];
    }
    char p[512];
    path_in(p, sizeof p, "s.npy");
    assert_int_equal(veer__npy_write(p, VEER_NPY_F32, 2, (uint64_t[]){n, 5}, s, NULL), 0);
    path_in(p, sizeof p, "a.npy");
    assert_int_equal(veer__npy_write(p, VEER_NPY_F32, 2, (uint64_t[]){n, 2}, a, NULL), 0);
    path_in(p, sizeof p, "ns.npy");
    assert_int_equal(veer__npy_write(p, VEER_NPY_F32, 2, (uint64_t[]){n, 5}, ns, NULL), 0);
    free(s), free(a), free(ns);
}

/* A 3 x 4 grid with 3 actions: index states for the table layout. */
static void write_table_log(size_t n)
{
    float *s = malloc(n * 2 * sizeof *s), *a = malloc(n * sizeof *a), *ns = malloc(n * 2 * sizeof *ns);
    uint64_t st = 7;
    for (size_t i = 0; i < n; i++) {
        s[i * 2] = (float)(int)(rnd(&st) * 3);
        s[i * 2 + 1] = (float)(int)(rnd(&st) * 4);
        a[i] = (float)(int)(rnd(&st) * 3);
        ns[i * 2] = s[i * 2];
        ns[i * 2 + 1] = a[i] == 1 && s[i * 2 + 1] < 3 ? s[i * 2 + 1] + 1 : s[i * 2 + 1];
    }
    char p[512];
    path_in(p, sizeof p, "ts.npy");
    assert_int_equal(veer__npy_write(p, VEER_NPY_F32, 2, (uint64_t[]){n, 2}, s, NULL), 0);
    path_in(p, sizeof p, "ta.npy");
    assert_int_equal(veer__npy_write(p, VEER_NPY_F32, 1, (uint64_t[]){n}, a, NULL), 0);
    path_in(p, sizeof p, "tns.npy");
    assert_int_equal(veer__npy_write(p, VEER_NPY_F32, 2, (uint64_t[]){n, 2}, ns, NULL), 0);
    free(s), free(a), free(ns);
}

static char paths[8][512];

static void cont_config(veer_train_config *c, const char *out)
{
    memset(c, 0, sizeof *c);
    assert_int_equal(veer__train_preset(c, "small"), 0);
    path_in(paths[0], 512, "s.npy");
    path_in(paths[1], 512, "a.npy");
    path_in(paths[2], 512, "ns.npy");
    path_in(paths[3], 512, out);
    c->states_path = paths[0];
    c->actions_path = paths[1];
    c->next_states_path = paths[2];
    c->out_path = paths[3];
    c->action_dim = 2;
    c->low[0] = -1, c->high[0] = 2, c->low[1] = 0, c->high[1] = 1;
    c->decision_step_s = 0.01f;
    c->z_dim = 6, c->hidden = 16, c->b_hidden = 12, c->batch = 32, c->steps = 40;
    c->ref_count = 50;
    c->holdout = 0.1f;
    c->threads = 1;
}

static void table_config(veer_train_config *c, const char *out)
{
    memset(c, 0, sizeof *c);
    assert_int_equal(veer__train_preset(c, "tabular"), 0);
    path_in(paths[4], 512, "ts.npy");
    path_in(paths[5], 512, "ta.npy");
    path_in(paths[6], 512, "tns.npy");
    path_in(paths[7], 512, out);
    c->states_path = paths[4];
    c->actions_path = paths[5];
    c->next_states_path = paths[6];
    c->out_path = paths[7];
    c->action_count = 3;
    c->state_counts[0] = 3, c->state_counts[1] = 4, c->nstate_counts = 2;
    c->decision_step_s = 1.0f;
    c->z_dim = 4, c->bilinear_k = 5, c->batch = 16, c->steps = 30;
    c->threads = 1;
}

static void close_to(const char *what, size_t i, double got, double want, double tol)
{
    if (!(fabs(got - want) <= tol * fmax(1.0, fabs(want))))
        fail_msg("%s[%zu]: runtime %.7g, trainer/reference %.7g", what, i, got, want);
}

/* Loads the log `c` names (as veer train would) into `log` and creates a trainer for it. */
static veer__trainer *trainer_for(const veer_train_config *c, veer__tlog *log)
{
    veer__tlog_spec spec = {.states_path = c->states_path, .actions_path = c->actions_path,
                            .next_states_path = c->next_states_path,
                            .action_count = c->action_count,
                            .action_dim = c->action_count ? 1 : c->action_dim,
                            .low = c->low, .high = c->high,
                            .nstate_counts = c->arch == VEER_TRAIN_TABLE ? c->nstate_counts : 0,
                            .state_counts = c->state_counts};
    veer_error err;
    if (veer__tlog_load(&spec, log, &err) != 0)
        fail_msg("log: %s", err.message);
    veer__trainer *t;
    if (veer__trainer_create(c, log, &t, &err) != 0)
        fail_msg("create: %s", err.message);
    return t;
}

/* Trains in memory, exports, reopens with libveer and compares the networks. */
static void roundtrip(veer_train_config *c)
{
    veer__tlog log;
    veer_error err;
    veer__trainer *t = trainer_for(c, &log);
    for (int i = 0; i < 25; i++)
        assert_int_equal(veer__trainer_step(t, NULL), 0);
    if (veer__train_export(t, c->out_path, "test", "2026-01-01T00:00:00Z", &err) != 0)
        fail_msg("export: %s", err.message);

    veer_bundle *b;
    if (veer_bundle_open(c->out_path, &b, &err) != 0)
        fail_msg("the runtime refused the trainer's bundle: %s (%s)", err.message, err.field);
    veer_workspace *ws;
    assert_int_equal(veer_workspace_create(b, 64, &ws, &err), 0);
    const veer_model_info *mi = veer_bundle_info(b);
    size_t n = 16, D = log.state_dim, A = log.action_dim, d = t->d;
    assert_int_equal(mi->state_dim, D);
    assert_int_equal(mi->z_dim, d);

    /* Fresh inputs: logged states and actions, random task vectors. */
    float *s = malloc(n * D * sizeof *s), *a = malloc(n * A * sizeof *a), *z = malloc(n * d * sizeof *z);
    float *got = malloc(n * (d > A ? d : A) * sizeof *got), *want = calloc(n * d, sizeof *want);
    uint64_t st = 99;
    for (size_t i = 0; i < n; i++) {
        memcpy(s + i * D, log.states + (i * 7 % log.n) * D, D * sizeof(float));
        memcpy(a + i * A, log.actions + (i * 5 % log.n) * A, A * sizeof(float));
        for (size_t j = 0; j < d; j++)
            z[i * d + j] = (float)(rnd(&st) * 2 - 1);
    }
    /* With --input-norm the trainer's networks read standardised states while the bundle
     * reads raw ones: standardise a copy here, by the log's mean and population standard
     * deviation computed in double (the definition, independent of the trainer's code). */
    float *sx = s;
    if (c->input_norm) {
        sx = malloc(n * D * sizeof *sx);
        for (size_t j = 0; j < D; j++) {
            double m = 0, v = 0;
            for (size_t i = 0; i < log.n; i++)
                m += log.states[i * D + j];
            m /= (double)log.n;
            for (size_t i = 0; i < log.n; i++)
                v += (log.states[i * D + j] - m) * (log.states[i * D + j] - m);
            double sd = sqrt(v / (double)log.n);
            assert_true(sd > 0.1); /* the test log's features spread 0.3-1.4 */
            for (size_t i = 0; i < n; i++)
                sx[i * D + j] = (float)((s[i * D + j] - m) / sd);
        }
    }
    /* What the bundle must hold: the trained networks, or their averages with --average (the
     * tabular preset's default). */
    veer__nn *fo[VEER_TRAIN_MAX_HEADS], *bo, *ao;
    veer__trainer_outputs(t, fo, &bo, &ao);
    const float *y;
    for (uint32_t h = 0; h < t->heads; h++) {
        assert_int_equal(veer__nn_forward(fo[h], n, sx, a, z, &y), 0);
        for (size_t i = 0; i < n * d; i++)
            want[i] += y[i] / (float)t->heads;
    }
    assert_int_equal(veer_eval_forward(ws, n, s, a, z, got), 0);
    for (size_t i = 0; i < n * d; i++)
        close_to("F", i, got[i], want[i], 1e-4);
    assert_int_equal(veer__nn_forward(bo, n, sx, NULL, NULL, &y), 0);
    assert_int_equal(veer_eval_backward(ws, n, s, got), 0);
    for (size_t i = 0; i < n * d; i++)
        close_to("B", i, got[i], y[i], 1e-4);
    if (ao) {
        assert_int_equal(veer__nn_forward(ao, n, sx, NULL, z, &y), 0);
        assert_int_equal(veer_eval_actor(ws, n, s, z, got), 0);
        for (size_t i = 0; i < n * A; i++)
            close_to("actor", i, got[i], y[i], 1e-4);
    }

    /* Drift statistics against a direct computation. */
    assert_int_equal(mi->has_stats, 1);
    size_t N = log.n;
    for (size_t j = 0; j < D; j++) {
        double m = 0;
        for (size_t i = 0; i < N; i++)
            m += log.states[i * D + j];
        m /= (double)N;
        close_to("mean", j, mi->state_mean[j], m, 1e-5);
        for (size_t k = 0; k < D; k++) {
            double m2 = 0, mk = 0;
            for (size_t i = 0; i < N; i++)
                mk += log.states[i * D + k];
            mk /= (double)N;
            for (size_t i = 0; i < N; i++)
                m2 += (log.states[i * D + j] - m) * (log.states[i * D + k] - mk);
            close_to("cov", j * D + k, mi->state_cov[j * D + k], m2 / (double)N, 1e-4);
        }
        /* Quantile edge i/bins by NumPy's default rule: position q (N - 1) between order
         * statistics, linearly interpolated (Hyndman & Fan definition 7). */
        float *col = malloc(N * sizeof *col);
        for (size_t i = 0; i < N; i++)
            col[i] = log.states[i * D + j];
        for (size_t x = 0; x < N; x++) /* insertion sort: independent of the trainer's qsort */
            for (size_t y2 = x; y2 > 0 && col[y2 - 1] > col[y2]; y2--) {
                float tmp = col[y2];
                col[y2] = col[y2 - 1];
                col[y2 - 1] = tmp;
            }
        for (uint32_t q = 1; q < mi->bins; q++) {
            double pos = (double)q / mi->bins * (double)(N - 1);
            size_t lo = (size_t)pos;
            double v = col[lo] + (pos - (double)lo) * (col[lo + 1 < N ? lo + 1 : lo] - col[lo]);
            close_to("quantile", j * (mi->bins - 1) + q - 1,
                     mi->quantile_edges[j * (mi->bins - 1) + q - 1], v, 1e-5);
        }
        free(col);
    }
    assert_true(mi->mahalanobis_p99 > 0 && mi->mahalanobis_p999 >= mi->mahalanobis_p99);

    /* Reference set: logged states with the runtime's B; Cov(B) over the next states. */
    assert_int_equal(mi->reference_count, c->ref_count < N ? c->ref_count : N);
    float *rb = malloc(mi->reference_count * d * sizeof *rb);
    assert_int_equal(veer_eval_backward(ws, mi->reference_count, mi->reference_states, rb), 0);
    for (size_t i = 0; i < mi->reference_count * d; i++)
        close_to("reference B", i, mi->reference_b[i], rb[i], 1e-4);
    free(rb);
    float *bn = malloc(N * d * sizeof *bn);
    assert_int_equal(veer_eval_backward(ws, N, log.next_states, bn), 0);
    for (size_t i = 0; i < d; i++)
        for (size_t j = 0; j < d; j++) {
            double e = 0;
            for (size_t r = 0; r < N; r++)
                e += (double)bn[r * d + i] * bn[r * d + j];
            close_to("cov_b", i * d + j, mi->cov_b[i * d + j], e / (double)N, 1e-4);
        }
    free(bn);
    assert_string_equal(mi->producer, "veer-train 0.1");
    assert_non_null(strstr(mi->source_digest, "blake2b-256 states="));

    if (sx != s)
        free(sx);
    free(s), free(a), free(z), free(got), free(want);
    veer_workspace_destroy(ws);
    veer_bundle_close(b);
    veer__trainer_destroy(t);
    veer__tlog_free(&log);
}

static void test_roundtrip_continuous(void **state)
{
    (void)state;
    veer_train_config c;
    cont_config(&c, "cont.veer");
    roundtrip(&c);
}

/* --arch split with two heads: the bundle's one network (four branches, a block-diagonal
 * head) must compute the mean of the trainer's two. */
static void test_roundtrip_split(void **state)
{
    (void)state;
    veer_train_config c;
    cont_config(&c, "split.veer");
    c.arch = VEER_TRAIN_SPLIT;
    c.layers = 3;
    assert_int_equal(c.heads, 2);
    roundtrip(&c);
}

/* --input-norm, with the single-MLP F and the split F (whose two branches both read the
 * state), and B reading a subset of the features: the bundle on raw states must give the
 * trainer's networks on standardised ones. */
static void test_roundtrip_input_norm(void **state)
{
    (void)state;
    veer_train_config c;
    cont_config(&c, "norm.veer");
    c.input_norm = 1;
    c.b_features[0] = 4, c.b_features[1] = 1, c.b_features[2] = 2, c.nb_features = 3;
    roundtrip(&c);
    cont_config(&c, "norm-split.veer");
    c.input_norm = 1;
    c.arch = VEER_TRAIN_SPLIT;
    roundtrip(&c);
}

static void test_roundtrip_table(void **state)
{
    (void)state;
    veer_train_config c;
    table_config(&c, "table.veer");
    roundtrip(&c);

    /* Index states cannot be standardised: --input-norm is refused, naming the flag. */
    c.input_norm = 1;
    veer__tlog_spec spec = {.states_path = c.states_path, .actions_path = c.actions_path,
                            .next_states_path = c.next_states_path, .action_count = 3,
                            .action_dim = 1, .nstate_counts = 2, .state_counts = c.state_counts};
    veer__tlog log;
    veer_error err;
    assert_int_equal(veer__tlog_load(&spec, &log, &err), 0);
    veer__trainer *t = NULL;
    assert_int_equal(veer__trainer_create(&c, &log, &t, &err), VEER_ECONFIG);
    assert_string_equal(err.field, "--input-norm");
    assert_null(t);
    veer__tlog_free(&log);
}

static unsigned char *slurp(const char *p, size_t *len)
{
    FILE *f = fopen(p, "rb");
    assert_non_null(f);
    fseek(f, 0, SEEK_END);
    long n = ftell(f);
    fseek(f, 0, SEEK_SET);
    unsigned char *b = malloc((size_t)n);
    assert_int_equal(fread(b, 1, (size_t)n, f), (size_t)n);
    fclose(f);
    *len = (size_t)n;
    return b;
}

static void run_ok(veer_train_config *c)
{
    veer_error err;
    if (veer__train_run(c, &err) != 0)
        fail_msg("run: %s (%s)", err.message, err.field);
}

/* Runs `c` to `stop` steps with checkpoints every 5, then again to `total`, which resumes. */
static void run_stopped_and_resumed(veer_train_config *c, const char *ckpt, uint64_t stop,
                                    uint64_t total)
{
    static char path[512];
    path_in(path, sizeof path, ckpt);
    c->checkpoint_path = path;
    c->checkpoint_every = 5;
    c->steps = stop;
    run_ok(c);
    c->steps = total;
    run_ok(c);
}

/* 1 when the two files in the test directory hold the same bytes. */
static int same_file(const char *a, const char *b)
{
    char p[512];
    size_t la, lb;
    path_in(p, sizeof p, a);
    unsigned char *xa = slurp(p, &la);
    path_in(p, sizeof p, b);
    unsigned char *xb = slurp(p, &lb);
    int same = la == lb && memcmp(xa, xb, la) == 0;
    free(xa);
    free(xb);
    return same;
}

static void test_same_flags_same_bundle_and_resume(void **state)
{
    (void)state;
    setenv("SOURCE_DATE_EPOCH", "1700000000", 1);
    veer_train_config c;
    cont_config(&c, "r1.veer");
    c.steps = 30;
    run_ok(&c);
    cont_config(&c, "r2.veer");
    c.steps = 30;
    run_ok(&c);
    /* Stop at 13 steps, then resume to 30 from the checkpoint, under a third name. */
    cont_config(&c, "r3.veer");
    run_stopped_and_resumed(&c, "r3.ckpt", 13, 30);
    /* A checkpoint from other settings is refused, not silently continued. */
    c.z_dim = 7;
    veer_error err;
    assert_int_equal(veer__train_run(&c, &err), VEER_ECONFIG);
    assert_string_equal(err.field, "--checkpoint");

    assert_true(same_file("r1.veer", "r2.veer"));
    assert_true(same_file("r1.veer", "r3.veer"));
    char p[512];

    /* The curve has a header and one row per evaluation (every steps/50 = 1 here) + step 0. */
    path_in(p, sizeof p, "r3.veer.curve.csv");
    size_t cl;
    unsigned char *cv = slurp(p, &cl);
    size_t lines = 0;
    for (size_t i = 0; i < cl; i++)
        lines += cv[i] == '\n';
    assert_int_equal(lines, 1 + 1 + 30);
    assert_memory_equal(cv, "step,seconds,fb_loss", 20);
    free(cv);
}

/* --lr-schedule cosine: before step k (from 0) every rate is base · ½(1 + cos(π k / steps)), the
 * annealing of Loshchilov & Hutter, "SGDR", ICLR 2017, eq. 5 with eta_min = 0 (computed here
 * from the formula, not from the trainer); constant leaves the rates alone. */
static void test_cosine_schedule(void **state)
{
    (void)state;
    veer_train_config c;
    table_config(&c, "cos.veer");
    c.lr_cosine = 1;
    c.steps = 30;
    veer__tlog log;
    veer_error err;
    veer__trainer *t = trainer_for(&c, &log);
    const double pi = 3.14159265358979323846;
    for (int k = 0; k < 30; k++) {
        assert_int_equal(veer__trainer_step(t, NULL), 0);
        double want = 0.5 * (1.0 + cos(pi * k / 30.0));
        close_to("lr_f", (size_t)k, t->opt_f[0].lr, c.lr_f * want, 1e-6);
        close_to("lr_b", (size_t)k, t->opt_b.lr, c.lr_b * want, 1e-6);
    }
    assert_true(t->opt_f[0].lr < 0.003f * c.lr_f); /* the last step: ½(1 + cos(29π/30)) = 0.0027 */
    veer__trainer_destroy(t);
    c.lr_cosine = 0;
    assert_int_equal(veer__trainer_create(&c, &log, &t, &err), 0);
    for (int k = 0; k < 5; k++)
        assert_int_equal(veer__trainer_step(t, NULL), 0);
    assert_true(t->opt_f[0].lr == c.lr_f && t->opt_b.lr == c.lr_b);
    veer__trainer_destroy(t);
    veer__tlog_free(&log);

    /* The schedule depends on the length, so a cosine checkpoint does not resume under
     * another --steps. */
    char ck[512];
    path_in(ck, sizeof ck, "cos.ckpt");
    table_config(&c, "cos.veer");
    c.lr_cosine = 1;
    c.checkpoint_path = ck;
    c.steps = 10;
    c.checkpoint_every = 5;
    c.progress = 0;
    if (veer__train_run(&c, &err) != 0)
        fail_msg("run: %s", err.message);
    c.steps = 20;
    assert_int_equal(veer__train_run(&c, &err), VEER_ECONFIG);
    assert_string_equal(err.field, "--checkpoint");
}

/* --average RATE: the bundle's networks are the exponential moving average of the trained
 * parameters, a_k = (1 - RATE) a_(k-1) + RATE θ_k from a_0 = θ_0 (the exponential form of
 * Polyak & Juditsky's averaging, SIAM J. Control Optim. 30(4), 1992), recomputed here in double
 * from a copy of the parameters after every step. A run stopped half-way and resumed from its
 * checkpoint gives the same bundle, so the averages are in the checkpoint. */
static void test_parameter_average(void **state)
{
    (void)state;
    setenv("SOURCE_DATE_EPOCH", "1700000000", 1);
    veer_train_config c;
    cont_config(&c, "avg.veer");
    c.average = 0.2f;
    veer__tlog log;
    veer_error err;
    veer__trainer *t = trainer_for(&c, &log);
    veer__nn *f[VEER_TRAIN_MAX_HEADS], *b, *actor;
    veer__trainer_outputs(t, f, &b, &actor);
    assert_ptr_equal(b, t->ba);
    assert_ptr_equal(actor, t->aa);
    assert_ptr_equal(f[0], t->fa[0]);
    veer__nn *nets[3] = {t->f[0], t->b, t->actor}, *avgs[3] = {f[0], b, actor};
    double *want[3];
    for (int k = 0; k < 3; k++) {
        want[k] = calloc(nets[k]->nparams, sizeof(double));
        for (size_t i = 0; i < nets[k]->nparams; i++)
            want[k][i] = nets[k]->params[i];
    }
    for (int step = 0; step < 12; step++) {
        assert_int_equal(veer__trainer_step(t, NULL), 0);
        for (int k = 0; k < 3; k++)
            for (size_t i = 0; i < nets[k]->nparams; i++)
                want[k][i] = 0.8 * want[k][i] + 0.2 * (double)nets[k]->params[i];
    }
    const char *names[3] = {"F average", "B average", "actor average"};
    for (int k = 0; k < 3; k++) {
        double moved = 0;
        for (size_t i = 0; i < nets[k]->nparams; i++) {
            close_to(names[k], i, avgs[k]->params[i], want[k][i], 1e-5);
            moved = fmax(moved, fabs((double)avgs[k]->params[i] - nets[k]->params[i]));
        }
        assert_true(moved > 1e-6); /* the average lags the trained parameters */
        free(want[k]);
    }
    veer__trainer_destroy(t);
    veer__tlog_free(&log);

    cont_config(&c, "avg1.veer");
    c.average = 0.2f;
    c.steps = 20;
    run_ok(&c);
    cont_config(&c, "avg2.veer");
    c.average = 0.2f;
    run_stopped_and_resumed(&c, "avg2.ckpt", 9, 20);
    cont_config(&c, "avg3.veer");
    c.steps = 20;
    run_ok(&c);
    assert_true(same_file("avg1.veer", "avg2.veer"));
    assert_false(same_file("avg1.veer", "avg3.veer")); /* without --average: another bundle */

    cont_config(&c, "avg4.veer");
    c.average = 1.5f;
    assert_int_equal(veer__train_run(&c, &err), VEER_ECONFIG);
    assert_string_equal(err.field, "--average");
}

static int setup(void **state)
{
    (void)state;
    snprintf(dir, sizeof dir, "/tmp/veer_test_export_XXXXXX");
    if (mkdtemp(dir) == NULL)
        return -1;
    write_cont_log(300);
    write_table_log(200);
    return 0;
}

static int teardown(void **state)
{
    (void)state;
    char cmd[512];
    snprintf(cmd, sizeof cmd, "rm -rf '%s'", dir);
    return system(cmd) == 0 ? 0 : -1;
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_roundtrip_continuous),
        cmocka_unit_test(test_roundtrip_split),
        cmocka_unit_test(test_roundtrip_input_norm),
        cmocka_unit_test(test_roundtrip_table),
        cmocka_unit_test(test_same_flags_same_bundle_and_resume),
        cmocka_unit_test(test_cosine_schedule),
        cmocka_unit_test(test_parameter_average),
    };
    return cmocka_run_group_tests(tests, setup, teardown);
}
