/* Networks and policies against the independent reference forward pass in support.c (plain
 * double-precision loops over the decoded schema), and against worked examples computed by hand
 * in the comments: clipping and its flag, the affine map of a normalised actor, the value of the
 * clipped action, argmax ties going to the lowest index, the fallback on a non-finite output,
 * and refusing non-finite inputs and out-of-range embedding indices. */
#include <math.h>
#include <pthread.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "support.h"

#define REL 1e-5

static float *random_z(uint32_t d)
{
    float *z = fx_random(d, 1.0f);
    double n = 0;
    for (uint32_t i = 0; i < d; i++)
        n += (double)z[i] * z[i];
    for (uint32_t i = 0; i < d; i++)
        z[i] = (float)(z[i] * sqrt(d / n));
    return z;
}

/* The scale of Q = F·z for a relative check: Σ|F_i z_i| (the condition of a dot product,
 * Higham section 3.1), so cancellation in Q is not mistaken for an error in F. */
static double q_scale(const Veer__Bundle__Model *m, const float *s, const float *a, const float *z)
{
    double f[64], sc = 0;
    assert_true(ref_net(m->forward, m, s, a, z, f) > 0);
    for (uint32_t i = 0; i < m->z_dim; i++)
        sc += fabs(f[i] * z[i]);
    return sc > 1e-30 ? sc : 1e-30;
}

static void check_policy(Veer__Bundle__Model *m, uint32_t max_batch)
{
    veer_bundle *b = fx_open(m);
    veer_workspace *ws = NULL;
    veer_error err;
    assert_int_equal(veer_workspace_create(b, max_batch, &ws, &err), 0);
    const veer_model_info *info = veer_bundle_info(b);
    uint32_t sd = info->state_dim, ad = info->action_dim;
    enum { N = 29 };
    float *states = fx_random(N * sd, 2.5f);
    for (int t = 0; t < 3; t++) {
        float *z = random_z(info->z_dim);
        float act[N * 4], val[N];
        uint32_t flags[N];
        assert_int_equal(veer_act_batch(ws, N, states, z, act, val, flags), 0);
        for (int r = 0; r < N; r++) {
            const float *s = states + r * sd;
            float a1[4], v1;
            uint32_t f1;
            assert_int_equal(veer_act(ws, s, z, a1, &v1, &f1), 0);
            float ra[4];
            double rq;
            int clipped;
            ref_policy(m, s, z, ra, &rq, &clipped);
            if (info->action_kind == VEER_ACTION_CONTINUOUS) {
                for (uint32_t j = 0; j < ad; j++) {
                    double span = info->action_high[j] - info->action_low[j];
                    assert_true(fabs(act[r * ad + j] - ra[j]) <= REL * span);
                    assert_true(fabs(a1[j] - ra[j]) <= REL * span);
                    assert_true(act[r * ad + j] >= info->action_low[j] &&
                                act[r * ad + j] <= info->action_high[j]);
                }
                assert_int_equal(flags[r], clipped ? VEER_ACT_CLIPPED : 0);
                assert_int_equal(f1, flags[r]);
            } else {
                /* The argmax may differ only between actions whose Q differ by less than the
                 * tolerance; then either is right in float32. */
                double qc = q_scale(m, s, &act[r], z), gap;
                double fr[64];
                ref_net(m->forward, m, s, &act[r], z, fr);
                gap = rq;
                for (uint32_t i = 0; i < info->z_dim; i++)
                    gap -= fr[i] * z[i];
                assert_true(gap <= REL * qc);
                assert_int_equal(flags[r], 0);
                rq -= gap; /* the reference Q of the action libveer chose */
            }
            double sc =
                q_scale(m, s, info->action_kind == VEER_ACTION_CONTINUOUS ? ra : &act[r], z);
            assert_true(fabs(val[r] - rq) <= REL * sc);
            assert_true(fabs(v1 - rq) <= REL * sc);
        }
        /* Values and flags are optional. */
        float act2[N * 4];
        assert_int_equal(veer_act_batch(ws, N, states, z, act2, NULL, NULL), 0);
        assert_int_equal(veer_act(ws, states, z, act2, NULL, NULL), 0);
    }
    veer_workspace_destroy(ws);
    veer_bundle_close(b);
}

static void test_continuous_policy(void **state)
{
    (void)state;
    fx_srand(21);
    check_policy(fx_continuous_model(), 4);
    fx_free_all();
}

static void test_discrete_policy(void **state)
{
    (void)state;
    fx_srand(22);
    check_policy(fx_discrete_model(), 3);
    fx_free_all();
}

