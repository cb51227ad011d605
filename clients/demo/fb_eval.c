/* veer-arm-fb-eval: the zero-shot return of the served FB policy on the demo task suite, against
 * the task-specific planner (CEM-MPC) and random torques, as a Markdown table.
 *
 * The policy is the model acting in-process through libveer (demo_fb.h: veer_task_encode, then
 * veer_act every query), run through the arm's evaluation loop (eval.h) with the same start
 * states, parcel mass, episode length and query interval as the baselines, whose returns come
 * from veer-arm-eval-baselines --json (the check refuses a baselines file made with other
 * settings). The query interval defaults to once per decision step (20 ms), as the baselines
 * plan once per decision; the served policy could be asked every millisecond (the demo does),
 * but then the comparison would no longer be like for like.
 *
 * Normalised score per task: (J − J_random) / (J_cem − J_random) (eval.h); the mean over tasks.
 *
 * --select ranks several bundles (checkpoints of one training run) on a held-out evaluation:
 * four start states that the reported evaluation never uses, each task's return scored as
 * (J − J_random) / (J_top − J_random) with J_top the return of reward 1 at every decision (the
 * suite's rewards are at most 1). No planner runs there, so the selection takes seconds; the
 * ranking needs only a common scale per task, not the planner's.
 *
 * --bootstrap K measures how much a score owes to the particular reward samples: the task is
 * encoded again from K resamples of the reference states drawn with replacement (Efron's
 * bootstrap, Ann. Statist. 7(1), 1979), each evaluated from the same starts. On the shipped model
 * the z of a resample lies 1.5-9 degrees from the full set's (50 resamples, every task), and that
 * is enough for the policy to settle at another pose (clients/demo/README.md), so the spread is
 * part of the figure. With --select, a bundle's
 * held-out score becomes the mean over the full set and the K resamples, so the choice of
 * checkpoint rests less on one encoding.
 */
#include <cjson/cJSON.h>
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "arm.h"
#include "base/base.h"
#include "demo_fb.h"
#include "eval.h"
#include "tasks.h"
#include "train/rng.h"

#define EXIT_REFUSED 1
#define EXIT_USAGE 2
#define MAX_BOOTSTRAP 200
#define BOOTSTRAP_KEY 20261202u /* fixed, so the resamples are the same for every bundle */

/* Held out from the reported evaluation (eval.c's starts): at rest to the left, raised to the
 * right, swinging near the top, folded low on the left. Chosen by hand inside the stops. */
static const double heldout_starts[4][4] = {
    {-2.0, 1.0, 0.0, 0.0},
    {0.6, -0.5, 0.0, 0.0},
    {-1.2, 0.4, 1.0, 1.5},
    {-3.2, -1.8, 0.0, 0.0},
};

typedef struct options {
    const char *bundle, *baselines, *json;
    long query_ms, decisions, bootstrap;
    int center, quiet;
    const char **select;
    int nselect;
} options;

static void usage(FILE *to)
{
    fprintf(to,
            "usage: veer-arm-fb-eval --bundle MODEL.veer --baselines BASELINES.json [options]\n"
            "       veer-arm-fb-eval --select MODEL.veer...\n"
            "Zero-shot returns of the FB policy served by libveer on the demo arm's task suite,\n"
            "normalised against the planner and random torques of veer-arm-eval-baselines.\n\n"
            "  --bundle PATH       the model\n"
            "  --baselines PATH    veer-arm-eval-baselines --json output (same settings)\n"
            "  --query-ms N        ms between policy queries, 1 to 20 (default: the baselines')\n"
            "  --no-center         encode reward samples without subtracting their mean\n"
            "  --json PATH         also write the figures as JSON (with one probe action per\n"
            "                      task: the state, the task vector and the action)\n"
            "  --bootstrap K       also encode each task from K resamples of the reward samples\n"
            "                      (with replacement) and report the scores' spread, 0 to %d\n"
            "                      (default 0); before --select, rank on the mean over them\n"
            "  --select PATH...    rank bundles on held-out starts, print the best path\n"
            "  --quiet             no table\n"
            "exit codes: 0 ok, 1 refused, 2 usage\n",
            MAX_BOOTSTRAP);
}

