/* Edge cases of the task encoder (veer_task_encode): every error code with the field it names,
 * the options, chunk boundaries, exhausted memory and concurrent calls.
 *
 * The bundle is built here with an affine B(s) = W s + c (one linear layer), so each expected
 * task vector is the formula of DESIGN.md ("The maths") evaluated directly in double precision
 * in this file: z = (1/n) Σ r_i B(s_i), z = Σ w_k B(g_k), z = (1/m) Σ r_j B_j, rescaled to
 * norm √d; the 2 x 2 covariance correction is solved by Cramer's rule. The NumPy reference
 * checks on random multi-layer bundles live in test_task_reference.py. */
#include <math.h>
#include <pthread.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "runtime/bundle_io.h"
#include "veer/runtime.h"

#define SDIM 3
#define ZDIM 2
#define REFS 4

static const float W[ZDIM * SDIM] = {0.5f, -1.0f, 0.25f, 1.5f, 0.75f, -0.5f};
static const float C[ZDIM] = {0.125f, -0.375f};
static const float REF_STATES[REFS * SDIM] = {1, 0, 0, 0, 1, 0, 0, 0, 1, 1, 1, 1};

/* B(s) in double, straight from the definition of a linear layer. */
static void b_of(const float *s, double *out)
{
    for (int j = 0; j < ZDIM; j++) {
        out[j] = C[j];
        for (int k = 0; k < SDIM; k++)
            out[j] += (double)W[j * SDIM + k] * s[k];
    }
}

/* A network of one branch with one linear layer to z_dim, in protobuf-c's linked form. */
typedef struct one_layer_net {
    Veer__Bundle__Input in[3];
    Veer__Bundle__Input *inputs[3];
    Veer__Bundle__Layer layer;
    Veer__Bundle__Layer *layers[1];
    Veer__Bundle__Branch branch;
    Veer__Bundle__Branch *branches[1];
    Veer__Bundle__Network net;
} one_layer_net;

static void one_layer_net_init(one_layer_net *n, const Veer__Bundle__InputKind *kinds,
                               size_t n_inputs, uint32_t in_dim, const float *w, const float *b)
{
    for (size_t i = 0; i < n_inputs; i++) {
        n->in[i] = (Veer__Bundle__Input)VEER__BUNDLE__INPUT__INIT;
        n->in[i].kind = kinds[i];
        n->inputs[i] = &n->in[i];
    }
    n->layer = (Veer__Bundle__Layer)VEER__BUNDLE__LAYER__INIT;
    n->layer.kind = VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR;
    n->layer.in_dim = in_dim;
    n->layer.out_dim = ZDIM;
    n->layer.n_weight = (size_t)ZDIM * in_dim;
    n->layer.weight = (float *)w;
    n->layer.n_bias = ZDIM;
    n->layer.bias = (float *)b;
    n->layers[0] = &n->layer;
    n->branch = (Veer__Bundle__Branch)VEER__BUNDLE__BRANCH__INIT;
    n->branch.name = "only";
    n->branch.n_inputs = n_inputs;
    n->branch.inputs = n->inputs;
    n->branch.n_layers = 1;
    n->branch.layers = n->layers;
    n->branches[0] = &n->branch;
    n->net = (Veer__Bundle__Network)VEER__BUNDLE__NETWORK__INIT;
    n->net.n_branches = 1;
    n->net.branches = n->branches;
    n->net.merge = VEER__BUNDLE__MERGE_KIND__MERGE_CONCAT;
}

/* Writes a small discrete-action bundle: F reads [state, one-hot action, z] through one linear
 * layer, B reads the state through W, c. `with_reference` adds the reference set and Cov(B). */
