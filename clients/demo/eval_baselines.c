/* veer-arm-eval-baselines: the baselines' returns on the demo task suite.
 *
 * For each task, runs the cross-entropy planner (cem.h) and random torques (eval.h) from the
 * fixed start states and prints a table: mean return of each and the planner's time per
 * decision. With --json it also writes the figures, per start as well, for the README and for
 * normalising a served policy's returns, (J − J_random) / (J_cem − J_random).
 */
#include <cjson/cJSON.h>
#include <errno.h>
#include <limits.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "arm.h"
#include "base/base.h"
#include "cem.h"
#include "eval.h"
#include "tasks.h"

#define EXIT_REFUSED 1
#define EXIT_USAGE 2

typedef struct options {
    int task_on[VEER_ARM_TASK_COUNT];
    long starts, decisions, query_ms, repeats, rng_key, plan_ms;
    double parcel_mass;
    int horizon;             /* 0: veer_arm_cem_config_for_task's */
    veer_arm_cem_config cem; /* the other planner settings, from the flags */
    const char *json;
    int quiet;
} options;

static void usage(FILE *to)
{
    fprintf(to,
            "usage: veer-arm-eval-baselines [options]\n"
            "Returns of the cross-entropy planner and of random torques on the demo arm's task\n"
            "suite, from fixed start states.\n\n"
            "  --tasks A,B,...        tasks to run (default all:");
    for (int i = 0; i < VEER_ARM_TASK_COUNT; i++)
        fprintf(to, " %s", veer_arm_tasks[i].name);
    fprintf(to,
            ")\n"
            "  --starts N             first N of the %d start states (default all)\n"
            "  --decisions N          decisions per episode, 20 ms each (default 250)\n"
            "  --query-ms N           ms between policy queries, 1 to 20 (default 20)\n"
            "  --random-repeats N     episodes per start for random torques (default 5)\n"
            "  --horizon N            planner horizon in decisions, all tasks (default 30,\n"
            "                         slow_reach_* 40)\n"
            "  --population N         planner samples per iteration (default 200)\n"
            "  --elites N             planner elites (default 20)\n"
            "  --iterations N         planner refits per decision (default 4)\n"
            "  --knot-every N         decisions between the planner's knots (default 5)\n"
            "  --plan-step-ms N       planner rollout step, divides 20, at most 5 (default 5)\n"
            "  --initial-sd F         planner sampling spread, fraction of the torque limit\n"
            "                         (default 0.5)\n"
            "  --parcel-mass KG       parcel at the gripper (default 0.5)\n"
            "  --rng N                random stream number (default 1)\n"
            "  --json PATH            also write the figures as JSON\n"
            "  --quiet                no table\n"
            "exit codes: 0 ok, 1 refused, 2 usage\n",
            VEER_ARM_EVAL_START_COUNT);
}

static int parse_long(const char *flag, const char *text, long lo, long hi, long *out)
{
    char *end;
    errno = 0;
    long v = text ? strtol(text, &end, 10) : 0;
    if (text == NULL || *text == '\0' || *end != '\0' || errno == ERANGE || v < lo || v > hi) {
        fprintf(stderr,
                "veer-arm-eval-baselines: %s needs a whole number from %ld to %ld, got "
                "'%s'\n",
                flag, lo, hi, text ? text : "(nothing)");
        return -1;
    }
    *out = v;
    return 0;
}

static int parse_double(const char *flag, const char *text, double lo, double hi, double *out)
{
    char *end;
    errno = 0;
    double v = text ? strtod(text, &end) : NAN;
    if (text == NULL || *text == '\0' || *end != '\0' || errno == ERANGE || !(v >= lo) ||
        !(v <= hi)) {
        fprintf(stderr, "veer-arm-eval-baselines: %s needs a number from %g to %g, got '%s'\n",
                flag, lo, hi, text ? text : "(nothing)");
        return -1;
    }
    *out = v;
    return 0;
}