static int parse_args(int argc, char **argv, options *o)
{
    memset(o, 0, sizeof *o);
    o->center = 1;
    o->query_ms = 0;
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i], *v = i + 1 < argc ? argv[i + 1] : NULL;
        if (strcmp(a, "--help") == 0 || strcmp(a, "-h") == 0) {
            usage(stdout);
            exit(0);
        } else if (strcmp(a, "--select") == 0) {
            o->select = (const char **)argv + i + 1;
            o->nselect = argc - i - 1;
            if (o->nselect < 1) {
                fprintf(stderr, "veer-arm-fb-eval: --select needs at least one bundle\n");
                return -1;
            }
            return 0;
        } else if (strcmp(a, "--no-center") == 0) {
            o->center = 0;
        } else if (strcmp(a, "--quiet") == 0) {
            o->quiet = 1;
        } else if (strcmp(a, "--bundle") == 0 || strcmp(a, "--baselines") == 0 ||
                   strcmp(a, "--json") == 0 || strcmp(a, "--query-ms") == 0 ||
                   strcmp(a, "--bootstrap") == 0) {
            if (v == NULL || *v == '\0') {
                fprintf(stderr, "veer-arm-fb-eval: %s needs a value\n", a);
                return -1;
            }
            if (strcmp(a, "--bundle") == 0)
                o->bundle = v;
            else if (strcmp(a, "--baselines") == 0)
                o->baselines = v;
            else if (strcmp(a, "--json") == 0)
                o->json = v;
            else if (strcmp(a, "--bootstrap") == 0) {
                char *end;
                errno = 0;
                o->bootstrap = strtol(v, &end, 10);
                if (*end || errno || o->bootstrap < 0 || o->bootstrap > MAX_BOOTSTRAP) {
                    fprintf(stderr, "veer-arm-fb-eval: --bootstrap needs 0 to %d, got '%s'\n",
                            MAX_BOOTSTRAP, v);
                    return -1;
                }
            } else {
                char *end;
                errno = 0;
                o->query_ms = strtol(v, &end, 10);
                if (*end || errno || o->query_ms < 1 || o->query_ms > 20) {
                    fprintf(stderr, "veer-arm-fb-eval: --query-ms needs 1 to 20, got '%s'\n", v);
                    return -1;
                }
            }
            i++;
        } else {
            fprintf(stderr, "veer-arm-fb-eval: unknown option '%s' (see --help)\n", a);
            return -1;
        }
    }
    if (o->bundle == NULL || o->baselines == NULL) {
        fprintf(stderr, "veer-arm-fb-eval: --bundle and --baselines are required (see --help)\n");
        return -1;
    }
    return 0;
}

/* ---- The baselines file -------------------------------------------------------------------- */

typedef struct baselines {
    long decisions, query_ms;
    double parcel_mass;
    double j_cem[VEER_ARM_TASK_COUNT], j_random[VEER_ARM_TASK_COUNT];
    int have[VEER_ARM_TASK_COUNT];
} baselines;