static void check_eval(Veer__Bundle__Model *m)
{
    veer_bundle *b = fx_open(m);
    veer_workspace *ws = NULL;
    assert_int_equal(veer_workspace_create(b, 2, &ws, NULL), 0);
    const veer_model_info *info = veer_bundle_info(b);
    uint32_t sd = info->state_dim, zd = info->z_dim, ad = info->action_dim;
    enum { N = 13 }; /* more rows than any slice */
    float *s = fx_random(N * sd, 2.0f), *z = fx_random(N * zd, 1.5f);
    float *a = fx_alloc(N * ad * sizeof *a), *out = fx_alloc(N * zd * sizeof *out);
    for (int r = 0; r < N; r++)
        for (uint32_t j = 0; j < ad; j++)
            a[r * ad + j] = info->action_kind == VEER_ACTION_DISCRETE
                                ? (float)(r % info->action_count)
                                : (float)fx_uniform(info->action_low[j], info->action_high[j]);
    double ref[64];
    assert_int_equal(veer_eval_forward(ws, N, s, a, z, out), 0);
    for (int r = 0; r < N; r++) {
        assert_int_equal(ref_net(m->forward, m, s + r * sd, a + r * ad, z + r * zd, ref), zd);
        assert_true(rel_err(out + r * zd, ref, zd) < REL);
    }
    assert_int_equal(veer_eval_backward(ws, N, s, out), 0);
    for (int r = 0; r < N; r++) {
        assert_int_equal(ref_net(m->backward, m, s + r * sd, NULL, NULL, ref), zd);
        assert_true(rel_err(out + r * zd, ref, zd) < REL);
        double norm = 0; /* B ends in a rescale to sqrt(z_dim) */
        for (uint32_t i = 0; i < zd; i++)
            norm += (double)out[r * zd + i] * out[r * zd + i];
        assert_true(fabs(sqrt(norm) - sqrt(zd)) < 1e-5);
    }
    if (info->action_kind == VEER_ACTION_CONTINUOUS) {
        assert_int_equal(veer_eval_actor(ws, N, s, z, out), 0);
        for (int r = 0; r < N; r++) {
            assert_int_equal(ref_net(m->actor, m, s + r * sd, NULL, z + r * zd, ref), ad);
            assert_true(rel_err(out + r * ad, ref, ad) < REL);
        }
    } else {
        assert_int_equal(veer_eval_actor(ws, N, s, z, out), VEER_EINVAL);
        /* Discrete actions must be integers within the count. */
        const float bad[] = {-1.0f, 5.0f, 0.5f, NAN};
        for (size_t k = 0; k < 4; k++) {
            a[7] = bad[k];
            assert_int_equal(veer_eval_forward(ws, N, s, a, z, out), VEER_EINVAL);
        }
    }
    veer_workspace_destroy(ws);
    veer_bundle_close(b);
}

static void test_eval_networks(void **state)
{
    (void)state;
    fx_srand(23);
    check_eval(fx_continuous_model());
    check_eval(fx_discrete_model());
    fx_free_all();
}

/* actor(s, z) = (s0, s1) exactly; F(s, a, z)_i = 0.5 (Σs + Σa + Σz) for every i. */
static Veer__Bundle__Model *worked_continuous(int normalized)
{
    Veer__Bundle__Model *m = fx_continuous_model();
    static const uint32_t first_two[2] = {0, 1};
    float w_actor[2 * 5] = {1, 0, 0, 0, 0, 0, 1, 0, 0, 0};
    m->actor = fx_net(1,
                      (Veer__Bundle__Branch *[]){fx_branch(
                          2,
                          (Veer__Bundle__Input *[]){
                              fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_STATE, 2, first_two, 0),
                              fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_TASK, 0, NULL, 0)},
                          1, (Veer__Bundle__Layer *[]){fx_linear_w(5, 2, w_actor, NULL)})},
                      0, NULL);
    m->actor_normalized = normalized;
    float w_f[3 * 9];
    for (int i = 0; i < 27; i++)
        w_f[i] = 0.5f;
    m->forward = fx_net(
        1,
        (Veer__Bundle__Branch *[]){fx_branch(
            3,
            (Veer__Bundle__Input *[]){fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_STATE, 0, NULL, 0),
                                      fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_ACTION, 0, NULL, 0),
                                      fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_TASK, 0, NULL, 0)},
            1, (Veer__Bundle__Layer *[]){fx_linear_w(9, 3, w_f, NULL)})},
        0, NULL);
    return m;
}

