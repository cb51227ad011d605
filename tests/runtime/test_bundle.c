/* Bundles through the writer and the loader: a model built here with protobuf-c round-trips
 * with every field intact; the precision matrix satisfies its definition P (C + rI) = I; and
 * a set of damaged bundles is refused, each with its own code and the field it names. (The full
 * catalogue of broken bundles is tests/reference/test_catalogue.py, through the Python
 * exporter.) */
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
#include <sodium.h>

#include "base/base.h"
#include "support.h"

static void test_round_trip(void **state)
{
    (void)state;
    fx_srand(11);
    Veer__Bundle__Model *m = fx_continuous_model();
    char path[] = "/tmp/veer-runtime-test-XXXXXX";
    int fd = mkstemp(path);
    assert_true(fd >= 0);
    close(fd);
    veer_error err;
    assert_int_equal(veer__bundle_write_model(m, path, &err), 0);

    veer_bundle *b = NULL;
    int rc = veer_bundle_open(path, &b, &err);
    assert_int_equal(rc, 0);
    assert_int_equal(err.code, 0);
    unlink(path);

    const veer_model_info *info = veer_bundle_info(b);
    assert_string_equal(info->model_version, "sorting-arm-test-1");
    assert_int_equal(info->state_dim, 4);
    assert_int_equal(info->z_dim, 3);
    assert_true(info->discount == 0.98f && info->decision_step_s == 0.02f);
    for (int i = 0; i < 4; i++)
        assert_string_equal(info->feature_names[i], m->feature_names[i]);
    assert_int_equal(info->action_kind, VEER_ACTION_CONTINUOUS);
    assert_int_equal(info->action_dim, 2);
    assert_int_equal(info->action_count, 0);
    assert_memory_equal(info->action_low, m->action->low, 2 * sizeof(float));
    assert_memory_equal(info->action_high, m->action->high, 2 * sizeof(float));
    assert_memory_equal(info->fallback_action, m->fallback_action, 2 * sizeof(float));
    assert_int_equal(info->b_feature_count, 2);
    assert_true(info->b_features[0] == 0 && info->b_features[1] == 2);
    assert_true(info->rescale == 1 && info->center_rewards == 0 && info->ridge == 1e-3f);
    assert_float_equal(info->rescale_norm, sqrtf(3.0f), 0.0f); /* 0 resolves to sqrt(z_dim) */

    assert_true(info->has_stats);
    assert_int_equal(info->stats_count, 1000);
    assert_int_equal(info->bins, 4);
    assert_memory_equal(info->state_mean, m->stats->mean, 4 * sizeof(float));
    assert_memory_equal(info->state_cov, m->stats->cov, 16 * sizeof(float));
    assert_memory_equal(info->quantile_edges, m->stats->quantile_edges, 12 * sizeof(float));
    assert_true(info->mahalanobis_p99 == 3.0f && info->mahalanobis_p999 == 4.0f);
    assert_int_equal(info->reference_count, 5);
    assert_memory_equal(info->reference_states, m->reference->states, 20 * sizeof(float));
    assert_memory_equal(info->reference_b, m->reference->b, 15 * sizeof(float));
    assert_memory_equal(info->cov_b, m->cov_b, 9 * sizeof(float));
    assert_string_equal(info->producer, "runtime tests");
    assert_string_equal(info->created, "2026-01-01T00:00:00Z");
    assert_string_equal(info->notes, "parcel-sorting arm fixture");
    /* The copies are 64-byte aligned for OpenBLAS. */
    assert_int_equal((uintptr_t)info->state_cov % 64, 0);
    assert_int_equal((uintptr_t)info->reference_b % 64, 0);

    /* The digest is BLAKE2b-256 of the packed Model, computed here directly with libsodium. */
    size_t n = veer__bundle__model__get_packed_size(m);
    uint8_t *payload = malloc(n), want[32];
    veer__bundle__model__pack(m, payload);
    assert_int_equal(sodium_init() < 0, 0);
    crypto_generichash(want, 32, payload, n, NULL, 0);
    assert_memory_equal(info->digest, want, 32);
    free(payload);

    /* Memory covers at least every float the bundle holds. */
    size_t floats = 16 + 4 + 12 + 20 + 15 + 9 + 2 + 2 + 2;
    assert_true(veer_bundle_memory(b) > floats * sizeof(float));
    veer_bundle_close(b);

    /* The discrete fixture: no bounds, count 5, the index fallback; no actor. */
    veer_bundle *d = fx_open(fx_discrete_model());
    info = veer_bundle_info(d);
    assert_int_equal(info->action_kind, VEER_ACTION_DISCRETE);
    assert_int_equal(info->action_dim, 1);
    assert_int_equal(info->action_count, 5);
    assert_null(info->action_low);
    assert_true(info->fallback_action[0] == 2.0f);
    veer_bundle_close(d);
    veer_bundle_close(NULL);
    fx_free_all();
}