static veer_bundle *make_bundle(int with_reference)
{
    static char *names[SDIM] = {"belt_speed", "parcel_x", "parcel_y"};
    static float fwd_w[ZDIM * (SDIM + 2 + ZDIM)];
    static float fwd_b[ZDIM];
    static float fallback[1] = {0};
    static float ref_b[REFS * ZDIM];
    static float cov_b[ZDIM * ZDIM];
    for (size_t i = 0; i < sizeof fwd_w / sizeof fwd_w[0]; i++)
        fwd_w[i] = 0.1f * (float)((int)(i % 7) - 3);

    Veer__Bundle__Model m = VEER__BUNDLE__MODEL__INIT;
    m.model_version = "encoder-edges-1";
    m.state_dim = SDIM;
    m.z_dim = ZDIM;
    m.discount = 0.98f;
    m.decision_step_s = 0.01f;
    m.n_feature_names = SDIM;
    m.feature_names = names;

    Veer__Bundle__ActionSpace action = VEER__BUNDLE__ACTION_SPACE__INIT;
    action.kind = VEER__BUNDLE__ACTION_KIND__ACTION_DISCRETE;
    action.dim = 1;
    action.count = 2;
    m.action = &action;
    m.n_fallback_action = 1;
    m.fallback_action = fallback;

    Veer__Bundle__TaskDefaults defaults = VEER__BUNDLE__TASK_DEFAULTS__INIT;
    defaults.rescale = 1;
    defaults.rescale_norm = 0; /* sqrt(z_dim) */
    defaults.center_rewards = 0;
    defaults.ridge = 1e-3f;
    m.task_defaults = &defaults;

    /* F reads [state, one-hot action, z]; B reads the state. */
    static const Veer__Bundle__InputKind f_kinds[3] = {VEER__BUNDLE__INPUT_KIND__INPUT_STATE,
                                                       VEER__BUNDLE__INPUT_KIND__INPUT_ACTION,
                                                       VEER__BUNDLE__INPUT_KIND__INPUT_TASK};
    one_layer_net forward, backward;
    one_layer_net_init(&forward, f_kinds, 3, SDIM + 2 + ZDIM, fwd_w, fwd_b);
    one_layer_net_init(&backward, f_kinds, 1, SDIM, W, C);
    m.forward = &forward.net;
    m.backward = &backward.net;

    Veer__Bundle__ReferenceSet ref = VEER__BUNDLE__REFERENCE_SET__INIT;
    if (with_reference) {
        double cov[ZDIM * ZDIM] = {0};
        for (int i = 0; i < REFS; i++) {
            double b[ZDIM];
            b_of(REF_STATES + i * SDIM, b);
            for (int j = 0; j < ZDIM; j++) {
                ref_b[i * ZDIM + j] = (float)b[j];
                for (int k = 0; k < ZDIM; k++)
                    cov[j * ZDIM + k] += b[j] * b[k] / REFS;
            }
        }
        for (int k = 0; k < ZDIM * ZDIM; k++)
            cov_b[k] = (float)cov[k];
        ref.count = REFS;
        ref.n_states = REFS * SDIM;
        ref.states = (float *)REF_STATES;
        ref.n_b = REFS * ZDIM;
        ref.b = ref_b;
        m.reference = &ref;
        m.n_cov_b = ZDIM * ZDIM;
        m.cov_b = cov_b;
    }

    uint8_t *buf = NULL;
    size_t len = 0;
    veer_error err;
    assert_int_equal(veer__bundle_write_model_mem(&m, &buf, &len, &err), 0);
    veer_bundle *bundle = NULL;
    int rc = veer_bundle_open_mem(buf, len, &bundle, &err);
    if (rc != 0)
        fail_msg("test bundle rejected: %s %s: %s", veer_errname(rc), err.field, err.message);
    free(buf);
    return bundle;
}

static veer_bundle *full, *bare;

static int setup(void **state)
{
    full = make_bundle(1);
    bare = make_bundle(0);
    return 0;
}

static int teardown(void **state)
{
    veer_bundle_close(full);
    veer_bundle_close(bare);
    return 0;
}

/* Encodes and checks the code and field; z must be left untouched on error. */
static void expect_error(const veer_bundle *b, const veer_task_spec *spec, int code,
                         const char *field)
{
    float z[ZDIM] = {42.0f, 42.0f};
    veer_task_report report;
    veer_error err;
    int rc = veer_task_encode(b, spec, z, &report, &err);
    if (rc != code)
        fail_msg("expected %s, got %s (%s: %s)", veer_errname(code), veer_errname(rc), err.field,
                 err.message);
    assert_int_equal(err.code, code);
    assert_string_equal(err.field, field);
    assert_true(strlen(err.message) > 0);
    assert_true(z[0] == 42.0f && z[1] == 42.0f);
}

static veer_task_spec make_spec(veer_task_source source, uint32_t count, const float *states,
                                const float *values)
{
    veer_task_spec spec;
    veer_task_spec_init(&spec, source);
    spec.count = count;
    spec.states = states;
    spec.values = values;
    return spec;
}

/* A few varied states and rewards, and the spec that reads them. */
static float states8[8 * SDIM];
static float rewards8[8] = {1.0f, -0.5f, 2.0f, 0.25f, -1.5f, 3.0f, 0.5f, -2.0f};

static veer_task_spec samples_spec(uint32_t n)
{
    for (int i = 0; i < 8 * SDIM; i++)
        states8[i] = (float)((i * 37) % 11) / 5.0f - 1.0f;
    veer_task_spec spec = make_spec(VEER_TASK_SAMPLES, n, states8, rewards8);
    return spec;
}