static int read_baselines(const char *path, baselines *b)
{
    memset(b, 0, sizeof *b);
    FILE *f = fopen(path, "rb");
    if (f == NULL) {
        fprintf(stderr, "veer-arm-fb-eval: --baselines %s: %s\n", path, strerror(errno));
        return -1;
    }
    char *text = veer__malloc(1 << 20);
    size_t n = text ? fread(text, 1, (1 << 20) - 1, f) : 0;
    fclose(f);
    if (text == NULL)
        return -1;
    text[n] = '\0';
    cJSON *root = cJSON_Parse(text);
    veer__free(text);
    int rc = -1;
    const cJSON *dec = cJSON_GetObjectItem(root, "decisions"),
                *q = cJSON_GetObjectItem(root, "query_ms"),
                *pm = cJSON_GetObjectItem(root, "parcel_mass_kg"),
                *st = cJSON_GetObjectItem(root, "starts"),
                *tasks = cJSON_GetObjectItem(root, "tasks");
    if (!cJSON_IsNumber(dec) || !cJSON_IsNumber(q) || !cJSON_IsNumber(pm) || !cJSON_IsArray(st) ||
        !cJSON_IsArray(tasks)) {
        fprintf(stderr,
                "veer-arm-fb-eval: --baselines %s: not a veer-arm-eval-baselines file "
                "(decisions, query_ms, parcel_mass_kg, starts, tasks)\n",
                path);
        goto done;
    }
    b->decisions = (long)dec->valuedouble;
    b->query_ms = (long)q->valuedouble;
    b->parcel_mass = pm->valuedouble;
    if (cJSON_GetArraySize(st) != VEER_ARM_EVAL_START_COUNT) {
        fprintf(stderr,
                "veer-arm-fb-eval: --baselines %s: starts: %d start states, the "
                "evaluation uses all %d\n",
                path, cJSON_GetArraySize(st), VEER_ARM_EVAL_START_COUNT);
        goto done;
    }
    for (int s = 0; s < VEER_ARM_EVAL_START_COUNT; s++)
        for (int k = 0; k < 4; k++) {
            const cJSON *x = cJSON_GetArrayItem(cJSON_GetArrayItem(st, s), k);
            if (!cJSON_IsNumber(x) || fabs(x->valuedouble - veer_arm_eval_starts[s][k]) > 1e-9) {
                fprintf(stderr,
                        "veer-arm-fb-eval: --baselines %s: starts[%d][%d] differs from "
                        "the evaluation's start states\n",
                        path, s, k);
                goto done;
            }
        }
    const cJSON *t;
    cJSON_ArrayForEach(t, tasks)
    {
        const cJSON *name = cJSON_GetObjectItem(t, "task"),
                    *c = cJSON_GetObjectItem(t, "cem_return"),
                    *r = cJSON_GetObjectItem(t, "random_return");
        const veer_arm_task *task =
            cJSON_IsString(name) ? veer_arm_task_find(name->valuestring) : NULL;
        if (task == NULL || !cJSON_IsNumber(c) || !cJSON_IsNumber(r)) {
            fprintf(stderr,
                    "veer-arm-fb-eval: --baselines %s: tasks: an entry without a known "
                    "task, cem_return and random_return\n",
                    path);
            goto done;
        }
        int i = (int)(task - veer_arm_tasks);
        b->j_cem[i] = c->valuedouble;
        b->j_random[i] = r->valuedouble;
        b->have[i] = 1;
    }
    rc = 0;
done:
    cJSON_Delete(root);
    return rc;
}

/* ---- Evaluating one bundle ------------------------------------------------------------------ */

typedef struct task_result {
    double j_fb;   /* reward samples (the reported figure) */
    double j_goal; /* goal encoding, reach kinds; NaN otherwise */
    double r2;     /* expressiveness of the samples */
    float z[1024];
    float probe_state[VEER_ARM_OBS_DIM], probe_action[VEER_ARM_ACT_DIM];
} task_result;

