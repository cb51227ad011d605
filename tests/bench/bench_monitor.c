/* bench_monitor: the cost of the monitors on the act path, against floors measured in the same
 * run.
 *
 *   bench_monitor [ROUNDS]      (default 15; built by tests/monitor/CMakeLists.txt)
 *
 * Histogram: nanoseconds per recorded value for veer_hist_record (one writer),
 * veer_hist_record_shared (atomic read-modify-write) and veer_hist_recorder_record (the interval
 * recorder), against the floor of a plain non-atomic increment of a counter array at an index
 * taken from the same values (the loop, the load of the value and the touch of the memory).
 * Reader side: microseconds per summary (count, min, max, mean and four percentiles).
 *
 * Drift: nanoseconds per veer_drift_add and per veer_drift_check for 8, 32 and 64 features
 * (10 bins, window 1000), against the floor of the bare Mahalanobis quadratic form
 * (x − μ)ᵀ P (x − μ) over P's lower triangle in a plain double loop: the one O(state_dim²) part
 * that cannot be avoided.
 *
 * Each figure is the median over rounds, measured and floor alternating so a burst of load from
 * other users hits both alike. A measurement, not a test: it asserts nothing and exits 0.
 */
#define _GNU_SOURCE
#include <math.h>
#include <sched.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"
#include "veer/drift.h"
#include "veer/histogram.h"
#include "veer/runtime.h"
#include "splitmix.h"

static uint64_t cpus_seen;

static void note_cpu(void)
{
    int c = sched_getcpu();
    if (c >= 0 && c < 64)
        cpus_seen |= 1ull << c;
}

static uint64_t rng_state = 0x2545f4914f6cdd1dull;

/* splitmix64, so every run draws the same inputs. */
static uint64_t next_u64(void)
{
    return bench_splitmix64(&rng_state);
}

static double uniform01(void)
{
    return (double)(next_u64() >> 11) / 9007199254740992.0;
}

static double normal(void)
{
    double u = uniform01(), v = uniform01();
    return sqrt(-2.0 * log(u + 1e-300)) * cos(2.0 * M_PI * v);
}

static int cmp_double(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return x < y ? -1 : x > y;
}

static double median(double *v, int n)
{
    qsort(v, (size_t)n, sizeof *v, cmp_double);
    return n % 2 ? v[n / 2] : 0.5 * (v[n / 2 - 1] + v[n / 2]);
}

/* ---- Histogram ----------------------------------------------------------------------------- */

enum { VALUES = 1 << 20 };
static volatile uint64_t sink;

static double time_floor(const uint64_t *vals, uint64_t *plain)
{
    uint64_t t0 = veer__now_ns();
    for (size_t i = 0; i < VALUES; i++)
        plain[(vals[i] >> 10) & 4095u]++;
    uint64_t t1 = veer__now_ns();
    sink += plain[vals[0] & 4095u];
    return (double)(t1 - t0) / VALUES;
}