static void test_spec_init_defaults(void **state)
{
    veer_task_spec spec;
    memset(&spec, 0x5a, sizeof spec);
    veer_task_spec_init(&spec, VEER_TASK_GOALS);
    assert_int_equal(spec.source, VEER_TASK_GOALS);
    assert_int_equal(spec.count, 0);
    assert_null(spec.states);
    assert_null(spec.values);
    assert_int_equal(spec.rescale, VEER_OPT_DEFAULT);
    assert_int_equal(spec.center, VEER_OPT_DEFAULT);
    assert_int_equal(spec.cov_correction, 0);
    assert_true(spec.ridge < 0);
    assert_int_equal(spec.max_count, 0);
    veer_task_spec_init(NULL, VEER_TASK_SAMPLES); /* must not crash */
}

static void test_null_arguments(void **state)
{
    veer_task_spec spec = samples_spec(8);
    float z[ZDIM];
    veer_error err;
    assert_int_equal(veer_task_encode(NULL, &spec, z, NULL, &err), VEER_EINVAL);
    assert_string_equal(err.field, "bundle");
    assert_int_equal(veer_task_encode(full, NULL, z, NULL, &err), VEER_EINVAL);
    assert_string_equal(err.field, "spec");
    assert_int_equal(veer_task_encode(full, &spec, NULL, NULL, &err), VEER_EINVAL);
    assert_string_equal(err.field, "z");
    /* A NULL error pointer is allowed. */
    assert_int_equal(veer_task_encode(full, &spec, NULL, NULL, NULL), VEER_EINVAL);
}

static void test_bad_options(void **state)
{
    veer_task_spec spec = samples_spec(8);
    spec.source = (veer_task_source)0;
    expect_error(full, &spec, VEER_EFIELD, "source");
    spec.source = (veer_task_source)4;
    expect_error(full, &spec, VEER_EFIELD, "source");

    spec = samples_spec(8);
    spec.rescale = 2;
    expect_error(full, &spec, VEER_EFIELD, "rescale");
    spec = samples_spec(8);
    spec.center = -2;
    expect_error(full, &spec, VEER_EFIELD, "center");
    spec = samples_spec(8);
    spec.cov_correction = VEER_OPT_DEFAULT; /* no bundle default exists for the correction */
    expect_error(full, &spec, VEER_EFIELD, "cov_correction");
    spec = samples_spec(8);
    spec.ridge = NAN;
    expect_error(full, &spec, VEER_EFIELD, "ridge");
    spec.ridge = INFINITY;
    expect_error(full, &spec, VEER_EFIELD, "ridge");

    spec = samples_spec(8);
    spec.source = VEER_TASK_GOALS;
    spec.center = 1; /* goal weights are not rewards */
    expect_error(full, &spec, VEER_EFIELD, "center");
    spec.center = VEER_OPT_DEFAULT;
    spec.cov_correction = 1;
    expect_error(full, &spec, VEER_EFIELD, "cov_correction");

    float ref_rewards[REFS] = {1, 2, 3, 4};
    veer_task_spec_init(&spec, VEER_TASK_REFERENCE);
    spec.count = REFS;
    spec.values = ref_rewards;
    spec.cov_correction = 1;
    expect_error(full, &spec, VEER_EFIELD, "cov_correction");
}

static void test_missing_bundle_parts(void **state)
{
    float ref_rewards[REFS] = {1, 2, 3, 4};
    veer_task_spec spec;
    veer_task_spec_init(&spec, VEER_TASK_REFERENCE);
    spec.count = REFS;
    spec.values = ref_rewards;
    expect_error(bare, &spec, VEER_EFIELD, "reference");

    spec = samples_spec(8);
    spec.cov_correction = 1;
    expect_error(bare, &spec, VEER_EFIELD, "cov_b");
}

static void test_empty(void **state)
{
    veer_task_spec spec = samples_spec(0);
    expect_error(full, &spec, VEER_EEMPTY, "count");
    spec.source = VEER_TASK_GOALS;
    expect_error(full, &spec, VEER_EEMPTY, "count");
    veer_task_spec_init(&spec, VEER_TASK_REFERENCE);
    spec.values = rewards8;
    expect_error(full, &spec, VEER_EEMPTY, "count");
}

