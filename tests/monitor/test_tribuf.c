/* The triple buffer under a writer and a reader on two threads: every slot the reader gets must
 * be whole (all its words written by the same publish) and never older than the previous one,
 * and the last publish must reach the reader. A torn or stale slot fails the checks. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <pthread.h>
#include <sched.h>
#include <stdatomic.h>

#include "monitor/monitor.h"

enum { WORDS = 64, PUBLISHES = 300000 };
typedef struct slot {
    uint64_t seq;
    uint64_t word[WORDS]; /* word[i] = seq * (i + 1) */
} slot;

static slot slots[3];
static veer__tribuf tb;
static atomic_int done, reader_started;

static void *writer_main(void *arg)
{
    while (!atomic_load(&reader_started))
        sched_yield();
    for (uint64_t s = 1; s <= PUBLISHES; s++) {
        slot *b = veer__tribuf_back(&tb);
        b->seq = s;
        for (int i = 0; i < WORDS; i++)
            b->word[i] = s * (uint64_t)(i + 1);
        veer__tribuf_publish(&tb);
    }
    atomic_store(&done, 1);
    return NULL;
}

static void check_slot(const slot *s, uint64_t *last)
{
    assert_true(s->seq >= *last);
    for (int i = 0; i < WORDS; i++)
        assert_int_equal(s->word[i], s->seq * (uint64_t)(i + 1));
    *last = s->seq;
}

static void test_writer_and_reader(void **state)
{
    assert_int_equal(veer__tribuf_init(&tb, &slots[0], &slots[1], &slots[2]), 0);
    pthread_t t;
    assert_int_equal(pthread_create(&t, NULL, writer_main, NULL), 0);
    uint64_t last = 0, reads = 0;
    do {
        atomic_store(&reader_started, 1);
        check_slot(veer__tribuf_read_begin(&tb), &last);
        veer__tribuf_read_end(&tb);
        reads++;
    } while (!atomic_load(&done));
    pthread_join(t, NULL);
    check_slot(veer__tribuf_read_begin(&tb), &last);
    veer__tribuf_read_end(&tb);
    assert_int_equal(last, PUBLISHES);
    print_message("%llu reads during %d publishes\n", (unsigned long long)reads, PUBLISHES);
    veer__tribuf_destroy(&tb);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_writer_and_reader),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
