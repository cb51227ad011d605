/* Embedding libveer: the smallest complete program that serves a model bundle.
 *
 * It opens a bundle, encodes two tasks (one from reward samples, one from a goal state), and
 * acts for a few states with each, the way a controller thread would: one workspace per thread,
 * created before the loop, so acting allocates nothing.
 *
 * usage: veer-embed-example BUNDLE SAMPLES.csv REWARDS.csv
 * (CSV: one state per row in the bundle's feature order; one reward per row.)
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "veer/runtime.h"

/* Reads up to max_rows rows of `cols` comma-separated floats; returns the row count or -1. */
static int read_csv(const char *path, float *out, int max_rows, int cols)
{
    FILE *f = fopen(path, "r");
    if (f == NULL)
        return -1;
    char line[4096];
    int rows = 0;
    while (rows < max_rows && fgets(line, sizeof line, f) != NULL) {
        char *p = line;
        for (int c = 0; c < cols; c++) {
            char *end;
            out[rows * cols + c] = strtof(p, &end);
            if (end == p) {
                fclose(f);
                return -1;
            }
            p = (*end == ',') ? end + 1 : end;
        }
        rows++;
    }
    fclose(f);
    return rows;
}

static void print_actions(veer_workspace *ws, const veer_model_info *info, const float *z,
                          const float *states, int n)
{
    float action[64], value;
    uint32_t flags;
    for (int i = 0; i < n; i++) {
        int rc = veer_act(ws, states + (size_t)i * info->state_dim, z, action, &value, &flags);
        if (rc != 0) {
            printf("    state %d: %s\n", i, veer_strerror(rc));
            continue;
        }
        printf("    state %d: action [", i);
        for (uint32_t k = 0; k < info->action_dim; k++)
            printf("%s%+.3f", k ? ", " : "", action[k]);
        printf("]  Q %+.3f%s%s\n", value, (flags & VEER_ACT_CLIPPED) ? "  clipped" : "",
               (flags & VEER_ACT_FALLBACK) ? "  FALLBACK" : "");
    }
}

int main(int argc, char **argv)
{
    if (argc != 4) {
        fprintf(stderr, "usage: %s BUNDLE SAMPLES.csv REWARDS.csv\n", argv[0]);
        return 2;
    }
    veer_error err;
    veer_bundle *bundle = NULL;
    if (veer_bundle_open(argv[1], &bundle, &err) != 0) {
        fprintf(stderr, "%s: %s (field %s)\n", argv[1], err.message, err.field);
        return 1;
    }
    const veer_model_info *info = veer_bundle_info(bundle);
    if (info->action_dim > 64 || info->state_dim > 256) {
        fprintf(stderr, "this example handles at most 64 action and 256 state dimensions\n");
        veer_bundle_close(bundle);
        return 1;
    }
    printf("model %s: %u state features, z_dim %u, %u action dimension(s)\n", info->model_version,
           info->state_dim, info->z_dim, info->action_dim);

    enum { MAX_ROWS = 1024 };
    float *states = calloc((size_t)MAX_ROWS * info->state_dim, sizeof *states);
    float *rewards = calloc(MAX_ROWS, sizeof *rewards);
    float *z = calloc(info->z_dim, sizeof *z);
    veer_workspace *ws = NULL;
    int status = 1;
    int n = states && rewards && z ? read_csv(argv[2], states, MAX_ROWS, (int)info->state_dim) : -1;
    int m = n > 0 ? read_csv(argv[3], rewards, MAX_ROWS, 1) : -1;
    if (n <= 0 || m != n) {
        fprintf(stderr, "could not read matching samples and rewards\n");
        goto done;
    }
    if (veer_workspace_create(bundle, 1, &ws, &err) != 0) {
        fprintf(stderr, "workspace: %s\n", err.message);
        goto done;
    }

    /* Task 1: from reward samples. */
    veer_task_spec spec;
    veer_task_spec_init(&spec, VEER_TASK_SAMPLES);
    spec.count = (uint32_t)n;
    spec.states = states;
    spec.values = rewards;
    veer_task_report report;
    if (veer_task_encode(bundle, &spec, z, &report, &err) != 0) {
        fprintf(stderr, "encode: %s (field %s)\n", err.message, err.field);
        goto done;
    }
    printf("task 'from %d reward samples': ||z|| before rescaling %.3f, expressiveness R2 %.3f\n",
           n, report.norm_raw, report.r2);
    print_actions(ws, info, z, states, 4);

    /* Task 2: reach the state of the best-rewarded sample, as a goal. */
    int best = 0;
    for (int i = 1; i < n; i++)
        if (rewards[i] > rewards[best])
            best = i;
    veer_task_spec_init(&spec, VEER_TASK_GOALS);
    float weight = 1.0f;
    spec.count = 1;
    spec.states = states + (size_t)best * info->state_dim;
    spec.values = &weight;
    if (veer_task_encode(bundle, &spec, z, &report, &err) != 0) {
        fprintf(stderr, "encode: %s (field %s)\n", err.message, err.field);
        goto done;
    }
    printf("task 'reach sample %d as a goal':\n", best);
    print_actions(ws, info, z, states, 4);
    status = 0;

done:
    veer_workspace_destroy(ws);
    free(z);
    free(rewards);
    free(states);
    veer_bundle_close(bundle);
    return status;
}