static void test_precision_is_inverse(void **state)
{
    (void)state;
    fx_srand(12);
    Veer__Bundle__Model *m = fx_continuous_model();
    veer_bundle *b = fx_open(m);
    const veer_model_info *info = veer_bundle_info(b);
    /* The definition of the inverse: P (C + rI) = I, in double from the float matrices. */
    for (int i = 0; i < 4; i++)
        for (int j = 0; j < 4; j++) {
            double s = 0;
            for (int k = 0; k < 4; k++)
                s += (double)info->state_precision[i * 4 + k] *
                     (m->stats->cov[k * 4 + j] + (k == j ? m->stats->cov_ridge : 0.0f));
            assert_true(fabs(s - (i == j ? 1.0 : 0.0)) < 1e-5);
        }
    veer_bundle_close(b);

    /* A zero covariance with no ridge is singular. */
    m->stats->cov = fx_floats(16, NULL);
    m->stats->cov_ridge = 0.0f;
    size_t len;
    uint8_t *buf = fx_pack(m, &len);
    veer_error err;
    b = (veer_bundle *)0x1;
    assert_int_equal(veer_bundle_open_mem(buf, len, &b, &err), VEER_ESINGULAR);
    assert_null(b);
    assert_string_equal(err.field, "stats.cov");
    free(buf);
    fx_free_all();
}

/* ---- Rejections ------------------------------------------------------------------------- */

typedef void (*mutate_fn)(Veer__Bundle__Model *m);

static void expect_reject(Veer__Bundle__Model *m, int code, const char *field)
{
    size_t len;
    uint8_t *buf = fx_pack(m, &len);
    veer_bundle *b = NULL;
    veer_error err;
    int rc = veer_bundle_open_mem(buf, len, &b, &err);
    free(buf);
    if (rc != code || strcmp(err.field, field) != 0)
        fail_msg("expected %s at %s, got %s at \"%s\": %s", veer_errname(code), field,
                 veer_errname(rc), err.field, err.message);
    assert_int_equal(err.code, code);
    assert_true(strlen(err.message) > 10);
    assert_null(b);
}

static void m_dim_chain(Veer__Bundle__Model *m)
{
    m->forward->branches[1]->layers[0]->in_dim = 6;
}
static void m_head_out(Veer__Bundle__Model *m)
{
    m->forward->n_head = 1;
}
static void m_bias_len(Veer__Bundle__Model *m)
{
    m->actor->head[0]->n_bias = 1;
}
static void m_no_actor(Veer__Bundle__Model *m)
{
    m->actor = NULL;
}
static void m_no_backward(Veer__Bundle__Model *m)
{
    m->backward = NULL;
}
static void m_nan_weight(Veer__Bundle__Model *m)
{
    m->backward->branches[0]->layers[2]->weight[4] = NAN;
}
static void m_inf_stat(Veer__Bundle__Model *m)
{
    m->stats->mean[1] = INFINITY;
}
static void m_low_high(Veer__Bundle__Model *m)
{
    m->action->low[1] = 2.5f;
}
static void m_fallback(Veer__Bundle__Model *m)
{
    m->fallback_action[1] = -0.5f;
}
static void m_ref_shape(Veer__Bundle__Model *m)
{
    m->reference->count = 6;
}
static void m_stats_size(Veer__Bundle__Model *m)
{
    m->stats->n_quantile_edges = 11;
}
static void m_edges(Veer__Bundle__Model *m)
{
    m->stats->quantile_edges[5] = -9.0f;
}
static void m_discount(Veer__Bundle__Model *m)
{
    m->discount = 1.0f;
}
static void m_feature(Veer__Bundle__Model *m)
{
    m->forward->branches[1]->inputs[0]->features[1] = 4;
}
static void m_names(Veer__Bundle__Model *m)
{
    m->feature_names[3] = m->feature_names[0];
}
static void m_eps(Veer__Bundle__Model *m)
{
    m->forward->head[0]->eps = 0.0f;
}
static void m_merge(Veer__Bundle__Model *m)
{
    m->forward->merge = VEER__BUNDLE__MERGE_KIND__MERGE_UNSET;
}
static void m_b_action(Veer__Bundle__Model *m)
{
    m->backward->branches[0]->inputs[0]->kind = VEER__BUNDLE__INPUT_KIND__INPUT_ACTION;
    m->backward->branches[0]->inputs[0]->n_features = 0;
}

static Veer__Bundle__Layer *ones_embedding(uint32_t in, uint32_t out)
{
    uint32_t counts[16];
    for (uint32_t i = 0; i < in; i++)
        counts[i] = 1;
    return fx_embedding(in, counts, out);
}
/* Embeddings look rows up by index: never in a head, never fed by z. */
static void m_embed_head(Veer__Bundle__Model *m)
{
    m->forward->head[0] = ones_embedding(16, 16);
}
static void m_embed_task(Veer__Bundle__Model *m)
{
    m->actor->branches[0]->layers[0] = ones_embedding(7, 6);
}

