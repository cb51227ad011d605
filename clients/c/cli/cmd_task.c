/* `veer task put|list|show|drop`: registering and inspecting tasks on veerd's admin socket.
 *
 * A task comes from exactly one source: reward samples (--samples with --rewards), goal states
 * (--goal, repeated, with optional --weights), or rewards over the model's reference states
 * (--reference-rewards). The files are read and checked locally first (see cli_input.c), so a
 * bad file is reported with its line and column and exit code 3 before veerd is asked. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"
#include "cli.h"
#include "cli_conn.h"

static void usage(FILE *to)
{
    fprintf(to,
            "usage: veer task put NAME SOURCE [OPTIONS] [CONNECTION]\n"
            "       veer task list [CONNECTION]\n"
            "       veer task show NAME [CONNECTION]\n"
            "       veer task drop NAME [CONNECTION]\n"
            "\n"
            "SOURCE, exactly one of:\n"
            "  --samples STATES --rewards R   reward samples: STATES is rows x state_dim, R one\n"
            "                                 reward per row (.csv or .npy)\n"
            "  --goal v1,v2,... [--goal ...]  goal states, each state_dim values\n"
            "    [--weights w1,w2,...]        one weight per goal (default 1 each)\n"
            "  --reference-rewards R          one reward per reference state of the model\n"
            "OPTIONS:\n"
            "  --center on|off     subtract the mean reward first (default: the model's)\n"
            "  --rescale on|off    rescale z to the model's norm (default: the model's)\n"
            "  --cov-correction    correct for samples not drawn like the training data\n"
            "  --ridge X           ridge for the covariance correction (default: the model's)\n"
            "CONNECTION:\n"
            "  --admin ENDPOINT (VEER_ADMIN, default %s), --server-key FILE --key PREFIX\n"
            "  (VEER_SERVER_KEY, VEER_KEY), --timeout-ms N, --json\n"
            "\n"
            "A task active on a channel cannot be dropped: switch the channel away first.\n"
            "exit codes: 0 ok, 1 refused by veerd, 2 usage, 3 bad input file, 4 unreachable\n",
            VEER_CLI_DEFAULT_ADMIN);
}

static void print_task_text(const veer_client_task *t)
{
    char hex[65];
    veer_cli_hex(t->digest, sizeof t->digest, hex);
    static const char *sources[] = {"?", "samples", "goals", "reference"};
    printf("task      %s\n", t->name);
    printf("digest    %s\n", hex);
    printf("source    %s (%u)\n", t->source <= 3 ? sources[t->source] : "?", t->count);
    if (t->r2 == t->r2)
        printf("r2        %.4f%s\n", t->r2,
               t->r2 < 0.2 ? "  (low: the model may not express this reward well)" : "");
    else
        printf("r2        n/a\n");
    printf("norm_raw  %.6g\n", t->norm_raw);
    printf("encoded   %s\n", t->encoded ? "yes" : "not yet");
    printf("active on");
    if (t->active_on_count == 0)
        printf(" (no channel)");
    for (uint32_t i = 0; i < t->active_on_count; i++)
        printf(" %s", t->active_on[i]);
    printf("\nz        ");
    for (uint32_t i = 0; i < t->z_dim; i++)
        printf(" %.6g", t->z[i]);
    printf("\n");
}

/* Parses on|off for --center / --rescale. */
static int on_off(veer_cli_conn *cc, const char *flag, const char *v, int *out)
{
    if (strcmp(v, "on") == 0)
        *out = 1;
    else if (strcmp(v, "off") == 0)
        *out = 0;
    else
        return veer_cli_complain(cc, VEER_CLI_USAGE, flag, "%s takes on or off, not '%s'", flag, v);
    return 0;
}

/* Leaves a flag's value in *v (either --flag=V or --flag V). Returns 1 when argv[*i] is flag. */
static int take(int argc, char **argv, int *i, const char *flag, const char **v)
{
    size_t n = strlen(flag);
    if (strncmp(argv[*i], flag, n) != 0)
        return 0;
    if (argv[*i][n] == '=') {
        *v = argv[*i] + n + 1;
        return 1;
    }
    if (argv[*i][n] != '\0')
        return 0;
    *v = *i + 1 < argc ? argv[++*i] : NULL;
    return 1;
}

#define MAX_GOALS 4096

