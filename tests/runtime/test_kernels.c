/* The dense kernels (src/runtime/kernels.c) against naive loops written here from the textbook
 * definitions, in double precision: y_i = b_i + Σ_j W_ij x_j for a linear layer; max(x, 0);
 * tanh; layer normalisation y = g (x - mean) / sqrt(var + eps) + b with the population variance
 * (Ba, Kiros & Hinton 2016, "Layer Normalization", eq. 4); x·norm/||x||₂; mixed-radix indexing;
 * a linear layer split into column blocks (net_repeat.h) against the same y = W x + b.
 * Worked examples are computed by hand in the comments beside them. */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "runtime/kernels.h"
#include "runtime/net_repeat.h"
#include "support.h"

static void naive_linear(size_t n, uint32_t in, uint32_t out, const float *x, const float *w,
                         const float *b, double *y)
{
    for (size_t r = 0; r < n; r++)
        for (uint32_t i = 0; i < out; i++) {
            double s = b ? b[i] : 0.0;
            for (uint32_t j = 0; j < in; j++)
                s += (double)w[(size_t)i * in + j] * x[r * in + j];
            y[r * out + i] = s;
        }
}

static void test_linear_single_and_batch(void **state)
{
    (void)state;
    fx_srand(1);
    veer__k_init(); /* the per-row limit this host's acts use; the row counts span either */
    const uint32_t in = 37, out = 19; /* odd sizes reach OpenBLAS's edge code */
    /* Row counts on both sides of the per-row sgemv / sgemm switch (kernels.h). */
    const size_t rows[] = {1, 2, VEER__K_GEMV_ROWS_MAX, VEER__K_GEMV_ROWS_MAX + 1, 9};
    for (size_t k = 0; k < sizeof rows / sizeof rows[0]; k++) {
        size_t n = rows[k];
        for (int with_bias = 0; with_bias <= 1; with_bias++) {
            float *x = fx_random(n * in, 2.0f), *w = fx_random((size_t)out * in, 1.0f);
            float *b = with_bias ? fx_random(out, 1.0f) : NULL;
            float *y = fx_alloc(n * out * sizeof *y);
            double *r = fx_alloc(n * out * sizeof *r);
            veer__k_linear(n, in, out, x, w, b, y);
            naive_linear(n, in, out, x, w, b, r);
            /* float32 products of 37 terms: a few ulps of the largest term. */
            assert_true(rel_err(y, r, n * out) < 1e-6);
        }
    }
    /* A worked example: W = [[1, 2], [3, 4]], b = [0.5, -1], x = [1, -1] -> y = [-0.5, -2]. */
    float w[4] = {1, 2, 3, 4}, b[2] = {0.5f, -1}, x[2] = {1, -1}, y[2];
    veer__k_linear(1, 2, 2, x, w, b, y);
    assert_true(y[0] == -0.5f && y[1] == -2.0f);
    fx_free_all();
}

/* A column block of a wider layer, added into y (the building block of net_repeat.c). */
static void test_linear_block(void **state)
{
    (void)state;
    fx_srand(2);
    const uint32_t in = 41, out = 23, col = 7, k = 13; /* columns 7..19 of a 41-wide input */
    const size_t rows[] = {1, VEER__K_GEMV_ROWS_MAX, VEER__K_GEMV_ROWS_MAX + 3};
    for (size_t t = 0; t < sizeof rows / sizeof rows[0]; t++) {
        size_t n = rows[t];
        float *x = fx_random(n * in, 2.0f), *w = fx_random((size_t)out * in, 1.0f);
        float *y = fx_random(n * out, 1.0f);
        double *r = fx_alloc(n * out * sizeof *r);
        for (size_t i = 0; i < n * out; i++)
            r[i] = y[i]; /* accumulates onto what y held */
        for (size_t a = 0; a < n; a++)
            for (uint32_t o = 0; o < out; o++)
                for (uint32_t j = col; j < col + k; j++)
                    r[a * out + o] += (double)w[(size_t)o * in + j] * x[a * in + j];
        veer__k_linear_block(n, k, out, x + col, in, w + col, in, y);
        assert_true(rel_err(y, r, n * out) < 1e-6);
    }
    fx_free_all();
}