static void test_rejections(void **state)
{
    (void)state;
    static const struct {
        mutate_fn fn;
        int code;
        const char *field;
    } cases[] = {
        {m_dim_chain, VEER_EDIMCHAIN, "forward.branches[1].layers[0].in_dim"},
        {m_head_out, VEER_EDIMCHAIN, "forward.head[0].out_dim"},
        {m_bias_len, VEER_EDIMCHAIN, "actor.head[0].bias"},
        {m_no_actor, VEER_ENETMISSING, "actor"},
        {m_no_backward, VEER_ENETMISSING, "backward"},
        {m_nan_weight, VEER_ENONFINITE, "backward.branches[0].layers[2].weight[4]"},
        {m_inf_stat, VEER_ENONFINITE, "stats.mean[1]"},
        {m_low_high, VEER_EBOUNDS, "action.low[1]"},
        {m_fallback, VEER_EFALLBACK, "fallback_action[1]"},
        {m_ref_shape, VEER_EREFSHAPE, "reference.states"},
        {m_stats_size, VEER_ESTATSSIZE, "stats.quantile_edges"},
        {m_edges, VEER_ESTATSSIZE, "stats.quantile_edges[5]"},
        {m_discount, VEER_EFIELD, "discount"},
        {m_feature, VEER_EFIELD, "forward.branches[1].inputs[0].features[1]"},
        {m_names, VEER_EFIELD, "feature_names"},
        {m_eps, VEER_EFIELD, "forward.head[0].eps"},
        {m_merge, VEER_EFIELD, "forward.merge"},
        {m_b_action, VEER_EFIELD, "backward.branches[0].inputs[0].kind"},
        {m_embed_head, VEER_EFIELD, "forward.head[0].kind"},
        {m_embed_task, VEER_EFIELD, "actor.branches[0].layers[0].kind"},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        fx_srand(13);
        Veer__Bundle__Model *m = fx_continuous_model();
        cases[i].fn(m);
        expect_reject(m, cases[i].code, cases[i].field);
        fx_free_all();
    }

    /* Discrete specifics: a fallback index out of range; a bilinear matrix of the wrong size. */
    fx_srand(14);
    Veer__Bundle__Model *d = fx_discrete_model();
    d->fallback_action[0] = 5.0f;
    expect_reject(d, VEER_EFALLBACK, "fallback_action[0]");
    d->fallback_action[0] = 4.0f;
    d->forward->bilinear_k = 5; /* the z branch gives 3 values */
    expect_reject(d, VEER_EDIMCHAIN, "forward.bilinear_k");
    fx_free_all();
}

static void test_frame_rejections(void **state)
{
    (void)state;
    fx_srand(15);
    Veer__Bundle__Model *m = fx_discrete_model();
    size_t len;
    uint8_t *good = fx_pack(m, &len);
    veer_bundle *b = NULL;
    veer_error err;

    assert_int_equal(veer_bundle_open_mem(good, 0, &b, &err), VEER_ENOTBUNDLE);
    assert_string_equal(err.field, "magic");
    good[7] = '2';
    assert_int_equal(veer_bundle_open_mem(good, len, &b, &err), VEER_ENOTBUNDLE);
    good[7] = '1';
    assert_int_equal(veer_bundle_open_mem(good, len / 2, &b, &err), VEER_ENOTBUNDLE);
    assert_string_equal(err.field, "bundle_file");

    /* A byte flipped deep in the payload: the checksum catches it. */
    good[len - 20] ^= 0x01;
    assert_int_equal(veer_bundle_open_mem(good, len, &b, &err), VEER_ECHECKSUM);
    assert_string_equal(err.field, "checksum");
    good[len - 20] ^= 0x01;
    assert_int_equal(veer_bundle_open_mem(good, len, &b, &err), 0);
    veer_bundle_close(b);

    /* Version 2, and a payload that is not a Model, each framed with a correct checksum. */
    uint8_t payload[40], digest[32], *framed;
    size_t flen;
    memset(payload, 0xff, sizeof payload);
    crypto_generichash(digest, 32, payload, sizeof payload, NULL, 0);
    assert_int_equal(
        veer__bundle_frame(payload, sizeof payload, 2, digest, 32, &framed, &flen, &err), 0);
    assert_int_equal(veer_bundle_open_mem(framed, flen, &b, &err), VEER_EVERSION);
    assert_string_equal(err.field, "format_version");
    veer__free(framed);
    assert_int_equal(
        veer__bundle_frame(payload, sizeof payload, 1, digest, 32, &framed, &flen, &err), 0);
    assert_int_equal(veer_bundle_open_mem(framed, flen, &b, &err), VEER_EDECODE);
    assert_string_equal(err.field, "payload");
    veer__free(framed);

    /* Files: a missing path is an I/O error naming the path. */
    assert_int_equal(veer_bundle_open("/nonexistent/arm.veer", &b, &err), VEER_EIO);
    assert_string_equal(err.field, "path");
    assert_null(b);
    assert_int_equal(veer_bundle_open_mem(good, len, NULL, &err), VEER_EINVAL);
    free(good);
    fx_free_all();
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_round_trip),
        cmocka_unit_test(test_precision_is_inverse),
        cmocka_unit_test(test_rejections),
        cmocka_unit_test(test_frame_rejections),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