static void bench_histogram(int rounds)
{
    uint64_t *vals = malloc(VALUES * sizeof *vals);
    uint64_t *plain = calloc(4096, sizeof *plain);
    double *floor_ns = malloc((size_t)rounds * sizeof(double));
    double *rec_ns = malloc((size_t)rounds * sizeof(double));
    double *shared_ns = malloc((size_t)rounds * sizeof(double));
    double *interval_ns = malloc((size_t)rounds * sizeof(double));
    double *summary_us = malloc((size_t)rounds * sizeof(double));
    /* Latencies like an act path's: log-normal around 40 µs with a long tail. */
    for (size_t i = 0; i < VALUES; i++)
        vals[i] = (uint64_t)(40000.0 * exp(0.8 * normal()));
    veer_hist *h, *hs, *interval;
    veer_hist_recorder *rec;
    if (veer_hist_create(&h) || veer_hist_create(&hs) || veer_hist_create(&interval) ||
        veer_hist_recorder_create(&rec)) {
        fprintf(stderr, "bench_monitor: out of memory\n");
        exit(0);
    }
    for (int r = 0; r < rounds; r++) {
        note_cpu();
        floor_ns[r] = time_floor(vals, plain);

        uint64_t t0 = veer__now_ns();
        for (size_t i = 0; i < VALUES; i++)
            veer_hist_record(h, vals[i]);
        rec_ns[r] = (double)(veer__now_ns() - t0) / VALUES;

        t0 = veer__now_ns();
        for (size_t i = 0; i < VALUES; i++)
            veer_hist_record_shared(hs, vals[i]);
        shared_ns[r] = (double)(veer__now_ns() - t0) / VALUES;

        t0 = veer__now_ns();
        for (size_t i = 0; i < VALUES; i++)
            veer_hist_recorder_record(rec, vals[i]);
        interval_ns[r] = (double)(veer__now_ns() - t0) / VALUES;
        veer_hist_recorder_take(rec, interval);

        veer_hist_summary s;
        t0 = veer__now_ns();
        for (int k = 0; k < 100; k++)
            veer_hist_summarize(h, &s);
        summary_us[r] = (double)(veer__now_ns() - t0) / 100.0 / 1000.0;
        sink += s.p99;
        note_cpu();
    }
    veer_hist_summary s;
    veer_hist_summarize(h, &s);
    double fl = median(floor_ns, rounds);
    printf("histogram (%u buckets, %d rounds of %d values)\n", veer_hist_bucket_count(), rounds,
           VALUES);
    printf("  floor: plain increment           %6.2f ns/value\n", fl);
    double m = median(rec_ns, rounds);
    printf("  veer_hist_record (one writer)     %6.2f ns/value  %5.2fx floor\n", m, m / fl);
    m = median(shared_ns, rounds);
    printf("  veer_hist_record_shared (atomic)  %6.2f ns/value  %5.2fx floor\n", m, m / fl);
    m = median(interval_ns, rounds);
    printf("  veer_hist_recorder_record         %6.2f ns/value  %5.2fx floor\n", m, m / fl);
    printf("  veer_hist_summarize (reader)      %6.2f us/call\n", median(summary_us, rounds));
    printf("  recorded data: p50 %.1f us, p99 %.1f us, p99.9 %.1f us, max %.1f us\n", s.p50 / 1e3,
           s.p99 / 1e3, s.p999 / 1e3, s.max / 1e3);
    veer_hist_destroy(h);
    veer_hist_destroy(hs);
    veer_hist_destroy(interval);
    veer_hist_recorder_destroy(rec);
    free(vals);
    free(plain);
    free(floor_ns);
    free(rec_ns);
    free(shared_ns);
    free(interval_ns);
    free(summary_us);
}

/* ---- Drift --------------------------------------------------------------------------------- */

enum { STATES = 20000, BINS = 10 };

/* The quadratic form over P's lower triangle (P is symmetric), with the differences computed
 * once into a buffer: the least arithmetic the distance needs. */
static double quad_floor(const double *p, const double *mu, const float *x, uint32_t n,
                         double *diff)
{
    double t = 0.0;
    for (uint32_t i = 0; i < n; i++)
        diff[i] = (double)x[i] - mu[i];
    for (uint32_t i = 0; i < n; i++) {
        double acc = 0.0;
        for (uint32_t j = 0; j < i; j++)
            acc += p[i * n + j] * diff[j];
        t += diff[i] * (2.0 * acc + p[i * n + i] * diff[i]);
    }
    return t;
}

