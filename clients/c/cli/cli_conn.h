/* Shared by the CLI's service commands (task, switch, channels, status, act, keygen): the
 * connection flags, turning a veer_error into a message and an exit code, JSON output, and
 * reading numbers from the command line and from CSV / .npy files.
 *
 * Connection flags, accepted by every service command (the environment gives the defaults):
 *   --admin ENDPOINT      veerd's admin socket (VEER_ADMIN)
 *   --act ENDPOINT        veerd's act socket (VEER_ACT)
 *   --server-key FILE     veerd's public key file, turns CURVE on (VEER_SERVER_KEY)
 *   --key PREFIX          this client's key pair PREFIX.pub / PREFIX.secret (VEER_KEY)
 *   --timeout-ms N        how long to wait for veerd (default 5000)
 *   --json                print one JSON document on stdout instead of text
 */
#ifndef VEER_CLI_CONN_H
#define VEER_CLI_CONN_H

#include <stddef.h>
#include <stdint.h>

#include <cjson/cJSON.h>

#include "veer/client.h"

#define VEER_CLI_DEFAULT_ADMIN "tcp://127.0.0.1:7711"
#define VEER_CLI_DEFAULT_ACT "tcp://127.0.0.1:7710"

typedef struct veer_cli_conn {
    const char *command; /* e.g. "task put", for messages */
    const char *admin, *act, *server_key_file, *key_prefix;
    uint32_t timeout_ms;
    int json;
    int used_admin, used_act; /* which sockets the command opened, for messages */
    char server_key[41], public_key[41], secret_key[41];
} veer_cli_conn;

/* Defaults from the environment; --json anywhere in argv is noted at once, so even an error in
 * an earlier flag is reported as JSON. */
void veer_cli_conn_init(veer_cli_conn *cc, const char *command, int argc, char **argv);

/* When argv[*i] is a connection flag, consumes it (and its value) and returns 1; returns 0 when
 * it is not one, or VEER_CLI_USAGE after printing what is wrong. */
int veer_cli_conn_flag(veer_cli_conn *cc, int argc, char **argv, int *i);

/* Parses connection flags and at most `n_pos` positional arguments (into pos[], *got of them)
 * from argv[1..]; anything else is a usage error. Returns 0 or an exit code. */
int veer_cli_positional(veer_cli_conn *cc, int argc, char **argv, const char **pos, int n_pos,
                        int *got);

/* Handles `--help` anywhere in argv: prints `help` on stdout and returns 1. */
int veer_cli_wants_help(int argc, char **argv, const char *help);

/* Opens a client with the admin socket, the act socket, or both. Returns 0 or an exit code
 * (after printing the error). */
int veer_cli_conn_open(veer_cli_conn *cc, int want_admin, int want_act, veer_client **out);

/* The opening of a command that takes no positional arguments and talks to the admin socket:
 * handles --help (returns -1: exit 0), the flags, and opens *out. Returns 0 or an exit code. */
int veer_cli_begin_admin(veer_cli_conn *cc, const char *command, const char *help, int argc,
                         char **argv, veer_client **out);

/* Prints `err` (text on stderr; with --json also {"error": ...} on stdout) and returns the
 * exit code for it: VEER_ETIMEDOUT is unreachable (4), the rest refused (1). */
int veer_cli_fail(const veer_cli_conn *cc, const veer_error *err);

/* Prints a usage or input problem on stderr (and as JSON with --json); returns `code`. */
int veer_cli_complain(const veer_cli_conn *cc, int code, const char *field, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));

/* Prints `doc` on stdout and deletes it. Returns VEER_CLI_OK. */
int veer_cli_print_json(cJSON *doc);

/* A float array as a JSON array; NaN and infinity become null (JSON has no such numbers). */
cJSON *veer_cli_json_floats(const float *v, size_t n);
cJSON *veer_cli_json_number(double x); /* null for NaN */
cJSON *veer_cli_json_task(const veer_client_task *t);
cJSON *veer_cli_json_channel(const veer_client_channel *ch);
void veer_cli_hex(const uint8_t *bytes, size_t n, char *out); /* out holds 2n + 1 */

/* ---- Numbers in (cli_input.c) ---------------------------------------------------------- */

/* A matrix read from a file or the command line; values row-major, owned by the caller (free
 * with veer_cli_matrix_free). */
typedef struct veer_cli_matrix {
    float *values;
    size_t rows, cols;
} veer_cli_matrix;

void veer_cli_matrix_free(veer_cli_matrix *m);

/* Parses "v1,v2,..." into a 1 x n matrix. Every value must be a finite number. Returns 0 or
 * prints the problem (naming `flag`) and returns VEER_CLI_USAGE. */
int veer_cli_parse_vector(const veer_cli_conn *cc, const char *text, const char *flag,
                          veer_cli_matrix *out);

/* Reads a .csv (comma-separated numbers, one row per line; '#' comments, blank lines and one
 * header line of names are skipped) or .npy file (float32/float64, 1-D or 2-D). Every value
 * must be finite and every row the same length. Returns 0 or prints the problem (file, line,
 * column) and returns VEER_CLI_INPUT. */
int veer_cli_read_matrix(const veer_cli_conn *cc, const char *path, veer_cli_matrix *out);

#endif
