/* veerd's configuration parser and the loopback rule: defaults, environment, flags (flags
 * win), every kind of bad value answered with VEER_ECONFIG naming the flag; which admin
 * endpoints count as local; key files in Z85 (ZeroMQ RFC 32) including keys containing '#'. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <zmq.h>

#include "service/auth.h"
#include "service/config.h"

static int parse(veer__config *cfg, veer_error *err, int argc, const char **argv)
{
    return veer__config_parse(cfg, argc, (char **)argv, err);
}

static void test_defaults_env_flags(void **state)
{
    veer__config cfg;
    veer_error err;
    unsetenv("VEER_MAX_TASKS");
    setenv("VEER_BUNDLE", "/models/arm.veer", 1);
    const char *a0[] = {"veerd"};
    assert_int_equal(parse(&cfg, &err, 1, a0), 0);
    assert_string_equal(cfg.bundle_path, "/models/arm.veer");
    assert_string_equal(cfg.act_endpoint, "tcp://127.0.0.1:7710");
    assert_int_equal(cfg.default_deadline_us, 1000);
    assert_int_equal(cfg.max_tasks, 1024);
    assert_int_equal(cfg.act_auth, 0);
    setenv("VEER_MAX_TASKS", "7", 1);
    assert_int_equal(parse(&cfg, &err, 1, a0), 0);
    assert_int_equal(cfg.max_tasks, 7);
    const char *a1[] = {"veerd", "--max-tasks", "9", "--default-deadline-us=250", "--admin",
                        "tcp://localhost:9000", "--allowed-keys", "k", "--server-key", "s", "--act-auth"};
    assert_int_equal(parse(&cfg, &err, 11, a1), 0);
    assert_int_equal(cfg.max_tasks, 9);
    assert_int_equal(cfg.default_deadline_us, 250);
    assert_string_equal(cfg.admin_endpoint, "tcp://127.0.0.1:9000");
    assert_int_equal(cfg.act_auth, 1);
    unsetenv("VEER_MAX_TASKS");
    const char *h[] = {"veerd", "--max-tasks", "bad", "--help"};
    assert_int_equal(parse(&cfg, &err, 4, h), VEER_ECONFIG); /* left to right: the bad value first */
    const char *h2[] = {"veerd", "--help"};
    assert_int_equal(parse(&cfg, &err, 2, h2), VEER__CONFIG_HELP);
}

static void expect_bad(const char *flag, int argc, const char **argv)
{
    veer__config cfg;
    veer_error err;
    veer_error_clear(&err);
    assert_int_equal(parse(&cfg, &err, argc, argv), VEER_ECONFIG);
    assert_string_equal(err.field, flag);
    assert_non_null(strstr(err.message, flag));
}

static void test_bad_values(void **state)
{
    setenv("VEER_BUNDLE", "/models/arm.veer", 1);
    const char *a[] = {"veerd", "--max-channels", "0"};
    expect_bad("--max-channels", 3, a);
    const char *b[] = {"veerd", "--max-channels", "12x"};
    expect_bad("--max-channels", 3, b);
    const char *c[] = {"veerd", "--max-channels", "99999999999999999999"};
    expect_bad("--max-channels", 3, c);
    const char *d[] = {"veerd", "--max-channels", "-1"};
    expect_bad("--max-channels", 3, d);
    const char *e[] = {"veerd", "--events", "inproc://x"};
    expect_bad("--events", 3, e);
    const char *f[] = {"veerd", "--act", "tcp://"};
    expect_bad("--act", 3, f);
    const char *g[] = {"veerd", "--events", "tcp://127.0.0.1:7710"};
    expect_bad("--events", 3, g);
    const char *h[] = {"veerd", "--allowed-keys", "file"};
    expect_bad("--server-key", 3, h);
    const char *i[] = {"veerd", "--state-dir="};
    expect_bad("--state-dir", 2, i);
    const char *j[] = {"veerd", "--bundle"};
    expect_bad("--bundle", 2, j);
    const char *k[] = {"veerd", "stray"};
    expect_bad("stray", 2, k);
    unsetenv("VEER_BUNDLE");
    const char *l[] = {"veerd"};
    expect_bad("--bundle", 1, l);
    setenv("VEER_DEFAULT_DEADLINE_US", "5", 1); /* below the minimum of 10 */
    const char *m[] = {"veerd", "--bundle", "x"};
    expect_bad("--default-deadline-us", 3, m);
    unsetenv("VEER_DEFAULT_DEADLINE_US");
    const char *n[] = {"veerd", "--bundle", "x", "--act-priority", "100"}; /* SCHED_FIFO tops at 99 */
    expect_bad("--act-priority", 5, n);
    const char *o[] = {"veerd", "--bundle", "x", "--cpu-latency-us", "fast"};
    expect_bad("--cpu-latency-us", 5, o);
    const char *p[] = {"veerd", "--bundle", "x", "--cpu-latency-us=-5"};
    expect_bad("--cpu-latency-us", 4, p);
    const char *q[] = {"veerd", "--bundle", "x", "--cpu-latency-us", "100001"};
    expect_bad("--cpu-latency-us", 5, q);
    const char *t1[] = {"veerd", "--bundle", "x", "--act-cpu", "first"};
    expect_bad("--act-cpu", 5, t1);
    const char *t2[] = {"veerd", "--bundle", "x", "--act-cpu", "1024"};
    expect_bad("--act-cpu", 5, t2);
    const char *t3[] = {"veerd", "--bundle", "x", "--act-cpu=-1"};
    expect_bad("--act-cpu", 4, t3);
    /* Given and in range: taken as it is, 0 included (the strictest request). */
    veer__config cfg;
    veer_error err;
    const char *r[] = {"veerd", "--bundle", "x", "--cpu-latency-us", "0", "--act-priority", "30"};
    assert_int_equal(parse(&cfg, &err, 7, r), 0);
    assert_int_equal(cfg.cpu_latency_on, 1);
    assert_int_equal(cfg.cpu_latency_us, 0);
    assert_int_equal(cfg.act_priority, 30);
    assert_int_equal(cfg.act_cpu_on, 0);
    const char *u[] = {"veerd", "--bundle", "x", "--act-cpu", "1"};
    assert_int_equal(parse(&cfg, &err, 5, u), 0);
    assert_int_equal(cfg.act_cpu_on, 1);
    assert_int_equal(cfg.act_cpu_index, 1);
    const char *s2[] = {"veerd", "--bundle", "x"};
    assert_int_equal(parse(&cfg, &err, 3, s2), 0);
    assert_int_equal(cfg.cpu_latency_on, 0);
    assert_int_equal(cfg.act_priority, 0);
}

