/* `veer keygen OUT_PREFIX`: a CurveZMQ key pair (libzmq's zmq_curve_keypair) for a supervisor,
 * a controller or veerd itself. OUT_PREFIX.pub holds the public key and OUT_PREFIX.secret the
 * secret key, each as one line of Z85 text (40 characters), the form libzmq's socket options
 * take. The secret file is created with mode 0600 and never overwritten, so a key in use is
 * not replaced by accident; --force allows replacing. */
#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>
#include <zmq.h>

#include "cli.h"
#include "cli_conn.h"

static const char HELP[] =
    "usage: veer keygen OUT_PREFIX [--force] [--json]\n"
    "Writes a new CURVE key pair: OUT_PREFIX.pub (public, give it to veerd's allowed-keys file\n"
    "or to clients as --server-key) and OUT_PREFIX.secret (secret, mode 0600, keep it on this\n"
    "machine). Existing files are kept unless --force is given.\n"
    "exit codes: 0 ok, 2 usage, 3 a file cannot be written\n";

static int write_key(veer_cli_conn *cc, const char *path, const char *key, mode_t mode, int force)
{
    int flags = O_WRONLY | O_CREAT | (force ? O_TRUNC : O_EXCL);
    int fd = open(path, flags, mode);
    if (fd < 0)
        return veer_cli_complain(cc, VEER_CLI_INPUT, path, "cannot create '%s': %s%s", path,
                                 strerror(errno),
                                 errno == EEXIST ? " (use --force to replace it)" : "");
    /* With --force on an existing file, open() keeps the old mode; set it explicitly. */
    char line[VEER_CLIENT_KEY_LEN + 2];
    snprintf(line, sizeof line, "%s\n", key);
    int ok = fchmod(fd, mode) == 0 && write(fd, line, strlen(line)) == (ssize_t)strlen(line) &&
             fsync(fd) == 0;
    int e = errno;
    ok = close(fd) == 0 && ok;
    if (!ok)
        return veer_cli_complain(cc, VEER_CLI_INPUT, path, "writing '%s' failed: %s", path,
                                 strerror(e));
    return 0;
}

static int run(int argc, char **argv)
{
    if (veer_cli_wants_help(argc, argv, HELP))
        return VEER_CLI_OK;
    veer_cli_conn cc;
    veer_cli_conn_init(&cc, "keygen", argc, argv);
    const char *prefix = NULL;
    int force = 0;
    for (int i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--json") == 0)
            cc.json = 1;
        else if (strcmp(argv[i], "--force") == 0)
            force = 1;
        else if (argv[i][0] == '-' && argv[i][1] == '-')
            return veer_cli_complain(&cc, VEER_CLI_USAGE, argv[i], "unknown flag %s", argv[i]);
        else if (prefix == NULL)
            prefix = argv[i];
        else
            return veer_cli_complain(&cc, VEER_CLI_USAGE, argv[i], "unexpected argument '%s'",
                                     argv[i]);
    }
    if (prefix == NULL || prefix[0] == '\0')
        return veer_cli_complain(&cc, VEER_CLI_USAGE, "OUT_PREFIX",
                                 "give OUT_PREFIX, e.g. `veer keygen keys/supervisor`");
    char pub[41], sec[41];
    if (zmq_curve_keypair(pub, sec) != 0)
        return veer_cli_complain(&cc, VEER_CLI_REFUSED, "",
                                 "libzmq cannot make CURVE keys: %s "
                                 "(is it built with CURVE support?)",
                                 zmq_strerror(errno));
    char pub_path[4096], sec_path[4096];
    if ((size_t)snprintf(pub_path, sizeof pub_path, "%s.pub", prefix) >= sizeof pub_path ||
        (size_t)snprintf(sec_path, sizeof sec_path, "%s.secret", prefix) >= sizeof sec_path)
        return veer_cli_complain(&cc, VEER_CLI_USAGE, "OUT_PREFIX", "OUT_PREFIX is too long");
    int rc;
    /* The secret first: if it cannot be written, no orphan public key is left behind. */
    if ((rc = write_key(&cc, sec_path, sec, 0600, force)) != 0)
        return rc;
    if ((rc = write_key(&cc, pub_path, pub, 0644, force)) != 0) {
        unlink(sec_path);
        return rc;
    }
    memset(sec, 0, sizeof sec);
    if (cc.json) {
        cJSON *doc = cJSON_CreateObject();
        cJSON_AddStringToObject(doc, "public_key", pub);
        cJSON_AddStringToObject(doc, "public_key_file", pub_path);
        cJSON_AddStringToObject(doc, "secret_key_file", sec_path);
        return veer_cli_print_json(doc);
    }
    printf("public key  %s  (%s)\nsecret key  %s  (mode 0600; keep it here)\n", pub, pub_path,
           sec_path);
    return VEER_CLI_OK;
}

const veer_cli_command veer_cli_cmd_keygen = {"keygen",
                                              "write a CURVE key pair for veerd or a client", run};