static int put(veer_cli_conn *cc, int argc, char **argv)
{
    const char *name = NULL, *samples = NULL, *rewards = NULL, *reference = NULL, *weights = NULL;
    const char *goals[MAX_GOALS];
    size_t n_goals = 0;
    veer_task_spec spec;
    memset(&spec, 0, sizeof spec);
    spec.rescale = spec.center = VEER_OPT_DEFAULT;
    spec.ridge = -1.0f;
    int rc;
    for (int i = 1; i < argc; i++) {
        const char *v = NULL;
        if ((rc = veer_cli_conn_flag(cc, argc, argv, &i)) != 0) {
            if (rc != 1)
                return rc;
            continue;
        }
        const char *flag = argv[i];
        if (strcmp(flag, "--cov-correction") == 0) {
            spec.cov_correction = 1;
            continue;
        }
        if (take(argc, argv, &i, "--samples", &v))
            samples = v;
        else if (take(argc, argv, &i, "--rewards", &v))
            rewards = v;
        else if (take(argc, argv, &i, "--reference-rewards", &v))
            reference = v;
        else if (take(argc, argv, &i, "--weights", &v))
            weights = v;
        else if (take(argc, argv, &i, "--goal", &v)) {
            if (v != NULL && n_goals == MAX_GOALS)
                return veer_cli_complain(cc, VEER_CLI_USAGE, "--goal",
                                         "more than %d goals; use --samples for large sets",
                                         MAX_GOALS);
            if (v != NULL)
                goals[n_goals++] = v;
        } else if (take(argc, argv, &i, "--center", &v)) {
            if (v != NULL && (rc = on_off(cc, "--center", v, &spec.center)) != 0)
                return rc;
        } else if (take(argc, argv, &i, "--rescale", &v)) {
            if (v != NULL && (rc = on_off(cc, "--rescale", v, &spec.rescale)) != 0)
                return rc;
        } else if (take(argc, argv, &i, "--ridge", &v)) {
            char *end;
            if (v != NULL) {
                double r = strtod(v, &end);
                if (*v == '\0' || *end != '\0' || !(r >= 0.0) || r > 1e6)
                    return veer_cli_complain(cc, VEER_CLI_USAGE, "--ridge",
                                             "--ridge takes a number from 0 to 1e6, not '%s'", v);
                spec.ridge = (float)r;
            }
        } else if (flag[0] == '-' && flag[1] == '-') {
            return veer_cli_complain(cc, VEER_CLI_USAGE, flag, "unknown flag %s", flag);
        } else if (name == NULL) {
            name = flag;
            continue;
        } else {
            return veer_cli_complain(cc, VEER_CLI_USAGE, flag, "unexpected argument '%s'", flag);
        }
        if (v == NULL)
            return veer_cli_complain(cc, VEER_CLI_USAGE, flag, "%s needs a value", flag);
    }
    if (name == NULL)
        return veer_cli_complain(cc, VEER_CLI_USAGE, "NAME", "give the task's NAME");
    int sources = (samples || rewards) + (n_goals > 0 || weights) + (reference != NULL);
    if (sources != 1)
        return veer_cli_complain(cc, VEER_CLI_USAGE, "SOURCE",
                                 "give exactly one source: --samples with --rewards, --goal, or "
                                 "--reference-rewards");
    if ((samples != NULL) != (rewards != NULL))
        return veer_cli_complain(cc, VEER_CLI_USAGE, samples ? "--rewards" : "--samples",
                                 "--samples and --rewards go together");
    if (weights != NULL && n_goals == 0)
        return veer_cli_complain(cc, VEER_CLI_USAGE, "--weights", "--weights needs --goal");
    if (spec.cov_correction && samples == NULL)
        return veer_cli_complain(cc, VEER_CLI_USAGE, "--cov-correction",
                                 "--cov-correction applies to --samples tasks only");

    veer_cli_matrix states = {0}, values = {0};
    uint32_t state_dim = 0;
    rc = 0;
    if (samples != NULL) {
        spec.source = VEER_TASK_SAMPLES;
        if ((rc = veer_cli_read_matrix(cc, samples, &states)) != 0 ||
            (rc = veer_cli_read_matrix(cc, rewards, &values)) != 0)
            goto done;
        size_t n_rewards = values.rows * values.cols;
        if (values.rows > 1 && values.cols > 1) {
            rc = veer_cli_complain(cc, VEER_CLI_INPUT, rewards,
                                   "%s is %zu x %zu; give one reward per row (a single column)",
                                   rewards, values.rows, values.cols);
            goto done;
        }
        if (n_rewards != states.rows) {
            rc = veer_cli_complain(cc, VEER_CLI_INPUT, rewards,
                                   "%s holds %zu rewards but %s holds %zu states; give one "
                                   "reward per state",
                                   rewards, n_rewards, samples, states.rows);
            goto done;
        }
        spec.count = (uint32_t)states.rows;
        spec.states = states.values;
        spec.values = values.values;
        state_dim = (uint32_t)states.cols;
    } else if (n_goals > 0) {
        spec.source = VEER_TASK_GOALS;
        for (size_t g = 0; g < n_goals; g++) {
            veer_cli_matrix one;
            if ((rc = veer_cli_parse_vector(cc, goals[g], "--goal", &one)) != 0)
                goto done;
            if (g > 0 && one.cols != states.cols) {
                veer_cli_matrix_free(&one);
                rc = veer_cli_complain(cc, VEER_CLI_USAGE, "--goal",
                                       "goal %zu has %zu values where goal 1 has %zu", g + 1,
                                       one.cols, states.cols);
                goto done;
            }
            float *grown = veer__realloc(states.values, (g + 1) * one.cols * sizeof(float));
            if (grown == NULL) {
                veer_cli_matrix_free(&one);
                rc = veer_cli_complain(cc, VEER_CLI_INPUT, "--goal", "out of memory");
                goto done;
            }
            memcpy(grown + g * one.cols, one.values, one.cols * sizeof(float));
            states.values = grown;
            states.cols = one.cols;
            states.rows = g + 1;
            veer_cli_matrix_free(&one);
        }
        if (weights != NULL) {
            if ((rc = veer_cli_parse_vector(cc, weights, "--weights", &values)) != 0)
                goto done;
            if (values.cols != n_goals) {
                rc = veer_cli_complain(cc, VEER_CLI_USAGE, "--weights",
                                       "--weights has %zu values for %zu goals; give one weight "
                                       "per --goal",
                                       values.cols, n_goals);
                goto done;
            }
        }
        spec.count = (uint32_t)n_goals;
        spec.states = states.values;
        spec.values = values.values;
        state_dim = (uint32_t)states.cols;
    } else {
        spec.source = VEER_TASK_REFERENCE;
        if ((rc = veer_cli_read_matrix(cc, reference, &values)) != 0)
            goto done;
        if (values.rows > 1 && values.cols > 1) {
            rc = veer_cli_complain(cc, VEER_CLI_INPUT, reference,
                                   "%s is %zu x %zu; give one reward per reference state",
                                   reference, values.rows, values.cols);
            goto done;
        }
        spec.count = (uint32_t)(values.rows * values.cols);
        spec.values = values.values;
    }

    veer_client *c;
    if ((rc = veer_cli_conn_open(cc, 1, 0, &c)) != 0)
        goto done;
    const veer_client_task *t;
    veer_error err;
    veer_error_clear(&err);
    rc = veer_client_task_put(c, name, &spec, state_dim, &t, &err);
    if (rc != 0) {
        rc = veer_cli_fail(cc, &err);
        /* A file whose shape or values veerd refuses is the file's fault: say so in the exit
         * code, so scripts can tell a bad file from a refused request. */
        if (rc == VEER_CLI_REFUSED && (samples || reference) &&
            (err.code == VEER_EDIM || err.code == VEER_ENONFINITE))
            rc = VEER_CLI_INPUT;
    } else if (cc->json) {
        rc = t ? veer_cli_print_json(veer_cli_json_task(t)) : VEER_CLI_OK;
    } else {
        if (t != NULL)
            print_task_text(t);
        else
            printf("stored task %s\n", name);
    }
    veer_client_close(c);
done:
    veer_cli_matrix_free(&states);
    veer_cli_matrix_free(&values);
    return rc;
}