static int parse_tasks(const char *text, options *o)
{
    if (text == NULL || *text == '\0') {
        fprintf(stderr, "veer-arm-eval-baselines: --tasks needs a comma-separated list\n");
        return -1;
    }
    memset(o->task_on, 0, sizeof o->task_on);
    char buf[512];
    snprintf(buf, sizeof buf, "%s", text);
    for (char *save, *name = strtok_r(buf, ",", &save); name; name = strtok_r(NULL, ",", &save)) {
        const veer_arm_task *t = veer_arm_task_find(name);
        if (t == NULL) {
            fprintf(stderr, "veer-arm-eval-baselines: --tasks: unknown task '%s' (see --help)\n",
                    name);
            return -1;
        }
        o->task_on[t - veer_arm_tasks] = 1;
    }
    return 0;
}

static int parse_args(int argc, char **argv, options *o)
{
    memset(o, 0, sizeof *o);
    for (int i = 0; i < VEER_ARM_TASK_COUNT; i++)
        o->task_on[i] = 1;
    o->starts = VEER_ARM_EVAL_START_COUNT;
    o->decisions = 250;
    o->query_ms = 20;
    o->repeats = 5;
    o->rng_key = 1;
    o->plan_ms = 5;
    o->parcel_mass = 0.5;
    veer_arm_cem_config_default(&o->cem);
    long horizon = 0, population = o->cem.population, elites = o->cem.elites,
         iterations = o->cem.iterations, knot_every = o->cem.knot_every;
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i], *v = i + 1 < argc ? argv[i + 1] : NULL;
        int rc = 0, takes = 1;
        if (strcmp(a, "--help") == 0 || strcmp(a, "-h") == 0) {
            usage(stdout);
            exit(0);
        } else if (strcmp(a, "--tasks") == 0) {
            rc = parse_tasks(v, o);
        } else if (strcmp(a, "--starts") == 0) {
            rc = parse_long(a, v, 1, VEER_ARM_EVAL_START_COUNT, &o->starts);
        } else if (strcmp(a, "--decisions") == 0) {
            rc = parse_long(a, v, 1, 100000, &o->decisions);
        } else if (strcmp(a, "--query-ms") == 0) {
            rc = parse_long(a, v, 1, 20, &o->query_ms);
        } else if (strcmp(a, "--random-repeats") == 0) {
            rc = parse_long(a, v, 1, 10000, &o->repeats);
        } else if (strcmp(a, "--horizon") == 0) {
            rc = parse_long(a, v, 1, 1000, &horizon);
        } else if (strcmp(a, "--population") == 0) {
            rc = parse_long(a, v, 2, 100000, &population);
        } else if (strcmp(a, "--elites") == 0) {
            rc = parse_long(a, v, 1, 100000, &elites);
        } else if (strcmp(a, "--iterations") == 0) {
            rc = parse_long(a, v, 1, 100, &iterations);
        } else if (strcmp(a, "--knot-every") == 0) {
            rc = parse_long(a, v, 1, 1000, &knot_every);
        } else if (strcmp(a, "--plan-step-ms") == 0) {
            rc = parse_long(a, v, 1, 5, &o->plan_ms);
        } else if (strcmp(a, "--rng") == 0) {
            rc = parse_long(a, v, 0, LONG_MAX, &o->rng_key);
        } else if (strcmp(a, "--parcel-mass") == 0) {
            rc = parse_double(a, v, 0.0, 5.0, &o->parcel_mass);
        } else if (strcmp(a, "--initial-sd") == 0) {
            rc = parse_double(a, v, 1e-3, 2.0, &o->cem.initial_sd);
        } else if (strcmp(a, "--json") == 0) {
            if (v == NULL || *v == '\0') {
                fprintf(stderr, "veer-arm-eval-baselines: --json needs a path\n");
                rc = -1;
            }
            o->json = v;
        } else if (strcmp(a, "--quiet") == 0) {
            o->quiet = 1;
            takes = 0;
        } else {
            fprintf(stderr, "veer-arm-eval-baselines: unknown option '%s' (see --help)\n", a);
            rc = -1;
        }
        if (rc)
            return -1;
        i += takes;
    }
    if (20 % o->plan_ms != 0) {
        fprintf(stderr, "veer-arm-eval-baselines: --plan-step-ms must divide 20, got %ld\n",
                o->plan_ms);
        return -1;
    }
    if (elites > population) {
        fprintf(stderr, "veer-arm-eval-baselines: --elites (%ld) exceeds --population (%ld)\n",
                elites, population);
        return -1;
    }
    o->horizon = (int)horizon; /* 0: each task's own */
    o->cem.population = (int)population;
    o->cem.elites = (int)elites;
    o->cem.iterations = (int)iterations;
    o->cem.knot_every = (int)knot_every;
    /* Without --horizon, the shortest per-task horizon is the default one. */
    long shortest = horizon > 0 ? horizon : o->cem.horizon;
    if (knot_every > shortest) {
        fprintf(stderr, "veer-arm-eval-baselines: --knot-every (%ld) exceeds the horizon (%ld)\n",
                knot_every, shortest);
        return -1;
    }
    o->cem.plan_dt = (double)o->plan_ms * 1e-3;
    o->cem.rng_key = (uint64_t)o->rng_key;
    return 0;
}