/* A linear layer over rows that repeat each state (net_repeat.h) against the plain definition
 * y = W x + b row by row: a shared block (state and z), a one-hot block (the action) and a
 * per-row block, for a few states of six rows each. */
static void test_repeated_linear(void **state)
{
    (void)state;
    fx_srand(3);
    const uint32_t rep = 6, in = 10 + rep + 5 + 4, out = 17;
    veer__rep_cols cols = {.count = 4,
                           .blocks = {{0, 10, VEER__REP_SHARED},
                                      {10, rep, VEER__REP_ONEHOT},
                                      {16, 5, VEER__REP_SHARED},
                                      {21, 4, VEER__REP_PER_ROW}}};
    const size_t states_of[] = {1, 3};
    for (size_t t = 0; t < 2; t++) {
        size_t states = states_of[t], n = states * rep;
        float *x = fx_random(n * in, 2.0f), *w = fx_random((size_t)out * in, 1.0f);
        float *b = fx_random(out, 1.0f);
        for (size_t r = 0; r < n; r++) {
            float *row = x + r * in;
            memcpy(row, x + (r / rep) * rep * in, 10 * sizeof *row);          /* shared state ... */
            memcpy(row + 16, x + (r / rep) * rep * in + 16, 5 * sizeof *row); /* ... and z */
            memset(row + 10, 0, rep * sizeof *row);
            row[10 + r % rep] = 1.0f;
        }
        veer__layer l = {
            .kind = VEER__LAYER_LINEAR, .in_dim = in, .out_dim = out, .weight = w, .bias = b};
        float *shared = fx_alloc(states * out * sizeof *shared);
        float *y = fx_alloc(n * out * sizeof *y);
        double *r = fx_alloc(n * out * sizeof *r);
        veer__rep_linear(&l, &cols, n, rep, x, in, shared, y);
        naive_linear(n, in, out, x, w, b, r);
        assert_true(rel_err(y, r, n * out) < 1e-6);
        /* Without the bias too. */
        l.bias = NULL;
        veer__rep_linear(&l, &cols, n, rep, x, in, shared, y);
        naive_linear(n, in, out, x, w, NULL, r);
        assert_true(rel_err(y, r, n * out) < 1e-6);
    }
    assert_true(veer__rep_worth(&cols, rep) && !veer__rep_worth(&cols, 1));
    veer__rep_cols per_row = {.count = 1, .blocks = {{0, in, VEER__REP_PER_ROW}}};
    assert_false(veer__rep_worth(&per_row, rep));
    fx_free_all();
}

static void test_relu_tanh(void **state)
{
    (void)state;
    float x[5] = {-2.0f, -0.0f, 0.0f, 3.5f, NAN};
    veer__k_relu(5, x);
    assert_true(x[0] == 0.0f && x[1] == 0.0f && x[2] == 0.0f && x[3] == 3.5f);
    assert_true(isnan(x[4])); /* a broken value must stay visible */

    float t[4] = {0.0f, 0.5f, -3.0f, 20.0f};
    veer__k_tanh(4, t);
    /* tanh(0.5) = 0.46211715726 (from the series / any table), tanh(-3) = -0.99505475369. */
    assert_float_equal(t[0], 0.0f, 0.0f);
    assert_float_equal(t[1], 0.46211715726f, 1e-7f);
    assert_float_equal(t[2], -0.99505475369f, 1e-7f);
    assert_float_equal(t[3], 1.0f, 0.0f);
}