static void act_one(veer_workspace *ws, const float *s, const float *z, float a0, float a1, float q,
                    uint32_t flags)
{
    float a[2] = {-7, -7}, v = -7;
    uint32_t f = 99;
    assert_int_equal(veer_act(ws, s, z, a, &v, &f), 0);
    if (a[0] != a0 || a[1] != a1 || v != q || f != flags)
        fail_msg("got (%g, %g) Q %g flags %u; want (%g, %g) Q %g flags %u", (double)a[0],
                 (double)a[1], (double)v, f, (double)a0, (double)a1, (double)q, flags);
}

static void test_clip_worked_example(void **state)
{
    (void)state;
    fx_srand(24);
    veer_bundle *b = fx_open(worked_continuous(0));
    veer_workspace *ws = NULL;
    assert_int_equal(veer_workspace_create(b, 1, &ws, NULL), 0);
    const float z[3] = {1, 0, 0};
    /* Bounds [-1, 1] x [0, 2]. s = (5, 0.5, 0, 0): actor (5, 0.5), clipped to (1, 0.5);
     * Q is for the clipped action: 0.5 (5.5 + 1.5 + 1) * 1 = 4. */
    act_one(ws, (const float[]){5, 0.5f, 0, 0}, z, 1, 0.5f, 4.0f, VEER_ACT_CLIPPED);
    /* s = (0.25, 1, 0, 0): inside; Q = 0.5 (1.25 + 1.25 + 1) = 1.75. */
    act_one(ws, (const float[]){0.25f, 1, 0, 0}, z, 0.25f, 1, 1.75f, 0);
    /* s = (-3, -2, 1, 1): both clipped to (-1, 0); Q = 0.5 (-3 - 1 + 1) = -1.5. */
    act_one(ws, (const float[]){-3, -2, 1, 1}, z, -1, 0, -1.5f, VEER_ACT_CLIPPED);
    /* Finite state, overflowing network: 0.5 * 3e38 * 4 > FLT_MAX, so F is infinite. The
     * fallback (0, 1) leaves with value 0 and both flags, and the call succeeds. */
    act_one(ws, (const float[]){3e38f, 3e38f, 3e38f, 3e38f}, z, 0, 1, 0,
            VEER_ACT_FALLBACK | VEER_ACT_NONFINITE);

    /* Non-finite inputs are refused and nothing is written. */
    float a[2] = {-7, -7}, v = -7;
    uint32_t f = 99;
    assert_int_equal(veer_act(ws, (const float[]){NAN, 0, 0, 0}, z, a, &v, &f), VEER_ENONFINITE);
    assert_int_equal(
        veer_act(ws, (const float[]){0, 0, 0, 0}, (const float[]){0, INFINITY, 0}, a, &v, &f),
        VEER_ENONFINITE);
    assert_true(a[0] == -7 && a[1] == -7 && v == -7 && f == 99);
    float two[8] = {0, 0, 0, 0, 0, 0, NAN, 0}, a2[4] = {-7, -7, -7, -7};
    assert_int_equal(veer_act_batch(ws, 2, two, z, a2, NULL, NULL), VEER_ENONFINITE);
    assert_true(a2[0] == -7);
    veer_workspace_destroy(ws);
    veer_bundle_close(b);

    /* Normalised actor: a = low + (y + 1) / 2 (high - low). y = (0.5, -0.5) -> (0.5, 0.5);
     * y = (1.5, 0) -> 1.5 is outside [-1, 1]: clipped to 1, and (0 + 1) / 2 * 2 = 1. */
    b = fx_open(worked_continuous(1));
    assert_int_equal(veer_workspace_create(b, 1, &ws, NULL), 0);
    act_one(ws, (const float[]){0.5f, -0.5f, 0, 0}, z, 0.5f, 0.5f, 0.5f * (0.0f + 1.0f + 1.0f), 0);
    act_one(ws, (const float[]){1.5f, 0, 0, 0}, z, 1, 1, 0.5f * (1.5f + 2.0f + 1.0f),
            VEER_ACT_CLIPPED);
    veer_workspace_destroy(ws);
    veer_bundle_close(b);
    fx_free_all();
}

