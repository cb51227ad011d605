/* libveer_client without a veerd: argument checks, the error each misuse returns and the field
 * it names, the timeout when nothing listens, and clean failure when an allocation fails (the
 * failing-allocator technique of SQLite's test_malloc.c). Everything that needs veerd's answers
 * is in the pytest files beside this one, against a real veerd. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <stdio.h>
#include <string.h>
#include <unistd.h>

#include <cmocka.h>

#include "veer/client.h"

/* A port on 127.0.0.1 where nothing listens: an ephemeral-range port is taken from the process
 * id to keep parallel runs apart; a connection there is refused, so replies never come. */
static void dead_endpoint(char *out, size_t n)
{
    snprintf(out, n, "tcp://127.0.0.1:%d", 61000 + (int)(getpid() % 3000));
}

static void open_needs_an_endpoint(void **state)
{
    (void)state;
    veer_client_options o;
    veer_client_options_init(&o);
    veer_client *c = (veer_client *)1;
    veer_error err;
    assert_int_equal(veer_client_open(&o, &c, &err), VEER_EINVAL);
    assert_null(c);
    assert_string_equal(err.field, "act_endpoint");
}

static void open_checks_keys(void **state)
{
    (void)state;
    veer_client_options o;
    veer_client_options_init(&o);
    o.admin_endpoint = "ipc:///tmp/veer-offline-test";
    o.server_key = "too short";
    veer_client *c;
    veer_error err;
    assert_int_equal(veer_client_open(&o, &c, &err), VEER_EINVAL);
    assert_string_equal(err.field, "server_key");
    /* A valid server key (the Z85 test vector of RFC 32's reference code, from memory) but no
     * client pair: the public key is named. */
    o.server_key = "rq:rM>}U?@Lns47E1%kR.o@n%FcmmsL/@{H8]yf7";
    assert_int_equal(veer_client_open(&o, &c, &err), VEER_EINVAL);
    assert_string_equal(err.field, "public_key");
}

static void open_refuses_bad_endpoint(void **state)
{
    (void)state;
    veer_client_options o;
    veer_client_options_init(&o);
    o.admin_endpoint = "nonsense";
    veer_client *c;
    veer_error err;
    assert_int_equal(veer_client_open(&o, &c, &err), VEER_EINVAL);
    assert_string_equal(err.field, "admin_endpoint");
}

static void act_open_times_out_without_veerd(void **state)
{
    (void)state;
    char ep[64];
    dead_endpoint(ep, sizeof ep);
    veer_client_options o;
    veer_client_options_init(&o);
    o.act_endpoint = ep;
    o.timeout_ms = 200;
    veer_client *c;
    veer_error err;
    assert_int_equal(veer_client_open(&o, &c, &err), VEER_ETIMEDOUT);
    assert_null(c);
}

static void admin_calls_check_arguments_and_time_out(void **state)
{
    (void)state;
    char ep[64];
    dead_endpoint(ep, sizeof ep);
    veer_client_options o;
    veer_client_options_init(&o);
    o.admin_endpoint = ep;
    o.timeout_ms = 150;
    veer_client *c;
    veer_error err;
    assert_int_equal(veer_client_open(&o, &c, &err), 0);

    const veer_client_channel *ch;
    assert_int_equal(veer_client_switch(c, "", "t", &ch, &err), VEER_EINVAL);
    assert_string_equal(err.field, "channel");
    char long_name[VEER_CLIENT_NAME_MAX + 10];
    memset(long_name, 'a', sizeof long_name - 1);
    long_name[sizeof long_name - 1] = '\0';
    assert_int_equal(veer_client_switch(c, "arm", long_name, &ch, &err), VEER_EINVAL);
    assert_string_equal(err.field, "task");
    assert_int_equal(veer_client_task_put(c, "t", NULL, 4, NULL, &err), VEER_EINVAL);
    assert_string_equal(err.field, "spec");

    veer_task_spec spec;
    memset(&spec, 0, sizeof spec);
    spec.source = VEER_TASK_SAMPLES;
    spec.count = 2;
    assert_int_equal(veer_client_task_put(c, "t", &spec, 4, NULL, &err), VEER_EINVAL);
    assert_string_equal(err.field, "spec.states");

    const veer_client_task *tasks;
    size_t n = 99;
    assert_int_equal(veer_client_task_list(c, &tasks, &n, &err), VEER_ETIMEDOUT);
    assert_int_equal(n, 0);

    float st[4] = {0}, action[4];
    assert_int_equal(veer_client_act(c, "arm", st, 1000, action, NULL, &err), VEER_EINVAL);
    assert_string_equal(err.field, "act_endpoint");
    assert_null(veer_client_model_info(c));
    assert_null(veer_client_act_histogram(c));
    veer_client_close(c);
}

/* Fails the Nth allocation from now on; counts calls. */
static long alloc_countdown;
static void *failing_malloc(size_t n)
{
    return --alloc_countdown == 0 ? NULL : malloc(n);
}
static void *failing_calloc(size_t n, size_t s)
{
    return --alloc_countdown == 0 ? NULL : calloc(n, s);
}
static void *failing_realloc(void *p, size_t n)
{
    return --alloc_countdown == 0 ? NULL : realloc(p, n);
}

static void every_allocation_failure_is_clean(void **state)
{
    (void)state;
    veer_allocator a = {failing_malloc, failing_calloc, failing_realloc, free};
    veer_client_options o;
    veer_client_options_init(&o);
    o.admin_endpoint = "ipc:///tmp/veer-offline-test";
    int failures = 0;
    for (long nth = 1; nth < 20; nth++) {
        alloc_countdown = nth;
        assert_int_equal(veer_set_allocator(&a), 0);
        veer_client *c = NULL;
        veer_error err;
        int rc = veer_client_open(&o, &c, &err);
        veer_set_allocator(NULL);
        if (rc == VEER_ENOMEM) {
            assert_null(c);
            failures++;
        } else {
            assert_int_equal(rc, 0);
            veer_client_close(c);
        }
    }
    assert_true(failures >= 1); /* the client object itself is at least one allocation */
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(open_needs_an_endpoint),
        cmocka_unit_test(open_checks_keys),
        cmocka_unit_test(open_refuses_bad_endpoint),
        cmocka_unit_test(act_open_times_out_without_veerd),
        cmocka_unit_test(admin_calls_check_arguments_and_time_out),
        cmocka_unit_test(every_allocation_failure_is_clean),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