static int eval_task(veer_demo_fb_policy *fb, const veer_arm_params *p, const veer_arm_task *task,
                     const double (*starts)[4], int nstarts, const veer_arm_episode *e, int center,
                     task_result *out, veer_error *err)
{
    veer_arm_policy pol = {.name = "fb", .act = veer_demo_fb_policy_act, .ctx = fb};
    veer_demo_task_spec spec;
    veer_task_report rep;
    int rc = veer_demo_task_spec_build(fb->bundle, task, p, VEER_DEMO_ENCODE_SAMPLES, center, &spec,
                                       err);
    if (rc == 0)
        rc = veer_demo_fb_policy_set_task(fb, &spec.spec, &rep, err);
    veer_demo_task_spec_free(&spec);
    if (rc)
        return rc;
    out->r2 = rep.r2;
    memcpy(out->z, fb->z, sizeof(float) * fb->z_dim);
    fb->record_first = 1;
    if ((rc = veer_arm_eval_policy(p, task, starts, nstarts, 1, e, &pol, &out->j_fb, NULL, err)))
        return rc;
    memcpy(out->probe_state, fb->first_state, sizeof out->probe_state);
    memcpy(out->probe_action, fb->first_action, sizeof out->probe_action);
    out->j_goal = NAN;
    if (veer_arm_task_has_goal(task)) {
        if ((rc = veer_demo_task_spec_build(fb->bundle, task, p, VEER_DEMO_ENCODE_GOAL, 0, &spec,
                                            err)) == 0)
            rc = veer_demo_fb_policy_set_task(fb, &spec.spec, NULL, err);
        veer_demo_task_spec_free(&spec);
        if (rc == 0)
            rc =
                veer_arm_eval_policy(p, task, starts, nstarts, 1, e, &pol, &out->j_goal, NULL, err);
    }
    return rc;
}

/* Returns of `task` encoded from `k` bootstrap resamples of the bundle's reference states:
 * j[i] for resample i (k doubles, caller-owned). Every task and every bundle sees the same
 * draws (the generator restarts from BOOTSTRAP_KEY), so resample i is one sample set a
 * supervisor might have sent, and a per-resample mean over tasks means something. */
static int bootstrap_task(veer_demo_fb_policy *fb, const veer_arm_params *p,
                          const veer_arm_task *task, const double (*starts)[4], int nstarts,
                          const veer_arm_episode *e, int center, long k, double *j, veer_error *err)
{
    veer_demo_task_spec full;
    int rc = veer_demo_task_spec_build(fb->bundle, task, p, VEER_DEMO_ENCODE_SAMPLES, center, &full,
                                       err);
    if (rc)
        return rc;
    uint32_t n = full.spec.count;
    float *states = veer__malloc(sizeof(float) * VEER_ARM_OBS_DIM * n);
    float *values = veer__malloc(sizeof(float) * n);
    if (states == NULL || values == NULL)
        rc = veer__error_set(err, VEER_ENOMEM, "bootstrap", NULL);
    veer__rng rng;
    veer__rng_init(&rng, BOOTSTRAP_KEY);
    veer_arm_policy pol = {.name = "fb", .act = veer_demo_fb_policy_act, .ctx = fb};
    for (long i = 0; i < k && rc == 0; i++) {
        for (uint32_t r = 0; r < n; r++) {
            uint64_t src = veer__rng_below(&rng, n);
            memcpy(states + (size_t)r * VEER_ARM_OBS_DIM, full.states + src * VEER_ARM_OBS_DIM,
                   sizeof(float) * VEER_ARM_OBS_DIM);
            values[r] = full.values[src];
        }
        veer_task_spec spec = full.spec;
        spec.states = states;
        spec.values = values;
        if ((rc = veer_demo_fb_policy_set_task(fb, &spec, NULL, err)) == 0)
            rc = veer_arm_eval_policy(p, task, starts, nstarts, 1, e, &pol, &j[i], NULL, err);
    }
    veer__free(states);
    veer__free(values);
    veer_demo_task_spec_free(&full);
    return rc;
}

