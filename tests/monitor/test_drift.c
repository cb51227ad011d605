/* Unit tests of the drift monitor that need C: a worked example small enough to do by hand,
 * every allocation failure unwinding cleanly, and a reader taking snapshots while the writer
 * adds states on another thread. The NumPy/SciPy comparisons are in test_monitor_reference.py. */
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
#include "veer/drift.h"

#define assert_near(a, b, tol) assert_true(fabs((double)(a) - (double)(b)) <= (tol))

/* One feature, training mean 0 and variance 4 (precision 0.25), two bins split at 0,
 * p99 distance 2.5, p999 distance 3. */
static const float mean1[1] = {0.0f}, cov1[1] = {4.0f}, prec1[1] = {0.25f}, edges1[1] = {0.0f};
static veer_drift_training train1(void)
{
    return (veer_drift_training){1, mean1, cov1, prec1, 2, edges1, 2.5f, 3.0f};
}

static void test_worked_example(void **state)
{
    veer_drift_training t = train1();
    veer_drift_config cfg;
    veer_drift_config_init(&cfg);
    cfg.window = 4;
    veer_drift *d;
    veer_error err;
    assert_int_equal(veer_drift_create(&t, &cfg, &d, &err), 0);
    veer_drift_report *r;
    assert_int_equal(veer_drift_report_create(d, &r), 0);

    /* Window {-1, -1, -1, 1}: live shares (3/4, 1/4) against (1/2, 1/2), by hand:
     * PSI = (0.75 - 0.5) ln(1.5) + (0.25 - 0.5) ln(0.5) = 0.25 ln 3 = 0.274653.
     * Mean -0.5, training std 2: shift -0.25. */
    const float xs[4] = {-1, -1, -1, 1};
    veer_drift_result res;
    for (int i = 0; i < 4; i++)
        assert_int_equal(veer_drift_add(d, &xs[i], &res, &err), 0);
    assert_near(res.mahalanobis, 0.5, 1e-12); /* |1 - 0| / 2 */
    assert_int_equal(veer_drift_read(d, r), 0);
    assert_near(r->psi[0], 0.25 * log(3.0), 1e-12);
    assert_near(r->mean_shift[0], -0.25, 1e-12);
    assert_int_equal(r->psi_level[0], VEER_DRIFT_ALARM); /* 0.2747 >= 0.25 */
    assert_int_equal(r->exceed_count, 0);

    /* 6 is 3 stds out: beyond p99 (2.5) but not beyond p999 (3, not strictly greater). */
    float far = 6.0f;
    assert_int_equal(veer_drift_add(d, &far, &res, NULL), 0);
    assert_int_equal(res.out_of_coverage, 0);
    assert_int_equal(veer_drift_read(d, r), 0);
    assert_int_equal(r->exceed_count, 1);
    assert_near(r->exceed_rate, 0.25, 1e-15);
    assert_int_equal(r->exceed_level, VEER_DRIFT_ALARM);
    /* Window {-1, -1, 1, 6}: shares (1/2, 1/2): PSI 0, so the PSI alarm clears to OK. */
    assert_near(r->psi[0], 0.0, 1e-15);
    assert_int_equal(r->psi_level[0], VEER_DRIFT_OK);
    assert_true(res.changed & VEER_DRIFT_CHANGED_PSI);
    double dist;
    float further = 6.5f;
    assert_int_equal(veer_drift_check(d, &further, &dist), 1);
    assert_near(dist, 3.25, 1e-12);
    assert_string_equal(veer_drift_level_name(r->level), "alarm");

    /* Empty live bin: the floor 1e-4 stands in for 0. Window {1, 1, 1, 1}:
     * PSI = (1 - 0.5) ln 2 + (1e-4 - 0.5) ln(2e-4). */
    float one = 1.0f;
    for (int i = 0; i < 4; i++)
        veer_drift_add(d, &one, NULL, NULL);
    veer_drift_read(d, r);
    assert_near(r->psi[0], 0.5 * log(2.0) + (1e-4 - 0.5) * log(2e-4), 1e-12);

    veer_drift_report_destroy(r);
    veer_drift_destroy(d);
}

static void test_bad_arguments(void **state)
{
    veer_drift_training t = train1();
    veer_drift *d = (void *)1;
    veer_error err;
    assert_int_equal(veer_drift_create(NULL, NULL, &d, &err), VEER_EINVAL);
    assert_int_equal(veer_drift_create(&t, NULL, NULL, &err), VEER_EINVAL);
    t.state_dim = 0;
    assert_int_equal(veer_drift_create(&t, NULL, &d, &err), VEER_EFIELD);
    assert_string_equal(err.field, "state_dim");
    assert_null(d);
    t = train1();
    t.precision = NULL;
    assert_int_equal(veer_drift_create(&t, NULL, &d, &err), VEER_EINVAL);
    assert_string_equal(err.field, "precision");
    t = train1();
    veer_drift_config cfg;
    veer_drift_config_init(&cfg);
    cfg.psi_alarm_clear = 0.05; /* below the watch clear */
    assert_int_equal(veer_drift_create(&t, &cfg, &d, &err), VEER_EFIELD);
    assert_string_equal(err.field, "psi_alarm_clear");
    assert_int_equal(veer_drift_create(&t, NULL, &d, &err), 0);
    assert_int_equal(veer_drift_add(d, NULL, NULL, &err), VEER_EINVAL);
    assert_int_equal(veer_drift_check(d, NULL, NULL), VEER_EINVAL);
    assert_int_equal(veer_drift_read(d, NULL), VEER_EINVAL);
    veer_drift_report_destroy(NULL);
    veer_drift_destroy(d);
    veer_drift_destroy(NULL);
}

