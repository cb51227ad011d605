/* The deadline-burst detector (src/service/burst.c) driven with made-up times: a burst is
 * threshold misses within the window; it is announced once and re-arms only after a whole quiet
 * window. Expected values are counted by hand from the sequences below. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>

#include <cmocka.h>

#include "service/burst.h"

#define MS 1000000ull

static void test_burst_needs_threshold_within_window(void **state)
{
    (void)state;
    veer__burst b;
    veer__burst_init(&b, 10, 1000 * MS);
    uint32_t misses = 0;
    /* 9 misses spread over 900 ms: no burst. */
    uint64_t total = 0;
    for (int t = 0; t <= 900; t += 100) {
        assert_int_equal(veer__burst_update(&b, (uint64_t)t * MS, total, &misses), 0);
        if (t < 900)
            total++;
    }
    assert_int_equal(misses, 9);
    /* One miss per 200 ms: at most 6 in a window plus one sampling period, never 10. */
    for (int t = 1000; t <= 3000; t += 100) {
        if ((t / 100) % 2 == 1)
            total++;
        assert_int_equal(veer__burst_update(&b, (uint64_t)t * MS, total, &misses), 0);
        assert_true(misses <= 9);
    }
    /* A burst: 12 misses at once. */
    total += 12;
    assert_int_equal(veer__burst_update(&b, 3100 * MS, total, &misses), 1);
    assert_true(misses >= 12);
    /* Still bursting: not announced again. */
    total += 20;
    assert_int_equal(veer__burst_update(&b, 3200 * MS, total, &misses), 0);
    /* Quiet for two windows, then another burst is announced. */
    for (int t = 3300; t <= 5500; t += 100)
        assert_int_equal(veer__burst_update(&b, (uint64_t)t * MS, total, &misses), 0);
    assert_int_equal(misses, 0);
    total += 10;
    assert_int_equal(veer__burst_update(&b, 5600 * MS, total, &misses), 1);
    assert_int_equal(misses, 10);
}

static void test_burst_old_misses_leave_the_window(void **state)
{
    (void)state;
    veer__burst b;
    veer__burst_init(&b, 5, 500 * MS);
    uint32_t misses = 0;
    assert_int_equal(veer__burst_update(&b, 0, 100, &misses), 0); /* baseline: earlier misses */
    assert_int_equal(misses, 0);
    assert_int_equal(veer__burst_update(&b, 100 * MS, 104, &misses), 0);
    assert_int_equal(misses, 4);
    /* 700 ms later the four are older than the window (the baseline moves to t = 100 ms). */
    assert_int_equal(veer__burst_update(&b, 700 * MS, 104, &misses), 0);
    assert_int_equal(misses, 0);
    assert_int_equal(veer__burst_update(&b, 800 * MS, 108, &misses), 0);
    assert_int_equal(misses, 4);
    assert_int_equal(veer__burst_update(&b, 900 * MS, 109, &misses), 1);
    assert_int_equal(misses, 5);
}

static void test_burst_fast_sampling_keeps_a_bounded_ring(void **state)
{
    (void)state;
    veer__burst b;
    veer__burst_init(&b, 1000, 1000 * MS);
    uint32_t misses = 0;
    /* 200 samples within the window: the ring keeps the newest VEER__BURST_SAMPLES. */
    for (uint64_t i = 0; i < 200; i++)
        assert_int_equal(veer__burst_update(&b, i * MS, i, &misses), 0);
    assert_int_equal(misses, VEER__BURST_SAMPLES - 1);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_burst_needs_threshold_within_window),
        cmocka_unit_test(test_burst_old_misses_leave_the_window),
        cmocka_unit_test(test_burst_fast_sampling_keeps_a_bounded_ring),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
