/* Test support for the runtime tests: see support.h. */
#include "support.h"

#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "base/base.h"

/* ---- Allocation and random numbers ------------------------------------------------------- */

static void **fx_ptrs;
static size_t fx_count, fx_cap;

void *fx_alloc(size_t n)
{
    if (fx_count == fx_cap) {
        fx_cap = fx_cap ? 2 * fx_cap : 256;
        fx_ptrs = realloc(fx_ptrs, fx_cap * sizeof *fx_ptrs);
        assert_non_null(fx_ptrs);
    }
    void *p = calloc(1, n ? n : 1);
    assert_non_null(p);
    fx_ptrs[fx_count++] = p;
    return p;
}

void fx_free_all(void)
{
    for (size_t i = 0; i < fx_count; i++)
        free(fx_ptrs[i]);
    free(fx_ptrs);
    fx_ptrs = NULL;
    fx_count = fx_cap = 0;
}

static uint64_t fx_state = 0x9E3779B97F4A7C15ull;

void fx_srand(uint64_t s)
{
    fx_state = s ? s : 1;
}

double fx_uniform(double lo, double hi)
{
    fx_state ^= fx_state >> 12;
    fx_state ^= fx_state << 25;
    fx_state ^= fx_state >> 27;
    uint64_t r = fx_state * 2685821657736338717ull;
    return lo + (hi - lo) * (double)(r >> 11) * (1.0 / 9007199254740992.0);
}

float *fx_random(size_t n, float scale)
{
    float *x = fx_alloc(n * sizeof *x);
    for (size_t i = 0; i < n; i++)
        x[i] = (float)fx_uniform(-scale, scale);
    return x;
}

float *fx_floats(size_t n, const float *values)
{
    float *x = fx_alloc(n * sizeof *x);
    if (values != NULL)
        memcpy(x, values, n * sizeof *x);
    return x;
}

/* ---- Building messages ------------------------------------------------------------------- */

static Veer__Bundle__Layer *new_layer(Veer__Bundle__LayerKind kind, uint32_t in, uint32_t out)
{
    Veer__Bundle__Layer *l = fx_alloc(sizeof *l);
    veer__bundle__layer__init(l);
    l->kind = kind;
    l->in_dim = in;
    l->out_dim = out;
    return l;
}

Veer__Bundle__Layer *fx_linear_w(uint32_t in, uint32_t out, const float *w, const float *b)
{
    Veer__Bundle__Layer *l = new_layer(VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR, in, out);
    l->n_weight = (size_t)in * out;
    l->weight = fx_floats(l->n_weight, w);
    l->n_bias = out;
    l->bias = fx_floats(out, b);
    return l;
}

Veer__Bundle__Layer *fx_linear(uint32_t in, uint32_t out, float scale)
{
    /* Scaled like a common initialisation (uniform, 1/sqrt(in)) so activations stay O(1). */
    float s = scale / sqrtf((float)in);
    return fx_linear_w(in, out, fx_random((size_t)in * out, s), fx_random(out, 0.1f));
}

Veer__Bundle__Layer *fx_simple(Veer__Bundle__LayerKind kind, uint32_t dim)
{
    return new_layer(kind, dim, dim);
}

Veer__Bundle__Layer *fx_layer_norm(uint32_t dim, float eps, int affine)
{
    Veer__Bundle__Layer *l = new_layer(VEER__BUNDLE__LAYER_KIND__LAYER_LAYER_NORM, dim, dim);
    l->eps = eps;
    if (affine) {
        l->n_weight = l->n_bias = dim;
        l->weight = fx_random(dim, 0.5f);
        for (uint32_t i = 0; i < dim; i++)
            l->weight[i] += 1.0f;
        l->bias = fx_random(dim, 0.2f);
    }
    return l;
}

Veer__Bundle__Layer *fx_rescale(uint32_t dim, float norm)
{
    Veer__Bundle__Layer *l = new_layer(VEER__BUNDLE__LAYER_KIND__LAYER_RESCALE_NORM, dim, dim);
    l->norm = norm;
    return l;
}