/* Fails each allocation of veer_drift_create in turn (SQLite test_malloc idea): every failure
 * returns VEER_ENOMEM with nothing leaked. */
static void test_create_oom(void **state)
{
    veer_drift_training t = train1();
    assert_int_equal(veer_set_allocator(&failing_alloc), 0);
    int succeeded = 0;
    for (fail_at = 0; fail_at < 64 && !succeeded; fail_at++) {
        alloc_calls = live_allocs = 0;
        veer_drift *d = (void *)1;
        veer_error err;
        int rc = veer_drift_create(&t, NULL, &d, &err);
        if (rc == 0) {
            veer_drift_destroy(d);
            succeeded = 1;
        } else {
            assert_int_equal(rc, VEER_ENOMEM);
            assert_null(d);
        }
        assert_int_equal(live_allocs, 0);
    }
    veer_set_allocator(NULL);
    assert_true(succeeded);
    assert_true(fail_at > 10);
}

/* The writer adds states (i mod 9) - 4 (one feature, all within the p99 distance and spread
 * over both bins, so no level changes and no extra publications); a reader snapshots
 * concurrently. Every snapshot must be one the writer published whole: states_total a multiple
 * of publish_every, the fill min(total, window), and the mean shift that of the window's values
 * (exact integers). */
enum { WRITES = 200000, WINDOW = 64, EVERY = 16 };
static veer_drift *shared_drift;
static atomic_int writer_done, reader_started;

static void *writer_main(void *arg)
{
    while (!atomic_load(&reader_started)) /* so the two overlap even on a busy machine */
        sched_yield();
    for (int i = 0; i < WRITES; i++) {
        float x = (float)(i % 9 - 4);
        veer_drift_add(shared_drift, &x, NULL, NULL);
    }
    atomic_store(&writer_done, 1);
    return NULL;
}

static void test_snapshot_concurrent(void **state)
{
    veer_drift_training t = train1();
    veer_drift_config cfg;
    veer_drift_config_init(&cfg);
    cfg.window = WINDOW;
    cfg.publish_every = EVERY;
    assert_int_equal(veer_drift_create(&t, &cfg, &shared_drift, NULL), 0);
    veer_drift_report *r;
    assert_int_equal(veer_drift_report_create(shared_drift, &r), 0);
    atomic_store(&writer_done, 0);
    atomic_store(&reader_started, 0);
    pthread_t th;
    assert_int_equal(pthread_create(&th, NULL, writer_main, NULL), 0);
    uint64_t last_seq = 0, snaps = 0;
    do {
        atomic_store(&reader_started, 1);
        assert_int_equal(veer_drift_snapshot(shared_drift, r), 0);
        assert_true(r->publish_seq >= last_seq);
        last_seq = r->publish_seq;
        uint64_t n = r->states_total;
        assert_int_equal(n % EVERY, 0);
        assert_int_equal(r->fill, n < WINDOW ? n : WINDOW);
        if (n >= WINDOW) {
            double s = 0;
            for (uint64_t k = n - WINDOW; k < n; k++)
                s += (double)(k % 9) - 4.0;
            assert_near(r->mean_shift[0], s / WINDOW / 2.0, 1e-9);
        }
        snaps++;
    } while (!atomic_load(&writer_done));
    pthread_join(th, NULL);
    print_message("%llu snapshots during the writes\n", (unsigned long long)snaps);
    assert_int_equal(veer_drift_snapshot(shared_drift, r), 0);
    assert_int_equal(r->level_changes, 0);
    assert_int_equal(r->states_total, WRITES);
    veer_drift_report_destroy(r);
    veer_drift_destroy(shared_drift);
}

/* A state wider than veer_drift_check's stack buffer (512 features) takes the unbuffered path;
 * its distance must equal the one veer_drift_add computes with the writer's buffer, and the
 * closed form for a diagonal precision: sqrt(Σ p_i (x_i − μ_i)²). */
static void test_wide_state(void **state)
{
    enum { N = 700 };
    float *mean = calloc(N, sizeof(float)), *cov = calloc((size_t)N * N, sizeof(float));
    float *prec = calloc((size_t)N * N, sizeof(float)), *edges = calloc(N, sizeof(float));
    float *x = malloc(N * sizeof(float));
    double want = 0.0;
    for (int i = 0; i < N; i++) {
        mean[i] = (float)(i % 7) * 0.25f;
        cov[i * N + i] = 2.0f;
        prec[i * N + i] = 0.5f;
        edges[i] = mean[i];
        x[i] = mean[i] + (float)((i % 5) - 2) * 0.5f;
        want += 0.5 * ((double)x[i] - mean[i]) * ((double)x[i] - mean[i]);
    }
    want = sqrt(want);
    veer_drift_training t = {N, mean, cov, prec, 2, edges, 40.0f, 50.0f};
    veer_drift_config cfg;
    veer_drift_config_init(&cfg);
    cfg.window = 4;
    veer_drift *d;
    assert_int_equal(veer_drift_create(&t, &cfg, &d, NULL), 0);
    double got;
    assert_int_equal(veer_drift_check(d, x, &got), 0);
    assert_near(got, want, 1e-9 * want);
    veer_drift_result res;
    assert_int_equal(veer_drift_add(d, x, &res, NULL), 0);
    assert_near(res.mahalanobis, want, 1e-9 * want);
    veer_drift_destroy(d);
    free(mean);
    free(cov);
    free(prec);
    free(edges);
    free(x);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_worked_example),
        cmocka_unit_test(test_bad_arguments),
        cmocka_unit_test(test_create_oom),
        cmocka_unit_test(test_snapshot_concurrent),
        cmocka_unit_test(test_wide_state),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
