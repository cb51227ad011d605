/* `veer act CHANNEL v1,v2,...`: one action query, for debugging a channel by hand. It goes
 * through the same client call a controller uses, with its local deadline, so what it prints
 * is what a controller would get, fallback included. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"
#include "cli_conn.h"

static const char HELP[] =
    "usage: veer act CHANNEL v1,v2,... [--deadline-us N] [--act ENDPOINT]\n"
    "                [--server-key FILE --key PREFIX] [--timeout-ms N] [--json]\n"
    "Asks veerd for the action on CHANNEL for one state (state_dim comma-separated values, in\n"
    "the model's feature order). --deadline-us is the local deadline, also sent to veerd\n"
    "(default 200000 for a query by hand); past it the model's fallback action is printed with\n"
    "the flags fallback,deadline. The act endpoint comes from --act or VEER_ACT (default %s).\n"
    "exit codes: 0 ok (check the flags), 1 refused by veerd, 2 usage, 4 unreachable\n";

static const struct {
    unsigned bit;
    const char *name;
} FLAGS[] = {
    {VEER_ACT_CLIPPED, "clipped"},     {VEER_ACT_FALLBACK, "fallback"},
    {VEER_ACT_NONFINITE, "nonfinite"}, {VEER_ACT_DEADLINE, "deadline"},
    {VEER_ACT_NO_TASK, "no_task"},     {VEER_ACT_OUT_OF_COVERAGE, "out_of_coverage"},
};

static int run(int argc, char **argv)
{
    for (int i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--help") == 0 || strcmp(argv[i], "-h") == 0) {
            printf(HELP, VEER_CLI_DEFAULT_ACT);
            return VEER_CLI_OK;
        }
    }
    veer_cli_conn cc;
    veer_cli_conn_init(&cc, "act", argc, argv);
    const char *pos[2] = {NULL, NULL};
    int got = 0, rc;
    unsigned long deadline_us = 200000;
    /* --deadline-us is this command's own flag; the rest go through the shared parser. */
    char **rest = calloc((size_t)argc + 1, sizeof *rest);
    if (rest == NULL)
        return VEER_CLI_INPUT;
    int n_rest = 0;
    rest[n_rest++] = argv[0];
    for (int i = 1; i < argc; i++) {
        const char *v = NULL;
        if (strncmp(argv[i], "--deadline-us=", 14) == 0)
            v = argv[i] + 14;
        else if (strcmp(argv[i], "--deadline-us") == 0)
            v = i + 1 < argc ? argv[++i] : "";
        else {
            rest[n_rest++] = argv[i];
            continue;
        }
        char *end;
        deadline_us = strtoul(v, &end, 10);
        if (*v == '\0' || *end != '\0' || deadline_us == 0 || deadline_us > 60000000ul) {
            free(rest);
            return veer_cli_complain(&cc, VEER_CLI_USAGE, "--deadline-us",
                                     "--deadline-us takes microseconds from 1 to 60000000, not "
                                     "'%s'",
                                     v);
        }
    }
    rc = veer_cli_positional(&cc, n_rest, rest, pos, 2, &got);
    free(rest);
    if (rc != 0)
        return rc;
    if (got != 2)
        return veer_cli_complain(&cc, VEER_CLI_USAGE, got ? "STATE" : "CHANNEL",
                                 "give CHANNEL and the state as v1,v2,...");
    veer_cli_matrix state;
    if ((rc = veer_cli_parse_vector(&cc, pos[1], "STATE", &state)) != 0)
        return rc;
    veer_client *c;
    if ((rc = veer_cli_conn_open(&cc, 0, 1, &c)) != 0) {
        veer_cli_matrix_free(&state);
        return rc;
    }
    const veer_client_model *m = veer_client_model_info(c);
    if (state.cols != m->state_dim) {
        rc = veer_cli_complain(&cc, VEER_CLI_USAGE, "STATE",
                               "the state has %zu values but model %s reads %u (first feature: "
                               "%s)",
                               state.cols, m->model_version, m->state_dim,
                               m->state_dim ? m->feature_names[0] : "");
        goto done;
    }
    float action[256];
    if (m->action_dim > sizeof action / sizeof *action) {
        rc = veer_cli_complain(&cc, VEER_CLI_REFUSED, "action_dim",
                               "the model's action has %u values; this command prints at most "
                               "256",
                               m->action_dim);
        goto done;
    }
    veer_client_act_result res;
    veer_error err;
    veer_error_clear(&err);
    if (veer_client_act(c, pos[0], state.values, (uint32_t)deadline_us, action, &res, &err) != 0) {
        rc = veer_cli_fail(&cc, &err);
        goto done;
    }
    if (cc.json) {
        cJSON *doc = cJSON_CreateObject();
        cJSON_AddStringToObject(doc, "channel", pos[0]);
        cJSON_AddItemToObject(doc, "action", veer_cli_json_floats(action, m->action_dim));
        cJSON_AddItemToObject(doc, "value", veer_cli_json_number(res.value));
        cJSON_AddStringToObject(doc, "task", res.task);
        cJSON_AddNumberToObject(doc, "epoch", (double)res.epoch);
        cJSON_AddNumberToObject(doc, "seq", (double)res.seq);
        cJSON_AddNumberToObject(doc, "flag_bits", res.flags);
        cJSON *fl = cJSON_AddArrayToObject(doc, "flags");
        for (size_t i = 0; i < sizeof FLAGS / sizeof *FLAGS; i++)
            if (res.flags & FLAGS[i].bit)
                cJSON_AddItemToArray(fl, cJSON_CreateString(FLAGS[i].name));
        cJSON_AddStringToObject(doc, "model_version", m->model_version);
        cJSON_AddNumberToObject(doc, "server_us", res.server_us);
        cJSON_AddNumberToObject(doc, "round_trip_us", (double)res.round_trip_ns / 1e3);
        rc = veer_cli_print_json(doc);
    } else {
        printf("action  ");
        for (uint32_t i = 0; i < m->action_dim; i++)
            printf(" %.6g", action[i]);
        printf("\nvalue    %.6g\ntask     %s (epoch %llu)\nflags   ", res.value,
               res.task[0] ? res.task : "(none)", (unsigned long long)res.epoch);
        if (res.flags == 0)
            printf(" (none)");
        for (size_t i = 0; i < sizeof FLAGS / sizeof *FLAGS; i++)
            if (res.flags & FLAGS[i].bit)
                printf(" %s", FLAGS[i].name);
        printf("\ntime     %.1f us round trip, %u us in veerd\n", (double)res.round_trip_ns / 1e3,
               res.server_us);
    }
done:
    veer_client_close(c);
    veer_cli_matrix_free(&state);
    return rc;
}

const veer_cli_command veer_cli_cmd_act = {"act", "ask veerd for one action (debugging)", run};