Veer__Bundle__Layer *fx_embedding(uint32_t n_idx, const uint32_t *counts, uint32_t out)
{
    Veer__Bundle__Layer *l = new_layer(VEER__BUNDLE__LAYER_KIND__LAYER_EMBEDDING, n_idx, out);
    size_t rows = 1;
    l->n_counts = n_idx;
    l->counts = fx_alloc(n_idx * sizeof *l->counts);
    for (uint32_t i = 0; i < n_idx; i++) {
        l->counts[i] = counts[i];
        rows *= counts[i];
    }
    l->n_weight = rows * out;
    l->weight = fx_random(l->n_weight, 1.0f);
    return l;
}

Veer__Bundle__Input *fx_input(Veer__Bundle__InputKind kind, size_t n_features,
                              const uint32_t *features, int as_index)
{
    Veer__Bundle__Input *in = fx_alloc(sizeof *in);
    veer__bundle__input__init(in);
    in->kind = kind;
    in->as_index = as_index;
    if (n_features > 0) {
        in->n_features = n_features;
        in->features = fx_alloc(n_features * sizeof *in->features);
        memcpy(in->features, features, n_features * sizeof *in->features);
    }
    return in;
}

static void *copy_ptrs(size_t n, const void *src)
{
    void *d = fx_alloc(n * sizeof(void *));
    if (n)
        memcpy(d, src, n * sizeof(void *));
    return d;
}

Veer__Bundle__Branch *fx_branch(size_t n_inputs, Veer__Bundle__Input *const *inputs,
                                size_t n_layers, Veer__Bundle__Layer *const *layers)
{
    Veer__Bundle__Branch *b = fx_alloc(sizeof *b);
    veer__bundle__branch__init(b);
    b->n_inputs = n_inputs;
    b->inputs = copy_ptrs(n_inputs, inputs);
    b->n_layers = n_layers;
    b->layers = copy_ptrs(n_layers, layers);
    return b;
}

Veer__Bundle__Network *fx_net(size_t n_branches, Veer__Bundle__Branch *const *branches,
                              size_t n_head, Veer__Bundle__Layer *const *head)
{
    Veer__Bundle__Network *n = fx_alloc(sizeof *n);
    veer__bundle__network__init(n);
    n->merge = VEER__BUNDLE__MERGE_KIND__MERGE_CONCAT;
    n->n_branches = n_branches;
    n->branches = copy_ptrs(n_branches, branches);
    n->n_head = n_head;
    n->head = copy_ptrs(n_head, head);
    return n;
}

#define SD 4
#define ZD 3
#define IN_STATE VEER__BUNDLE__INPUT_KIND__INPUT_STATE
#define IN_ACTION VEER__BUNDLE__INPUT_KIND__INPUT_ACTION
#define IN_TASK VEER__BUNDLE__INPUT_KIND__INPUT_TASK

/* A symmetric positive definite n x n matrix A Aᵀ / n + 0.1 I, both halves from one double. */
static float *spd(uint32_t n)
{
    double *a = fx_alloc((size_t)n * n * sizeof *a);
    for (size_t i = 0; i < (size_t)n * n; i++)
        a[i] = fx_uniform(-1, 1);
    float *c = fx_alloc((size_t)n * n * sizeof *c);
    for (uint32_t i = 0; i < n; i++)
        for (uint32_t j = 0; j <= i; j++) {
            double s = i == j ? 0.1 : 0.0;
            for (uint32_t k = 0; k < n; k++)
                s += a[i * n + k] * a[j * n + k] / n;
            c[i * n + j] = c[j * n + i] = (float)s;
        }
    return c;
}