static void test_too_many(void **state)
{
    veer_task_spec spec = samples_spec(8);
    spec.max_count = 7;
    expect_error(full, &spec, VEER_ETOOMANY, "count");
    spec.max_count = 8;
    float z[ZDIM];
    assert_int_equal(veer_task_encode(full, &spec, z, NULL, NULL), 0);

    /* The hard limit holds whatever max_count says, and it is checked before the arrays are
     * read: these pointers hold 8 rows, far fewer than count. */
    spec.count = VEER_TASK_MAX_COUNT + 1;
    spec.max_count = 0;
    expect_error(full, &spec, VEER_ETOOMANY, "count");
    spec.max_count = UINT32_MAX;
    expect_error(full, &spec, VEER_ETOOMANY, "count");
}

static void test_wrong_dimensions(void **state)
{
    veer_task_spec spec = samples_spec(8);
    spec.states = NULL;
    expect_error(full, &spec, VEER_EDIM, "states");
    spec = samples_spec(8);
    spec.values = NULL;
    expect_error(full, &spec, VEER_EDIM, "values");
    spec.source = VEER_TASK_GOALS;
    spec.values = rewards8;
    spec.states = NULL;
    expect_error(full, &spec, VEER_EDIM, "states");

    float ref_rewards[REFS + 1] = {1, 2, 3, 4, 5};
    veer_task_spec_init(&spec, VEER_TASK_REFERENCE);
    spec.values = ref_rewards;
    spec.count = REFS + 1;
    expect_error(full, &spec, VEER_EDIM, "count");
    spec.count = REFS - 1;
    expect_error(full, &spec, VEER_EDIM, "count");
    spec.count = REFS;
    spec.values = NULL;
    expect_error(full, &spec, VEER_EDIM, "values");
    spec.values = ref_rewards;
    spec.states = states8; /* the reference set brings its own states */
    expect_error(full, &spec, VEER_EFIELD, "states");
}

static void test_nonfinite(void **state)
{
    float values[8];
    memcpy(values, rewards8, sizeof values);
    veer_task_spec spec = samples_spec(8);
    spec.values = values;
    values[7] = NAN;
    expect_error(full, &spec, VEER_ENONFINITE, "values[7]");
    values[7] = 1.0f;
    values[3] = -INFINITY;
    spec.source = VEER_TASK_GOALS;
    expect_error(full, &spec, VEER_ENONFINITE, "values[3]");
    values[3] = 1.0f;

    float states[8 * SDIM];
    spec = samples_spec(8);
    memcpy(states, states8, sizeof states);
    spec.states = states;
    states[2 * SDIM + 1] = NAN;
    expect_error(full, &spec, VEER_ENONFINITE, "states[2][1]");
    states[2 * SDIM + 1] = 0.0f;
    states[7 * SDIM + 2] = INFINITY;
    expect_error(full, &spec, VEER_ENONFINITE, "states[7][2]");

    float ref_rewards[REFS] = {1, 2, INFINITY, 4};
    veer_task_spec_init(&spec, VEER_TASK_REFERENCE);
    spec.count = REFS;
    spec.values = ref_rewards;
    expect_error(full, &spec, VEER_ENONFINITE, "values[2]");
}

static void test_no_signal(void **state)
{
    float zeros[8] = {0};
    veer_task_spec spec = samples_spec(8);
    spec.values = zeros;
    expect_error(full, &spec, VEER_ENOSIGNAL, "values");
    spec.source = VEER_TASK_GOALS;
    expect_error(full, &spec, VEER_ENOSIGNAL, "values");

    float same[8] = {-2, -2, -2, -2, -2, -2, -2, -2};
    spec = samples_spec(8);
    spec.values = same;
    spec.center = 1;
    expect_error(full, &spec, VEER_ENOSIGNAL, "values");
    /* Without centring the same rewards are a valid task. */
    spec.center = 0;
    float z[ZDIM];
    assert_int_equal(veer_task_encode(full, &spec, z, NULL, NULL), 0);

    /* Nonzero values whose weighted embeddings cancel exactly: the same goal with weights
     * +1 and -1, and the same state with rewards +1 and -1 (unit weights, so no rounding
     * can leave a remainder). */
    float twice[2 * SDIM] = {0.5f, -0.25f, 1.0f, 0.5f, -0.25f, 1.0f};
    float opposite[2] = {1.0f, -1.0f};
    veer_task_spec_init(&spec, VEER_TASK_GOALS);
    spec.count = 2;
    spec.states = twice;
    spec.values = opposite;
    expect_error(full, &spec, VEER_ENOSIGNAL, "z");
    spec.source = VEER_TASK_SAMPLES;
    expect_error(full, &spec, VEER_ENOSIGNAL, "z");
}

