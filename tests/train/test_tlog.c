/* Every bad transition log is refused with VEER_ELOG (or VEER_ENPY / VEER_EIO for a file that is
 * not a readable .npy), a field naming the file, and a message naming the row and the problem.
 * The good cases check the values arrive unchanged (int64 discrete actions, bool episode
 * ends). Rule under test: bad input gets a clear error, never a crash or changed data. */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "base/base.h"
#include "base/npy.h"
#include "train/tlog.h"

static char dir[256];
static char ps[512], pa[512], pn[512], pd[512];

static void put(const char *path, veer__npy_dtype dt, uint32_t ndim, uint64_t r, uint64_t c,
                const void *data)
{
    uint64_t shape[2] = {r, c};
    assert_int_equal(veer__npy_write(path, dt, ndim, shape, data, NULL), 0);
}

/* A valid discrete log of 6 transitions on a 2-feature index state (counts 3 x 4). */
static float S[12] = {0, 0, 1, 2, 2, 3, 0, 1, 1, 1, 2, 0};
static float A[6] = {0, 1, 2, 3, 4, 0};
static float N[12] = {0, 1, 1, 3, 2, 3, 1, 1, 1, 0, 2, 1};

static void write_good(void)
{
    put(ps, VEER_NPY_F32, 2, 6, 2, S);
    put(pa, VEER_NPY_F32, 1, 6, 0, A);
    put(pn, VEER_NPY_F32, 2, 6, 2, N);
}

static veer__tlog_spec discrete_spec(void)
{
    static const uint32_t counts[2] = {3, 4};
    veer__tlog_spec s = {.states_path = ps, .actions_path = pa, .next_states_path = pn,
                         .action_count = 5, .action_dim = 1, .nstate_counts = 2,
                         .state_counts = counts};
    return s;
}

static void expect_refused(const veer__tlog_spec *spec, int code, const char *file,
                           const char *words)
{
    veer__tlog log;
    veer_error err;
    veer_error_clear(&err);
    int rc = veer__tlog_load(spec, &log, &err);
    if (rc != code || strcmp(err.field, file) != 0 || strstr(err.message, words) == NULL)
        fail_msg("want %s in %s with '%s'; got %s field '%s': %s", veer_errname(code), file,
                 words, veer_errname(rc), err.field, err.message);
    assert_null(log.states);
}

static void test_good_log(void **state)
{
    (void)state;
    write_good();
    int64_t a64[6] = {0, 1, 2, 3, 4, 0};
    put(pa, VEER_NPY_I64, 1, 6, 0, a64);
    unsigned char d[6] = {0, 0, 1, 0, 0, 1};
    put(pd, VEER_NPY_BOOL, 1, 6, 0, d);
    veer__tlog_spec spec = discrete_spec();
    spec.dones_path = pd;
    veer__tlog log;
    veer_error err;
    if (veer__tlog_load(&spec, &log, &err) != 0)
        fail_msg("%s", err.message);
    assert_int_equal(log.n, 6);
    assert_memory_equal(log.states, S, sizeof S);
    assert_memory_equal(log.next_states, N, sizeof N);
    for (int i = 0; i < 6; i++) {
        assert_true(log.actions[i] == (float)a64[i]);
        assert_true(log.cont[i] == (d[i] ? 0.0f : 1.0f));
    }
    assert_non_null(strstr(log.digest, "dones="));
    veer__tlog_free(&log);
    /* Time-limit cuts: checked the same, but the successor measure runs on through them. */
    spec.ends_truncated = 1;
    assert_int_equal(veer__tlog_load(&spec, &log, &err), 0);
    for (int i = 0; i < 6; i++)
        assert_true(log.cont[i] == 1.0f);
    veer__tlog_free(&log);
}

static void test_bad_states(void **state)
{
    (void)state;
    veer__tlog_spec spec = discrete_spec();
    write_good();
    double s64[12] = {0};
    put(ps, VEER_NPY_F64, 2, 6, 2, s64);
    expect_refused(&spec, VEER_ELOG, "s.npy", "float32");
    put(ps, VEER_NPY_F32, 1, 12, 0, S);
    expect_refused(&spec, VEER_ELOG, "s.npy", "shape (n, state_dim)");
    put(ps, VEER_NPY_F32, 2, 0, 2, NULL);
    expect_refused(&spec, VEER_ELOG, "s.npy", "empty");
    float bad[12];
    memcpy(bad, S, sizeof bad);
    bad[7] = NAN;
    put(ps, VEER_NPY_F32, 2, 6, 2, bad);
    expect_refused(&spec, VEER_ELOG, "s.npy", "row 3, column 1");
    bad[7] = 5; /* beyond the count 4 of feature 1 */
    put(ps, VEER_NPY_F32, 2, 6, 2, bad);
    expect_refused(&spec, VEER_ELOG, "s.npy", "whole numbers in [0, 4)");
    bad[7] = 0.5f;
    put(ps, VEER_NPY_F32, 2, 6, 2, bad);
    expect_refused(&spec, VEER_ELOG, "s.npy", "whole numbers");
    write_good();
    memcpy(bad, N, sizeof bad);
    bad[0] = INFINITY;
    put(pn, VEER_NPY_F32, 2, 6, 2, bad);
    expect_refused(&spec, VEER_ELOG, "n.npy", "row 0, column 0 is inf");
    put(pn, VEER_NPY_F32, 2, 5, 2, N);
    expect_refused(&spec, VEER_ELOG, "n.npy", "has 5 rows but the states file has 6");
    put(pn, VEER_NPY_F32, 2, 4, 3, N);
    expect_refused(&spec, VEER_ELOG, "n.npy", "shape (n, 2)");
}