static void test_tanh_accuracy(void **state)
{
    (void)state;
    /* veer__k_tanh is a polynomial and exp-based approximation (see kernels.c); against the
     * C library's double tanh it must stay within 2.5e-7 relative (about two float ulps) over
     * [-12, 12] and over magnitudes from 1e-30 up, where relative accuracy is hardest. */
    enum { N = 400001, L = 3000 };
    float *x = malloc((N + 2 * L) * sizeof *x), *y = malloc((N + 2 * L) * sizeof *y);
    assert_non_null(x);
    assert_non_null(y);
    for (int i = 0; i < N; i++)
        x[i] = -12.0f + 24.0f * (float)i / (N - 1);
    for (int i = 0; i < L; i++) {
        x[N + i] = powf(10.0f, -30.0f + 30.0f * (float)i / L);
        x[N + L + i] = -x[N + i];
    }
    memcpy(y, x, (N + 2 * L) * sizeof *x);
    veer__k_tanh(N + 2 * L, y);
    double worst = 0;
    for (int i = 0; i < N + 2 * L; i++) {
        double r = tanh((double)x[i]);
        double e = r == 0 ? fabs(y[i]) : fabs(y[i] - r) / fabs(r);
        worst = e > worst ? e : worst;
    }
    free(x);
    free(y);
    if (worst > 2.5e-7)
        fail_msg("worst relative error %g", worst);

    /* Special values: signed zeros keep their sign, infinities give +-1, NaN stays NaN. */
    float s[6] = {0.0f, -0.0f, INFINITY, -INFINITY, NAN, 1e-40f};
    veer__k_tanh(6, s);
    assert_true(s[0] == 0.0f && !signbit(s[0]) && s[1] == 0.0f && signbit(s[1]));
    assert_true(s[2] == 1.0f && s[3] == -1.0f && isnan(s[4]) && s[5] == 1e-40f);
}

static void test_layer_norm_formula(void **state)
{
    (void)state;
    /* Worked example, no gain or bias, eps 0 would be 0/0 for constant rows so eps = 1e-6:
     * x = [1, 2, 3, 4]: mean 2.5, var (2.25 + 0.25 + 0.25 + 2.25) / 4 = 1.25,
     * y = (x - 2.5) / sqrt(1.25 + 1e-6) = [-1.3416402, -0.4472134, 0.4472134, 1.3416402]. */
    float x[4] = {1, 2, 3, 4}, y[4];
    veer__k_layer_norm(1, 4, x, NULL, NULL, 1e-6f, y);
    const double want[4] = {-1.3416402, -0.4472134, 0.4472134, 1.3416402};
    assert_true(rel_err(y, want, 4) < 1e-6);

    /* Random rows with gain and bias against the formula, in place. */
    fx_srand(2);
    const size_t n = 3;
    const uint32_t d = 33;
    float *v = fx_random(n * d, 5.0f), *g = fx_random(d, 1.0f), *b = fx_random(d, 1.0f);
    double *r = fx_alloc(n * d * sizeof *r);
    for (size_t row = 0; row < n; row++) {
        double mean = 0, var = 0;
        for (uint32_t i = 0; i < d; i++)
            mean += v[row * d + i] / (double)d;
        for (uint32_t i = 0; i < d; i++)
            var += pow(v[row * d + i] - mean, 2) / d;
        for (uint32_t i = 0; i < d; i++)
            r[row * d + i] = g[i] * (v[row * d + i] - mean) / sqrt(var + 1e-5) + b[i];
    }
    veer__k_layer_norm(n, d, v, g, b, 1e-5f, v);
    assert_true(rel_err(v, r, n * d) < 1e-6);

    /* Edge case: a constant row has no spread; with eps > 0 it maps to the bias exactly. */
    float c[3] = {7, 7, 7}, cb[3] = {0.25f, -1, 2};
    veer__k_layer_norm(1, 3, c, NULL, cb, 1e-5f, c);
    assert_true(c[0] == 0.25f && c[1] == -1.0f && c[2] == 2.0f);
    fx_free_all();
}

