/* Gradients of the trainer's layers, merges and losses against central finite differences
 * (Nocedal & Wright, Numerical Optimization, 2nd ed., §8.1, formula (8.7): error O(h²)).
 *
 * The differences are taken in double precision on an independent double-precision forward
 * pass written here from the layer definitions in proto/veer_bundle.proto, so the check
 * compares the float32 backward pass of src/train against a reference that shares no code
 * with it. Each check also compares the forward values themselves. */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "base/base.h"
#include "train/adam.h"
#include "train/fbloss.h"
#include "train/nn.h"

#define H 1e-6 /* difference step in double precision */

/* ---- the double-precision reference ------------------------------------------------------ */

static void ref_layer(const veer__nn_layer *l, const double *p, size_t n, const double *x,
                      double *y)
{
    const double *w = p + l->w_off, *b = p + l->b_off;
    for (size_t r = 0; r < n; r++) {
        const double *xr = x + r * l->in;
        double *yr = y + r * l->out;
        switch (l->kind) {
        case VEER_NN_LINEAR:
            for (uint32_t o = 0; o < l->out; o++) {
                double s = b[o];
                for (uint32_t i = 0; i < l->in; i++)
                    s += w[(size_t)o * l->in + i] * xr[i];
                yr[o] = s;
            }
            break;
        case VEER_NN_EMBEDDING: {
            size_t j = 0;
            for (uint32_t i = 0; i < l->ncounts; i++)
                j = j * l->counts[i] + (size_t)xr[i];
            for (uint32_t o = 0; o < l->out; o++)
                yr[o] = w[j * l->out + o];
            break;
        }
        case VEER_NN_RELU:
            for (uint32_t i = 0; i < l->in; i++)
                yr[i] = xr[i] > 0 ? xr[i] : 0;
            break;
        case VEER_NN_TANH:
            for (uint32_t i = 0; i < l->in; i++)
                yr[i] = tanh(xr[i]);
            break;
        case VEER_NN_LAYER_NORM: {
            double m = 0, v = 0;
            for (uint32_t i = 0; i < l->in; i++)
                m += xr[i];
            m /= l->in;
            for (uint32_t i = 0; i < l->in; i++)
                v += (xr[i] - m) * (xr[i] - m);
            v /= l->in;
            for (uint32_t i = 0; i < l->in; i++)
                yr[i] = w[i] * (xr[i] - m) / sqrt(v + l->eps) + b[i];
            break;
        }
        case VEER_NN_RESCALE_NORM: {
            double ss = 0, c = l->norm > 0 ? l->norm : sqrt((double)l->out);
            for (uint32_t i = 0; i < l->in; i++)
                ss += xr[i] * xr[i];
            for (uint32_t i = 0; i < l->in; i++)
                yr[i] = xr[i] * c / sqrt(ss);
            break;
        }
        }
    }
}

static double *ref_chain(const veer__nn_chain *c, const double *p, size_t n, const double *x)
{
    size_t w = c->in_dim;
    double *cur = malloc(n * w * sizeof *cur);
    memcpy(cur, x, n * w * sizeof *cur);
    for (uint32_t i = 0; i < c->nlayers; i++) {
        double *y = malloc(n * c->layers[i].out * sizeof *y);
        ref_layer(&c->layers[i], p, n, cur, y);
        free(cur);
        cur = y;
    }
    return cur;
}

static uint32_t out_of(const veer__nn_chain *c)
{
    return c->nlayers ? c->layers[c->nlayers - 1].out : c->in_dim;
}