static void test_singular_covariance(void **state)
{
    /* One sample gives a rank-one second moment of B, which no ridge of 0 can invert. */
    veer_task_spec spec = samples_spec(1);
    spec.cov_correction = 1;
    spec.ridge = 0.0f;
    expect_error(full, &spec, VEER_ESINGULAR, "ridge");
    /* Identical samples: still rank one. */
    float same_states[4 * SDIM];
    for (int i = 0; i < 4; i++)
        memcpy(same_states + i * SDIM, states8, sizeof(float) * SDIM);
    spec.count = 4;
    spec.states = same_states;
    expect_error(full, &spec, VEER_ESINGULAR, "ridge");
    /* With a ridge the system is well posed. */
    spec.ridge = 0.5f;
    float z[ZDIM];
    assert_int_equal(veer_task_encode(full, &spec, z, NULL, NULL), 0);
}

/* z for n samples, from the definition, rescaled to sqrt(d) unless `raw`. `bound` gets the
 * error a float32 evaluation may make in each component: B and the weighted sum carry a few
 * units of rounding u = 2^-24 relative to Σ |w_i B_ij| / n (the summation bound of Higham,
 * "Accuracy and Stability of Numerical Algorithms", 2nd ed., §4.2, from memory), which matters
 * when centred rewards cancel. */
static void expected_samples(const float *states, const float *r, uint32_t n, int center, int raw,
                             double *z, double *norm_raw, double *bound)
{
    double mean = 0;
    for (uint32_t i = 0; i < n; i++)
        mean += r[i];
    mean /= n;
    for (int j = 0; j < ZDIM; j++)
        z[j] = bound[j] = 0;
    for (uint32_t i = 0; i < n; i++) {
        double b[ZDIM];
        b_of(states + (size_t)i * SDIM, b);
        for (int j = 0; j < ZDIM; j++) {
            double w = (double)r[i] - (center ? mean : 0);
            z[j] += w * b[j] / n;
            bound[j] += fabs(w * b[j]) / n;
        }
    }
    *norm_raw = hypot(z[0], z[1]);
    double scale = raw ? 1.0 : sqrt((double)ZDIM) / *norm_raw;
    for (int j = 0; j < ZDIM; j++) {
        z[j] *= scale;
        bound[j] = 1e-5 * fabs(z[j]) + 16.0 * ldexp(1.0, -24) * bound[j] * scale;
    }
}

static void test_samples_across_chunks(void **state)
{
    /* 1,000 samples span several of the encoder's chunks, with a partial last one. */
    enum { N = 1000 };
    static float states[N * SDIM], r[N];
    for (int i = 0; i < N; i++) {
        for (int k = 0; k < SDIM; k++)
            states[i * SDIM + k] = sinf(0.37f * (float)(i * SDIM + k));
        r[i] = cosf(0.011f * (float)i) - 0.8f;
    }
    veer_task_spec spec = make_spec(VEER_TASK_SAMPLES, N, states, r);
    for (int center = 0; center <= 1; center++) {
        for (int rescale = 0; rescale <= 1; rescale++) {
            spec.center = center;
            spec.rescale = rescale;
            float z[ZDIM];
            veer_task_report rep;
            veer_error err;
            assert_int_equal(veer_task_encode(full, &spec, z, &rep, &err), 0);
            double want[ZDIM], norm_raw, bound[ZDIM];
            expected_samples(states, r, N, center, !rescale, want, &norm_raw, bound);
            for (int j = 0; j < ZDIM; j++)
                assert_float_equal(z[j], want[j], bound[j]);
            assert_float_equal(rep.norm_raw, norm_raw, 1e-4 * norm_raw);
            if (rescale)
                assert_float_equal(hypot(z[0], z[1]), sqrt(2.0), 1e-6);
            double mean = 0;
            for (int i = 0; i < N; i++)
                mean += r[i];
            assert_float_equal(rep.mean_reward, center ? mean / N : 0.0, 1e-9);
        }
    }
}