static void test_rescale_norm(void **state)
{
    (void)state;
    /* [3, 4] has norm 5; to norm 10 it becomes [6, 8]. */
    float x[4] = {3, 4, 0, 0};
    assert_int_equal(veer__k_rescale_norm(1, 2, 10.0f, x), 0);
    assert_true(fabsf(x[0] - 6.0f) < 1e-6f && fabsf(x[1] - 8.0f) < 1e-6f);

    /* The documented edge case: a zero row has no direction. It becomes all zeros (finite, no
     * NaN from 0/0) and is counted, so callers can tell. */
    float z[6] = {1, 2, 2, 0, 0, 0};
    assert_int_equal(veer__k_rescale_norm(2, 3, 6.0f, z), 1);
    assert_true(fabsf(z[0] - 2.0f) < 1e-6f && fabsf(z[1] - 4.0f) < 1e-6f);
    for (int i = 3; i < 6; i++)
        assert_true(z[i] == 0.0f);

    /* Tiny but non-zero rows keep their direction: 1e-30 squared underflows a float, not the
     * double accumulator. [1e-30, 1e-30] to norm sqrt(2) -> [1, 1]. */
    float t[2] = {1e-30f, 1e-30f};
    assert_int_equal(veer__k_rescale_norm(1, 2, sqrtf(2.0f), t), 0);
    assert_true(fabsf(t[0] - 1.0f) < 1e-6f && fabsf(t[1] - 1.0f) < 1e-6f);

    /* NaN is not hidden: it propagates so the caller sees a non-finite output. */
    float u[2] = {NAN, 1};
    veer__k_rescale_norm(1, 2, 1.0f, u);
    assert_true(isnan(u[0]));
}

static void test_copy_cols_concat(void **state)
{
    (void)state;
    /* Concatenating a 2 x 2 block and a 2 x 1 block into a 2 x 3 row-major matrix. */
    float a[4] = {1, 2, 3, 4}, b[2] = {5, 6}, c[6] = {0};
    veer__k_copy_cols(2, 2, a, 2, c, 3);
    veer__k_copy_cols(2, 1, b, 1, c + 2, 3);
    const float want[6] = {1, 2, 5, 3, 4, 6};
    assert_memory_equal(c, want, sizeof want);
}

static void test_embedding(void **state)
{
    (void)state;
    /* counts (3, 4): joint index of (i0, i1) is i0 * 4 + i1; table row r holds [r, -r]. */
    const uint32_t counts[2] = {3, 4};
    float table[12 * 2];
    for (int r = 0; r < 12; r++) {
        table[2 * r] = (float)r;
        table[2 * r + 1] = (float)-r;
    }
    float x[3 * 2] = {0, 0, 2, 3, 1, 2}, y[3 * 2];
    assert_int_equal(veer__k_embedding(3, 2, counts, 2, x, table, y), 0);
    const float want[6] = {0, -0.0f, 11, -11, 6, -6};
    for (int i = 0; i < 6; i++)
        assert_true(y[i] == want[i]);

    /* Indices that are not integers in range are refused, naming the first bad row, and never
     * read the table out of bounds (ASan would see it). */
    const float bad[][2] = {{3, 0},   {0, 4},        {-1, 0},   {1.5f, 0},
                            {NAN, 0}, {0, INFINITY}, {1e30f, 0}};
    for (size_t k = 0; k < sizeof bad / sizeof bad[0]; k++) {
        float xb[4] = {1, 1, bad[k][0], bad[k][1]};
        assert_int_equal(veer__k_embedding(2, 2, counts, 2, xb, table, y), -2);
    }
}

static void test_row_dot_and_finite(void **state)
{
    (void)state;
    /* [1, 2, 3]·[4, -5, 6] = 12, [0.5, 0, -1]·[4, -5, 6] = -4. */
    float a[6] = {1, 2, 3, 0.5f, 0, -1}, z[3] = {4, -5, 6}, v[2];
    veer__k_row_dot(2, 3, a, z, v);
    assert_true(v[0] == 12.0f && v[1] == -4.0f);
    float f[3] = {1, 2, 3};
    assert_true(veer__k_all_finite(3, f));
    f[1] = INFINITY;
    assert_false(veer__k_all_finite(3, f));
    f[1] = NAN;
    assert_false(veer__k_all_finite(3, f));
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_linear_single_and_batch),
        cmocka_unit_test(test_linear_block),
        cmocka_unit_test(test_repeated_linear),
        cmocka_unit_test(test_relu_tanh),
        cmocka_unit_test(test_tanh_accuracy),
        cmocka_unit_test(test_layer_norm_formula),
        cmocka_unit_test(test_rescale_norm),
        cmocka_unit_test(test_copy_cols_concat),
        cmocka_unit_test(test_embedding),
        cmocka_unit_test(test_row_dot_and_finite),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
