/* The act thread's state ring (src/service/state_ring.c): order, whole states, drops when full,
 * and a producer and a consumer on two threads (each state is k, k+1, ..., so a torn or
 * reordered copy shows; the consumer sees exactly the states that were not dropped, in order).
 * Expected values follow from the sequences themselves; no reference output. */
#include <pthread.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>

#include <cmocka.h>

#include "service/state_ring.h"

#define DIM 7

static void fill(float *s, uint32_t k)
{
    for (int j = 0; j < DIM; j++)
        s[j] = (float)(k + (uint32_t)j);
}

static void test_ring_order_and_drops(void **state)
{
    (void)state;
    veer__state_ring r;
    assert_int_equal(veer__state_ring_init(&r, DIM, 5), 0);
    assert_int_equal(r.capacity, 8);
    assert_null(veer__state_ring_peek(&r));
    float s[DIM];
    for (uint32_t k = 0; k < 10; k++) {
        fill(s, k);
        assert_int_equal(veer__state_ring_push(&r, s), k < 8 ? 0 : 1);
    }
    assert_int_equal(atomic_load(&r.dropped), 2);
    for (uint32_t k = 0; k < 8; k++) {
        const float *got = veer__state_ring_peek(&r);
        assert_non_null(got);
        assert_true(got[0] == (float)k && got[DIM - 1] == (float)(k + DIM - 1));
        veer__state_ring_release(&r);
    }
    assert_null(veer__state_ring_peek(&r));
    fill(s, 100);
    assert_int_equal(veer__state_ring_push(&r, s), 0); /* room again after the consumer's release */
    assert_true(veer__state_ring_peek(&r)[0] == 100.0f);
    veer__state_ring_free(&r);
}

#define PUSHES 200000u

static void *producer(void *arg)
{
    veer__state_ring *r = arg;
    float s[DIM];
    for (uint32_t k = 0; k < PUSHES; k++) {
        fill(s, k);
        veer__state_ring_push(r, s);
    }
    return NULL;
}

static void test_ring_two_threads(void **state)
{
    (void)state;
    veer__state_ring r;
    assert_int_equal(veer__state_ring_init(&r, DIM, 64), 0);
    pthread_t t;
    assert_int_equal(pthread_create(&t, NULL, producer, &r), 0);
    uint64_t seen = 0;
    int64_t last = -1;
    for (;;) {
        const float *got = veer__state_ring_peek(&r);
        if (got == NULL) {
            if (seen + atomic_load(&r.dropped) == PUSHES)
                break;
            continue;
        }
        for (int j = 1; j < DIM; j++)
            assert_true(got[j] == got[0] + (float)j); /* a whole state */
        assert_true((int64_t)got[0] > last);         /* in order */
        last = (int64_t)got[0];
        veer__state_ring_release(&r);
        seen++;
    }
    pthread_join(t, NULL);
    assert_null(veer__state_ring_peek(&r));
    assert_int_equal(seen + atomic_load(&r.dropped), PUSHES);
    assert_true(seen >= 64);
    veer__state_ring_free(&r);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_ring_order_and_drops),
        cmocka_unit_test(test_ring_two_threads),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