static int cmp_double(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

/* The q-quantile (0 ≤ q ≤ 1) of x[0..n), by linear interpolation between order statistics (the
 * rule NumPy's percentile uses by default). Sorts x in place. */
static double quantile(double *x, long n, double q)
{
    qsort(x, (size_t)n, sizeof *x, cmp_double);
    double pos = q * (double)(n - 1);
    long lo = (long)floor(pos);
    long hi = lo + 1 < n ? lo + 1 : lo;
    return x[lo] + (pos - (double)lo) * (x[hi] - x[lo]);
}

static int open_policy(const char *path, veer_bundle **b, veer_demo_fb_policy *fb)
{
    veer_error err = {0};
    int rc = veer_bundle_open(path, b, &err);
    if (rc == 0 && (rc = veer_demo_fb_policy_init(fb, *b, &err)) != 0) {
        veer_bundle_close(*b);
        *b = NULL;
    }
    if (rc)
        fprintf(stderr, "veer-arm-fb-eval: %s: %s (%s): %s\n", path, veer_errname(rc), err.field,
                err.message);
    return rc;
}

static int run_select(const options *o)
{
    veer_arm_params p;
    veer_arm_params_default(&p);
    veer_arm_episode e;
    veer_arm_episode_default(&e);
    double j_random[VEER_ARM_TASK_COUNT];
    veer_error err = {0};
    for (int t = 0; t < VEER_ARM_TASK_COUNT; t++) {
        veer_arm_random_policy rnd;
        veer_arm_random_policy_init(&rnd, &p, 7 + (uint64_t)t);
        veer_arm_policy pol = {.name = "random", .act = veer_arm_random_policy_act, .ctx = &rnd};
        if (veer_arm_eval_policy(&p, &veer_arm_tasks[t], heldout_starts, 4, 3, &e, &pol,
                                 &j_random[t], NULL, &err) != 0) {
            fprintf(stderr, "veer-arm-fb-eval: %s\n", err.message);
            return EXIT_REFUSED;
        }
    }
    int best = -1;
    double best_score = -INFINITY;
    for (int k = 0; k < o->nselect; k++) {
        veer_bundle *b;
        veer_demo_fb_policy fb;
        if (open_policy(o->select[k], &b, &fb) != 0)
            return EXIT_REFUSED;
        double sum = 0.0;
        fprintf(stderr, "%s:", o->select[k]);
        for (int t = 0; t < VEER_ARM_TASK_COUNT; t++) {
            task_result r;
            if (eval_task(&fb, &p, &veer_arm_tasks[t], heldout_starts, 4, &e, o->center, &r,
                          &err)) {
                fprintf(stderr, "\nveer-arm-fb-eval: %s: %s\n", veer_arm_tasks[t].name,
                        err.message);
                return EXIT_REFUSED;
            }
            double top = (double)e.decisions;
            double s = (r.j_fb - j_random[t]) / (top - j_random[t]);
            if (o->bootstrap > 0) {
                double jb[MAX_BOOTSTRAP];
                if (bootstrap_task(&fb, &p, &veer_arm_tasks[t], heldout_starts, 4, &e, o->center,
                                   o->bootstrap, jb, &err)) {
                    fprintf(stderr, "\nveer-arm-fb-eval: %s: %s\n", veer_arm_tasks[t].name,
                            err.message);
                    return EXIT_REFUSED;
                }
                for (long i = 0; i < o->bootstrap; i++)
                    s += (jb[i] - j_random[t]) / (top - j_random[t]);
                s /= (double)(o->bootstrap + 1);
            }
            fprintf(stderr, " %s %.3f", veer_arm_tasks[t].name, s);
            sum += s;
        }
        double mean = sum / VEER_ARM_TASK_COUNT;
        fprintf(stderr, " | mean %.3f\n", mean);
        if (mean > best_score)
            best_score = mean, best = k;
        veer_demo_fb_policy_free(&fb);
        veer_bundle_close(b);
    }
    printf("%s\n", o->select[best]);
    return 0;
}

/* The bootstrap's figures for the reported evaluation: per task and for the mean over tasks,
 * the median and the 10th and 90th percentiles of the score over the resamples. */
typedef struct boot_summary {
    long k;
    double scores[VEER_ARM_TASK_COUNT][MAX_BOOTSTRAP]; /* per resample, in draw order */
    double task[VEER_ARM_TASK_COUNT][3];
    double mean[3];
} boot_summary;

static void summarise_bootstrap(const baselines *bl, long k, double (*jb)[MAX_BOOTSTRAP],
                                boot_summary *out)
{
    static const double qs[3] = {0.5, 0.1, 0.9};
    double scores[MAX_BOOTSTRAP], means[MAX_BOOTSTRAP] = {0};
    out->k = k;
    for (int t = 0; t < VEER_ARM_TASK_COUNT; t++) {
        for (long i = 0; i < k; i++) {
            scores[i] = veer_arm_normalised_score(jb[t][i], bl->j_random[t], bl->j_cem[t]);
            out->scores[t][i] = scores[i];
            means[i] += scores[i] / VEER_ARM_TASK_COUNT;
        }
        for (int q = 0; q < 3; q++)
            out->task[t][q] = quantile(scores, k, qs[q]);
    }
    for (int q = 0; q < 3; q++)
        out->mean[q] = quantile(means, k, qs[q]);
}

static void print_bootstrap(const boot_summary *bs, const task_result *res, const baselines *bl)
{
    printf("\nThe same scores with each task encoded from %ld bootstrap resamples of the reference "
           "states (one draw per resample, shared by the tasks): median and 10–90 %% range.\n\n",
           bs->k);
    printf("| task | score (all samples) | median | 10 %% | 90 %% |\n");
    printf("|---|---:|---:|---:|---:|\n");
    for (int t = 0; t < VEER_ARM_TASK_COUNT; t++)
        printf("| %s | %.2f | %.2f | %.2f | %.2f |\n", veer_arm_tasks[t].name,
               veer_arm_normalised_score(res[t].j_fb, bl->j_random[t], bl->j_cem[t]),
               bs->task[t][0], bs->task[t][1], bs->task[t][2]);
    printf("| **mean** | | **%.2f** | %.2f | %.2f |\n", bs->mean[0], bs->mean[1], bs->mean[2]);
}

static void print_table(const char *model, long query_ms, const baselines *bl,
                        const task_result *res, double mean, double mean_goal)
{
    printf("Model `%s`; policy queried every %ld ms, reward read every 20 ms, %ld decisions "
           "(%.0f s) from %d start states; rewards encoded from the bundle's reference states, "
           "centred.\n\n",
           model, query_ms, bl->decisions, bl->decisions * 0.02, VEER_ARM_EVAL_START_COUNT);
    printf("| task | FB (samples) | FB (goal) | CEM-MPC | random | score | score (goal) |\n");
    printf("|---|---:|---:|---:|---:|---:|---:|\n");
    for (int t = 0; t < VEER_ARM_TASK_COUNT; t++) {
        const task_result *r = &res[t];
        double s = veer_arm_normalised_score(r->j_fb, bl->j_random[t], bl->j_cem[t]);
        printf("| %s | %.1f | ", veer_arm_tasks[t].name, r->j_fb);
        if (isnan(r->j_goal))
            printf("– | ");
        else
            printf("%.1f | ", r->j_goal);
        printf("%.1f | %.1f | %.2f | ", bl->j_cem[t], bl->j_random[t], s);
        if (isnan(r->j_goal))
            printf("– |\n");
        else
            printf("%.2f |\n", veer_arm_normalised_score(r->j_goal, bl->j_random[t], bl->j_cem[t]));
    }
    printf("| **mean** | | | | | **%.2f** | %.2f (goals for the reach kinds) |\n", mean, mean_goal);
}

static int write_json(const char *path, const options *o, const baselines *bl, long query_ms,
                      const task_result *res, uint32_t z_dim, double mean, double mean_goal,
                      const boot_summary *bs)
{
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "kind", "veer demo arm FB evaluation");
    cJSON_AddStringToObject(root, "bundle", o->bundle);
    cJSON_AddNumberToObject(root, "query_ms", (double)query_ms);
    cJSON_AddNumberToObject(root, "decisions", (double)bl->decisions);
    cJSON_AddBoolToObject(root, "center", o->center);
    cJSON_AddNumberToObject(root, "mean_score", mean);
    cJSON_AddNumberToObject(root, "mean_score_reach_goals", mean_goal);
    if (bs != NULL) {
        cJSON *boot = cJSON_AddObjectToObject(root, "bootstrap");
        cJSON_AddNumberToObject(boot, "resamples", (double)bs->k);
        cJSON_AddNumberToObject(boot, "mean_score_median", bs->mean[0]);
        cJSON_AddNumberToObject(boot, "mean_score_p10", bs->mean[1]);
        cJSON_AddNumberToObject(boot, "mean_score_p90", bs->mean[2]);
    }
    cJSON *tasks = cJSON_AddArrayToObject(root, "tasks");
    for (int t = 0; t < VEER_ARM_TASK_COUNT; t++) {
        const task_result *r = &res[t];
        cJSON *e = cJSON_CreateObject();
        cJSON_AddStringToObject(e, "task", veer_arm_tasks[t].name);
        cJSON_AddNumberToObject(e, "fb_return", r->j_fb);
        if (!isnan(r->j_goal))
            cJSON_AddNumberToObject(e, "fb_goal_return", r->j_goal);
        cJSON_AddNumberToObject(e, "cem_return", bl->j_cem[t]);
        cJSON_AddNumberToObject(e, "random_return", bl->j_random[t]);
        cJSON_AddNumberToObject(e, "score",
                                veer_arm_normalised_score(r->j_fb, bl->j_random[t], bl->j_cem[t]));
        if (!isnan(r->r2))
            cJSON_AddNumberToObject(e, "r2", r->r2);
        if (bs != NULL) {
            cJSON_AddNumberToObject(e, "bootstrap_score_median", bs->task[t][0]);
            cJSON_AddNumberToObject(e, "bootstrap_score_p10", bs->task[t][1]);
            cJSON_AddNumberToObject(e, "bootstrap_score_p90", bs->task[t][2]);
            cJSON_AddItemToObject(e, "bootstrap_scores",
                                  cJSON_CreateDoubleArray(bs->scores[t], (int)bs->k));
        }
        cJSON *probe = cJSON_AddObjectToObject(e, "probe");
        cJSON_AddItemToObject(probe, "state",
                              cJSON_CreateFloatArray(r->probe_state, VEER_ARM_OBS_DIM));
        cJSON_AddItemToObject(probe, "z", cJSON_CreateFloatArray(r->z, (int)z_dim));
        cJSON_AddItemToObject(probe, "action",
                              cJSON_CreateFloatArray(r->probe_action, VEER_ARM_ACT_DIM));
        cJSON_AddItemToArray(tasks, e);
    }
    char *text = cJSON_Print(root);
    cJSON_Delete(root);
    FILE *f = text ? fopen(path, "w") : NULL;
    int ok = f && fputs(text, f) >= 0 && fputc('\n', f) != EOF;
    if (f && fclose(f) != 0)
        ok = 0;
    cJSON_free(text);
    if (!ok)
        fprintf(stderr, "veer-arm-fb-eval: --json %s: cannot write: %s\n", path, strerror(errno));
    return ok ? 0 : -1;
}

