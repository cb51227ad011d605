/* The backward-only workspace the task encoder uses (veer__workspace_create_backward): it must
 * give exactly the B of a full workspace (bit for bit: the same slices go through the same
 * products) and agree with the independent reference forward pass in support.c (plain
 * double-precision loops over the decoded schema); and since its buffers are sized for B alone,
 * every public call that would run F or the actor on it must be refused with VEER_EINVAL
 * before writing any output, rather than overrun. */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "runtime/workspace.h"
#include "support.h"

/* Float rounding over a few short dot products; common practice, no source. */
#define REL 1e-5

enum { N = 13 }; /* more rows than any slice below, and not a multiple of them */

/* B from a backward-only workspace of max_batch states equals B from a full one of the same
 * max_batch byte for byte, and both match the reference. */
static void check_same_b(Veer__Bundle__Model *m, uint32_t max_batch)
{
    veer_bundle *b = fx_open(m);
    const veer_model_info *info = veer_bundle_info(b);
    uint32_t sd = info->state_dim, zd = info->z_dim;
    veer_workspace *full = NULL, *bonly = NULL;
    veer_error err;
    assert_int_equal(veer_workspace_create(b, max_batch, &full, &err), 0);
    assert_int_equal(veer__workspace_create_backward(b, max_batch, &bonly, &err), 0);
    assert_non_null(bonly);

    float *s = fx_random(N * sd, 2.0f);
    float *want = fx_alloc(N * zd * sizeof *want), *got = fx_alloc(N * zd * sizeof *got);
    assert_int_equal(veer_eval_backward(full, N, s, want), 0);
    memset(got, 0xff, N * zd * sizeof *got); /* NaN everywhere: every row must be written */
    assert_int_equal(veer_eval_backward(bonly, N, s, got), 0);
    assert_memory_equal(got, want, N * zd * sizeof *got);

    double ref[64];
    for (int r = 0; r < N; r++) {
        assert_int_equal(ref_net(m->backward, m, s + r * sd, NULL, NULL, ref), (int)zd);
        assert_true(rel_err(got + r * zd, ref, zd) < REL);
    }
    veer_workspace_destroy(bonly);
    veer_workspace_destroy(full);
    veer_bundle_close(b);
}

static void test_backward_only_matches_full(void **state)
{
    (void)state;
    fx_srand(41);
    check_same_b(fx_continuous_model(), 2);
    check_same_b(fx_continuous_model(), 5);
    check_same_b(fx_discrete_model(), 2); /* F is bilinear here, wider than B */
    check_same_b(fx_discrete_model(), 256);
    fx_free_all();
}

/* Every call that runs F or the actor refuses a backward-only workspace and writes nothing. */
static void check_refusals(Veer__Bundle__Model *m)
{
    veer_bundle *b = fx_open(m);
    const veer_model_info *info = veer_bundle_info(b);
    uint32_t sd = info->state_dim, zd = info->z_dim, ad = info->action_dim;
    veer_workspace *ws = NULL;
    assert_int_equal(veer__workspace_create_backward(b, 4, &ws, NULL), 0);

    float *s = fx_random(N * sd, 2.0f), *z = fx_random(N * zd, 1.0f);
    float *a = fx_alloc(N * ad * sizeof *a);
    for (int r = 0; r < N; r++)
        for (uint32_t j = 0; j < ad; j++)
            a[r * ad + j] = info->action_kind == VEER_ACTION_DISCRETE
                                ? (float)(r % info->action_count)
                                : 0.5f * (info->action_low[j] + info->action_high[j]);
    size_t out_len = N * (zd > ad ? zd : ad);
    float *out = fx_alloc(out_len * sizeof *out), *untouched = fx_alloc(out_len * sizeof *out);
    for (size_t i = 0; i < out_len; i++)
        out[i] = untouched[i] = -7.25f;
    float value = -7.25f, values[N];
    uint32_t flags = 0xdeadbeef, flag_list[N];
    for (int r = 0; r < N; r++) {
        values[r] = -7.25f;
        flag_list[r] = 0xdeadbeef;
    }

    assert_int_equal(veer_eval_forward(ws, N, s, a, z, out), VEER_EINVAL);
    assert_int_equal(veer_eval_forward(ws, 1, s, a, z, out), VEER_EINVAL);
    assert_int_equal(veer_eval_actor(ws, N, s, z, out), VEER_EINVAL);
    assert_int_equal(veer_act(ws, s, z, out, &value, &flags), VEER_EINVAL);
    assert_int_equal(veer_act_batch(ws, N, s, z, out, values, flag_list), VEER_EINVAL);
    assert_int_equal(veer_act_batch(ws, N, s, z, out, NULL, NULL), VEER_EINVAL);
    assert_memory_equal(out, untouched, out_len * sizeof *out);
    assert_true(value == -7.25f && flags == 0xdeadbeef);
    for (int r = 0; r < N; r++)
        assert_true(values[r] == -7.25f && flag_list[r] == 0xdeadbeef);

    /* The refusals leave the workspace usable for B. */
    double ref[64];
    assert_int_equal(veer_eval_backward(ws, N, s, out), 0);
    for (int r = 0; r < N; r++) {
        assert_int_equal(ref_net(m->backward, m, s + r * sd, NULL, NULL, ref), (int)zd);
        assert_true(rel_err(out + r * zd, ref, zd) < REL);
    }
    veer_workspace_destroy(ws);
    veer_bundle_close(b);
}

static void test_backward_only_refuses_f_and_actor(void **state)
{
    (void)state;
    fx_srand(42);
    check_refusals(fx_continuous_model()); /* has an actor: refused for the workspace, not it */
    check_refusals(fx_discrete_model());
    fx_free_all();
}

/* Bad arguments get the same checks and field names as veer_workspace_create. */
static void test_backward_only_bad_arguments(void **state)
{
    (void)state;
    fx_srand(43);
    veer_bundle *b = fx_open(fx_discrete_model());
    veer_workspace *ws = (veer_workspace *)0x1;
    veer_error err;
    assert_int_equal(veer__workspace_create_backward(b, 0, &ws, &err), VEER_EINVAL);
    assert_string_equal(err.field, "max_batch");
    assert_null(ws);
    ws = (veer_workspace *)0x1;
    assert_int_equal(veer__workspace_create_backward(b, (1u << 20) + 1, &ws, &err), VEER_EINVAL);
    assert_string_equal(err.field, "max_batch");
    assert_null(ws);
    assert_int_equal(veer__workspace_create_backward(NULL, 4, &ws, &err), VEER_EINVAL);
    assert_string_equal(err.field, "bundle");
    assert_int_equal(veer__workspace_create_backward(b, 4, NULL, &err), VEER_EINVAL);
    assert_string_equal(err.field, "out");
    veer_bundle_close(b);
    fx_free_all();
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_backward_only_matches_full),
        cmocka_unit_test(test_backward_only_refuses_f_and_actor),
        cmocka_unit_test(test_backward_only_bad_arguments),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