static Veer__Bundle__Model *base_model(void)
{
    static const char *const names[SD] = {"belt_speed", "gripper_x", "gripper_y", "parcel_mass"};
    Veer__Bundle__Model *m = fx_alloc(sizeof *m);
    veer__bundle__model__init(m);
    m->model_version = "sorting-arm-test-1";
    m->state_dim = SD;
    m->z_dim = ZD;
    m->discount = 0.98f;
    m->decision_step_s = 0.02f;
    m->n_feature_names = SD;
    m->feature_names = fx_alloc(SD * sizeof *m->feature_names); /* tests may edit the list */
    for (int i = 0; i < SD; i++)
        m->feature_names[i] = (char *)names[i];

    Veer__Bundle__TaskDefaults *td = fx_alloc(sizeof *td);
    veer__bundle__task_defaults__init(td);
    td->rescale = 1;
    td->ridge = 1e-3f;
    m->task_defaults = td;

    Veer__Bundle__StateStats *st = fx_alloc(sizeof *st);
    veer__bundle__state_stats__init(st);
    st->count = 1000;
    st->n_mean = SD;
    st->mean = fx_random(SD, 1.0f);
    st->n_cov = SD * SD;
    st->cov = spd(SD);
    st->cov_ridge = 1e-3f;
    st->bins = 4;
    st->n_quantile_edges = SD * 3;
    st->quantile_edges = fx_alloc(SD * 3 * sizeof(float));
    for (int i = 0; i < SD; i++)
        for (int j = 0; j < 3; j++)
            st->quantile_edges[i * 3 + j] = (float)(j - 1) * 0.5f + 0.1f * (float)i;
    st->mahalanobis_p99 = 3.0f;
    st->mahalanobis_p999 = 4.0f;
    m->stats = st;

    Veer__Bundle__ReferenceSet *ref = fx_alloc(sizeof *ref);
    veer__bundle__reference_set__init(ref);
    ref->count = 5;
    ref->n_states = 5 * SD;
    ref->states = fx_random(5 * SD, 1.0f);
    ref->n_b = 5 * ZD;
    ref->b = fx_random(5 * ZD, 1.0f);
    m->reference = ref;
    m->n_cov_b = ZD * ZD;
    m->cov_b = spd(ZD);

    Veer__Bundle__Provenance *pv = fx_alloc(sizeof *pv);
    veer__bundle__provenance__init(pv);
    pv->producer = "runtime tests";
    pv->created = "2026-01-01T00:00:00Z";
    pv->source_digest = "none";
    pv->settings = "hand-built";
    pv->notes = "parcel-sorting arm fixture";
    m->provenance = pv;

    /* B(s) reads belt_speed and gripper_y, rescaled to norm sqrt(z_dim). */
    static const uint32_t b_feat[2] = {0, 2};
    m->backward =
        fx_net(1,
               (Veer__Bundle__Branch *[]){fx_branch(
                   1, (Veer__Bundle__Input *[]){fx_input(IN_STATE, 2, b_feat, 0)}, 4,
                   (Veer__Bundle__Layer *[]){fx_linear(2, 6, 1.5f),
                                             fx_simple(VEER__BUNDLE__LAYER_KIND__LAYER_RELU, 6),
                                             fx_linear(6, ZD, 1.5f), fx_rescale(ZD, 0.0f)})},
               0, NULL);
    return m;
}

