/* `veer channels`: every channel veerd knows, its active task, switch epoch and act count. */
#include <stdio.h>

#include "cli.h"
#include "cli_conn.h"

static const char HELP[] =
    "usage: veer channels [--admin ENDPOINT] [--server-key FILE --key PREFIX] [--timeout-ms N]\n"
    "                     [--json]\n"
    "Lists the channels: the active task, the switch epoch (one more per switch) and the number\n"
    "of act requests answered.\n"
    "exit codes: 0 ok, 1 refused by veerd, 2 usage, 4 unreachable\n";

static int run(int argc, char **argv)
{
    veer_cli_conn cc;
    veer_client *c;
    int rc = veer_cli_begin_admin(&cc, "channels", HELP, argc, argv, &c);
    if (rc != 0)
        return rc < 0 ? VEER_CLI_OK : rc;
    const veer_client_channel *chs;
    size_t n;
    veer_error err;
    veer_error_clear(&err);
    if (veer_client_channels(c, &chs, &n, &err) != 0) {
        rc = veer_cli_fail(&cc, &err);
    } else if (cc.json) {
        cJSON *doc = cJSON_CreateObject(), *a = cJSON_AddArrayToObject(doc, "channels");
        for (size_t i = 0; i < n; i++)
            cJSON_AddItemToArray(a, veer_cli_json_channel(&chs[i]));
        rc = veer_cli_print_json(doc);
    } else {
        printf("%-24s %-24s %8s %12s\n", "CHANNEL", "TASK", "EPOCH", "ACTS");
        for (size_t i = 0; i < n; i++)
            printf("%-24s %-24s %8llu %12llu\n", chs[i].name,
                   chs[i].task[0] ? chs[i].task : "(none)", (unsigned long long)chs[i].epoch,
                   (unsigned long long)chs[i].acts);
    }
    veer_client_close(c);
    return rc;
}

const veer_cli_command veer_cli_cmd_channels = {"channels", "list veerd's channels", run};
