/* bench_train: training steps per second of `veer train`'s SMALL networks (24 state features,
 * 6 continuous actions, d = 32, hidden 256 x 2, two F heads, batch 256), against a floor
 * measured in the same run: the very matrix products one step performs (recorded shape by
 * shape through veer__tgemm), replayed as bare cblas_sgemm calls on buffers of the same
 * sizes. The ratio floor_time / step_time says how much of a step is spent outside OpenBLAS's
 * products; the target is at least 50%.
 *
 * Also reported: the tabular layout at the warehouse floor's size (9 x 11 cells, 5 actions,
 * k = 256, d = 32, the tabular preset's batch), whose step is dominated by embedding gathers and Adam over the
 * tables rather than by products, so it has no product floor.
 *
 * usage: bench_train [steps]   (default 200). Prints figures; asserts nothing. */
#define _GNU_SOURCE
#include <cblas.h>
#include <sched.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"
#include "train/train.h"
#include "veer/runtime.h"

static double rnd(uint64_t *s)
{
    *s = *s * 6364136223846793005ull + 1442695040888963407ull;
    return (double)(*s >> 11) / 9007199254740992.0;
}

/* A synthetic log in memory: random states, actions in [-1, 1], next = state + small drift. */
static void synth_log(veer__tlog *log, size_t n, uint32_t D, uint32_t A, uint32_t count,
                      const uint32_t *counts)
{
    memset(log, 0, sizeof *log);
    log->n = n;
    log->state_dim = D;
    log->action_dim = A;
    log->states = malloc(n * D * sizeof(float));
    log->next_states = malloc(n * D * sizeof(float));
    log->actions = malloc(n * A * sizeof(float));
    log->cont = malloc(n * sizeof(float));
    uint64_t s = 1;
    for (size_t i = 0; i < n; i++) {
        for (uint32_t j = 0; j < D; j++) {
            float v = counts ? (float)(int)(rnd(&s) * counts[j]) : (float)(rnd(&s) * 2 - 1);
            log->states[i * D + j] = v;
            log->next_states[i * D + j] = counts ? v : v + 0.01f;
        }
        for (uint32_t j = 0; j < A; j++)
            log->actions[i * A + j] = count ? (float)(int)(rnd(&s) * count) : (float)(rnd(&s) * 2 - 1);
        log->cont[i] = 1.0f;
    }
    snprintf(log->digest, sizeof log->digest, "synthetic");
}

static void free_log(veer__tlog *log)
{
    free(log->states), free(log->next_states), free(log->actions), free(log->cont);
}

static double time_steps(veer__trainer *t, int steps)
{
    uint64_t t0 = veer__now_ns();
    for (int i = 0; i < steps; i++)
        if (veer__trainer_step(t, NULL) != 0) {
            fprintf(stderr, "bench_train: step failed\n");
            exit(1);
        }
    return (double)(veer__now_ns() - t0) * 1e-9;
}