static int list(veer_cli_conn *cc, int argc, char **argv)
{
    int rc, got;
    if ((rc = veer_cli_positional(cc, argc, argv, NULL, 0, &got)) != 0)
        return rc;
    veer_client *c;
    if ((rc = veer_cli_conn_open(cc, 1, 0, &c)) != 0)
        return rc;
    const veer_client_task *tasks;
    size_t n;
    veer_error err;
    veer_error_clear(&err);
    if (veer_client_task_list(c, &tasks, &n, &err) != 0) {
        rc = veer_cli_fail(cc, &err);
    } else if (cc->json) {
        cJSON *doc = cJSON_CreateObject(), *a = cJSON_AddArrayToObject(doc, "tasks");
        for (size_t i = 0; i < n; i++)
            cJSON_AddItemToArray(a, veer_cli_json_task(&tasks[i]));
        rc = veer_cli_print_json(doc);
    } else {
        printf("%-24s %-9s %7s %8s %9s  %s\n", "TASK", "SOURCE", "COUNT", "R2", "NORM_RAW",
               "ACTIVE ON");
        static const char *sources[] = {"?", "samples", "goals", "reference"};
        for (size_t i = 0; i < n; i++) {
            const veer_client_task *t = &tasks[i];
            char r2[16];
            if (t->r2 == t->r2)
                snprintf(r2, sizeof r2, "%.4f", t->r2);
            else
                snprintf(r2, sizeof r2, "n/a");
            printf("%-24s %-9s %7u %8s %9.4g  ", t->name, t->source <= 3 ? sources[t->source] : "?",
                   t->count, r2, t->norm_raw);
            for (uint32_t k = 0; k < t->active_on_count; k++)
                printf("%s%s", k ? "," : "", t->active_on[k]);
            printf("%s\n", t->encoded ? "" : " (encoding)");
        }
    }
    veer_client_close(c);
    return rc;
}

