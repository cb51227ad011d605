/* C-level checks of the demo library that Python cannot make: every allocation failure in the
 * planner's set-up comes back as VEER_ENOMEM with nothing left allocated (the Nth-allocation
 * technique of SQLite's test_malloc.c and libuv's test-loop-oom.c), planning itself allocates
 * nothing, and the .npy writer reports an unwritable path as VEER_EIO naming "path" and leaves
 * no partial file. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <cmocka.h>

#include "cem.h"
#include "npy_write.h"
#include "veer/alloc.h"

static long fail_at, calls, outstanding;

static void *t_malloc(size_t n)
{
    if (++calls == fail_at)
        return NULL;
    void *p = malloc(n);
    outstanding += p != NULL;
    return p;
}

static void *t_calloc(size_t n, size_t s)
{
    if (++calls == fail_at)
        return NULL;
    void *p = calloc(n, s);
    outstanding += p != NULL;
    return p;
}

static void *t_realloc(void *p, size_t n)
{
    if (++calls == fail_at)
        return NULL;
    void *q = realloc(p, n);
    outstanding += p == NULL && q != NULL;
    return q;
}

static void t_free(void *p)
{
    outstanding -= p != NULL;
    free(p);
}

static const veer_allocator counting = {t_malloc, t_calloc, t_realloc, t_free};

static void planner_setup_survives_every_allocation_failure(void **state)
{
    (void)state;
    veer_arm_params p;
    veer_arm_params_default(&p);
    veer_arm_cem_config c;
    veer_arm_cem_config_default(&c);
    assert_int_equal(veer_set_allocator(&counting), 0);
    long n;
    for (n = 1;; n++) {
        fail_at = n;
        calls = outstanding = 0;
        veer_arm_cem *cem = NULL;
        veer_error err;
        int rc = veer_arm_cem_create(&c, &p, &veer_arm_tasks[0], &cem, &err);
        if (rc == 0) {
            /* Planning allocates nothing: the call count does not move. */
            long before = calls;
            double q[2] = {0.3, 1.2}, qd[2] = {0.0, 0.0}, tau[2];
            assert_int_equal(veer_arm_cem_plan(cem, q, qd, tau), 0);
            assert_int_equal(calls, before);
            veer_arm_cem_destroy(cem);
            assert_int_equal(outstanding, 0);
            break;
        }
        assert_int_equal(rc, VEER_ENOMEM);
        assert_null(cem);
        assert_int_equal(outstanding, 0);
    }
    assert_true(n > 1); /* at least one failure path was exercised */
    veer_set_allocator(NULL);
}

static void npy_writer_reports_an_unwritable_path(void **state)
{
    (void)state;
    char dir[] = "/tmp/veer-demo-npy-XXXXXX";
    assert_non_null(mkdtemp(dir));
    char path[256];
    snprintf(path, sizeof path, "%s/missing/x.npy", dir);
    float data[4] = {1, 2, 3, 4};
    veer_error err;
    assert_int_equal(veer_demo_npy_write_f32(path, data, 2, 2, &err), VEER_EIO);
    assert_string_equal(err.field, "path");
    assert_non_null(strstr(err.message, "missing/x.npy"));
    /* A good path: the file is there, its temporary (.tmp, renamed into place) is not. */
    snprintf(path, sizeof path, "%s/x.npy", dir);
    assert_int_equal(veer_demo_npy_write_f32(path, data, 2, 2, &err), 0);
    assert_int_equal(access(path, F_OK), 0);
    char part[300];
    snprintf(part, sizeof part, "%s.tmp", path);
    assert_int_not_equal(access(part, F_OK), 0);
    unlink(path);
    rmdir(dir);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(planner_setup_survives_every_allocation_failure),
        cmocka_unit_test(npy_writer_reports_an_unwritable_path),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