int main(int argc, char **argv)
{
    int steps = argc > 1 ? atoi(argv[1]) : 200;
    if (steps < 1)
        steps = 200;
    veer_blas_threads(1);
    printf("bench_train: OpenBLAS kernel %s, threads %d, running on cpu %d\n", veer_blas_kernel(),
           openblas_get_num_threads(), sched_getcpu());

    /* ---- SMALL continuous networks ---- */
    veer_train_config c;
    memset(&c, 0, sizeof c);
    veer__train_preset(&c, "small");
    c.action_dim = 6;
    for (int j = 0; j < 6; j++)
        c.low[j] = -1, c.high[j] = 1;
    c.holdout = 0;
    veer__tlog log;
    synth_log(&log, 50000, 24, 6, 0, NULL);
    veer__trainer *t;
    veer_error err;
    if (veer__trainer_create(&c, &log, &t, &err) != 0) {
        fprintf(stderr, "bench_train: %s\n", err.message);
        return 1;
    }
    time_steps(t, 20); /* warm-up: caches, OpenBLAS buffers */
    veer__gemm_log rec = {0};
    veer__tgemm_record(&rec);
    time_steps(t, 1);
    veer__tgemm_record(NULL);
    double flops = 0;
    size_t maxa = 0, maxb = 0, maxc = 0;
    for (size_t i = 0; i < rec.count; i++) {
        veer__gemm_shape g = rec.shapes[i];
        flops += 2.0 * g.m * g.n * g.k;
        if ((size_t)g.m * g.k > maxa) maxa = (size_t)g.m * g.k;
        if ((size_t)g.k * g.n > maxb) maxb = (size_t)g.k * g.n;
        if ((size_t)g.m * g.n > maxc) maxc = (size_t)g.m * g.n;
    }
    double step_s = time_steps(t, steps) / steps;

    /* The floor: the same products, bare, same order, same sizes. */
    float *A = veer__malloc_aligned(maxa * sizeof(float)), *B = veer__malloc_aligned(maxb * sizeof(float));
    float *C = veer__malloc_aligned(maxc * sizeof(float));
    for (size_t i = 0; i < maxa; i++) A[i] = (float)(i % 13) * 0.01f;
    for (size_t i = 0; i < maxb; i++) B[i] = (float)(i % 7) * 0.01f;
    memset(C, 0, maxc * sizeof(float));
    for (int warm = 0; warm < 3; warm++)
        for (size_t i = 0; i < rec.count; i++) {
            veer__gemm_shape g = rec.shapes[i];
            cblas_sgemm(CblasRowMajor, g.ta ? CblasTrans : CblasNoTrans,
                        g.tb ? CblasTrans : CblasNoTrans, (blasint)g.m, (blasint)g.n, (blasint)g.k,
                        1.0f, A, g.ta ? (blasint)g.m : (blasint)g.k, B,
                        g.tb ? (blasint)g.k : (blasint)g.n, 1.0f, C, (blasint)g.n);
        }
    uint64_t t0 = veer__now_ns();
    for (int s = 0; s < steps; s++)
        for (size_t i = 0; i < rec.count; i++) {
            veer__gemm_shape g = rec.shapes[i];
            cblas_sgemm(CblasRowMajor, g.ta ? CblasTrans : CblasNoTrans,
                        g.tb ? CblasTrans : CblasNoTrans, (blasint)g.m, (blasint)g.n, (blasint)g.k,
                        1.0f, A, g.ta ? (blasint)g.m : (blasint)g.k, B,
                        g.tb ? (blasint)g.k : (blasint)g.n, 1.0f, C, (blasint)g.n);
        }
    double floor_s = (double)(veer__now_ns() - t0) * 1e-9 / steps;
    printf("SMALL (24 features, 6 actions, d=32, hidden 256x2, 2 F heads, batch 256):\n");
    printf("  products per step      %zu sgemm calls, %.3f GFLOP\n", rec.count, flops * 1e-9);
    printf("  training step          %.3f ms  (%.1f steps/s, %.2f GFLOP/s)\n", step_s * 1e3,
           1.0 / step_s, flops / step_s * 1e-9);
    printf("  floor (bare sgemm)     %.3f ms  (%.1f steps/s, %.2f GFLOP/s)\n", floor_s * 1e3,
           1.0 / floor_s, flops / floor_s * 1e-9);
    printf("  ratio floor/step       %.1f%%   (target >= 50%%)\n", 100.0 * floor_s / step_s);
    printf("  30,000 steps would take %.1f min on this core\n", 30000 * step_s / 60.0);
    veer__free(rec.shapes);
    veer__free_aligned(A), veer__free_aligned(B), veer__free_aligned(C);
    veer__trainer_destroy(t);
    free_log(&log);

    /* ---- the tabular layout at the warehouse floor's size ---- */
    memset(&c, 0, sizeof c);
    veer__train_preset(&c, "tabular");
    c.action_count = 5;
    c.nstate_counts = 2;
    c.state_counts[0] = 9, c.state_counts[1] = 11;
    c.holdout = 0;
    synth_log(&log, 20000, 2, 1, 5, c.state_counts);
    if (veer__trainer_create(&c, &log, &t, &err) != 0) {
        fprintf(stderr, "bench_train: %s\n", err.message);
        return 1;
    }
    time_steps(t, 5);
    int tsteps = steps / 4 ? steps / 4 : 1;
    double ts = time_steps(t, tsteps) / tsteps;
    printf("tabular (9x11 cells, 5 actions, k=256, d=32, batch %u):\n", c.batch);
    printf("  training step          %.3f ms  (%.1f steps/s; %llu steps take %.0f s)\n", ts * 1e3,
           1.0 / ts, (unsigned long long)c.steps, (double)c.steps * ts);
    veer__trainer_destroy(t);
    free_log(&log);
    return 0;
}
