/* Exhausted memory: the Nth allocation made through veer's hook fails, for N = 1, 2, ... until
 * the call succeeds, in bundle opening (including protobuf-c's decoding, which allocates through
 * the hook) and workspace creation. Each failure must come back as VEER_ENOMEM with no
 * allocation left behind (the technique of SQLite's test_malloc.c and libuv's
 * test-loop-oom.c). Run under the Sanitize build, ASan also checks for use after free and
 * double frees on every unwinding path. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <cmocka.h>

#include "support.h"

static long fail_at;     /* the allocation number that fails; 0: none */
static long calls;       /* allocations attempted since the counter was reset */
static long outstanding; /* live allocations */

static int should_fail(void)
{
    return ++calls == fail_at;
}

static void *t_malloc(size_t n)
{
    if (should_fail())
        return NULL;
    void *p = malloc(n);
    outstanding += p != NULL;
    return p;
}

static void *t_calloc(size_t n, size_t s)
{
    if (should_fail())
        return NULL;
    void *p = calloc(n, s);
    outstanding += p != NULL;
    return p;
}

static void *t_realloc(void *p, size_t n)
{
    if (should_fail())
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

static void arm(long n)
{
    fail_at = n;
    calls = 0;
}

/* From memory, or (from_file) through veer_bundle_open, which also allocates the file buffer. */
static void check_open(const Veer__Bundle__Model *m, int from_file)
{
    size_t len;
    uint8_t *buf = fx_pack(m, &len);
    char path[] = "/tmp/veer-oom-test-XXXXXX";
    if (from_file) {
        int fd = mkstemp(path);
        assert_true(fd >= 0);
        assert_int_equal(write(fd, buf, len), (ssize_t)len);
        close(fd);
    }
    assert_int_equal(veer_set_allocator(&counting), 0);
    long n;
    for (n = 1;; n++) {
        veer_bundle *b = NULL;
        veer_error err;
        arm(n);
        long before = outstanding;
        int rc =
            from_file ? veer_bundle_open(path, &b, &err) : veer_bundle_open_mem(buf, len, &b, &err);
        if (rc == 0) {
            assert_true(calls < n); /* every allocation was tried and none failed */
            veer_bundle_close(b);
            assert_int_equal(outstanding, before);
            break;
        }
        if (rc != VEER_ENOMEM)
            fail_msg("allocation %ld failing gave %s (%s: %s)", n, veer_errname(rc), err.field,
                     err.message);
        assert_int_equal(err.code, VEER_ENOMEM);
        assert_null(b);
        assert_int_equal(outstanding, before);
    }
    assert_true(n > 10); /* the loop really went through the loader's allocations */
    veer_set_allocator(NULL);
    if (from_file)
        unlink(path);
    free(buf);
}

static void test_open_oom(void **state)
{
    (void)state;
    fx_srand(31);
    check_open(fx_continuous_model(), 0);
    check_open(fx_discrete_model(), 0);
    check_open(fx_discrete_model(), 1);
    fx_free_all();
}

static void test_workspace_oom(void **state)
{
    (void)state;
    fx_srand(32);
    veer_bundle *b = fx_open(fx_discrete_model());
    assert_int_equal(veer_set_allocator(&counting), 0);
    long n;
    for (n = 1;; n++) {
        veer_workspace *ws = NULL;
        veer_error err;
        arm(n);
        long before = outstanding;
        int rc = veer_workspace_create(b, 16, &ws, &err);
        if (rc == 0) {
            veer_workspace_destroy(ws);
            assert_int_equal(outstanding, before);
            break;
        }
        assert_int_equal(rc, VEER_ENOMEM);
        assert_int_equal(err.code, VEER_ENOMEM);
        assert_null(ws);
        assert_int_equal(outstanding, before);
    }
    assert_true(n > 1);
    /* Acting allocates nothing: with every allocation failing, it still works. */
    arm(0);
    veer_workspace *ws = NULL;
    assert_int_equal(veer_workspace_create(b, 4, &ws, NULL), 0);
    arm(1);
    float s[4] = {0.1f, 0.2f, 0.3f, 0.4f}, z[3] = {1, 0, 0}, a, v;
    assert_int_equal(veer_act(ws, s, z, &a, &v, NULL), 0);
    assert_int_equal(calls, 0);
    veer_workspace_destroy(ws);
    veer_set_allocator(NULL);
    veer_bundle_close(b);
    fx_free_all();
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_open_oom),
        cmocka_unit_test(test_workspace_oom),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
