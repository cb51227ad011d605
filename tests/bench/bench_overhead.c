/* bench_overhead: what veerd's monitors (drift monitor and per-stage latency recorders) cost an
 * act, measured on two veerd processes serving the same bundle in the same run, one with
 * `--monitors 1` and one with `--monitors 0` (the floor).
 *
 *   bench_overhead ON_ACT ON_ADMIN ON_PID OFF_ACT OFF_ADMIN OFF_PID BUNDLE [ROUNDS] [PER_ROUND]
 *
 * (run_bench_overhead.sh starts both veerd and passes these.) The figure is the controller's
 * round trip through the C client (veer_client_act's round_trip_ns): send, veerd's act thread,
 * reply. Rounds alternate between the two services and flip their order every round, so a
 * burst of load from other users of the machine hits both alike; p50 and p99 are over every
 * act of every round, and the ratio of per-round p50s is reported as a median too. Target: at
 * most 3 % more at p50 with monitors on. A measurement, not a test: it asserts nothing.
 */
#define _GNU_SOURCE
#include <dirent.h>
#include <math.h>
#include <sched.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "veer/client.h"
#include "veer/runtime.h"
#include "splitmix.h"

#define N_STATES 4096
#define MAX_CPUS 64

typedef struct side {
    const char *name;
    veer_client *client;
    long pid;
    uint64_t *rtt;    /* every act of every round */
    uint64_t *server; /* veerd's own time per act (ActReply.server_us, in ns) */
    size_t n;
    double *round_p50;
    uint64_t cpus;       /* CPUs veerd's threads were seen on */
    uint64_t fallbacks;  /* acts not answered by the policy (left out of the figures) */
    uint32_t last_flags; /* of the last such act: VEER_ACT_* flags, or -code << 16 */
} side;

static uint64_t rng = 0x9e3779b97f4a7c15ull;
static double uniform01(void)
{
    return (double)(bench_splitmix64(&rng) >> 11) / 9007199254740992.0;
}

static int cmp_u64(const void *a, const void *b)
{
    uint64_t x = *(const uint64_t *)a, y = *(const uint64_t *)b;
    return (x > y) - (x < y);
}

