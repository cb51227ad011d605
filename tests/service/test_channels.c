/* The channel table: lookups while channels are added, the full and over-long cases, and the
 * switch/reclamation protocol under a concurrent reader: a reader thread acting through the
 * table sees only whole tasks (every z value equals the task's epoch, and the name matches), sees
 * epochs in order, and never reads freed memory (run under ASan to check that last point; the
 * sanitizer build runs this test). */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <pthread.h>
#include <sched.h>
#include <stdio.h>
#include <string.h>

#include "service/channels.h"

static void test_create_find(void **state)
{
    veer__channels *t;
    assert_int_equal(veer__channels_create(40, &t), 0);
    veer__channel *made[40];
    char name[32];
    for (int i = 0; i < 40; i++) {
        snprintf(name, sizeof name, "line-%d", i);
        assert_null(veer__channels_find(t, name));
        assert_int_equal(veer__channels_get_or_create(t, name, &made[i], NULL), 0);
        assert_string_equal(made[i]->name, name);
    }
    for (int i = 0; i < 40; i++) {
        snprintf(name, sizeof name, "line-%d", i);
        assert_ptr_equal(veer__channels_find(t, name), made[i]);
        veer__channel *again;
        assert_int_equal(veer__channels_get_or_create(t, name, &again, NULL), 0);
        assert_ptr_equal(again, made[i]);
    }
    assert_int_equal(veer__channels_count(t), 40);
    veer_error err;
    veer__channel *ch;
    assert_int_equal(veer__channels_get_or_create(t, "one-too-many", &ch, &err), VEER_ETOOMANY);
    assert_string_equal(err.field, "channel");
    assert_int_equal(veer__channels_get_or_create(t, "", &ch, &err), VEER_EFIELD);
    char longname[VEER__CHANNEL_NAME_MAX + 1];
    memset(longname, 'x', sizeof longname - 1);
    longname[VEER__CHANNEL_NAME_MAX] = '\0';
    assert_int_equal(veer__channels_get_or_create(t, longname, &ch, &err), VEER_EFIELD);
    longname[VEER__CHANNEL_NAME_MAX - 1] = '\0'; /* 63 bytes: the longest allowed */
    assert_int_equal(veer__channels_count(t), 40);
    uint32_t seen = 0;
    for (uint32_t i = 0; i < veer__channels_capacity(t); i++)
        seen += veer__channels_slot(t, i) != NULL;
    assert_int_equal(seen, 40);
    veer__channels_destroy(t);
}

static void test_switch_and_reclaim(void **state)
{
    veer__channels *t;
    veer__channel *ch;
    assert_int_equal(veer__channels_create(4, &t), 0);
    assert_int_equal(veer__channels_get_or_create(t, "arm", &ch, NULL), 0);
    assert_null(atomic_load(&ch->active));
    float z[3] = {1, 2, 3};
    for (uint64_t e = 1; e <= 3; e++)
        assert_int_equal(veer__channels_switch(t, ch, "task", z, 3, e, NULL), 0);
    veer__active_task *a = atomic_load(&ch->active);
    assert_int_equal(a->epoch, 3);
    assert_int_equal(ch->epoch, 3);
    assert_string_equal(a->task, "task");
    assert_memory_equal(a->z, z, sizeof z);
    /* Two replaced tasks wait until the act thread says it holds no pointer. */
    assert_int_equal(veer__channels_reclaim(t), 2);
    assert_int_equal(veer__channels_reclaim(t), 2);
    veer__channels_quiescent(t);
    assert_int_equal(veer__channels_reclaim(t), 0);
    /* One switched after the announcement must wait for the next one. */
    assert_int_equal(veer__channels_switch(t, ch, "task", z, 3, 4, NULL), 0);
    assert_int_equal(veer__channels_reclaim(t), 1);
    veer__channels_quiescent(t);
    assert_int_equal(veer__channels_reclaim(t), 0);
    veer__channels_destroy(t);
}

#define Z_DIM 64
#define SWITCHES 20000

typedef struct reader_state {
    veer__channels *t;
    atomic_int stop;
    _Atomic uint64_t reads;
    uint64_t torn, backwards, max_epoch, distinct;
} reader_state;

static void *reader(void *arg)
{
    reader_state *r = arg;
    uint64_t last = 0;
    while (!atomic_load(&r->stop)) {
        veer__channel *ch = veer__channels_find(r->t, "arm");
        if (ch != NULL) {
            const veer__active_task *a = atomic_load_explicit(&ch->active, memory_order_seq_cst);
            if (a != NULL) {
                uint64_t e = a->epoch;
                for (int i = 0; i < Z_DIM; i++)
                    if (a->z[i] != (float)e)
                        r->torn++;
                if (strcmp(a->task, (e % 2) ? "odd" : "even") != 0)
                    r->torn++;
                if (e < last)
                    r->backwards++;
                if (e != last)
                    r->distinct++;
                last = e;
                atomic_fetch_add(&r->reads, 1);
            }
        }
        veer__channels_quiescent(r->t); /* holds no pointer from here */
    }
    r->max_epoch = last;
    return NULL;
}

static void test_concurrent_reader(void **state)
{
    reader_state r = {0};
    assert_int_equal(veer__channels_create(8, &r.t), 0);
    atomic_init(&r.stop, 0);
    pthread_t th;
    assert_int_equal(pthread_create(&th, NULL, reader, &r), 0);
    veer__channel *ch;
    assert_int_equal(veer__channels_get_or_create(r.t, "arm", &ch, NULL), 0);
    float z[Z_DIM];
    size_t waiting = 0;
    for (uint64_t e = 1; e <= SWITCHES; e++) {
        for (int i = 0; i < Z_DIM; i++)
            z[i] = (float)e; /* exact in float up to 2^24 */
        assert_int_equal(veer__channels_switch(r.t, ch, (e % 2) ? "odd" : "even", z, Z_DIM, e, NULL), 0);
        if (e % 64 == 0) {
            waiting = veer__channels_reclaim(r.t);
            /* Let the reader in between batches, so the two really interleave even when the
             * scheduler would run this loop to the end first. */
            uint64_t seen = atomic_load(&r.reads);
            while (atomic_load(&r.reads) == seen)
                sched_yield();
        }
    }
    atomic_store(&r.stop, 1);
    pthread_join(th, NULL);
    assert_true(atomic_load(&r.reads) > 0);
    assert_int_equal(r.torn, 0);
    assert_int_equal(r.backwards, 0);
    assert_true(r.max_epoch <= SWITCHES);
    assert_true(r.distinct > 1);
    /* Reclamation kept up: what still waits is bounded by one reclaim interval, not the run. */
    assert_true(waiting <= SWITCHES / 2);
    veer__channels_quiescent(r.t);
    assert_int_equal(veer__channels_reclaim(r.t), 0);
    print_message("reader: %llu reads, %llu distinct epochs seen\n", (unsigned long long)atomic_load(&r.reads),
                  (unsigned long long)r.distinct);
    veer__channels_destroy(r.t);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_create_find),
        cmocka_unit_test(test_switch_and_reclaim),
        cmocka_unit_test(test_concurrent_reader),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