/* The whole network in double: inputs assembled as the bundle schema says. */
static double *ref_net(const veer__nn *nn, const double *p, size_t n, const double *s,
                       const double *a, const double *z)
{
    double *outs[VEER_NN_MAX_BRANCHES];
    for (uint32_t b = 0; b < nn->nbranches; b++) {
        const veer__nn_chain *c = &nn->branch[b];
        double *x = calloc(n * c->in_dim, sizeof *x);
        for (size_t r = 0; r < n; r++) {
            double *xr = x + r * c->in_dim;
            for (uint32_t i = 0; i < c->ninputs; i++) {
                const veer__nn_input *in = &c->inputs[i];
                for (uint32_t j = 0; j < in->width; j++) {
                    if (in->kind == VEER_NN_IN_STATE)
                        xr[j] = s[r * nn->state_dim + (in->nfeat ? in->features[j] : j)];
                    else if (in->kind == VEER_NN_IN_TASK)
                        xr[j] = z[r * nn->z_dim + j];
                    else if (nn->action_count == 0 || in->as_index)
                        xr[j] = a[r * nn->action_dim + j];
                    else
                        xr[j] = (uint32_t)a[r] == j ? 1.0 : 0.0;
                }
                xr += in->width;
            }
        }
        outs[b] = ref_chain(c, p, n, x);
        free(x);
    }
    uint32_t mw = nn->head.in_dim;
    double *m = calloc(n * mw, sizeof *m);
    if (nn->merge == VEER_NN_CONCAT) {
        uint32_t col = 0;
        for (uint32_t b = 0; b < nn->nbranches; b++) {
            uint32_t w = out_of(&nn->branch[b]);
            for (size_t r = 0; r < n; r++)
                for (uint32_t j = 0; j < w; j++)
                    m[r * mw + col + j] = outs[b][r * w + j];
            col += w;
        }
    } else {
        uint32_t k = nn->bilinear_k, kb = k + (nn->bilinear_bias ? 1 : 0);
        const double *M = outs[nn->matrix_branch], *v = outs[1 - nn->matrix_branch];
        for (size_t r = 0; r < n; r++)
            for (uint32_t j = 0; j < mw; j++)
                for (uint32_t i = 0; i < kb; i++)
                    m[r * mw + j] += (i < k ? v[r * k + i] : 1.0) * M[(r * kb + i) * mw + j];
    }
    for (uint32_t b = 0; b < nn->nbranches; b++)
        free(outs[b]);
    double *y = ref_chain(&nn->head, p, n, m);
    free(m);
    return y;
}

/* ---- the check ------------------------------------------------------------------------------ */

static double weighted(const double *y, const double *w, size_t count)
{
    double s = 0;
    for (size_t i = 0; i < count; i++)
        s += y[i] * w[i];
    return s;
}

static void close_enough(const char *what, size_t i, double got, double want)
{
    double tol = 2e-3 * fmax(1.0, fabs(want)) + 1e-4;
    if (!(fabs(got - want) <= tol))
        fail_msg("%s[%zu]: backward %.7g, finite difference %.7g", what, i, got, want);
}

/* Loss = Σ w ⊙ net(s, a, z) for fixed random w. Compares the forward values, every parameter
 * gradient and (continuous actions) the action gradient with central differences. */