static void test_goals_and_reference(void **state)
{
    float goals[2 * SDIM] = {1.0f, 2.0f, -1.0f, 0.0f, 0.5f, 0.5f};
    float weights[2] = {0.7f, 0.3f};
    veer_task_spec spec = make_spec(VEER_TASK_GOALS, 2, goals, weights);
    spec.rescale = 0;
    float z[ZDIM];
    veer_task_report rep;
    assert_int_equal(veer_task_encode(full, &spec, z, &rep, NULL), 0);
    double b0[ZDIM], b1[ZDIM];
    b_of(goals, b0);
    b_of(goals + SDIM, b1);
    for (int j = 0; j < ZDIM; j++)
        assert_float_equal(z[j], 0.7 * b0[j] + 0.3 * b1[j], 1e-6);
    assert_true(isnan(rep.r2)); /* no fit for goals */
    assert_float_equal(rep.mean_reward, 0.0, 0.0);

    float ref_rewards[REFS] = {1.0f, -2.0f, 0.5f, 4.0f};
    veer_task_spec_init(&spec, VEER_TASK_REFERENCE);
    spec.count = REFS;
    spec.values = ref_rewards;
    spec.rescale = 0;
    assert_int_equal(veer_task_encode(full, &spec, z, &rep, NULL), 0);
    double want[ZDIM] = {0, 0};
    for (int i = 0; i < REFS; i++) {
        double b[ZDIM];
        b_of(REF_STATES + i * SDIM, b);
        for (int j = 0; j < ZDIM; j++)
            want[j] += ref_rewards[i] * b[j] / REFS;
    }
    for (int j = 0; j < ZDIM; j++)
        assert_float_equal(z[j], want[j], 1e-6);
    /* 4 rewards fit by 3 unknowns: count > d + 1, so an R² exists and lies in [0, 1]. */
    assert_true(rep.r2 >= -1e-12 && rep.r2 <= 1 + 1e-12);
}

static void test_cov_correction_2x2(void **state)
{
    veer_task_spec spec = samples_spec(8);
    spec.cov_correction = 1;
    spec.ridge = 0.25f;
    spec.rescale = 0;
    float z[ZDIM];
    assert_int_equal(veer_task_encode(full, &spec, z, NULL, NULL), 0);

    /* S = (1/n) Σ B Bᵀ + ridge I, m = (1/n) Σ r B, z = Cov_train(B) S⁻¹ m, with the 2 x 2
     * inverse by Cramer's rule and Cov_train(B) from the reference states. */
    double s[4] = {0}, m[2] = {0}, cov[4] = {0};
    for (int i = 0; i < 8; i++) {
        double b[ZDIM];
        b_of(states8 + i * SDIM, b);
        for (int j = 0; j < 2; j++) {
            m[j] += rewards8[i] * b[j] / 8;
            for (int k = 0; k < 2; k++)
                s[j * 2 + k] += b[j] * b[k] / 8;
        }
    }
    for (int i = 0; i < REFS; i++) {
        double b[ZDIM];
        b_of(REF_STATES + i * SDIM, b);
        for (int j = 0; j < 2; j++)
            for (int k = 0; k < 2; k++)
                cov[j * 2 + k] += b[j] * b[k] / REFS;
    }
    s[0] += 0.25;
    s[3] += 0.25;
    double det = s[0] * s[3] - s[1] * s[2];
    double x0 = (s[3] * m[0] - s[1] * m[1]) / det, x1 = (s[0] * m[1] - s[2] * m[0]) / det;
    double want0 = cov[0] * x0 + cov[1] * x1, want1 = cov[2] * x0 + cov[3] * x1;
    assert_float_equal(z[0], want0, 1e-5 * fabs(want0) + 1e-6);
    assert_float_equal(z[1], want1, 1e-5 * fabs(want1) + 1e-6);
}

static void test_r2_of_an_exact_fit(void **state)
{
    /* Rewards that are an affine function of B are expressed perfectly: R² = 1. Rewards that
     * cannot be (here, alternating signs on states whose B is nearly constant) are not. */
    enum { N = 300 };
    static float states[N * SDIM], r[N];
    for (int i = 0; i < N; i++) {
        for (int k = 0; k < SDIM; k++)
            states[i * SDIM + k] = cosf(0.91f * (float)(i + 7 * k));
        double b[ZDIM];
        b_of(states + i * SDIM, b);
        r[i] = (float)(2.0 * b[0] - 0.5 * b[1] + 0.25);
    }
    veer_task_spec spec = make_spec(VEER_TASK_SAMPLES, N, states, r);
    float z[ZDIM];
    veer_task_report rep;
    assert_int_equal(veer_task_encode(full, &spec, z, &rep, NULL), 0);
    assert_float_equal(rep.r2, 1.0, 1e-6);

    /* count <= z_dim + 1 leaves no degrees of freedom: NaN. */
    spec.count = ZDIM + 1;
    assert_int_equal(veer_task_encode(full, &spec, z, &rep, NULL), 0);
    assert_true(isnan(rep.r2));
}

/* ---- Exhausted memory: fail the Nth allocation, every N, and expect a clean VEER_ENOMEM. */

