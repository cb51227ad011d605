/* bench_state_ring: what carrying the channel's slot with each act state costs the act thread.
 *
 * veerd's act thread copies every valid act state into a ring for the drift monitors
 * (src/service/state_ring.c); since the monitors are kept per channel as well, each entry also
 * carries a 4-byte tag (the channel's slot in the channel table). This measures
 * veer__state_ring_push_tagged against a floor measured in the same run: the push as it was
 * before tags (the copy and the release store of head, reproduced below), on the same ring, for
 * a few state sizes. Rounds of the two alternate, so a change of machine load hits both alike;
 * each round times one ring's worth of pushes (the ring is drained, untimed, in between), and
 * the medians of the per-round figures are printed with their ratio. No assertion: a benchmark
 * prints figures (tests/bench/CMakeLists.txt). OpenBLAS is not used here.
 *
 * Usage: bench_state_ring [rounds]   (default 400) */
#define _GNU_SOURCE
#include <sched.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "service/state_ring.h"

static double now_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec * 1e9 + (double)ts.tv_nsec;
}

/* The push before tags were added (src/service/state_ring.c at the time), the floor. Not inlined:
 * the tagged push is a call into another object file, and so was this one in veerd. */
__attribute__((noinline)) static int push_floor(veer__state_ring *r, const float *state)
{
    uint64_t head = atomic_load_explicit(&r->head, memory_order_relaxed);
    if (head - atomic_load_explicit(&r->tail, memory_order_acquire) >= r->capacity) {
        atomic_store_explicit(&r->dropped,
                              atomic_load_explicit(&r->dropped, memory_order_relaxed) + 1,
                              memory_order_relaxed);
        return 1;
    }
    memcpy(r->slots + (size_t)(head & (r->capacity - 1)) * r->dim, state, r->dim * sizeof(float));
    atomic_store_explicit(&r->head, head + 1, memory_order_release);
    return 0;
}

static void drain(veer__state_ring *r)
{
    uint32_t tag;
    volatile float sink = 0;
    const float *s;
    while ((s = veer__state_ring_peek_tagged(r, &tag)) != NULL) {
        sink += s[0] + (float)(tag & 1u);
        veer__state_ring_release(r);
    }
    (void)sink;
}

static int cmp(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

int main(int argc, char **argv)
{
    int rounds = argc > 1 ? atoi(argv[1]) : 400;
    if (rounds < 10 || rounds > 100000) {
        fprintf(stderr, "bench_state_ring: rounds must be 10 .. 100000\n");
        return 2;
    }
    const uint32_t capacity = 8192; /* veerd's ring (ACT_STATE_RING in src/service/act.c) */
    const uint32_t dims[] = {8, 32, 128};
    printf("bench_state_ring: %d rounds of %u pushes per variant; OpenBLAS not used; "
           "running on cpu %d\n",
           rounds, capacity, sched_getcpu());
    printf("%6s %14s %14s %8s\n", "dim", "floor ns/push", "tagged ns/push", "ratio");
    double *a = malloc(sizeof(double) * (size_t)rounds), *b = malloc(sizeof(double) * (size_t)rounds);
    if (a == NULL || b == NULL)
        return 1;
    for (size_t d = 0; d < sizeof dims / sizeof dims[0]; d++) {
        veer__state_ring r;
        if (veer__state_ring_init(&r, dims[d], capacity) != 0)
            return 1;
        float *states = malloc(sizeof(float) * 64 * dims[d]);
        if (states == NULL)
            return 1;
        for (uint32_t i = 0; i < 64 * dims[d]; i++)
            states[i] = (float)i * 0.001f;
        for (int k = 0; k < rounds; k++) {
            for (int v = 0; v < 2; v++) {
                int tagged = (v + k) % 2; /* alternate which goes first */
                double t0 = now_ns();
                for (uint32_t i = 0; i < capacity; i++) {
                    const float *s = states + (size_t)(i & 63u) * dims[d];
                    if (tagged)
                        veer__state_ring_push_tagged(&r, s, i & 255u);
                    else
                        push_floor(&r, s);
                }
                double ns = (now_ns() - t0) / capacity;
                (tagged ? b : a)[k] = ns;
                drain(&r);
            }
        }
        qsort(a, (size_t)rounds, sizeof *a, cmp);
        qsort(b, (size_t)rounds, sizeof *b, cmp);
        double fa = a[rounds / 2], fb = b[rounds / 2];
        printf("%6u %14.2f %14.2f %8.3f\n", dims[d], fa, fb, fb / fa);
        printf("       (p10 %.2f / %.2f, p90 %.2f / %.2f; dropped %llu)\n", a[rounds / 10],
               b[rounds / 10], a[rounds * 9 / 10], b[rounds * 9 / 10],
               (unsigned long long)atomic_load(&r.dropped));
        free(states);
        veer__state_ring_free(&r);
    }
    free(a);
    free(b);
    return 0;
}
