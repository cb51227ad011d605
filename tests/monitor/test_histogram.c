/* Unit tests of the latency histogram: the bucket layout against its definition (every value
 * lies in its bucket, width <= 1/128 of the lower bound), clamping, min/max/mean against exact
 * arithmetic, merge against recording into one histogram, cumulative counts and percentiles
 * against brute force over the same values (nearest-rank definition, sorted data), the interval
 * recorder under a concurrent writer, and bad arguments. The NumPy comparisons are in
 * test_monitor_reference.py. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <math.h>
#include <pthread.h>
#include <sched.h>
#include <stdatomic.h>
#include <stdlib.h>
#include <string.h>

#include "veer/alloc.h"
#include "failing_alloc.h"
#include "veer/histogram.h"

/* cmocka 1.1's assert_float_equal works in single precision; these checks need doubles. */
#define assert_near(a, b, tol) assert_true(fabs((double)(a) - (double)(b)) <= (tol))

static uint64_t lcg_state = 12345;
static uint64_t lcg(void)
{
    /* Knuth's MMIX constants (TAOCP vol. 2, 3.3.4), from memory. */
    lcg_state = lcg_state * 6364136223846793005ull + 1442695040888963407ull;
    return lcg_state >> 11;
}

static int cmp_u64(const void *a, const void *b)
{
    uint64_t x = *(const uint64_t *)a, y = *(const uint64_t *)b;
    return x < y ? -1 : x > y;
}

static void test_bucket_layout(void **state)
{
    veer_hist *h;
    assert_int_equal(veer_hist_create(&h), 0);
    /* Walk all buckets: contiguous, starting at 1 µs, covering 60 s, width/lower <= 1/128. */
    uint32_t n = veer_hist_bucket_count();
    assert_int_equal(n, 3302);
    uint32_t seen = 0;
    uint64_t expect_lo = VEER_HIST_LOWEST_NS;
    uint64_t prev_hi = 0;
    for (uint64_t v = VEER_HIST_LOWEST_NS; v <= VEER_HIST_HIGHEST_NS;) {
        uint64_t hi = veer_hist_bucket_ceiling(v);
        assert_true(hi >= v);
        assert_true(hi > prev_hi);
        /* width relative to the bucket's lowest value */
        double width = (double)(hi - expect_lo + 1);
        if (expect_lo != VEER_HIST_LOWEST_NS) /* the first bucket starts mid-bucket at 1000 */
            assert_true(width / (double)expect_lo <= 1.0 / 128.0 + 1e-15);
        prev_hi = hi;
        expect_lo = hi + 1;
        seen++;
        v = hi + 1;
    }
    assert_int_equal(seen, n);
    /* Values inside one bucket map to the same ceiling; next value to the next bucket. */
    uint64_t c = veer_hist_bucket_ceiling(123456789);
    assert_int_equal(veer_hist_bucket_ceiling(c), c);
    assert_true(veer_hist_bucket_ceiling(c + 1) > c);
    veer_hist_destroy(h);
}

static void test_clamp_min_max_mean(void **state)
{
    veer_hist *h;
    assert_int_equal(veer_hist_create(&h), 0);
    veer_hist_record(h, 5);               /* below 1 µs */
    veer_hist_record(h, 0);               /* below */
    veer_hist_record(h, 120000000000ull); /* 120 s, above */
    veer_hist_record(h, 2500);
    assert_int_equal(veer_hist_count(h), 4);
    assert_int_equal(veer_hist_underflow(h), 2);
    assert_int_equal(veer_hist_overflow(h), 1);
    assert_int_equal(veer_hist_min(h), 0);
    assert_int_equal(veer_hist_max(h), 120000000000ull);
    assert_near(veer_hist_mean(h), (5.0 + 0 + 120e9 + 2500) / 4.0, 1e-3);
    assert_int_equal(veer_hist_sum(h), 5 + 0 + 120000000000ull + 2500);
    assert_int_equal(veer_hist_count_le(h, veer_hist_bucket_ceiling(1000)), 2);
    /* The overflowed value sits in the last bucket; the maximum is reported exactly. */
    uint64_t v;
    assert_int_equal(veer_hist_percentile(h, 100.0, &v), 0);
    assert_int_equal(v, 120000000000ull);
    assert_int_equal(veer_hist_percentile(h, 0.0, &v), 0);
    assert_int_equal(v, 1003); /* highest value of the first bucket [1000, 1003] */
    veer_hist_reset(h);
    assert_int_equal(veer_hist_count(h), 0);
    assert_int_equal(veer_hist_min(h), 0);
    assert_int_equal(veer_hist_max(h), 0);
    assert_int_equal(veer_hist_underflow(h), 0);
    veer_hist_destroy(h);
}

