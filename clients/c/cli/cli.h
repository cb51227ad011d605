/* The `veer` command line: one executable, one file per command (cmd_<name>.c). Each command
 * file defines `const veer_cli_command veer_cli_cmd_<name>`; the build collects them into the
 * dispatch table, so adding a command means adding a file.
 *
 * Exit codes, the same for every command:
 *   0  success
 *   1  the service or the library refused the request (the error is printed)
 *   2  usage error: unknown command, bad flag, missing argument
 *   3  input file unreadable or malformed
 *   4  the service could not be reached in time
 */
#ifndef VEER_CLI_H
#define VEER_CLI_H

enum {
    VEER_CLI_OK = 0,
    VEER_CLI_REFUSED = 1,
    VEER_CLI_USAGE = 2,
    VEER_CLI_INPUT = 3,
    VEER_CLI_UNREACHABLE = 4,
};

typedef struct veer_cli_command {
    const char *name;    /* first word after `veer`, e.g. "inspect" or "task" */
    const char *summary; /* one line for `veer --help` */
    /* argv[0] is the command name itself. Returns an exit code from the list above. */
    int (*run)(int argc, char **argv);
} veer_cli_command;

#endif