static void check_net(veer__nn *nn, size_t n, const float *s, const float *a, const float *z,
                      veer__rng *rng)
{
    size_t od = nn->out_dim, np = nn->nparams;
    double *p = malloc(np * sizeof *p), *sd = malloc(n * nn->state_dim * sizeof *sd);
    double *ad = malloc((n * nn->action_dim + 1) * sizeof *ad);
    double *zd = malloc((n * nn->z_dim + 1) * sizeof *zd), *w = malloc(n * od * sizeof *w);
    float *wf = malloc(n * od * sizeof *wf), *da = malloc((n * nn->action_dim + 1) * sizeof *da);
    for (size_t i = 0; i < np; i++)
        p[i] = nn->params[i];
    for (size_t i = 0; i < n * nn->state_dim; i++)
        sd[i] = s[i];
    for (size_t i = 0; a && i < n * nn->action_dim; i++)
        ad[i] = a[i];
    for (size_t i = 0; z && i < n * nn->z_dim; i++)
        zd[i] = z[i];
    for (size_t i = 0; i < n * od; i++)
        wf[i] = (float)(w[i] = veer__rng_normal(rng));

    const float *y;
    assert_int_equal(veer__nn_forward(nn, n, s, a, z, &y), 0);
    double *yr = ref_net(nn, p, n, sd, ad, zd);
    for (size_t i = 0; i < n * od; i++)
        close_enough("forward", i, y[i], yr[i]);
    free(yr);

    veer__nn_zero_grad(nn);
    int cont = nn->action_count == 0 && a != NULL;
    veer__nn_backward(nn, n, wf, cont ? da : NULL);
    for (size_t i = 0; i < np; i++) {
        double keep = p[i];
        p[i] = keep + H;
        double *yp = ref_net(nn, p, n, sd, ad, zd);
        p[i] = keep - H;
        double *ym = ref_net(nn, p, n, sd, ad, zd);
        p[i] = keep;
        close_enough("param", i, nn->grads[i], (weighted(yp, w, n * od) - weighted(ym, w, n * od)) / (2 * H));
        free(yp);
        free(ym);
    }
    for (size_t i = 0; cont && i < n * nn->action_dim; i++) {
        double keep = ad[i];
        ad[i] = keep + H;
        double *yp = ref_net(nn, p, n, sd, ad, zd);
        ad[i] = keep - H;
        double *ym = ref_net(nn, p, n, sd, ad, zd);
        ad[i] = keep;
        close_enough("action", i, da[i], (weighted(yp, w, n * od) - weighted(ym, w, n * od)) / (2 * H));
        free(yp);
        free(ym);
    }
    free(p), free(sd), free(ad), free(zd), free(w), free(wf), free(da);
}

static void fill_normal(float *x, size_t count, veer__rng *rng, double scale)
{
    for (size_t i = 0; i < count; i++)
        x[i] = (float)(veer__rng_normal(rng) * scale);
}

/* Every layer kind with a parameter or an input gradient, as a chain on a continuous action
 * input: linear → layer norm → tanh → linear → relu → linear → rescale to norm. */
static void test_mlp_layers(void **state)
{
    (void)state;
    veer__rng rng;
    veer__rng_init(&rng, 11);
    veer__nn *nn;
    assert_int_equal(veer__nn_new(3, 4, 0, 2, 8, &nn), 0);
    uint32_t feats[2] = {2, 0};
    int b = veer__nn_add_branch(nn, "x");
    assert_int_equal(veer__nn_add_input(nn, 0, VEER_NN_IN_STATE, 2, feats, 0), 0);
    assert_int_equal(veer__nn_add_input(nn, 0, VEER_NN_IN_ACTION, 0, NULL, 0), 0);
    assert_int_equal(veer__nn_add_input(nn, 0, VEER_NN_IN_TASK, 0, NULL, 0), 0);
    assert_int_equal(veer__nn_add_layer(nn, b, VEER_NN_LINEAR, 7, 0, NULL), 0);
    assert_int_equal(veer__nn_add_layer(nn, b, VEER_NN_LAYER_NORM, 0, 0, NULL), 0);
    assert_int_equal(veer__nn_add_layer(nn, b, VEER_NN_TANH, 0, 0, NULL), 0);
    assert_int_equal(veer__nn_add_layer(nn, b, VEER_NN_LINEAR, 6, 0, NULL), 0);
    assert_int_equal(veer__nn_add_layer(nn, b, VEER_NN_RELU, 0, 0, NULL), 0);
    assert_int_equal(veer__nn_add_layer(nn, b, VEER_NN_LINEAR, 5, 0, NULL), 0);
    assert_int_equal(veer__nn_add_layer(nn, b, VEER_NN_RESCALE_NORM, 0, 0, NULL), 0);
    veer__nn_set_merge(nn, VEER_NN_CONCAT, 0, 0, 0);
    assert_int_equal(veer__nn_finish(nn, &rng, NULL), 0);
    /* Layer-norm gain and bias away from 1 and 0 so their gradients are exercised. */
    veer__nn_layer *ln = &nn->branch[0].layers[1];
    fill_normal(nn->params + ln->w_off, ln->nw, &rng, 0.5);
    fill_normal(nn->params + ln->b_off, ln->nb, &rng, 0.5);
    float s[8 * 3], a[8 * 4], z[8 * 2];
    fill_normal(s, 24, &rng, 1), fill_normal(a, 32, &rng, 1), fill_normal(z, 16, &rng, 1);
    check_net(nn, 8, s, a, z, &rng);
    veer__nn_free(nn);
}

