/* `veer`: dispatches to the command named by the first argument. The table is generated at
 * build time from the cmd_*.c files present (see clients/c/CMakeLists.txt). */
#include <stdio.h>
#include <string.h>

#include "cli.h"
#include "cli_commands.h" /* generated: VEER_CLI_COMMANDS, a NULL-terminated array */

static void usage(FILE *to)
{
    fprintf(to, "usage: veer COMMAND [ARGS...]\n\ncommands:\n");
    for (const veer_cli_command *const *c = VEER_CLI_COMMANDS; *c != NULL; c++)
        fprintf(to, "  %-10s %s\n", (*c)->name, (*c)->summary);
    fprintf(to, "\n`veer COMMAND --help` describes each command.\n"
                "exit codes: 0 ok, 1 refused, 2 usage, 3 bad input file, 4 service unreachable\n");
}

int main(int argc, char **argv)
{
    if (argc < 2) {
        usage(stderr);
        return VEER_CLI_USAGE;
    }
    if (strcmp(argv[1], "--help") == 0 || strcmp(argv[1], "-h") == 0 ||
        strcmp(argv[1], "help") == 0) {
        usage(stdout);
        return VEER_CLI_OK;
    }
    for (const veer_cli_command *const *c = VEER_CLI_COMMANDS; *c != NULL; c++) {
        if (strcmp((*c)->name, argv[1]) == 0)
            return (*c)->run(argc - 1, argv + 1);
    }
    fprintf(stderr, "veer: unknown command '%s'\n", argv[1]);
    usage(stderr);
    return VEER_CLI_USAGE;
}
