/* bench_act_split: what sharing one policy pass between threads (veerd --act-threads,
 * src/service/act_split.c) costs or saves, against the floor of the same pass on one thread.
 *
 * For each bundle and a batch of n states (2, 4, 8), rounds alternate the floor (the pass on
 * this thread, veer__act_rows_eval) and the split (veer__act_split_run with one helper thread),
 * each round timing one pass of each. Two regimes:
 *   hot:    passes back to back, as under a closed-window load;
 *   paced:  1 ms of sleep before each pass, as when controllers tick at 1 kHz: the act thread
 *           and the helper wake to cold caches, and the helper has to be woken first.
 * The helper sleeps as soon as it is idle (veerd's --act-spin-us 0, the default). The medians
 * (and p99) of each are printed with their ratio; below 1 the split saves time. No assertion:
 * a benchmark prints figures (tests/bench/CMakeLists.txt).
 *
 * Usage: bench_act_split BUNDLE... [--rounds N]   (default 2000; the STANDARD model wants 200) */
#define _GNU_SOURCE
#include <sched.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "base/base.h"
#include "service/act_split.h"

#define MAX_ROWS 8

static int cmp(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

static void sleep_us(long us)
{
    struct timespec ts = {.tv_sec = 0, .tv_nsec = us * 1000L};
    nanosleep(&ts, NULL);
}

static uint64_t cpus_seen;

static void note_cpu(void)
{
    int c = sched_getcpu();
    if (c >= 0 && c < 64)
        cpus_seen |= 1ull << c;
}

static int bench_bundle(const char *path, int rounds)
{
    veer_error err;
    veer_bundle *b = NULL;
    veer_workspace *ws = NULL;
    veer__act_split *split = NULL;
    if (veer_bundle_open(path, &b, &err) < 0 || veer_workspace_create(b, MAX_ROWS, &ws, &err) < 0 ||
        veer__act_split_start(b, 1, MAX_ROWS, 0, 0, &split, &err) < 0) {
        fprintf(stderr, "bench_act_split: %s: %s\n", path, err.message);
        return 1;
    }
    const veer_model_info *info = veer_bundle_info(b);
    float *states = calloc((size_t)MAX_ROWS * info->state_dim, sizeof(float));
    float *zs = calloc((size_t)MAX_ROWS * info->z_dim, sizeof(float));
    float *actions = calloc((size_t)MAX_ROWS * info->action_dim, sizeof(float));
    float values[MAX_ROWS];
    uint32_t flags[MAX_ROWS];
    double *one = malloc(sizeof(double) * (size_t)rounds),
           *two = malloc(sizeof(double) * (size_t)rounds);
    if (states == NULL || zs == NULL || actions == NULL || one == NULL || two == NULL)
        return 1;
    /* States from the bundle's reference set; task vectors with entries in [-0.5, 0.5). */
    for (size_t i = 0; i < (size_t)MAX_ROWS * info->state_dim; i++)
        states[i] =
            info->reference_count
                ? info->reference_states[i % ((size_t)info->reference_count * info->state_dim)]
                : 0.0f;
    for (size_t i = 0; i < (size_t)MAX_ROWS * info->z_dim; i++)
        zs[i] = (float)((i * 7919u) % 13u) / 13.0f - 0.5f;
    printf("\n== %s (state %u, z %u, %s) ==\n", path, info->state_dim, info->z_dim,
           info->action_kind == VEER_ACTION_DISCRETE ? "discrete" : "continuous");
    printf("  %-6s %3s %22s %22s %7s\n", "regime", "n", "one thread p50 / p99", "split p50 / p99",
           "ratio");
    const uint32_t ns[] = {2, 4, 8};
    for (int paced = 0; paced < 2; paced++) {
        for (size_t k = 0; k < sizeof ns / sizeof ns[0]; k++) {
            veer__act_rows rows = {.n = ns[k],
                                   .states = states,
                                   .zs = zs,
                                   .actions = actions,
                                   .values = values,
                                   .flags = flags};
            for (int r = 0; r < rounds; r++) {
                for (int v = 0; v < 2; v++) {
                    int split_first = r % 2; /* alternate which goes first */
                    int use_split = v == 0 ? split_first : !split_first;
                    if (paced)
                        sleep_us(1000);
                    note_cpu();
                    uint64_t t0 = veer__now_ns();
                    if (use_split)
                        veer__act_split_run(split, ws, &rows);
                    else
                        veer__act_rows_eval(info, ws, &rows);
                    double us = (double)(veer__now_ns() - t0) / 1e3;
                    (use_split ? two : one)[r] = us;
                }
            }
            qsort(one, (size_t)rounds, sizeof *one, cmp);
            qsort(two, (size_t)rounds, sizeof *two, cmp);
            double p50a = one[rounds / 2], p50b = two[rounds / 2];
            printf("  %-6s %3u %11.1f / %7.1f us %11.1f / %7.1f us %7.2f\n",
                   paced ? "paced" : "hot", ns[k], p50a, one[rounds * 99 / 100], p50b,
                   two[rounds * 99 / 100], p50b / p50a);
        }
    }
    free(states);
    free(zs);
    free(actions);
    free(one);
    free(two);
    veer__act_split_stop(split);
    veer_workspace_destroy(ws);
    veer_bundle_close(b);
    return 0;
}

int main(int argc, char **argv)
{
    int rounds = 2000;
    const char *paths[8];
    int n = 0;
    for (int i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--rounds") == 0 && i + 1 < argc)
            rounds = atoi(argv[++i]);
        else if (n < 8)
            paths[n++] = argv[i];
    }
    if (n == 0 || rounds < 10 || rounds > 1000000) {
        fprintf(stderr, "usage: bench_act_split BUNDLE... [--rounds N (10 .. 1000000)]\n");
        return 2;
    }
    printf("bench_act_split: one policy pass over n states on one thread (the floor) against the\n"
           "same pass shared with one helper thread; %d alternating rounds; OpenBLAS kernel %s,\n"
           "one OpenBLAS thread; threads not pinned\n",
           rounds, veer_blas_kernel());
    for (int i = 0; i < n; i++)
        if (bench_bundle(paths[i], rounds) != 0)
            return 1;
    char cpus[256] = "";
    for (int c = 0; c < 64; c++)
        if (cpus_seen & (1ull << c))
            snprintf(cpus + strlen(cpus), sizeof cpus - strlen(cpus), "%s%d", cpus[0] ? "," : "",
                     c);
    printf("\n  the timing thread ran on CPU(s) %s (sched_getcpu, sampled); the helper is not "
           "pinned\n",
           cpus);
    return 0;
}