/* The tabular form of the issue: F(s,a,z) = W[s,a]·φ(z) + b[s,a], φ(z) = ReLU(zU + c), as an
 * embedding branch and a task branch joined by the bilinear merge, plus a linear head. */
static void bilinear_case(int extra_layer)
{
    veer__rng rng;
    veer__rng_init(&rng, 12);
    veer__nn *nn;
    const uint32_t k = 3, d = 2;
    assert_int_equal(veer__nn_new(2, 1, 5, 4, 6, &nn), 0);
    veer__nn_add_branch(nn, "table");
    veer__nn_add_branch(nn, "task");
    assert_int_equal(veer__nn_add_input(nn, 0, VEER_NN_IN_STATE, 0, NULL, 0), 0);
    assert_int_equal(veer__nn_add_input(nn, 0, VEER_NN_IN_ACTION, 0, NULL, 1), 0);
    uint32_t counts[3] = {2, 3, 5};
    assert_int_equal(veer__nn_add_layer(nn, 0, VEER_NN_EMBEDDING, (k + 1) * d, 3, counts), 0);
    if (extra_layer) /* the general path: the matrix branch's output is materialised */
        assert_int_equal(veer__nn_add_layer(nn, 0, VEER_NN_TANH, 0, 0, NULL), 0);
    assert_int_equal(veer__nn_add_input(nn, 1, VEER_NN_IN_TASK, 0, NULL, 0), 0);
    assert_int_equal(veer__nn_add_layer(nn, 1, VEER_NN_LINEAR, k, 0, NULL), 0);
    assert_int_equal(veer__nn_add_layer(nn, 1, VEER_NN_RELU, 0, 0, NULL), 0);
    veer__nn_set_merge(nn, VEER_NN_BILINEAR, k, 0, 1);
    assert_int_equal(veer__nn_finish(nn, &rng, NULL), 0);
    assert_int_equal(nn->out_dim, d);
    assert_int_equal(nn->fused, !extra_layer); /* a lone table is read in place */
    float s[6 * 2] = {0, 0, 1, 2, 1, 1, 0, 2, 1, 0, 0, 1}, a[6] = {0, 4, 2, 3, 1, 4}, z[6 * 4];
    fill_normal(z, 24, &rng, 1);
    check_net(nn, 6, s, a, z, &rng);
    /* An index out of range is refused, not read out of bounds. */
    const float *y;
    float bad_a[1] = {5};
    assert_int_equal(veer__nn_forward(nn, 1, s, bad_a, z, &y), VEER_EINVAL);
    veer__nn_free(nn);
}

static void test_bilinear_embedding(void **state)
{
    (void)state;
    bilinear_case(0);
    bilinear_case(1);
}

/* Concat of two branches (one-hot discrete action) and a head with two layers. */
static void test_concat_head_onehot(void **state)
{
    (void)state;
    veer__rng rng;
    veer__rng_init(&rng, 13);
    veer__nn *nn;
    assert_int_equal(veer__nn_new(3, 1, 4, 2, 5, &nn), 0);
    veer__nn_add_branch(nn, "sa");
    veer__nn_add_branch(nn, "z");
    veer__nn_add_input(nn, 0, VEER_NN_IN_STATE, 0, NULL, 0);
    veer__nn_add_input(nn, 0, VEER_NN_IN_ACTION, 0, NULL, 0);
    veer__nn_add_layer(nn, 0, VEER_NN_LINEAR, 4, 0, NULL);
    veer__nn_add_layer(nn, 0, VEER_NN_TANH, 0, 0, NULL);
    veer__nn_add_input(nn, 1, VEER_NN_IN_TASK, 0, NULL, 0);
    assert_int_equal(veer__nn_set_merge(nn, VEER_NN_CONCAT, 0, 0, 0), 0);
    /* The head is added after the merge, so its input width is the concatenation's. */
    assert_int_equal(veer__nn_add_layer(nn, VEER_NN_HEAD, VEER_NN_LINEAR, 5, 0, NULL), 0);
    assert_int_equal(veer__nn_add_layer(nn, VEER_NN_HEAD, VEER_NN_RELU, 0, 0, NULL), 0);
    assert_int_equal(veer__nn_add_layer(nn, VEER_NN_HEAD, VEER_NN_LINEAR, 3, 0, NULL), 0);
    assert_int_equal(veer__nn_finish(nn, &rng, NULL), 0);
    float s[15], a[5] = {0, 3, 1, 2, 3}, z[10];
    fill_normal(s, 15, &rng, 1), fill_normal(z, 10, &rng, 1);
    check_net(nn, 5, s, a, z, &rng);
    veer__nn_free(nn);
}