Veer__Bundle__Model *fx_continuous_model(void)
{
    Veer__Bundle__Model *m = base_model();
    Veer__Bundle__ActionSpace *as = fx_alloc(sizeof *as);
    veer__bundle__action_space__init(as);
    as->kind = VEER__BUNDLE__ACTION_KIND__ACTION_CONTINUOUS;
    as->dim = 2;
    as->n_low = as->n_high = 2;
    as->low = fx_floats(2, (const float[]){-1.0f, 0.0f});
    as->high = fx_floats(2, (const float[]){1.0f, 2.0f});
    m->action = as;
    m->n_fallback_action = 2;
    m->fallback_action = fx_floats(2, (const float[]){0.0f, 1.0f});

    static const uint32_t f_feat[2] = {1, 3};
    m->forward =
        fx_net(2,
               (Veer__Bundle__Branch *[]){
                   fx_branch(2,
                             (Veer__Bundle__Input *[]){fx_input(IN_STATE, 0, NULL, 0),
                                                       fx_input(IN_ACTION, 0, NULL, 0)},
                             2,
                             (Veer__Bundle__Layer *[]){
                                 fx_linear(SD + 2, 8, 1.5f),
                                 fx_simple(VEER__BUNDLE__LAYER_KIND__LAYER_RELU, 8)}),
                   fx_branch(2,
                             (Veer__Bundle__Input *[]){fx_input(IN_STATE, 2, f_feat, 0),
                                                       fx_input(IN_TASK, 0, NULL, 0)},
                             2,
                             (Veer__Bundle__Layer *[]){
                                 fx_linear(2 + ZD, 8, 1.5f),
                                 fx_simple(VEER__BUNDLE__LAYER_KIND__LAYER_TANH, 8)})},
               2, (Veer__Bundle__Layer *[]){fx_layer_norm(16, 1e-5f, 1), fx_linear(16, ZD, 1.5f)});

    m->actor = fx_net(
        1,
        (Veer__Bundle__Branch *[]){fx_branch(
            2,
            (Veer__Bundle__Input *[]){fx_input(IN_STATE, 0, NULL, 0),
                                      fx_input(IN_TASK, 0, NULL, 0)},
            2,
            (Veer__Bundle__Layer *[]){fx_linear(SD + ZD, 6, 1.5f),
                                      fx_simple(VEER__BUNDLE__LAYER_KIND__LAYER_RELU, 6)})},
        2,
        (Veer__Bundle__Layer *[]){fx_linear(6, 2, 3.0f),
                                  fx_simple(VEER__BUNDLE__LAYER_KIND__LAYER_TANH, 2)});
    m->actor_normalized = 1;
    return m;
}

Veer__Bundle__Model *fx_discrete_model(void)
{
    Veer__Bundle__Model *m = base_model();
    Veer__Bundle__ActionSpace *as = fx_alloc(sizeof *as);
    veer__bundle__action_space__init(as);
    as->kind = VEER__BUNDLE__ACTION_KIND__ACTION_DISCRETE;
    as->dim = 1;
    as->count = 5;
    m->action = as;
    m->n_fallback_action = 1;
    m->fallback_action = fx_floats(1, (const float[]){2.0f});

    /* Bilinear F: the state-action branch gives a (k + 1) x 6 matrix, the z branch a k-vector. */
    Veer__Bundle__Network *f = fx_net(
        2,
        (Veer__Bundle__Branch *[]){
            fx_branch(2,
                      (Veer__Bundle__Input *[]){fx_input(IN_STATE, 0, NULL, 0),
                                                fx_input(IN_ACTION, 0, NULL, 0)},
                      3,
                      (Veer__Bundle__Layer *[]){fx_linear(SD + 5, 10, 1.5f),
                                                fx_simple(VEER__BUNDLE__LAYER_KIND__LAYER_RELU, 10),
                                                fx_linear(10, (3 + 1) * 6, 1.5f)}),
            fx_branch(1, (Veer__Bundle__Input *[]){fx_input(IN_TASK, 0, NULL, 0)}, 1,
                      (Veer__Bundle__Layer *[]){fx_linear(ZD, 3, 1.5f)})},
        2,
        (Veer__Bundle__Layer *[]){fx_simple(VEER__BUNDLE__LAYER_KIND__LAYER_RELU, 6),
                                  fx_linear(6, ZD, 1.5f)});
    f->merge = VEER__BUNDLE__MERGE_KIND__MERGE_BILINEAR;
    f->bilinear_k = 3;
    f->matrix_branch = 0;
    f->bilinear_bias = 1;
    m->forward = f;
    return m;
}

uint8_t *fx_pack(const Veer__Bundle__Model *m, size_t *len)
{
    uint8_t *buf = NULL;
    veer_error err;
    int rc = veer__bundle_write_model_mem(m, &buf, len, &err);
    assert_int_equal(rc, 0);
    /* The writer allocates through veer's hook; hand the caller a malloc'd copy. */
    uint8_t *copy = malloc(*len);
    assert_non_null(copy);
    memcpy(copy, buf, *len);
    veer__free(buf);
    return copy;
}

