/* The CLI's connection to veerd and its output: flags and environment, key files, error
 * messages that name veerd's error code, field and message, and JSON through cJSON.
 *
 * Exit codes follow cli.h. A refusal from veerd prints its symbolic code name (for example
 * VEER_EDIM), the offending field and veerd's sentence, because that is what tells the user
 * what to fix; "unreachable" also names the endpoint that did not answer. */
#include "cli_conn.h"

#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"

void veer_cli_conn_init(veer_cli_conn *cc, const char *command, int argc, char **argv)
{
    memset(cc, 0, sizeof *cc);
    cc->command = command;
    cc->admin = getenv("VEER_ADMIN") ? getenv("VEER_ADMIN") : VEER_CLI_DEFAULT_ADMIN;
    cc->act = getenv("VEER_ACT") ? getenv("VEER_ACT") : VEER_CLI_DEFAULT_ACT;
    cc->server_key_file = getenv("VEER_SERVER_KEY");
    cc->key_prefix = getenv("VEER_KEY");
    cc->timeout_ms = 5000;
    for (int i = 1; i < argc; i++)
        if (strcmp(argv[i], "--json") == 0)
            cc->json = 1;
}

static int complain_v(const veer_cli_conn *cc, int code, const char *field, const char *fmt,
                      va_list ap)
{
    char msg[512];
    vsnprintf(msg, sizeof msg, fmt, ap);
    fprintf(stderr, "veer %s: %s\n", cc->command, msg);
    if (code == VEER_CLI_USAGE)
        fprintf(stderr, "(see `veer %s --help`)\n", cc->command);
    if (cc->json) {
        cJSON *doc = cJSON_CreateObject(), *e = cJSON_AddObjectToObject(doc, "error");
        cJSON_AddStringToObject(e, "kind", code == VEER_CLI_USAGE ? "usage" : "input");
        cJSON_AddStringToObject(e, "field", field ? field : "");
        cJSON_AddStringToObject(e, "message", msg);
        cJSON_AddNumberToObject(e, "exit", code);
        veer_cli_print_json(doc);
    }
    return code;
}

int veer_cli_complain(const veer_cli_conn *cc, int code, const char *field, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    int rc = complain_v(cc, code, field, fmt, ap);
    va_end(ap);
    return rc;
}

/* Takes "--flag VALUE" or "--flag=VALUE". Returns the value, or NULL when argv[*i] is not
 * `flag`; *missing is set when the flag is there but its value is not. */
static const char *flag_value(int argc, char **argv, int *i, const char *flag, int *missing)
{
    size_t n = strlen(flag);
    if (strncmp(argv[*i], flag, n) != 0)
        return NULL;
    if (argv[*i][n] == '=')
        return argv[*i] + n + 1;
    if (argv[*i][n] != '\0')
        return NULL;
    if (*i + 1 >= argc) {
        *missing = 1;
        return NULL;
    }
    *i += 1;
    return argv[*i];
}

int veer_cli_conn_flag(veer_cli_conn *cc, int argc, char **argv, int *i)
{
    int missing = 0;
    const char *v;
    if (strcmp(argv[*i], "--json") == 0) {
        cc->json = 1;
        return 1;
    }
    if ((v = flag_value(argc, argv, i, "--admin", &missing)) != NULL) {
        cc->admin = v;
        return 1;
    }
    if ((v = flag_value(argc, argv, i, "--act", &missing)) != NULL) {
        cc->act = v;
        return 1;
    }
    if ((v = flag_value(argc, argv, i, "--server-key", &missing)) != NULL) {
        cc->server_key_file = v;
        return 1;
    }
    if ((v = flag_value(argc, argv, i, "--key", &missing)) != NULL) {
        cc->key_prefix = v;
        return 1;
    }
    if ((v = flag_value(argc, argv, i, "--timeout-ms", &missing)) != NULL) {
        char *end;
        errno = 0;
        unsigned long t = strtoul(v, &end, 10);
        if (*v == '\0' || *end != '\0' || errno != 0 || t == 0 || t > 3600000ul)
            return veer_cli_complain(cc, VEER_CLI_USAGE, "--timeout-ms",
                                     "--timeout-ms wants milliseconds from 1 to 3600000, not '%s'",
                                     v);
        cc->timeout_ms = (uint32_t)t;
        return 1;
    }
    if (missing)
        return veer_cli_complain(cc, VEER_CLI_USAGE, argv[*i], "%s needs a value", argv[*i]);
    return 0;
}