/* ---- the FB losses ------------------------------------------------------------------------ */

/* Straight from the formulas in fbloss.h, in double, with explicit pairs. */
static double ref_fb(size_t n, uint32_t d, const double *F, const double *B, const double *Ft,
                     const double *Bt, double g, const double *c)
{
    double off = 0, diag = 0;
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < n; j++) {
            double m = 0, t = 0;
            for (uint32_t k = 0; k < d; k++) {
                m += F[i * d + k] * B[j * d + k];
                t += Ft[i * d + k] * Bt[j * d + k];
            }
            if (i == j)
                diag += m;
            else
                off += (m - g * c[i] * t) * (m - g * c[i] * t);
        }
    return off / (2.0 * n * (n - 1)) - diag / n;
}

static double ref_orth(size_t n, uint32_t d, const double *B)
{
    double off = 0, tr = 0;
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < n; j++) {
            double m = 0;
            for (uint32_t k = 0; k < d; k++)
                m += B[i * d + k] * B[j * d + k];
            if (i == j)
                tr += m;
            else
                off += m * m;
        }
    return off / ((double)n * (n - 1)) - 2.0 * tr / n + d;
}

static void test_fb_loss_gradient(void **state)
{
    (void)state;
    enum { N = 7, D = 3 };
    veer__rng rng;
    veer__rng_init(&rng, 21);
    float F[N * D], B[N * D], Ft[N * D], Bt[N * D], c[N], dF[N * D], dB[N * D], work[2 * N * N];
    double Fd[N * D], Bd[N * D], Ftd[N * D], Btd[N * D], cd[N];
    fill_normal(F, N * D, &rng, 1), fill_normal(B, N * D, &rng, 1);
    fill_normal(Ft, N * D, &rng, 1), fill_normal(Bt, N * D, &rng, 1);
    for (int i = 0; i < N; i++)
        cd[i] = c[i] = (i == 3) ? 0.0f : 1.0f; /* one episode end */
    for (int i = 0; i < N * D; i++)
        Fd[i] = F[i], Bd[i] = B[i], Ftd[i] = Ft[i], Btd[i] = Bt[i];
    const float g = 0.9f, coef = 0.7f;
    memset(dB, 0, sizeof dB);
    double L = veer__fb_loss(N, D, F, B, Ft, Bt, g, c, dF, dB, work, NULL, NULL);
    double Lo = veer__fb_orth(N, D, B, coef, dB, work);
    close_enough("fb value", 0, L, ref_fb(N, D, Fd, Bd, Ftd, Btd, g, cd));
    close_enough("orth value", 0, Lo, ref_orth(N, D, Bd));
    for (int i = 0; i < N * D; i++) {
        double keep = Fd[i];
        Fd[i] = keep + H;
        double p = ref_fb(N, D, Fd, Bd, Ftd, Btd, g, cd);
        Fd[i] = keep - H;
        double m = ref_fb(N, D, Fd, Bd, Ftd, Btd, g, cd);
        Fd[i] = keep;
        close_enough("dF", (size_t)i, dF[i], (p - m) / (2 * H));
        keep = Bd[i];
        Bd[i] = keep + H;
        p = ref_fb(N, D, Fd, Bd, Ftd, Btd, g, cd) + coef * ref_orth(N, D, Bd);
        Bd[i] = keep - H;
        m = ref_fb(N, D, Fd, Bd, Ftd, Btd, g, cd) + coef * ref_orth(N, D, Bd);
        Bd[i] = keep;
        close_enough("dB", (size_t)i, dB[i], (p - m) / (2 * H));
    }
}

