/* `veer switch CHANNEL TASK`: makes TASK the channel's active task. The channel is created on
 * its first switch; the controller acting on it sees the new task on its next request. */
#include <stdio.h>

#include "cli.h"
#include "cli_conn.h"

static const char HELP[] =
    "usage: veer switch CHANNEL TASK [--admin ENDPOINT] [--server-key FILE --key PREFIX]\n"
    "                   [--timeout-ms N] [--json]\n"
    "Makes TASK (already put with `veer task put`) the active task of CHANNEL. Controllers on\n"
    "the channel get actions for the new task from their next request on.\n"
    "Switching what a machine optimises is a safety-relevant act: veerd may require a CURVE key.\n"
    "exit codes: 0 ok, 1 refused by veerd, 2 usage, 4 unreachable\n";

static int run(int argc, char **argv)
{
    if (veer_cli_wants_help(argc, argv, HELP))
        return VEER_CLI_OK;
    veer_cli_conn cc;
    veer_cli_conn_init(&cc, "switch", argc, argv);
    const char *pos[2] = {NULL, NULL};
    int got, rc;
    if ((rc = veer_cli_positional(&cc, argc, argv, pos, 2, &got)) != 0)
        return rc;
    if (got != 2)
        return veer_cli_complain(&cc, VEER_CLI_USAGE, got ? "TASK" : "CHANNEL",
                                 "give CHANNEL and TASK");
    veer_client *c;
    if ((rc = veer_cli_conn_open(&cc, 1, 0, &c)) != 0)
        return rc;
    const veer_client_channel *ch;
    veer_error err;
    veer_error_clear(&err);
    if (veer_client_switch(c, pos[0], pos[1], &ch, &err) != 0)
        rc = veer_cli_fail(&cc, &err);
    else if (cc.json && ch != NULL)
        rc = veer_cli_print_json(veer_cli_json_channel(ch));
    else if (ch != NULL)
        printf("channel %s now runs task %s (epoch %llu)\n", ch->name, ch->task,
               (unsigned long long)ch->epoch);
    else
        printf("channel %s now runs task %s\n", pos[0], pos[1]);
    veer_client_close(c);
    return rc;
}

const veer_cli_command veer_cli_cmd_switch = {"switch", "make a task the active task of a channel",
                                              run};