int main(int argc, char **argv)
{
    options o;
    if (parse_args(argc, argv, &o) != 0)
        return EXIT_USAGE;
    if (o.select)
        return run_select(&o);
    baselines bl;
    if (read_baselines(o.baselines, &bl) != 0)
        return EXIT_REFUSED;
    for (int t = 0; t < VEER_ARM_TASK_COUNT; t++)
        if (!bl.have[t]) {
            fprintf(stderr, "veer-arm-fb-eval: --baselines: no figures for task %s\n",
                    veer_arm_tasks[t].name);
            return EXIT_REFUSED;
        }
    long query_ms = o.query_ms ? o.query_ms : bl.query_ms;
    if (query_ms != bl.query_ms) {
        fprintf(stderr,
                "veer-arm-fb-eval: --query-ms %ld differs from the baselines' %ld: the "
                "returns would not compare\n",
                query_ms, bl.query_ms);
        return EXIT_REFUSED;
    }
    veer_arm_params p;
    veer_arm_params_default(&p);
    p.parcel_mass = bl.parcel_mass;
    veer_arm_episode e;
    veer_arm_episode_default(&e);
    e.decisions = (int)bl.decisions;
    e.query_ms = (int)query_ms;

    veer_bundle *b;
    veer_demo_fb_policy fb;
    if (open_policy(o.bundle, &b, &fb) != 0)
        return EXIT_REFUSED;
    task_result *res = veer__malloc(sizeof(task_result) * VEER_ARM_TASK_COUNT);
    if (res == NULL)
        return EXIT_REFUSED;
    double sum = 0.0, sum_goal = 0.0;
    int rc = 0;
    for (int t = 0; t < VEER_ARM_TASK_COUNT && rc == 0; t++) {
        veer_error err = {0};
        if ((rc = eval_task(&fb, &p, &veer_arm_tasks[t], veer_arm_eval_starts,
                            VEER_ARM_EVAL_START_COUNT, &e, o.center, &res[t], &err)) != 0) {
            fprintf(stderr, "veer-arm-fb-eval: %s: %s (%s): %s\n", veer_arm_tasks[t].name,
                    veer_errname(rc), err.field, err.message);
            break;
        }
        double s = veer_arm_normalised_score(res[t].j_fb, bl.j_random[t], bl.j_cem[t]);
        double sg = isnan(res[t].j_goal)
                        ? s
                        : veer_arm_normalised_score(res[t].j_goal, bl.j_random[t], bl.j_cem[t]);
        sum += s;
        sum_goal += sg;
    }
    /* The bootstrap: up to VEER_ARM_TASK_COUNT × MAX_BOOTSTRAP returns, about 0.1 s each; the
     * returns and their summary (11 kB each) are static, kept off the stack. */
    static double jb[VEER_ARM_TASK_COUNT][MAX_BOOTSTRAP];
    static boot_summary bs;
    if (rc == 0 && o.bootstrap > 0) {
        for (int t = 0; t < VEER_ARM_TASK_COUNT && rc == 0; t++) {
            veer_error err = {0};
            if ((rc = bootstrap_task(&fb, &p, &veer_arm_tasks[t], veer_arm_eval_starts,
                                     VEER_ARM_EVAL_START_COUNT, &e, o.center, o.bootstrap, jb[t],
                                     &err)) != 0)
                fprintf(stderr, "veer-arm-fb-eval: --bootstrap: %s: %s (%s): %s\n",
                        veer_arm_tasks[t].name, veer_errname(rc), err.field, err.message);
        }
        if (rc == 0)
            summarise_bootstrap(&bl, o.bootstrap, jb, &bs);
    }
    if (rc == 0) {
        double mean = sum / VEER_ARM_TASK_COUNT;
        const boot_summary *bsp = o.bootstrap > 0 ? &bs : NULL;
        if (!o.quiet) {
            print_table(o.bundle, query_ms, &bl, res, mean, sum_goal / VEER_ARM_TASK_COUNT);
            if (bsp)
                print_bootstrap(bsp, res, &bl);
        }
        if (o.json && write_json(o.json, &o, &bl, query_ms, res, fb.z_dim, mean,
                                 sum_goal / VEER_ARM_TASK_COUNT, bsp) != 0)
            rc = -1;
    }
    veer__free(res);
    veer_demo_fb_policy_free(&fb);
    veer_bundle_close(b);
    return rc == 0 ? 0 : EXIT_REFUSED;
}