static int cmp_double(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

/* Exact percentile of sorted values (nearest rank). */
static uint64_t pct(const uint64_t *sorted, size_t n, double p)
{
    size_t rank = (size_t)ceil(p / 100.0 * (double)n);
    return sorted[rank ? rank - 1 : 0];
}

/* Adds the CPU each thread of `pid` last ran on (field 39 of /proc/PID/task/TID/stat). */
static void note_cpus(long pid, uint64_t *mask)
{
    char dir[64];
    snprintf(dir, sizeof dir, "/proc/%ld/task", pid);
    DIR *d = opendir(dir);
    if (d == NULL)
        return;
    struct dirent *e;
    while ((e = readdir(d)) != NULL) {
        if (e->d_name[0] == '.')
            continue;
        char path[128], buf[1024];
        snprintf(path, sizeof path, "%s/%.20s/stat", dir, e->d_name);
        FILE *f = fopen(path, "r");
        if (f == NULL)
            continue;
        size_t n = fread(buf, 1, sizeof buf - 1, f);
        fclose(f);
        buf[n] = '\0';
        char *p = strrchr(buf, ')'); /* the command name may hold spaces */
        int field = 2, cpu = -1;
        for (; p != NULL && *p; p++) {
            if (*p == ' ' && ++field == 39) {
                cpu = atoi(p + 1);
                break;
            }
        }
        if (cpu >= 0 && cpu < MAX_CPUS)
            *mask |= 1ull << cpu;
    }
    closedir(d);
}

static void print_cpus(uint64_t mask)
{
    int first = 1;
    for (int c = 0; c < MAX_CPUS; c++) {
        if (mask & (1ull << c)) {
            printf("%s%d", first ? "" : ",", c);
            first = 0;
        }
    }
    if (first)
        printf("?");
}

static int open_side(side *s, const char *act, const char *admin, const float *goal, uint32_t dim)
{
    veer_client_options o;
    veer_client_options_init(&o);
    o.act_endpoint = act;
    o.admin_endpoint = admin;
    veer_error err;
    veer_error_clear(&err);
    if (veer_client_open(&o, &s->client, &err) != 0) {
        fprintf(stderr, "bench_overhead: %s: %s\n", s->name, err.message);
        return -1;
    }
    veer_task_spec spec;
    veer_task_spec_init(&spec, VEER_TASK_GOALS);
    float w = 1.0f;
    spec.count = 1;
    spec.states = goal;
    spec.values = &w;
    if (veer_client_task_put(s->client, "reach", &spec, dim, NULL, &err) != 0 ||
        veer_client_switch(s->client, "bench", "reach", NULL, &err) != 0) {
        fprintf(stderr, "bench_overhead: %s: setting up the task: %s\n", s->name, err.message);
        return -1;
    }
    return 0;
}

/* `count` acts; returns the number that came back with the policy's action. */
static size_t run_acts(side *s, const float *states, uint32_t dim, size_t count, uint64_t *out,
                       uint64_t *server, size_t *k)
{
    float action[256];
    veer_client_act_result r;
    size_t ok = 0;
    for (size_t i = 0; i < count; i++) {
        const float *st = states + (size_t)((*k + i) % N_STATES) * dim;
        int rc = veer_client_act(s->client, "bench", st, 100000, action, &r, NULL);
        if (rc != 0 || (r.flags & VEER_ACT_FALLBACK)) {
            s->fallbacks++;
            s->last_flags = rc != 0 ? (uint32_t)-rc << 16 : r.flags;
        } else {
            if (out != NULL) {
                out[ok] = r.round_trip_ns;
                server[ok] = (uint64_t)r.server_us * 1000u;
            }
            ok++;
        }
    }
    *k += count;
    return ok;
}

int main(int argc, char **argv)
{
    if (argc < 8) {
        fprintf(stderr,
                "usage: bench_overhead ON_ACT ON_ADMIN ON_PID OFF_ACT OFF_ADMIN OFF_PID BUNDLE "
                "[ROUNDS] [PER_ROUND]\n");
        return 2;
    }
    int rounds = argc > 8 ? atoi(argv[8]) : 100;
    size_t per_round = argc > 9 ? (size_t)atol(argv[9]) : 250;
    if (rounds < 1 || per_round < 100) {
        fprintf(stderr, "bench_overhead: ROUNDS >= 1 and PER_ROUND >= 100\n");
        return 2;
    }
    veer_bundle *bundle = NULL;
    veer_error err;
    if (veer_bundle_open(argv[7], &bundle, &err) != 0) {
        fprintf(stderr, "bench_overhead: %s: %s\n", argv[7], err.message);
        return 1;
    }
    const veer_model_info *info = veer_bundle_info(bundle);
    uint32_t dim = info->state_dim;
    if (!info->has_stats || info->action_dim > 256) {
        fprintf(stderr,
                "bench_overhead: the bundle needs training statistics and at most 256 actions\n");
        return 1;
    }
    /* States drawn around the training mean with the training standard deviations, so the drift
     * monitor does its usual work and nothing drifts. */
    float *states = malloc((size_t)N_STATES * dim * sizeof(float));
    for (size_t i = 0; states != NULL && i < N_STATES; i++) {
        for (uint32_t j = 0; j < dim; j++) {
            double u = uniform01(), v = uniform01();
            double g = sqrt(-2.0 * log(u + 1e-300)) * cos(2.0 * M_PI * v);
            states[i * dim + j] =
                (float)(info->state_mean[j] + g * sqrt(info->state_cov[(size_t)j * dim + j]));
        }
    }
    /* The A/A run (both services with monitors off) names its first service itself. */
    const char *first =
        getenv("VEER_BENCH_FIRST_LABEL") ? getenv("VEER_BENCH_FIRST_LABEL") : "monitors on";
    side sides[2] = {{.name = first, .pid = atol(argv[3])},
                     {.name = "monitors off", .pid = atol(argv[6])}};
    if (states == NULL || open_side(&sides[0], argv[1], argv[2], states, dim) != 0 ||
        open_side(&sides[1], argv[4], argv[5], states, dim) != 0)
        return 1;
    size_t k = 0;
    uint64_t client_cpus = 0;
    for (int s = 0; s < 2; s++) {
        sides[s].rtt = malloc((size_t)rounds * per_round * sizeof(uint64_t));
        sides[s].round_p50 = malloc((size_t)rounds * sizeof(double));
        if (sides[s].rtt == NULL || sides[s].round_p50 == NULL)
            return 1;
        sides[s].server = malloc((size_t)rounds * per_round * sizeof(uint64_t));
        if (sides[s].server == NULL)
            return 1;
        run_acts(&sides[s], states, dim, 3000, NULL, NULL,
                 &k); /* warm-up: caches, the running p99, the window */
    }
    uint64_t *scratch = malloc(per_round * sizeof(uint64_t));
    for (int r = 0; r < rounds && scratch != NULL; r++) {
        for (int o = 0; o < 2; o++) {
            side *s = &sides[(r + o) % 2];
            size_t ok = run_acts(s, states, dim, per_round, s->rtt + s->n, s->server + s->n, &k);
            memcpy(scratch, s->rtt + s->n, ok * sizeof(uint64_t));
            qsort(scratch, ok, sizeof(uint64_t), cmp_u64);
            s->round_p50[r] = ok ? (double)pct(scratch, ok, 50) : NAN;
            s->n += ok;
            note_cpus(s->pid, &s->cpus);
            int c = sched_getcpu();
            if (c >= 0 && c < MAX_CPUS)
                client_cpus |= 1ull << c;
        }
    }

    printf("bench_overhead: act round trip through the C client, veerd with monitors on vs off "
           "(same run)\n");
    printf("  bundle %s: state %u, z %u; %d rounds x %zu acts per service, alternating\n", argv[7],
           dim, info->z_dim, rounds, per_round);
    printf("  OpenBLAS kernel: %s (OPENBLAS_CORETYPE=%s)\n", veer_blas_kernel(),
           getenv("OPENBLAS_CORETYPE") ? getenv("OPENBLAS_CORETYPE") : "unset");
    printf("  CPUs: client ");
    print_cpus(client_cpus);
    for (int s = 0; s < 2; s++) {
        printf("; veerd (%s, pid %ld) ", sides[s].name, sides[s].pid);
        print_cpus(sides[s].cpus);
    }
    printf(" (sampled, not pinned)\n");
    double p50[2], p99[2];
    for (int s = 0; s < 2; s++) {
        qsort(sides[s].rtt, sides[s].n, sizeof(uint64_t), cmp_u64);
        p50[s] = (double)pct(sides[s].rtt, sides[s].n, 50) / 1e3;
        p99[s] = (double)pct(sides[s].rtt, sides[s].n, 99) / 1e3;
        printf("  %-13s fallbacks %llu (last flags 0x%x)\n", sides[s].name,
               (unsigned long long)sides[s].fallbacks, sides[s].last_flags);
        printf("  %-13s acts %7zu   p50 %8.2f us   p90 %8.2f us   p99 %8.2f us\n", sides[s].name,
               sides[s].n, p50[s], (double)pct(sides[s].rtt, sides[s].n, 90) / 1e3, p99[s]);
    }
    /* veerd's own time: from taking the request off the socket to starting the reply (decode,
     * checks, drift monitor, policy), in whole microseconds, so the mean is the finer figure. */
    double mean_server[2];
    for (int s = 0; s < 2; s++) {
        double sum = 0;
        for (size_t i = 0; i < sides[s].n; i++)
            sum += (double)sides[s].server[i];
        mean_server[s] = sides[s].n ? sum / (double)sides[s].n / 1e3 : NAN;
        qsort(sides[s].server, sides[s].n, sizeof(uint64_t), cmp_u64);
        printf("  %-13s veerd's own time (server_us, 1 us resolution): mean %7.2f us   p50 %5.0f "
               "us   p99 %5.0f us\n",
               sides[s].name, mean_server[s], (double)pct(sides[s].server, sides[s].n, 50) / 1e3,
               (double)pct(sides[s].server, sides[s].n, 99) / 1e3);
    }
    printf("  veerd's own time on/off: mean %.3f (%+.2f us per act)\n",
           mean_server[0] / mean_server[1], mean_server[0] - mean_server[1]);
    double ratios[4096];
    int nr = 0;
    for (int r = 0; r < rounds && r < 4096; r++)
        if (sides[1].round_p50[r] > 0)
            ratios[nr++] = sides[0].round_p50[r] / sides[1].round_p50[r];
    qsort(ratios, (size_t)nr, sizeof(double), cmp_double);
    double median_ratio = nr ? ratios[nr / 2] : NAN;
    printf("  ratio on/off: p50 %.3f (%+.1f %%), p99 %.3f; median of per-round p50 ratios %.3f; "
           "target p50 <= 1.030: %s\n",
           p50[0] / p50[1], 100 * (p50[0] / p50[1] - 1), p99[0] / p99[1], median_ratio,
           p50[0] / p50[1] <= 1.03 ? "met" : "NOT met");
    for (int s = 0; s < 2; s++) {
        veer_client_close(sides[s].client);
        free(sides[s].rtt);
        free(sides[s].server);
        free(sides[s].round_p50);
    }
    free(scratch);
    free(states);
    veer_bundle_close(bundle);
    return 0;
}