veer_bundle *fx_open(const Veer__Bundle__Model *m)
{
    size_t len;
    uint8_t *buf = fx_pack(m, &len);
    veer_bundle *b = NULL;
    veer_error err;
    int rc = veer_bundle_open_mem(buf, len, &b, &err);
    free(buf);
    if (rc != 0)
        fail_msg("open failed: %s %s: %s", veer_errname(rc), err.field, err.message);
    return b;
}

/* ---- The reference forward pass ---------------------------------------------------------- */

#define RMAX 4096

static int ref_layers(Veer__Bundle__Layer *const *layers, size_t n, double *x, uint32_t *width)
{
    double y[RMAX];
    for (size_t li = 0; li < n; li++) {
        const Veer__Bundle__Layer *l = layers[li];
        uint32_t in = l->in_dim, out = l->out_dim;
        switch (l->kind) {
        case VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR:
            for (uint32_t i = 0; i < out; i++) {
                double s = l->n_bias ? l->bias[i] : 0.0;
                for (uint32_t j = 0; j < in; j++)
                    s += (double)l->weight[(size_t)i * in + j] * x[j];
                y[i] = s;
            }
            memcpy(x, y, out * sizeof *x);
            break;
        case VEER__BUNDLE__LAYER_KIND__LAYER_EMBEDDING: {
            size_t joint = 0;
            for (uint32_t j = 0; j < in; j++) {
                if (x[j] < 0 || x[j] >= l->counts[j] || x[j] != floor(x[j]))
                    return -1;
                joint = joint * l->counts[j] + (size_t)x[j];
            }
            for (uint32_t i = 0; i < out; i++)
                x[i] = l->weight[joint * out + i];
            break;
        }
        case VEER__BUNDLE__LAYER_KIND__LAYER_RELU:
            for (uint32_t i = 0; i < out; i++)
                x[i] = x[i] > 0 ? x[i] : 0;
            break;
        case VEER__BUNDLE__LAYER_KIND__LAYER_TANH:
            for (uint32_t i = 0; i < out; i++)
                x[i] = tanh(x[i]);
            break;
        case VEER__BUNDLE__LAYER_KIND__LAYER_LAYER_NORM: {
            double mean = 0, var = 0;
            for (uint32_t i = 0; i < out; i++)
                mean += x[i] / out;
            for (uint32_t i = 0; i < out; i++)
                var += (x[i] - mean) * (x[i] - mean) / out;
            for (uint32_t i = 0; i < out; i++) {
                double v = (x[i] - mean) / sqrt(var + l->eps);
                x[i] = v * (l->n_weight ? l->weight[i] : 1.0) + (l->n_bias ? l->bias[i] : 0.0);
            }
            break;
        }
        case VEER__BUNDLE__LAYER_KIND__LAYER_RESCALE_NORM: {
            double norm = l->norm > 0 ? l->norm : sqrt((double)out), ss = 0;
            for (uint32_t i = 0; i < out; i++)
                ss += x[i] * x[i];
            for (uint32_t i = 0; i < out; i++)
                x[i] = ss > 0 ? x[i] * norm / sqrt(ss) : 0.0;
            break;
        }
        default:
            fail_msg("reference: unknown layer kind %d", (int)l->kind);
        }
        *width = out;
    }
    return 0;
}