static void test_bad_actions(void **state)
{
    (void)state;
    veer__tlog_spec spec = discrete_spec();
    write_good();
    float a[6];
    memcpy(a, A, sizeof a);
    a[4] = 5;
    put(pa, VEER_NPY_F32, 1, 6, 0, a);
    expect_refused(&spec, VEER_ELOG, "a.npy", "row 4 holds action 5; the declared count is 5");
    a[4] = 1.5f;
    put(pa, VEER_NPY_F32, 1, 6, 0, a);
    expect_refused(&spec, VEER_ELOG, "a.npy", "holds action 1.5");
    int64_t a64[6] = {0, 1, -1, 0, 0, 0};
    put(pa, VEER_NPY_I64, 1, 6, 0, a64);
    expect_refused(&spec, VEER_ELOG, "a.npy", "row 2 holds action -1");
    put(pa, VEER_NPY_F32, 1, 5, 0, A);
    expect_refused(&spec, VEER_ELOG, "a.npy", "has 5 rows");

    /* Continuous: two dimensions within [-1, 1] x [0, 2]. */
    float lo[2] = {-1, 0}, hi[2] = {1, 2};
    veer__tlog_spec cs = {.states_path = ps, .actions_path = pa, .next_states_path = pn,
                          .action_dim = 2, .low = lo, .high = hi};
    float ac[12] = {0, 0, 1, 2, -1, 0, 0.5f, 1, 0, 2.5f, 0, 1};
    put(pa, VEER_NPY_F32, 2, 6, 2, ac);
    expect_refused(&cs, VEER_ELOG, "a.npy", "row 4, action 1 is 2.5, outside the declared bounds");
    put(pa, VEER_NPY_F32, 2, 4, 3, ac);
    expect_refused(&cs, VEER_ELOG, "a.npy", "shape (n, 2)");
    int32_t ai[12] = {0};
    put(pa, VEER_NPY_I32, 2, 6, 2, ai);
    expect_refused(&cs, VEER_ELOG, "a.npy", "float32, not int32");
}

static void test_bad_dones_and_files(void **state)
{
    (void)state;
    veer__tlog_spec spec = discrete_spec();
    write_good();
    spec.dones_path = pd;
    float d[6] = {0, 0, 2, 0, 0, 1};
    put(pd, VEER_NPY_F32, 1, 6, 0, d);
    expect_refused(&spec, VEER_ELOG, "d.npy", "row 2 is 2; episode ends must be 0 or 1");
    put(pd, VEER_NPY_F32, 1, 4, 0, d);
    expect_refused(&spec, VEER_ELOG, "d.npy", "shape (6,)");
    FILE *f = fopen(pd, "wb");
    fputs("episode,end\n0\n1\n", f); /* a CSV where a .npy belongs */
    fclose(f);
    expect_refused(&spec, VEER_ENPY, "d.npy", "not a .npy file");
    remove(pd);
    expect_refused(&spec, VEER_EIO, "d.npy", "cannot open");
}

static int setup(void **state)
{
    (void)state;
    snprintf(dir, sizeof dir, "/tmp/veer_test_tlog_XXXXXX");
    if (mkdtemp(dir) == NULL)
        return -1;
    snprintf(ps, sizeof ps, "%s/s.npy", dir);
    snprintf(pa, sizeof pa, "%s/a.npy", dir);
    snprintf(pn, sizeof pn, "%s/n.npy", dir);
    snprintf(pd, sizeof pd, "%s/d.npy", dir);
    return 0;
}

static int teardown(void **state)
{
    (void)state;
    char cmd[600];
    snprintf(cmd, sizeof cmd, "rm -rf '%s'", dir);
    return system(cmd) == 0 ? 0 : -1;
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_good_log),
        cmocka_unit_test(test_bad_states),
        cmocka_unit_test(test_bad_actions),
        cmocka_unit_test(test_bad_dones_and_files),
    };
    return cmocka_run_group_tests(tests, setup, teardown);
}