static int alloc_budget = -1; /* allocations left before failing; -1: never fail */
static int alloc_failed;

static void *budget_take(void)
{
    if (alloc_budget == 0) {
        alloc_failed = 1;
        return NULL;
    }
    if (alloc_budget > 0)
        alloc_budget--;
    return (void *)1;
}
static void *t_malloc(size_t n)
{
    return budget_take() ? malloc(n) : NULL;
}
static void *t_calloc(size_t n, size_t s)
{
    return budget_take() ? calloc(n, s) : NULL;
}
static void *t_realloc(void *p, size_t n)
{
    return budget_take() ? realloc(p, n) : NULL;
}

static void test_out_of_memory(void **state)
{
    enum { N = 600 };
    static float states[N * SDIM], r[N];
    for (int i = 0; i < N * SDIM; i++)
        states[i] = sinf((float)i);
    for (int i = 0; i < N; i++)
        r[i] = (float)(i % 5) - 1.5f;
    veer_task_spec spec = make_spec(VEER_TASK_SAMPLES, N, states, r);
    spec.cov_correction = 1; /* every scratch buffer and the fit are in play */
    float want[ZDIM], z[ZDIM];
    veer_task_report rep;
    assert_int_equal(veer_task_encode(full, &spec, want, &rep, NULL), 0);

    veer_allocator a = {t_malloc, t_calloc, t_realloc, free};
    assert_int_equal(veer_set_allocator(&a), 0);
    int succeeded = 0;
    for (int budget = 0; budget < 200 && !succeeded; budget++) {
        alloc_budget = budget;
        alloc_failed = 0;
        veer_error err;
        int rc = veer_task_encode(full, &spec, z, &rep, &err);
        if (rc == 0) {
            succeeded = 1;
            assert_false(alloc_failed);
            assert_memory_equal(z, want, sizeof z);
        } else {
            assert_true(alloc_failed);
            if (rc != VEER_ENOMEM)
                fail_msg("allocation %d failed and gave %s (%s)", budget, veer_errname(rc),
                         err.message);
        }
    }
    alloc_budget = -1;
    veer_set_allocator(NULL);
    assert_true(succeeded);
}

/* ---- Concurrent calls on one shared bundle give the same bits as a lone call. */

static float conc_states[2000 * SDIM], conc_r[2000];
static float conc_want[ZDIM];

static void *encode_repeatedly(void *arg)
{
    veer_task_spec spec = make_spec(VEER_TASK_SAMPLES, 2000, conc_states, conc_r);
    spec.cov_correction = 1;
    for (int k = 0; k < 20; k++) {
        float z[ZDIM];
        veer_task_report rep;
        if (veer_task_encode(full, &spec, z, &rep, NULL) != 0 ||
            memcmp(z, conc_want, sizeof z) != 0)
            return (void *)1;
    }
    return NULL;
}

static void test_concurrent_calls(void **state)
{
    for (int i = 0; i < 2000 * SDIM; i++)
        conc_states[i] = cosf(0.13f * (float)i);
    for (int i = 0; i < 2000; i++)
        conc_r[i] = sinf(0.05f * (float)i);
    veer_task_spec spec = make_spec(VEER_TASK_SAMPLES, 2000, conc_states, conc_r);
    spec.cov_correction = 1;
    assert_int_equal(veer_task_encode(full, &spec, conc_want, NULL, NULL), 0);
    pthread_t t[4];
    for (int i = 0; i < 4; i++)
        assert_int_equal(pthread_create(&t[i], NULL, encode_repeatedly, NULL), 0);
    for (int i = 0; i < 4; i++) {
        void *bad = NULL;
        pthread_join(t[i], &bad);
        assert_null(bad);
    }
}

/* ---- Random specifications: whatever the mix of options and bad values, the encoder returns
 * 0 with a finite z of the promised norm, or a known code with a field, never a crash (run
 * under ASan/UBSan in the sanitizer build). Common practice (randomised robustness testing),
 * no source. */

static uint64_t mix_state = 12345;

static uint32_t next_u32(void)
{
    mix_state = mix_state * 6364136223846793005ull + 1442695040888963407ull;
    return (uint32_t)(mix_state >> 33);
}

static int pick(const int *options, int n)
{
    return options[next_u32() % (uint32_t)n];
}