static void bench_drift(uint32_t n, int rounds)
{
    /* Training statistics of independent standard normal features: identity covariance and
     * precision, standard normal deciles as edges (from memory), and plausible p99 / p99.9
     * distances near sqrt(n) (only the cost matters here). */
    static const float deciles[BINS - 1] = {-1.2816f, -0.8416f, -0.5244f, -0.2533f, 0.0f,
                                            0.2533f,  0.5244f,  0.8416f,  1.2816f};
    float *mean = calloc(n, sizeof(float)), *cov = calloc((size_t)n * n, sizeof(float));
    float *edges = malloc((size_t)n * (BINS - 1) * sizeof(float));
    double *pd = calloc((size_t)n * n, sizeof(double)), *mud = calloc(n, sizeof(double));
    double *diff = malloc(n * sizeof(double));
    float *states = malloc((size_t)STATES * n * sizeof(float));
    double *add_ns = malloc((size_t)rounds * sizeof(double));
    double *check_ns = malloc((size_t)rounds * sizeof(double));
    double *floor_ns = malloc((size_t)rounds * sizeof(double));
    for (uint32_t i = 0; i < n; i++) {
        cov[i * n + i] = 1.0f;
        pd[i * n + i] = 1.0;
        memcpy(edges + (size_t)i * (BINS - 1), deciles, sizeof deciles);
    }
    for (size_t k = 0; k < (size_t)STATES * n; k++)
        states[k] = (float)normal();
    veer_drift_training t = {
        n, mean, cov, cov, BINS, edges, sqrtf((float)n) + 2.33f, sqrtf((float)n) + 3.1f};
    veer_drift *d;
    veer_error err;
    if (veer_drift_create(&t, NULL, &d, &err) != 0) {
        fprintf(stderr, "bench_monitor: %s: %s\n", err.field, err.message);
        exit(0);
    }
    for (int r = 0; r < rounds; r++) {
        note_cpu();
        uint64_t t0 = veer__now_ns();
        double acc = 0.0;
        for (size_t s = 0; s < STATES; s++)
            acc += quad_floor(pd, mud, states + s * n, n, diff);
        floor_ns[r] = (double)(veer__now_ns() - t0) / STATES;
        sink += (uint64_t)acc;

        t0 = veer__now_ns();
        for (size_t s = 0; s < STATES; s++)
            veer_drift_add(d, states + s * n, NULL, NULL);
        add_ns[r] = (double)(veer__now_ns() - t0) / STATES;

        t0 = veer__now_ns();
        int out = 0;
        for (size_t s = 0; s < STATES; s++)
            out += veer_drift_check(d, states + s * n, NULL);
        check_ns[r] = (double)(veer__now_ns() - t0) / STATES;
        sink += (uint64_t)out;
        note_cpu();
    }
    double fl = median(floor_ns, rounds), a = median(add_ns, rounds), c = median(check_ns, rounds);
    printf("drift, %2u features, %d bins, window 1000 (%d rounds of %d states)\n", n, BINS, rounds,
           STATES);
    printf("  floor: bare quadratic form        %7.1f ns/state\n", fl);
    printf("  veer_drift_add                    %7.1f ns/state  %5.2fx floor\n", a, a / fl);
    printf("  veer_drift_check (act path)       %7.1f ns/state  %5.2fx floor\n", c, c / fl);
    veer_drift_destroy(d);
    free(mean);
    free(cov);
    free(edges);
    free(pd);
    free(mud);
    free(diff);
    free(states);
    free(add_ns);
    free(check_ns);
    free(floor_ns);
}

int main(int argc, char **argv)
{
    int rounds = argc > 1 ? atoi(argv[1]) : 15;
    if (rounds < 1 || rounds > 1000) {
        fprintf(stderr, "usage: bench_monitor [ROUNDS 1..1000]\n");
        return 2;
    }
    printf("bench_monitor: OpenBLAS kernel %s (unused by the monitors)\n", veer_blas_kernel());
    bench_histogram(rounds);
    bench_drift(8, rounds);
    bench_drift(32, rounds);
    bench_drift(64, rounds);
    printf("CPUs this thread ran on:");
    for (int c = 0; c < 64; c++)
        if (cpus_seen & (1ull << c))
            printf(" %d", c);
    printf("\n");
    return 0;
}