/* Exact nearest-rank percentile of sorted data: x[ceil(p/100 n) - 1]. */
static uint64_t nearest_rank(const uint64_t *sorted, size_t n, double pct)
{
    size_t r = (size_t)ceil(pct / 100.0 * (double)n - 1e-9);
    if (r < 1)
        r = 1;
    return sorted[r - 1];
}

static void test_percentiles_against_sorted(void **state)
{
    enum { N = 200000 };
    uint64_t *x = malloc(N * sizeof *x);
    veer_hist *h;
    assert_int_equal(veer_hist_create(&h), 0);
    for (size_t i = 0; i < N; i++) {
        /* log-uniform over 1 µs .. 1 s */
        double u = (double)(lcg() & 0xFFFFFFFFu) / 4294967296.0;
        x[i] = (uint64_t)(1000.0 * pow(1e6, u));
        veer_hist_record(h, x[i]);
    }
    qsort(x, N, sizeof *x, cmp_u64);
    const double pcts[] = {0, 1, 10, 25, 50, 75, 90, 99, 99.9, 99.99, 100};
    for (size_t k = 0; k < sizeof pcts / sizeof pcts[0]; k++) {
        uint64_t got, want = nearest_rank(x, N, pcts[k]);
        assert_int_equal(veer_hist_percentile(h, pcts[k], &got), 0);
        double rel = ((double)got - (double)want) / (double)want;
        /* Never below the true value, at most one bucket width (1/128) above. */
        assert_true(rel >= 0.0);
        assert_true(rel <= 1.0 / 128.0);
    }
    veer_hist_summary s;
    assert_int_equal(veer_hist_summarize(h, &s), 0);
    assert_int_equal(s.count, N);
    assert_int_equal(s.min, x[0]);
    assert_int_equal(s.max, x[N - 1]);
    uint64_t p;
    veer_hist_percentile(h, 99.9, &p);
    assert_int_equal(s.p999, p);
    veer_hist_percentile(h, 50, &p);
    assert_int_equal(s.p50, p);

    /* Cumulative counts at bucket ceilings are exact. */
    for (int t = 0; t < 50; t++) {
        uint64_t b = veer_hist_bucket_ceiling(x[lcg() % N]);
        uint64_t brute = 0;
        for (size_t i = 0; i < N; i++)
            brute += x[i] <= b;
        assert_int_equal(veer_hist_count_le(h, b), brute);
    }
    assert_int_equal(veer_hist_count_le(h, UINT64_MAX), N);
    assert_int_equal(veer_hist_count_le(h, 999), 0);

    /* Iteration: non-empty buckets in order, counts sum to N, cumulative matches count_le. */
    veer_hist_iter it;
    veer_hist_iter_init(&it, h);
    uint64_t total = 0, last_hi = 0;
    int buckets = 0;
    while (veer_hist_iter_next(&it)) {
        assert_true(it.count > 0);
        assert_true(it.lowest_ns > last_hi || buckets == 0);
        total += it.count;
        assert_int_equal(it.cumulative, total);
        if (buckets % 97 == 0)
            assert_int_equal(veer_hist_count_le(h, it.highest_ns), it.cumulative);
        last_hi = it.highest_ns;
        buckets++;
    }
    assert_int_equal(total, N);
    free(x);
    veer_hist_destroy(h);
}