/* Three actions; F(a) = (1, 0, 0), (1, 1, 0), (0, 1, 0) for a = 0, 1, 2, whatever the state. */
static Veer__Bundle__Model *worked_discrete(void)
{
    Veer__Bundle__Model *m = fx_discrete_model();
    m->action->count = 3;
    m->fallback_action[0] = 1;
    float w[3 * 6] = {1, 1, 0, 0, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0, 0, 0, 0, 0};
    m->forward = fx_net(
        1,
        (Veer__Bundle__Branch *[]){fx_branch(
            2,
            (Veer__Bundle__Input *[]){fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_ACTION, 0, NULL, 0),
                                      fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_TASK, 0, NULL, 0)},
            1, (Veer__Bundle__Layer *[]){fx_linear_w(6, 3, w, NULL)})},
        0, NULL);
    return m;
}

static void test_argmax_worked_example(void **state)
{
    (void)state;
    fx_srand(25);
    veer_bundle *b = fx_open(worked_discrete());
    veer_workspace *ws = NULL;
    assert_int_equal(veer_workspace_create(b, 2, &ws, NULL), 0);
    const float s[4] = {0.3f, -1, 2, 0};
    struct {
        float z[3];
        float action, q;
    } cases[] = {
        {{1, 0, 0}, 0, 1},    /* Q = (1, 1, 0): tie between 0 and 1, the lowest wins */
        {{0, 1, 0}, 1, 1},    /* Q = (0, 1, 1): tie between 1 and 2 */
        {{-1, -1, 0}, 0, -1}, /* Q = (-1, -2, -1) */
        {{0, 0, 1}, 0, 0},    /* all equal */
        {{0.5f, 2, 0}, 1, 2.5f},
    };
    for (size_t k = 0; k < sizeof cases / sizeof cases[0]; k++) {
        float a = -7, v = -7;
        uint32_t f = 99;
        assert_int_equal(veer_act(ws, s, cases[k].z, &a, &v, &f), 0);
        assert_true(a == cases[k].action && v == cases[k].q && f == 0);
    }
    /* Q for action 1 is 3e38 + 3e38, beyond a float: the fallback (1) with value 0. */
    float a = -7, v = -7;
    uint32_t f = 99;
    assert_int_equal(veer_act(ws, s, (const float[]){3e38f, 3e38f, 0}, &a, &v, &f), 0);
    assert_true(a == 1 && v == 0 && f == (VEER_ACT_FALLBACK | VEER_ACT_NONFINITE));
    veer_workspace_destroy(ws);
    veer_bundle_close(b);
    fx_free_all();
}

static void test_embedding_state_index(void **state)
{
    (void)state;
    fx_srand(26);
    /* F reads (action index, parcel_mass as a class 0..2) through one embedding table. */
    Veer__Bundle__Model *m = fx_discrete_model();
    static const uint32_t cls[1] = {3}, first_two[2] = {0, 1};
    m->forward =
        fx_net(2,
               (Veer__Bundle__Branch *[]){
                   fx_branch(2,
                             (Veer__Bundle__Input *[]){
                                 fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_ACTION, 0, NULL, 1),
                                 fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_STATE, 1, cls, 0)},
                             2,
                             (Veer__Bundle__Layer *[]){
                                 fx_embedding(2, (const uint32_t[]){5, 3}, 8),
                                 fx_simple(VEER__BUNDLE__LAYER_KIND__LAYER_RELU, 8)}),
                   fx_branch(2,
                             (Veer__Bundle__Input *[]){
                                 fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_STATE, 2, first_two, 0),
                                 fx_input(VEER__BUNDLE__INPUT_KIND__INPUT_TASK, 0, NULL, 0)},
                             1, (Veer__Bundle__Layer *[]){fx_linear(5, 8, 1.5f)})},
               1, (Veer__Bundle__Layer *[]){fx_linear(16, 3, 1.5f)});
    veer_bundle *b = fx_open(m);
    veer_workspace *ws = NULL;
    assert_int_equal(veer_workspace_create(b, 1, &ws, NULL), 0);
    float z[3] = {0.6f, -1.2f, 0.9f};
    for (int c = 0; c < 3; c++) {
        float s[4] = {0.4f, -0.7f, 1.1f, (float)c}, a, v, ra;
        double rq;
        int clipped;
        assert_int_equal(veer_act(ws, s, z, &a, &v, NULL), 0);
        ref_policy(m, s, z, &ra, &rq, &clipped);
        assert_true(a == ra);
        assert_true(fabs(v - rq) <= REL * q_scale(m, s, &a, z));
    }
    /* A class outside 0..2, or not an integer, is refused without reading past the table. */
    const float bad[] = {3, -1, 0.5f, 1e9f};
    for (size_t k = 0; k < 4; k++) {
        float s[4] = {0.4f, -0.7f, 1.1f, bad[k]}, a;
        assert_int_equal(veer_act(ws, s, z, &a, NULL, NULL), VEER_EINVAL);
    }
    /* In a batch the check comes first: with slices of one state, the good first two states
     * are not acted on either when the third is bad. */
    float batch[12] = {0.4f, -0.7f, 1.1f, 0, 0.1f, 0.2f, 0.3f, 2, 0.5f, 0.5f, 0.5f, 3};
    float acts[3] = {-7, -7, -7};
    assert_int_equal(veer_act_batch(ws, 3, batch, z, acts, NULL, NULL), VEER_EINVAL);
    assert_true(acts[0] == -7 && acts[1] == -7 && acts[2] == -7);
    batch[11] = 1;
    assert_int_equal(veer_act_batch(ws, 3, batch, z, acts, NULL, NULL), 0);
    veer_workspace_destroy(ws);
    veer_bundle_close(b);
    fx_free_all();
}