int veer_cli_positional(veer_cli_conn *cc, int argc, char **argv, const char **pos, int n_pos,
                        int *got)
{
    *got = 0;
    for (int i = 1; i < argc; i++) {
        int rc = veer_cli_conn_flag(cc, argc, argv, &i);
        if (rc == 1)
            continue;
        if (rc != 0)
            return rc;
        if (argv[i][0] == '-' && argv[i][1] == '-')
            return veer_cli_complain(cc, VEER_CLI_USAGE, argv[i], "unknown flag %s", argv[i]);
        if (*got == n_pos)
            return veer_cli_complain(cc, VEER_CLI_USAGE, argv[i], "unexpected argument '%s'",
                                     argv[i]);
        pos[(*got)++] = argv[i];
    }
    return 0;
}

int veer_cli_wants_help(int argc, char **argv, const char *help)
{
    for (int i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--help") == 0 || strcmp(argv[i], "-h") == 0) {
            fputs(help, stdout);
            return 1;
        }
    }
    return 0;
}

/* Reads a Z85 key (40 characters, then optional whitespace) from `path`. */
static int read_key(const veer_cli_conn *cc, const char *path, char out[41])
{
    FILE *f = fopen(path, "r");
    if (f == NULL)
        return veer_cli_complain(cc, VEER_CLI_INPUT, path, "cannot read key file '%s': %s", path,
                                 strerror(errno));
    char line[128];
    size_t n = fread(line, 1, sizeof line - 1, f);
    fclose(f);
    line[n] = '\0';
    while (n > 0 && (line[n - 1] == '\n' || line[n - 1] == '\r' || line[n - 1] == ' '))
        line[--n] = '\0';
    if (n != VEER_CLIENT_KEY_LEN)
        return veer_cli_complain(cc, VEER_CLI_INPUT, path,
                                 "key file '%s' must hold one 40-character Z85 key (as `veer "
                                 "keygen` writes), found %zu characters",
                                 path, n);
    memcpy(out, line, 41);
    return 0;
}

int veer_cli_conn_open(veer_cli_conn *cc, int want_admin, int want_act, veer_client **out)
{
    int rc;
    veer_client_options o;
    veer_client_options_init(&o);
    cc->used_admin = want_admin;
    cc->used_act = want_act;
    o.admin_endpoint = want_admin ? cc->admin : NULL;
    o.act_endpoint = want_act ? cc->act : NULL;
    o.timeout_ms = cc->timeout_ms;
    if (cc->server_key_file != NULL && cc->server_key_file[0] != '\0') {
        if (cc->key_prefix == NULL || cc->key_prefix[0] == '\0')
            return veer_cli_complain(cc, VEER_CLI_USAGE, "--key",
                                     "--server-key needs this client's own key pair too: "
                                     "--key PREFIX (make one with `veer keygen PREFIX`)");
        char pub[4096], sec[4096];
        snprintf(pub, sizeof pub, "%s.pub", cc->key_prefix);
        snprintf(sec, sizeof sec, "%s.secret", cc->key_prefix);
        if ((rc = read_key(cc, cc->server_key_file, cc->server_key)) != 0 ||
            (rc = read_key(cc, pub, cc->public_key)) != 0 ||
            (rc = read_key(cc, sec, cc->secret_key)) != 0)
            return rc;
        o.server_key = cc->server_key;
        o.public_key = cc->public_key;
        o.secret_key = cc->secret_key;
        o.act_curve = 1;
    }
    veer_error err;
    veer_error_clear(&err);
    rc = veer_client_open(&o, out, &err);
    if (rc == 0)
        return 0;
    if (rc == VEER_EINVAL)
        return veer_cli_complain(cc, VEER_CLI_USAGE, err.field, "%s", err.message);
    return veer_cli_fail(cc, &err);
}