/* The orthonormality estimate is unbiased for ||E[BBᵀ] − I||²_F: for B drawn from a known
 * finite distribution the exact value is computed directly, and the mean of the batch
 * estimate over many batches must approach it (standard error bound checked at 5 sigma). */
static void test_orth_unbiased(void **state)
{
    (void)state;
    enum { K = 4, D = 2, N = 16, REPS = 4000 };
    const double atoms[K][D] = {{1.0, 0.2}, {-0.5, 1.5}, {0.3, -0.8}, {2.0, 0.0}};
    const double prob[K] = {0.1, 0.4, 0.3, 0.2};
    double S[D][D] = {{0}};
    for (int k = 0; k < K; k++)
        for (int i = 0; i < D; i++)
            for (int j = 0; j < D; j++)
                S[i][j] += prob[k] * atoms[k][i] * atoms[k][j];
    double exact = 0;
    for (int i = 0; i < D; i++)
        for (int j = 0; j < D; j++)
            exact += (S[i][j] - (i == j)) * (S[i][j] - (i == j));
    veer__rng rng;
    veer__rng_init(&rng, 31);
    float B[N * D], work[N * N];
    double sum = 0, sum2 = 0;
    for (int r = 0; r < REPS; r++) {
        for (int i = 0; i < N; i++) {
            double u = veer__rng_uniform(&rng), acc = 0;
            int k = 0;
            while (k < K - 1 && u >= acc + prob[k])
                acc += prob[k++];
            B[i * D] = (float)atoms[k][0];
            B[i * D + 1] = (float)atoms[k][1];
        }
        double e = veer__fb_orth(N, D, B, 0.0f, NULL, work);
        sum += e;
        sum2 += e * e;
    }
    double mean = sum / REPS, se = sqrt((sum2 / REPS - mean * mean) / REPS);
    if (fabs(mean - exact) > 5 * se + 1e-6)
        fail_msg("orthonormality estimate mean %.5f, exact %.5f (se %.5f)", mean, exact, se);
}

/* Adam's first steps against the paper's Algorithm 1 computed by hand in double. */
static void test_adam_matches_algorithm(void **state)
{
    (void)state;
    veer__adam a;
    assert_int_equal(veer__adam_init(&a, 2, 0.1f), 0);
    float p[2] = {1.0f, -2.0f};
    double pd[2] = {1.0, -2.0}, m[2] = {0}, v[2] = {0};
    const float gs[3][2] = {{0.5f, -1.0f}, {0.1f, 2.0f}, {-0.3f, 0.0f}};
    for (int t = 1; t <= 3; t++) {
        veer__adam_step(&a, p, gs[t - 1]);
        for (int i = 0; i < 2; i++) {
            m[i] = 0.9 * m[i] + 0.1 * gs[t - 1][i];
            v[i] = 0.999 * v[i] + 0.001 * gs[t - 1][i] * gs[t - 1][i];
            double mh = m[i] / (1 - pow(0.9, t)), vh = v[i] / (1 - pow(0.999, t));
            pd[i] -= 0.1 * mh / (sqrt(vh) + 1e-8);
            close_enough("adam", (size_t)i, p[i], pd[i]);
        }
    }
    veer__adam_free(&a);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_mlp_layers),       cmocka_unit_test(test_bilinear_embedding),
        cmocka_unit_test(test_concat_head_onehot), cmocka_unit_test(test_fb_loss_gradient),
        cmocka_unit_test(test_orth_unbiased),    cmocka_unit_test(test_adam_matches_algorithm),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