typedef struct task_result {
    double j_cem, j_random, ms_per_decision, cpu_ms_per_decision;
    int horizon;
    double cem_start[VEER_ARM_EVAL_START_COUNT], random_start[VEER_ARM_EVAL_START_COUNT];
} task_result;

static int run_task(const options *o, const veer_arm_params *p, const veer_arm_task *task,
                    task_result *res)
{
    veer_arm_episode ep = {(int)o->decisions, 20, (int)o->query_ms};
    veer_error err;
    veer_arm_cem *cem;
    veer_arm_cem_config c = o->cem;
    veer_arm_cem_config tuned;
    veer_arm_cem_config_for_task(task, &tuned);
    c.horizon = o->horizon ? o->horizon : tuned.horizon;
    res->horizon = c.horizon;
    int rc = veer_arm_cem_create(&c, p, task, &cem, &err);
    if (rc == 0) {
        veer_arm_policy pol = {"cem", veer_arm_cem_act, veer_arm_cem_reset_cb, cem};
        rc = veer_arm_eval_policy(p, task, veer_arm_eval_starts, (int)o->starts, 1, &ep, &pol,
                                  &res->j_cem, res->cem_start, &err);
        uint64_t plans, wall, cpu;
        veer_arm_cem_timing(cem, &plans, &wall, &cpu);
        res->ms_per_decision = plans ? (double)wall / (double)plans * 1e-6 : 0.0;
        res->cpu_ms_per_decision = plans ? (double)cpu / (double)plans * 1e-6 : 0.0;
        veer_arm_cem_destroy(cem);
    }
    if (rc == 0) {
        veer_arm_random_policy rnd;
        veer_arm_random_policy_init(&rnd, p, (uint64_t)o->rng_key * 7919u + 17u);
        veer_arm_policy pol = {"random", veer_arm_random_policy_act, NULL, &rnd};
        rc = veer_arm_eval_policy(p, task, veer_arm_eval_starts, (int)o->starts, (int)o->repeats,
                                  &ep, &pol, &res->j_random, res->random_start, &err);
    }
    if (rc)
        fprintf(stderr, "veer-arm-eval-baselines: task %s: %s (%s)\n", task->name, err.message,
                err.field);
    return rc;
}