static void test_local_endpoints(void **state)
{
    const char *local[] = {"ipc:///run/veer/admin", "tcp://127.0.0.1:7711", "tcp://127.8.9.10:1",
                           "tcp://[::1]:7711", "tcp://localhost:7711"};
    const char *remote[] = {"tcp://0.0.0.0:7711", "tcp://*:7711", "tcp://10.0.0.1:7711", "tcp://127.0.0.1.x:1",
                            "tcp://127.0.0:1", "tcp://127.0.0.256:1", "tcp://[::]:7711", "tcp://eth0:7711",
                            "tcp://127.0.0.1", "udp://127.0.0.1:1", "tcp://1127.0.0.1:1"};
    for (size_t i = 0; i < sizeof local / sizeof *local; i++)
        assert_int_equal(veer__auth_endpoint_is_local(local[i]), 1);
    for (size_t i = 0; i < sizeof remote / sizeof *remote; i++) {
        if (veer__auth_endpoint_is_local(remote[i]))
            fail_msg("%s counted as local", remote[i]);
    }
}

static void test_key_files(void **state)
{
    /* A key with '#' in it, found by trying key pairs (Z85 uses '#' as one of its 85 digits). */
    char pub[41], sec[41];
    do
        assert_int_equal(zmq_curve_keypair(pub, sec), 0);
    while (strchr(pub, '#') == NULL || strchr(sec, '#') == NULL);
    char dir[] = "/tmp/veer-keys-XXXXXX";
    assert_non_null(mkdtemp(dir));
    char sp[64], ap[64];
    snprintf(sp, sizeof sp, "%s/server.secret", dir);
    snprintf(ap, sizeof ap, "%s/allowed", dir);
    FILE *f = fopen(sp, "w");
    fprintf(f, "# server key\n\n  %s  \n", sec);
    fclose(f);
    f = fopen(ap, "w");
    fprintf(f, "# supervisors\n%s\n\n# another\n%s\n", pub, pub);
    fclose(f);
    uint8_t secret[32];
    char derived[41];
    veer_error err;
    assert_int_equal(veer__auth_read_secret(sp, "--server-key", secret, derived, &err), 0);
    char expect_pub[41];
    assert_int_equal(zmq_curve_public(expect_pub, sec), 0);
    assert_string_equal(derived, expect_pub);
    veer__keyset ks;
    assert_int_equal(veer__auth_read_allowed(ap, "--allowed-keys", &ks, &err), 0);
    assert_int_equal(ks.count, 2);
    uint8_t raw[32];
    zmq_z85_decode(raw, pub);
    assert_true(veer__keyset_contains(&ks, raw));
    raw[0] ^= 1;
    assert_false(veer__keyset_contains(&ks, raw));
    veer__keyset_free(&ks);
    f = fopen(ap, "a");
    fprintf(f, "%.39s\n", pub); /* line 6: one character short */
    fclose(f);
    assert_int_equal(veer__auth_read_allowed(ap, "--allowed-keys", &ks, &err), VEER_ECONFIG);
    assert_string_equal(err.field, "--allowed-keys");
    assert_non_null(strstr(err.message, "line 6"));
    assert_int_equal(veer__auth_read_secret("/nonexistent/key", "--server-key", secret, derived, &err), VEER_ECONFIG);
    remove(sp);
    remove(ap);
    remove(dir);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_defaults_env_flags),
        cmocka_unit_test(test_bad_values),
        cmocka_unit_test(test_local_endpoints),
        cmocka_unit_test(test_key_files),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