int ref_net(const Veer__Bundle__Network *net, const Veer__Bundle__Model *m, const float *state,
            const float *action, const float *z, double *out)
{
    double outs[8][RMAX];
    uint32_t widths[8];
    int discrete = m->action->kind == VEER__BUNDLE__ACTION_KIND__ACTION_DISCRETE;
    assert_true(net->n_branches <= 8);
    for (size_t b = 0; b < net->n_branches; b++) {
        const Veer__Bundle__Branch *br = net->branches[b];
        double *x = outs[b];
        uint32_t w = 0;
        for (size_t i = 0; i < br->n_inputs; i++) {
            const Veer__Bundle__Input *in = br->inputs[i];
            if (in->kind == IN_STATE) {
                size_t nf = in->n_features ? in->n_features : m->state_dim;
                for (size_t j = 0; j < nf; j++)
                    x[w++] = state[in->n_features ? in->features[j] : j];
            } else if (in->kind == IN_ACTION && !discrete) {
                for (uint32_t j = 0; j < m->action->dim; j++)
                    x[w++] = action[j];
            } else if (in->kind == IN_ACTION && in->as_index) {
                x[w++] = action[0];
            } else if (in->kind == IN_ACTION) {
                for (uint32_t j = 0; j < m->action->count; j++)
                    x[w++] = (j == (uint32_t)action[0]) ? 1.0 : 0.0;
            } else {
                for (uint32_t j = 0; j < m->z_dim; j++)
                    x[w++] = z[j];
            }
        }
        if (ref_layers(br->layers, br->n_layers, x, &w) != 0)
            return -1;
        widths[b] = w;
    }
    double x[RMAX];
    uint32_t w = 0;
    if (net->merge == VEER__BUNDLE__MERGE_KIND__MERGE_BILINEAR) {
        /* out_j = Σ_i v_i M[i][j] (+ M[k][j]), M read row-major as (k + bias) x out. */
        const double *mat = outs[net->matrix_branch], *v = outs[1 - net->matrix_branch];
        uint32_t k = net->bilinear_k, rows = k + (net->bilinear_bias ? 1 : 0);
        w = widths[net->matrix_branch] / rows;
        for (uint32_t j = 0; j < w; j++) {
            double s = net->bilinear_bias ? mat[(size_t)k * w + j] : 0.0;
            for (uint32_t i = 0; i < k; i++)
                s += v[i] * mat[(size_t)i * w + j];
            x[j] = s;
        }
    } else {
        for (size_t b = 0; b < net->n_branches; b++)
            for (uint32_t j = 0; j < widths[b]; j++)
                x[w++] = outs[b][j];
    }
    if (ref_layers(net->head, net->n_head, x, &w) != 0)
        return -1;
    memcpy(out, x, w * sizeof *out);
    return (int)w;
}

static double dot_z(const double *f, const float *z, uint32_t d)
{
    double s = 0;
    for (uint32_t i = 0; i < d; i++)
        s += f[i] * z[i];
    return s;
}

void ref_policy(const Veer__Bundle__Model *m, const float *state, const float *z, float *action,
                double *q, int *clipped)
{
    double f[RMAX];
    *clipped = 0;
    if (m->action->kind == VEER__BUNDLE__ACTION_KIND__ACTION_DISCRETE) {
        double best = -INFINITY;
        for (uint32_t a = 0; a < m->action->count; a++) {
            float af = (float)a;
            assert_true(ref_net(m->forward, m, state, &af, z, f) > 0);
            double v = dot_z(f, z, m->z_dim);
            if (v > best) {
                best = v;
                action[0] = af;
            }
        }
        *q = best;
        return;
    }
    double y[RMAX];
    assert_true(ref_net(m->actor, m, state, NULL, z, y) > 0);
    for (uint32_t j = 0; j < m->action->dim; j++) {
        double lo = m->action->low[j], hi = m->action->high[j], a = y[j];
        if (m->actor_normalized) {
            *clipped |= a < -1 || a > 1;
            a = lo + (a + 1) / 2 * (hi - lo);
        } else {
            *clipped |= a < lo || a > hi;
        }
        action[j] = (float)fmin(fmax(a, lo), hi);
    }
    assert_true(ref_net(m->forward, m, state, action, z, f) > 0);
    *q = dot_z(f, z, m->z_dim);
}

double rel_err(const float *c, const double *r, size_t n)
{
    double num = 0, den = 1e-30;
    for (size_t i = 0; i < n; i++) {
        num = fmax(num, fabs(c[i] - r[i]));
        den = fmax(den, fabs(r[i]));
    }
    return num / den;
}