static int write_json(const options *o, const veer_arm_params *p, const task_result *res)
{
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "kind", "veer demo arm baselines");
    cJSON_AddNumberToObject(root, "decisions", (double)o->decisions);
    cJSON_AddNumberToObject(root, "decision_step_s", 0.02);
    cJSON_AddNumberToObject(root, "query_ms", (double)o->query_ms);
    cJSON_AddNumberToObject(root, "parcel_mass_kg", p->parcel_mass);
    cJSON_AddNumberToObject(root, "random_repeats", (double)o->repeats);
    cJSON *cfg = cJSON_AddObjectToObject(root, "cem");
    cJSON_AddNumberToObject(cfg, "population", o->cem.population);
    cJSON_AddNumberToObject(cfg, "elites", o->cem.elites);
    cJSON_AddNumberToObject(cfg, "iterations", o->cem.iterations);
    cJSON_AddNumberToObject(cfg, "knot_every", o->cem.knot_every);
    cJSON_AddNumberToObject(cfg, "plan_step_s", o->cem.plan_dt);
    cJSON *starts = cJSON_AddArrayToObject(root, "starts");
    for (int s = 0; s < o->starts; s++)
        cJSON_AddItemToArray(starts, cJSON_CreateDoubleArray(veer_arm_eval_starts[s], 4));
    cJSON *tasks = cJSON_AddArrayToObject(root, "tasks");
    for (int t = 0; t < VEER_ARM_TASK_COUNT; t++) {
        if (!o->task_on[t])
            continue;
        cJSON *e = cJSON_CreateObject();
        cJSON_AddStringToObject(e, "task", veer_arm_tasks[t].name);
        cJSON_AddNumberToObject(e, "cem_horizon", res[t].horizon);
        cJSON_AddNumberToObject(e, "cem_return", res[t].j_cem);
        cJSON_AddNumberToObject(e, "random_return", res[t].j_random);
        cJSON_AddNumberToObject(e, "cem_wall_ms_per_decision", res[t].ms_per_decision);
        cJSON_AddNumberToObject(e, "cem_cpu_ms_per_decision", res[t].cpu_ms_per_decision);
        cJSON_AddItemToObject(e, "cem_per_start",
                              cJSON_CreateDoubleArray(res[t].cem_start, (int)o->starts));
        cJSON_AddItemToObject(e, "random_per_start",
                              cJSON_CreateDoubleArray(res[t].random_start, (int)o->starts));
        cJSON_AddItemToArray(tasks, e);
    }
    char *text = cJSON_Print(root);
    cJSON_Delete(root);
    FILE *f = text ? fopen(o->json, "w") : NULL;
    int ok = f != NULL && fputs(text, f) >= 0 && fputc('\n', f) != EOF;
    if (f != NULL && fclose(f) != 0)
        ok = 0;
    cJSON_free(text);
    if (!ok) {
        fprintf(stderr, "veer-arm-eval-baselines: cannot write %s: %s\n", o->json, strerror(errno));
        return -1;
    }
    return 0;
}

int main(int argc, char **argv)
{
    options o;
    if (parse_args(argc, argv, &o) != 0)
        return EXIT_USAGE;
    veer_arm_params p;
    veer_arm_params_default(&p);
    p.parcel_mass = o.parcel_mass;

    task_result res[VEER_ARM_TASK_COUNT];
    memset(res, 0, sizeof res);
    if (!o.quiet)
        printf("%-16s %10s %10s %10s %10s  (planner time per decision)\n", "task", "J_cem",
               "J_random", "wall ms", "cpu ms");
    for (int t = 0; t < VEER_ARM_TASK_COUNT; t++) {
        if (!o.task_on[t])
            continue;
        if (run_task(&o, &p, &veer_arm_tasks[t], &res[t]) != 0)
            return EXIT_REFUSED;
        if (!o.quiet) {
            printf("%-16s %10.2f %10.2f %10.2f %10.2f\n", veer_arm_tasks[t].name, res[t].j_cem,
                   res[t].j_random, res[t].ms_per_decision, res[t].cpu_ms_per_decision);
            fflush(stdout);
        }
    }
    if (o.json && write_json(&o, &p, res) != 0)
        return EXIT_REFUSED;
    return 0;
}
