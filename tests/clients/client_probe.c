/* A small controller for the client tests: opens a veer_client on an act endpoint and runs
 * commands read line by line from stdin, printing one JSON line per command, so a pytest can
 * stop and continue veerd between calls and see what the C library returned each time.
 *
 *   usage: client_probe ACT_ENDPOINT
 *   stdin: "act CHANNEL DEADLINE_US v1,v2,..."  -> {"rc":..,"flags":..,"seq":..,"action":[..],...}
 *          "stats"                               -> {"acts":..,"late_discarded":..,
 *                                                   "allocations": through libveer's hook}
 *          "quit"
 */
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "veer/client.h"

/* Every allocation libveer_client makes goes through veer_set_allocator's hook; counting them
 * lets the test check that acting allocates nothing in our code. */
static unsigned long long allocations;
static void *count_malloc(size_t n)
{
    allocations++;
    return malloc(n);
}
static void *count_calloc(size_t n, size_t s)
{
    allocations++;
    return calloc(n, s);
}
static void *count_realloc(void *p, size_t n)
{
    allocations++;
    return realloc(p, n);
}

static void print_floats(const float *v, uint32_t n)
{
    printf("[");
    for (uint32_t i = 0; i < n; i++)
        printf("%s%.9g", i ? "," : "", (double)v[i]);
    printf("]");
}

int main(int argc, char **argv)
{
    if (argc != 2) {
        fprintf(stderr, "usage: client_probe ACT_ENDPOINT\n");
        return 2;
    }
    veer_allocator counting = {count_malloc, count_calloc, count_realloc, free};
    veer_set_allocator(&counting);
    veer_client_options o;
    veer_client_options_init(&o);
    o.act_endpoint = argv[1];
    o.timeout_ms = 5000;
    veer_client *c;
    veer_error err;
    int rc = veer_client_open(&o, &c, &err);
    if (rc != 0) {
        printf("{\"open\":%d,\"name\":\"%s\"}\n", rc, veer_errname(rc));
        return 1;
    }
    const veer_client_model *m = veer_client_model_info(c);
    printf("{\"open\":0,\"state_dim\":%u,\"action_dim\":%u,\"fallback\":", m->state_dim,
           m->action_dim);
    print_floats(m->fallback_action, m->action_dim);
    printf("}\n");
    fflush(stdout);

    char line[65536];
    float state[VEER_CLIENT_MAX_STATE], action[256];
    while (fgets(line, sizeof line, stdin) != NULL) {
        if (strncmp(line, "quit", 4) == 0)
            break;
        if (strncmp(line, "stats", 5) == 0) {
            veer_client_act_stats s;
            veer_client_act_stats_get(c, &s);
            veer_hist_summary h;
            veer_hist_summarize(veer_client_act_histogram(c), &h);
            printf("{\"acts\":%" PRIu64 ",\"replies\":%" PRIu64 ",\"deadline_fallbacks\":%" PRIu64
                   ",\"late_discarded\":%" PRIu64 ",\"bad_replies\":%" PRIu64
                   ",\"hist_count\":%" PRIu64 ",\"hist_max_ns\":%" PRIu64
                   ",\"model_changes\":%" PRIu64 ",\"allocations\":%llu}\n",
                   s.acts, s.replies, s.deadline_fallbacks, s.late_discarded, s.bad_replies,
                   h.count, h.max, s.model_changes, allocations);
            fflush(stdout);
            continue;
        }
        char channel[VEER_CLIENT_NAME_MAX];
        unsigned long deadline_us;
        int used = 0;
        if (sscanf(line, "act %127s %lu %n", channel, &deadline_us, &used) < 2) {
            printf("{\"bad_command\":true}\n");
            fflush(stdout);
            continue;
        }
        uint32_t n = 0;
        for (char *p = line + used, *end; n < VEER_CLIENT_MAX_STATE; p = end + 1) {
            state[n++] = strtof(p, &end);
            if (*end != ',')
                break;
        }
        veer_client_act_result res;
        veer_error_clear(&err);
        rc = veer_client_act(c, channel, state, (uint32_t)deadline_us, action, &res, &err);
        printf("{\"rc\":%d,\"name\":\"%s\",\"field\":\"%s\",\"flags\":%u,\"seq\":%" PRIu64
               ",\"epoch\":%" PRIu64 ",\"task\":\"%s\",\"value\":%.9g,\"round_trip_ns\":%" PRIu64
               ",\"action\":",
               rc, veer_errname(rc), err.field, res.flags, res.seq, res.epoch, res.task,
               (double)res.value, res.round_trip_ns);
        print_floats(action, m->action_dim);
        printf("}\n");
        fflush(stdout);
    }
    veer_client_close(c);
    return 0;
}