int veer_cli_begin_admin(veer_cli_conn *cc, const char *command, const char *help, int argc,
                         char **argv, veer_client **out)
{
    *out = NULL;
    if (veer_cli_wants_help(argc, argv, help))
        return -1;
    veer_cli_conn_init(cc, command, argc, argv);
    int got, rc;
    if ((rc = veer_cli_positional(cc, argc, argv, NULL, 0, &got)) != 0)
        return rc;
    return veer_cli_conn_open(cc, 1, 0, out);
}

int veer_cli_fail(const veer_cli_conn *cc, const veer_error *err)
{
    int code = err->code == VEER_ETIMEDOUT ? VEER_CLI_UNREACHABLE : VEER_CLI_REFUSED;
    if (code == VEER_CLI_UNREACHABLE)
        fprintf(stderr, "veer %s: no answer from veerd at %s: %s\n", cc->command,
                cc->used_act ? cc->act : cc->admin, err->message);
    else
        fprintf(stderr, "veer %s: refused: %s (%s)%s%s: %s\n", cc->command, veer_errname(err->code),
                veer_strerror(err->code), err->field[0] ? " in " : "", err->field, err->message);
    if (cc->json) {
        cJSON *doc = cJSON_CreateObject(), *e = cJSON_AddObjectToObject(doc, "error");
        cJSON_AddNumberToObject(e, "code", err->code);
        cJSON_AddStringToObject(e, "name", veer_errname(err->code));
        cJSON_AddStringToObject(e, "field", err->field);
        cJSON_AddStringToObject(e, "message", err->message);
        cJSON_AddNumberToObject(e, "exit", code);
        veer_cli_print_json(doc);
    }
    return code;
}

int veer_cli_print_json(cJSON *doc)
{
    char *s = cJSON_Print(doc);
    if (s != NULL) {
        fputs(s, stdout);
        fputc('\n', stdout);
        cJSON_free(s);
    }
    cJSON_Delete(doc);
    return VEER_CLI_OK;
}

cJSON *veer_cli_json_number(double x)
{
    return isfinite(x) ? cJSON_CreateNumber(x) : cJSON_CreateNull();
}

cJSON *veer_cli_json_floats(const float *v, size_t n)
{
    cJSON *a = cJSON_CreateArray();
    for (size_t i = 0; i < n; i++)
        cJSON_AddItemToArray(a, veer_cli_json_number(v[i]));
    return a;
}

void veer_cli_hex(const uint8_t *bytes, size_t n, char *out)
{
    static const char digits[] = "0123456789abcdef";
    for (size_t i = 0; i < n; i++) {
        out[2 * i] = digits[bytes[i] >> 4];
        out[2 * i + 1] = digits[bytes[i] & 15];
    }
    out[2 * n] = '\0';
}

static const char *source_name(uint32_t s)
{
    switch (s) {
    case VEER_TASK_SAMPLES:
        return "samples";
    case VEER_TASK_GOALS:
        return "goals";
    case VEER_TASK_REFERENCE:
        return "reference";
    default:
        return "unknown";
    }
}

cJSON *veer_cli_json_task(const veer_client_task *t)
{
    char hex[65];
    veer_cli_hex(t->digest, sizeof t->digest, hex);
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "name", t->name);
    cJSON_AddStringToObject(o, "digest", hex);
    cJSON_AddStringToObject(o, "source", source_name(t->source));
    cJSON_AddNumberToObject(o, "count", t->count);
    cJSON_AddItemToObject(o, "r2", veer_cli_json_number(t->r2));
    cJSON_AddItemToObject(o, "norm_raw", veer_cli_json_number(t->norm_raw));
    cJSON_AddItemToObject(o, "z", veer_cli_json_floats(t->z, t->z_dim));
    cJSON *on = cJSON_AddArrayToObject(o, "active_on");
    for (uint32_t i = 0; i < t->active_on_count; i++)
        cJSON_AddItemToArray(on, cJSON_CreateString(t->active_on[i]));
    cJSON_AddBoolToObject(o, "encoded", t->encoded);
    return o;
}

cJSON *veer_cli_json_channel(const veer_client_channel *ch)
{
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "name", ch->name);
    cJSON_AddStringToObject(o, "task", ch->task);
    cJSON_AddNumberToObject(o, "epoch", (double)ch->epoch);
    cJSON_AddNumberToObject(o, "acts", (double)ch->acts);
    return o;
}