static void test_random_specs(void **state)
{
    enum { MAXN = 40 };
    /* Valid choices are drawn more often than invalid ones, so both paths get exercised. */
    static const int flags[] = {VEER_OPT_DEFAULT, 0, 1, VEER_OPT_DEFAULT, 0, 1, 2, -7};
    static const int sources[] = {VEER_TASK_SAMPLES,
                                  VEER_TASK_GOALS,
                                  VEER_TASK_REFERENCE,
                                  VEER_TASK_SAMPLES,
                                  VEER_TASK_GOALS,
                                  VEER_TASK_REFERENCE,
                                  0,
                                  9};
    static const float ridges[] = {-1.0f, 0.0f, 1e-3f, 0.5f, NAN, INFINITY};
    static const float specials[] = {0.0f, 1.0f, -1.0f, NAN, INFINITY, -INFINITY, 1e30f, -1e30f};
    static const int known[] = {VEER_EINVAL,     VEER_EFIELD,    VEER_EEMPTY,   VEER_EDIM,
                                VEER_ENONFINITE, VEER_ENOSIGNAL, VEER_ETOOMANY, VEER_ESINGULAR};
    float states[MAXN * SDIM], values[MAXN];
    int successes = 0;
    for (int round = 0; round < 3000; round++) {
        for (int i = 0; i < MAXN * SDIM; i++)
            states[i] = (float)((int)(next_u32() % 2001) - 1000) / 250.0f;
        for (int i = 0; i < MAXN; i++)
            values[i] = (float)((int)(next_u32() % 2001) - 1000) / 500.0f;
        /* A few special values in random places. */
        for (int k = next_u32() % 4 == 0 ? 2 : 0; k > 0; k--) {
            values[next_u32() % MAXN] = specials[next_u32() % 8];
            states[next_u32() % (MAXN * SDIM)] = specials[next_u32() % 8];
        }
        veer_task_spec spec;
        veer_task_spec_init(&spec, (veer_task_source)pick(sources, 8));
        spec.count = next_u32() % 3 == 0 ? REFS : next_u32() % (MAXN + 1);
        spec.states = next_u32() % 20 == 0 ? NULL : states;
        spec.values = next_u32() % 20 == 0 ? NULL : values;
        spec.rescale = pick(flags, 8);
        spec.center = pick(flags, 8);
        spec.cov_correction = next_u32() % 3 == 0 ? pick(flags, 8) : 0;
        spec.ridge = next_u32() % 4 == 0 ? ridges[next_u32() % 6] : -1.0f;
        spec.max_count = next_u32() % 10 == 0 ? next_u32() % MAXN : 0;
        if (spec.source == VEER_TASK_REFERENCE && next_u32() % 2)
            spec.states = NULL;

        float z[ZDIM];
        veer_task_report rep;
        veer_error err;
        const veer_bundle *b = next_u32() % 4 == 0 ? bare : full;
        int rc = veer_task_encode(b, &spec, z, next_u32() % 2 ? &rep : NULL, &err);
        if (rc == 0) {
            double norm = hypot(z[0], z[1]);
            assert_true(isfinite(z[0]) && isfinite(z[1]) && norm > 0);
            int rescaled = spec.rescale == 1 || spec.rescale == VEER_OPT_DEFAULT;
            if (rescaled)
                assert_float_equal(norm, sqrt((double)ZDIM), 1e-5);
            successes++;
            continue;
        }
        int is_known = 0;
        for (size_t k = 0; k < sizeof known / sizeof known[0]; k++)
            is_known |= rc == known[k];
        if (!is_known)
            fail_msg("round %d: unexpected %s (%s: %s)", round, veer_errname(rc), err.field,
                     err.message);
        assert_int_equal(err.code, rc);
        assert_true(strlen(err.field) > 0);
    }
    /* The mix must exercise the success path too, not only the checks. */
    print_message("%d of 3000 random specifications encoded\n", successes);
    assert_true(successes > 300);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_spec_init_defaults),
        cmocka_unit_test(test_null_arguments),
        cmocka_unit_test(test_bad_options),
        cmocka_unit_test(test_missing_bundle_parts),
        cmocka_unit_test(test_empty),
        cmocka_unit_test(test_too_many),
        cmocka_unit_test(test_wrong_dimensions),
        cmocka_unit_test(test_nonfinite),
        cmocka_unit_test(test_no_signal),
        cmocka_unit_test(test_singular_covariance),
        cmocka_unit_test(test_samples_across_chunks),
        cmocka_unit_test(test_goals_and_reference),
        cmocka_unit_test(test_cov_correction_2x2),
        cmocka_unit_test(test_r2_of_an_exact_fit),
        cmocka_unit_test(test_out_of_memory),
        cmocka_unit_test(test_concurrent_calls),
        cmocka_unit_test(test_random_specs),
    };
    return cmocka_run_group_tests(tests, setup, teardown);
}
