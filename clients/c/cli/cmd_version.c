/* `veer version`: the version of the CLI and of the library it runs on. */
#include <stdio.h>
#include <string.h>

#include "cli.h"

#ifndef VEER_VERSION_STRING
#define VEER_VERSION_STRING "0.1.0"
#endif

static int run(int argc, char **argv)
{
    if (argc > 1 && strcmp(argv[1], "--help") == 0) {
        printf("usage: veer version\nPrints veer's version.\n");
        return VEER_CLI_OK;
    }
    printf("veer %s\n", VEER_VERSION_STRING);
    return VEER_CLI_OK;
}

const veer_cli_command veer_cli_cmd_version = {"version", "print veer's version", run};