static void test_merge_equals_single(void **state)
{
    veer_hist *a, *b, *all, *cp;
    assert_int_equal(veer_hist_create(&a), 0);
    assert_int_equal(veer_hist_create(&b), 0);
    assert_int_equal(veer_hist_create(&all), 0);
    assert_int_equal(veer_hist_create(&cp), 0);
    for (int i = 0; i < 50000; i++) {
        uint64_t v = lcg() % 5000000000ull;
        veer_hist_record(i % 3 ? a : b, v);
        veer_hist_record(all, v);
    }
    veer_hist_record(b, 70000000000ull);
    veer_hist_record(all, 70000000000ull);
    assert_int_equal(veer_hist_copy(cp, a), 0);
    assert_int_equal(veer_hist_merge(cp, b), 0);
    veer_hist_iter i1, i2;
    veer_hist_iter_init(&i1, cp);
    veer_hist_iter_init(&i2, all);
    int n1, n2;
    while ((n1 = veer_hist_iter_next(&i1)) & (n2 = veer_hist_iter_next(&i2))) {
        assert_int_equal(i1.lowest_ns, i2.lowest_ns);
        assert_int_equal(i1.count, i2.count);
    }
    assert_int_equal(n1, n2);
    assert_int_equal(veer_hist_min(cp), veer_hist_min(all));
    assert_int_equal(veer_hist_max(cp), veer_hist_max(all));
    assert_int_equal(veer_hist_underflow(cp), veer_hist_underflow(all));
    assert_int_equal(veer_hist_overflow(cp), 1);
    assert_near(veer_hist_mean(cp), veer_hist_mean(all), 1e-6);
    assert_int_equal(veer_hist_merge(cp, cp), VEER_EINVAL);
    veer_hist_destroy(a);
    veer_hist_destroy(b);
    veer_hist_destroy(all);
    veer_hist_destroy(cp);
}

static void test_bad_arguments(void **state)
{
    veer_hist *h;
    uint64_t v = 7;
    assert_int_equal(veer_hist_create(NULL), VEER_EINVAL);
    assert_int_equal(veer_hist_create(&h), 0);
    assert_int_equal(veer_hist_percentile(h, 50, &v), VEER_EEMPTY);
    assert_int_equal(v, 0);
    veer_hist_record(h, 5000);
    assert_int_equal(veer_hist_percentile(h, NAN, &v), VEER_EINVAL);
    assert_int_equal(veer_hist_percentile(h, -0.1, &v), VEER_EINVAL);
    assert_int_equal(veer_hist_percentile(h, 100.01, &v), VEER_EINVAL);
    assert_int_equal(veer_hist_percentile(h, INFINITY, &v), VEER_EINVAL);
    assert_int_equal(veer_hist_percentile(h, 50, NULL), VEER_EINVAL);
    assert_int_equal(veer_hist_summarize(h, NULL), VEER_EINVAL);
    assert_int_equal(veer_hist_merge(NULL, h), VEER_EINVAL);
    assert_int_equal(veer_hist_copy(h, NULL), VEER_EINVAL);
    veer_hist_summary s;
    veer_hist *e;
    assert_int_equal(veer_hist_create(&e), 0);
    assert_int_equal(veer_hist_summarize(e, &s), 0);
    assert_int_equal(s.count, 0);
    assert_int_equal(s.p99, 0);
    veer_hist_destroy(e);
    veer_hist_destroy(h);
    veer_hist_destroy(NULL);
    veer_hist_recorder_destroy(NULL);
    assert_int_equal(veer_hist_recorder_take(NULL, NULL), VEER_EINVAL);
}