static int show_or_drop(veer_cli_conn *cc, int argc, char **argv, int drop)
{
    int rc, got;
    const char *name = NULL;
    if ((rc = veer_cli_positional(cc, argc, argv, &name, 1, &got)) != 0)
        return rc;
    if (name == NULL)
        return veer_cli_complain(cc, VEER_CLI_USAGE, "NAME", "give the task's NAME");
    veer_client *c;
    if ((rc = veer_cli_conn_open(cc, 1, 0, &c)) != 0)
        return rc;
    veer_error err;
    veer_error_clear(&err);
    const veer_client_task *t = NULL;
    if (drop ? veer_client_task_drop(c, name, &err) != 0
             : veer_client_task_get(c, name, &t, &err) != 0) {
        rc = veer_cli_fail(cc, &err);
    } else if (drop) {
        if (cc->json) {
            cJSON *doc = cJSON_CreateObject();
            cJSON_AddStringToObject(doc, "dropped", name);
            rc = veer_cli_print_json(doc);
        } else {
            printf("dropped task %s\n", name);
        }
    } else if (cc->json) {
        rc = veer_cli_print_json(veer_cli_json_task(t));
    } else {
        print_task_text(t);
    }
    veer_client_close(c);
    return rc;
}

static int run(int argc, char **argv)
{
    if (argc < 2 || strcmp(argv[1], "--help") == 0 || strcmp(argv[1], "-h") == 0) {
        usage(argc < 2 ? stderr : stdout);
        return argc < 2 ? VEER_CLI_USAGE : VEER_CLI_OK;
    }
    for (int i = 2; i < argc; i++) {
        if (strcmp(argv[i], "--help") == 0) {
            usage(stdout);
            return VEER_CLI_OK;
        }
    }
    veer_cli_conn cc;
    char command[32];
    snprintf(command, sizeof command, "task %s", argv[1]);
    veer_cli_conn_init(&cc, command, argc, argv);
    if (strcmp(argv[1], "put") == 0)
        return put(&cc, argc - 1, argv + 1);
    if (strcmp(argv[1], "list") == 0)
        return list(&cc, argc - 1, argv + 1);
    if (strcmp(argv[1], "show") == 0)
        return show_or_drop(&cc, argc - 1, argv + 1, 0);
    if (strcmp(argv[1], "drop") == 0)
        return show_or_drop(&cc, argc - 1, argv + 1, 1);
    cc.command = "task";
    return veer_cli_complain(&cc, VEER_CLI_USAGE, argv[1],
                             "unknown subcommand '%s'; use put, list, show or drop", argv[1]);
}

const veer_cli_command veer_cli_cmd_task = {"task", "put, list, show or drop tasks on veerd", run};
