/* `veer status`: whether veerd is ready, its model, counts of tasks, channels, acts, fallbacks
 * and deadline misses. */
#include <stdio.h>

#include "cli.h"
#include "cli_conn.h"

static const char HELP[] =
    "usage: veer status [--admin ENDPOINT] [--server-key FILE --key PREFIX] [--timeout-ms N]\n"
    "                   [--json]\n"
    "Shows veerd's version, model, uptime and counters. Exit code 4 when veerd does not answer,\n"
    "so `veer status` also serves as a liveness check in scripts.\n"
    "exit codes: 0 ok, 1 refused by veerd, 2 usage, 4 unreachable\n";

static int run(int argc, char **argv)
{
    veer_cli_conn cc;
    veer_client *c;
    int rc = veer_cli_begin_admin(&cc, "status", HELP, argc, argv, &c);
    if (rc != 0)
        return rc < 0 ? VEER_CLI_OK : rc;
    const veer_client_status *s;
    veer_error err;
    veer_error_clear(&err);
    if (veer_client_status_get(c, &s, &err) != 0) {
        rc = veer_cli_fail(&cc, &err);
    } else if (cc.json) {
        cJSON *doc = cJSON_CreateObject();
        cJSON_AddStringToObject(doc, "version", s->version);
        cJSON_AddStringToObject(doc, "model_version", s->model_version);
        cJSON_AddBoolToObject(doc, "ready", s->ready);
        cJSON_AddNumberToObject(doc, "uptime_s", s->uptime_s);
        cJSON_AddNumberToObject(doc, "tasks", s->tasks);
        cJSON_AddNumberToObject(doc, "channels", s->channels);
        cJSON_AddNumberToObject(doc, "acts", (double)s->acts);
        cJSON_AddNumberToObject(doc, "fallbacks", (double)s->fallbacks);
        cJSON_AddNumberToObject(doc, "deadline_misses", (double)s->deadline_misses);
        rc = veer_cli_print_json(doc);
    } else {
        printf("veerd            %s (%s)\n", s->version, s->ready ? "ready" : "not ready");
        printf("model            %s\n", s->model_version);
        printf("uptime           %.1f s\n", s->uptime_s);
        printf("tasks            %u\n", s->tasks);
        printf("channels         %u\n", s->channels);
        printf("acts             %llu\n", (unsigned long long)s->acts);
        printf("fallbacks        %llu\n", (unsigned long long)s->fallbacks);
        printf("deadline misses  %llu\n", (unsigned long long)s->deadline_misses);
    }
    veer_client_close(c);
    return rc;
}

const veer_cli_command veer_cli_cmd_status = {"status", "show veerd's state and counters", run};