/* Fails each allocation of the recorder's set-up in turn: ENOMEM, *out NULL, nothing leaked. */
static void test_recorder_oom(void **state)
{
    assert_int_equal(veer_set_allocator(&failing_alloc), 0);
    for (fail_at = 0; fail_at < 10; fail_at++) {
        alloc_calls = 0;
        live_allocs = 0;
        veer_hist_recorder *r = (void *)1;
        int rc = veer_hist_recorder_create(&r);
        if (rc == 0) {
            veer_hist_recorder_destroy(r);
            assert_int_equal(live_allocs, 0);
            break;
        }
        assert_int_equal(rc, VEER_ENOMEM);
        assert_null(r);
        assert_int_equal(live_allocs, 0);
    }
    assert_true(fail_at >= 3); /* three allocations: the recorder and two histograms */
    veer_set_allocator(NULL);
}

/* One writer records 1..N while a reader takes intervals; every value must land in exactly one
 * interval: the sum of interval counts is N and the merged intervals have min 1·1000, max N·1000.
 */
enum { REC_N = 2000000 };
static atomic_int writer_done, reader_started;
static void *writer_main(void *arg)
{
    veer_hist_recorder *r = arg;
    while (!atomic_load(&reader_started)) /* so the two overlap even on a busy machine */
        sched_yield();
    for (uint64_t i = 1; i <= REC_N; i++)
        veer_hist_recorder_record(r, i * 1000);
    atomic_store(&writer_done, 1);
    return NULL;
}

static void test_recorder_concurrent(void **state)
{
    veer_hist_recorder *r;
    veer_hist *interval, *total;
    assert_int_equal(veer_hist_recorder_create(&r), 0);
    assert_int_equal(veer_hist_create(&interval), 0);
    assert_int_equal(veer_hist_create(&total), 0);
    atomic_store(&writer_done, 0);
    atomic_store(&reader_started, 0);
    pthread_t t;
    assert_int_equal(pthread_create(&t, NULL, writer_main, r), 0);
    uint64_t sum_counts = 0;
    int takes = 0;
    while (!atomic_load(&writer_done)) {
        atomic_store(&reader_started, 1);
        veer_hist_reset(interval);
        assert_int_equal(veer_hist_recorder_take(r, interval), 0);
        sum_counts += veer_hist_count(interval);
        veer_hist_merge(total, interval);
        takes++;
    }
    pthread_join(t, NULL);
    veer_hist_reset(interval);
    veer_hist_recorder_take(r, interval);
    sum_counts += veer_hist_count(interval);
    veer_hist_merge(total, interval);
    assert_int_equal(sum_counts, REC_N);
    assert_int_equal(veer_hist_count(total), REC_N);
    assert_int_equal(veer_hist_min(total), 1000);
    assert_int_equal(veer_hist_max(total), (uint64_t)REC_N * 1000);
    assert_near(veer_hist_mean(total), 1000.0 * (REC_N + 1) / 2.0, 1e-3);
    print_message("%d intervals taken during the writes\n", takes);
    veer_hist_destroy(interval);
    veer_hist_destroy(total);
    veer_hist_recorder_destroy(r);
}

/* Several threads on one histogram with veer_hist_record_shared lose no count. */
static void *shared_main(void *arg)
{
    for (int i = 0; i < 200000; i++)
        veer_hist_record_shared(arg, 1000 + (uint64_t)i);
    return NULL;
}

static void test_record_shared(void **state)
{
    veer_hist *h;
    assert_int_equal(veer_hist_create(&h), 0);
    pthread_t t[3];
    for (int i = 0; i < 3; i++)
        pthread_create(&t[i], NULL, shared_main, h);
    for (int i = 0; i < 3; i++)
        pthread_join(t[i], NULL);
    assert_int_equal(veer_hist_count(h), 600000);
    assert_int_equal(veer_hist_min(h), 1000);
    assert_int_equal(veer_hist_max(h), 1000 + 199999);
    veer_hist_destroy(h);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_bucket_layout),
        cmocka_unit_test(test_clamp_min_max_mean),
        cmocka_unit_test(test_percentiles_against_sorted),
        cmocka_unit_test(test_merge_equals_single),
        cmocka_unit_test(test_bad_arguments),
        cmocka_unit_test(test_recorder_oom),
        cmocka_unit_test(test_recorder_concurrent),
        cmocka_unit_test(test_record_shared),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