static void test_workspace_and_blas(void **state)
{
    (void)state;
    fx_srand(27);
    veer_bundle *b = fx_open(fx_discrete_model());
    veer_workspace *ws = (veer_workspace *)0x1;
    veer_error err;
    assert_int_equal(veer_workspace_create(b, 0, &ws, &err), VEER_EINVAL);
    assert_string_equal(err.field, "max_batch");
    assert_null(ws);
    veer_blas_threads(2);
    assert_int_equal(veer_workspace_create(b, 8, &ws, &err), 0);
    /* Creating a workspace pins OpenBLAS to one thread: setting it again reports 1. */
    assert_int_equal(veer_blas_threads(1), 1);
    assert_non_null(veer_blas_kernel());
    assert_true(strlen(veer_blas_kernel()) > 0);
    veer_workspace_destroy(ws);
    veer_workspace_destroy(NULL);
    veer_bundle_close(b);
    fx_free_all();
}

/* One bundle shared by threads, each with its own workspace: every thread gets exactly the
 * actions computed beforehand on one thread (the bundle is read-only after opening). */
enum { SHARE_N = 150, SHARE_THREADS = 3 };

typedef struct share_job {
    veer_bundle *bundle;
    const float *states, *z;
    float actions[SHARE_N * 2], values[SHARE_N];
    uint32_t flags[SHARE_N];
    int rc;
} share_job;

static void *share_run(void *arg)
{
    share_job *j = arg;
    veer_workspace *ws = NULL;
    j->rc = veer_workspace_create(j->bundle, 1, &ws, NULL);
    for (int rep = 0; rep < 5 && j->rc == 0; rep++)
        for (int r = 0; r < SHARE_N && j->rc == 0; r++)
            j->rc = veer_act(ws, j->states + r * 4, j->z, j->actions + r * 2, &j->values[r],
                             &j->flags[r]);
    veer_workspace_destroy(ws);
    return NULL;
}

static void test_shared_bundle_threads(void **state)
{
    (void)state;
    fx_srand(28);
    veer_bundle *b = fx_open(fx_continuous_model());
    float *states = fx_random(SHARE_N * 4, 2.0f), *z = random_z(3);
    share_job *want = fx_alloc(sizeof *want), *jobs = fx_alloc(SHARE_THREADS * sizeof *jobs);
    *want = (share_job){.bundle = b, .states = states, .z = z};
    share_run(want);
    assert_int_equal(want->rc, 0);
    pthread_t t[SHARE_THREADS];
    for (int i = 0; i < SHARE_THREADS; i++) {
        jobs[i] = (share_job){.bundle = b, .states = states, .z = z};
        assert_int_equal(pthread_create(&t[i], NULL, share_run, &jobs[i]), 0);
    }
    for (int i = 0; i < SHARE_THREADS; i++) {
        pthread_join(t[i], NULL);
        assert_int_equal(jobs[i].rc, 0);
        assert_memory_equal(jobs[i].actions, want->actions, sizeof want->actions);
        assert_memory_equal(jobs[i].values, want->values, sizeof want->values);
        assert_memory_equal(jobs[i].flags, want->flags, sizeof want->flags);
    }
    veer_bundle_close(b);
    fx_free_all();
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_continuous_policy),     cmocka_unit_test(test_discrete_policy),
        cmocka_unit_test(test_eval_networks),         cmocka_unit_test(test_clip_worked_example),
        cmocka_unit_test(test_argmax_worked_example), cmocka_unit_test(test_embedding_state_index),
        cmocka_unit_test(test_workspace_and_blas),    cmocka_unit_test(test_shared_bundle_threads),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
