/* Parsing veerd's flags and VEER_* variables from one table of option descriptors.
 *
 * The key choice is the table: each option names its flag, its variable, its kind, its range
 * and its help line once, and the parser, the range checks, --help and the start-up dump all
 * walk it. Unknown flags, values out of range and missing required settings all come back as
 * VEER_ECONFIG with the flag in err->field, and veerd exits 2 on them. getopt_long is not used
 * because it prints its own messages and cannot report which environment variable was bad. */
#include "service/config.h"

#include <errno.h>
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"

typedef enum { OPT_STR, OPT_U32, OPT_BOOL } opt_kind;

typedef struct opt_desc {
    const char *flag;     /* "--act" */
    const char *env;      /* "VEER_ACT" */
    opt_kind kind;
    size_t offset;        /* into veer__config */
    const char *fallback; /* default as text; NULL: none (empty string or required) */
    uint32_t min, max;    /* OPT_U32 range */
    int required;
    const char *help;
} opt_desc;

#define OFF(f) offsetof(veer__config, f)

static const opt_desc OPTIONS[] = {
    {"--bundle", "VEER_BUNDLE", OPT_STR, OFF(bundle_path), NULL, 0, 0, 1,
     "Model bundle file to load and serve (required)."},
    {"--state-dir", "VEER_STATE_DIR", OPT_STR, OFF(state_dir), "veerd-state", 0, 0, 0,
     "Directory for the journal of tasks and switches; created (mode 0700) when missing."},
    {"--act", "VEER_ACT", OPT_STR, OFF(act_endpoint), "tcp://127.0.0.1:7710", 0, 0, 0,
     "Act endpoint (ZeroMQ ROUTER): controllers connect with DEALER and ask for actions."},
    {"--admin", "VEER_ADMIN", OPT_STR, OFF(admin_endpoint), "tcp://127.0.0.1:7711", 0, 0, 0,
     "Admin endpoint (ROUTER): supervisors put tasks and switch channels. Without --server-key\n"
     "it must be loopback (tcp://127.0.0.1, tcp://[::1], tcp://localhost) or ipc://.\n"
     "tcp://localhost:PORT is bound as tcp://127.0.0.1:PORT in every endpoint."},
    {"--events", "VEER_EVENTS", OPT_STR, OFF(events_endpoint), "tcp://127.0.0.1:7712", 0, 0, 0,
     "Events endpoint (PUB): switches, stored and dropped tasks, model loads."},
    {"--http", "VEER_HTTP", OPT_STR, OFF(http_endpoint), NULL, 0, 0, 0,
     "HOST:PORT (or [V6]:PORT) for the HTTP endpoint: GET /metrics (Prometheus text format),\n"
     "/healthz and /readyz. Off when empty. Read-only, but bind it where only operators reach."},
    {"--default-deadline-us", "VEER_DEFAULT_DEADLINE_US", OPT_U32, OFF(default_deadline_us),
     "1000", 10, 10000000, 0,
     "Deadline in microseconds for act requests that do not carry one."},
    {"--deadline-percentile", "VEER_DEADLINE_PERCENTILE", OPT_U32, OFF(deadline_percentile), "99", 50, 100, 0,
     "Percentile of recent policy times used to predict whether an act would finish after its\n"
     "deadline (then it gets the fallback at once). 99 is safe for machines with headroom; on a\n"
     "loaded machine whose p99 passes the deadline every act falls back, so a lower value\n"
     "trades a few late actions for many fresh ones."},
    {"--act-spin-us", "VEER_ACT_SPIN_US", OPT_U32, OFF(act_spin_us), "0", 0, 1000, 0,
     "Microseconds the act thread polls its socket without sleeping before it blocks for the\n"
     "next request (0: block at once). Spinning saves the thread's wake-up on every request at\n"
     "the price of a busy core: use it only with a core to spare for the act thread."},
    {"--act-batch", "VEER_ACT_BATCH", OPT_U32, OFF(act_batch), "1", 1, 16, 0,
     "Most act requests the act thread answers together: those already queued when it takes\n"
     "one are decoded and checked, and those that need the policy are evaluated in one pass\n"
     "of the networks (1: one at a time; errors and fallbacks are answered before the pass).\n"
     "For discrete models a pass over several states costs less than that many single acts,\n"
     "so controllers ticking in phase wait less; continuous models gain nothing. Batched\n"
     "values can differ from single acts' in the last bits."},
    {"--act-threads", "VEER_ACT_THREADS", OPT_U32, OFF(act_threads), "1", 1, 4, 0,
     "Threads that share the policy pass of a batch (1: the act thread alone). Each added\n"
     "thread has its own workspace and computes a block of the batch's states. It pays only\n"
     "when a state's compute is long against waking a thread: on 2 cores, 4 to 8 states of a\n"
     "2 ms model took 0.62-0.73 of one thread's time, and a 33 us model got 1.1-1.9x slower\n"
     "(tests/bench/bench_act_split.c). Needs --act-batch 2 or more; an idle helper polls for\n"
     "--act-spin-us, then sleeps."},
    {"--act-priority", "VEER_ACT_PRIORITY", OPT_U32, OFF(act_priority), "0", 0, 99, 0,
     "SCHED_FIFO priority (1 to 99) for the act thread and libzmq's I/O threads, so other work\n"
     "on the machine cannot delay an act (0: ordinary scheduling). Needs CAP_SYS_NICE or an\n"
     "RLIMIT_RTPRIO at least this high (systemd: LimitRTPRIO=); veerd refuses to start without.\n"
     "Keep it below the priorities of the machine's own control loops."},
    {"--act-cpu", "VEER_ACT_CPU", OPT_STR, OFF(act_cpu), NULL, 0, 0, 0,
     "Pin the act thread and libzmq's I/O threads to this CPU (a number from 0), so a request\n"
     "and its reply are handed between threads on one core (empty: not pinned). Choose a core\n"
     "the machine's other real-time work does not use."},
    {"--cpu-latency-us", "VEER_CPU_LATENCY_US", OPT_STR, OFF(cpu_latency), NULL, 0, 0, 0,
     "Hold a CPU wake-up latency request of this many microseconds (0 to 100000) through\n"
     "/dev/cpu_dma_latency while veerd runs, so idle CPUs do not sleep too deeply to answer in\n"
     "time (empty: no request). It applies to the whole machine and costs power; needs root or\n"
     "write access to that device."},
    {"--max-message-bytes", "VEER_MAX_MESSAGE_BYTES", OPT_U32, OFF(max_message_bytes),
     "16777216", 1024, 1073741824, 0,
     "Largest admin request handled. Up to twice this gets an EMSGSIZE error reply; beyond\n"
     "that libzmq closes the sender's connection without a reply."},
    {"--act-max-message-bytes", "VEER_ACT_MAX_MESSAGE_BYTES", OPT_U32,
     OFF(act_max_message_bytes), "65536", 256, 16777216, 0,
     "Largest act request handled (the same two-step rule as --max-message-bytes)."},
    {"--max-samples", "VEER_MAX_SAMPLES", OPT_U32, OFF(max_samples), "100000", 1, 1000000, 0,
     "Most samples, goals or reference rewards one task may carry."},
    {"--max-tasks", "VEER_MAX_TASKS", OPT_U32, OFF(max_tasks), "1024", 1, 1000000, 0,
     "Most tasks the registry holds."},
    {"--max-channels", "VEER_MAX_CHANNELS", OPT_U32, OFF(max_channels), "256", 1, 65536, 0,
     "Size of the channel table (fixed at start so controllers read it without locks)."},
    {"--journal-compact-bytes", "VEER_JOURNAL_COMPACT_BYTES", OPT_U32,
     OFF(journal_compact_bytes), "67108864", 4096, 4000000000u, 0,
     "Rewrite the journal with only live tasks and switches once it grows past this size."},
    {"--server-key", "VEER_SERVER_KEY", OPT_STR, OFF(server_key_path), NULL, 0, 0, 0,
     "File with the server's CURVE secret key (Z85, 40 characters). Turns on CurveZMQ for\n"
     "the admin socket; needs --allowed-keys."},
    {"--allowed-keys", "VEER_ALLOWED_KEYS", OPT_STR, OFF(allowed_keys_path), NULL, 0, 0, 0,
     "File of client public keys (Z85, one per line, '#' comments) allowed to connect."},
    {"--monitors", "VEER_MONITORS", OPT_BOOL, OFF(monitors), "1", 0, 1, 0,
     "Drift monitor and per-stage latency histograms on the act path (0 turns them off, for\n"
     "measuring their cost; no coverage flag, no drift or latency metrics then)."},
    {"--drift-window", "VEER_DRIFT_WINDOW", OPT_U32, OFF(drift_window), "1000", 100, 1000000, 0,
     "States in the sliding window of each drift monitor (the whole service's and each\n"
     "channel's). Levels are judged once a window is full; under 100 states a 1 % rate means\n"
     "less than one state. Memory: about window x (6 x state size + 9) bytes per monitor, and\n"
     "there are up to --max-channels + 1 monitors."},
    {"--act-auth", "VEER_ACT_AUTH", OPT_BOOL, OFF(act_auth), "0", 0, 1, 0,
     "Require CURVE authentication on the act socket too (0 or 1; needs --server-key)."},
};
#define OPTION_COUNT (sizeof OPTIONS / sizeof OPTIONS[0])

static int set_value(veer__config *cfg, const opt_desc *o, const char *text, const char *source,
                     veer_error *err)
{
    char *base = (char *)cfg + o->offset;
    if (o->kind == OPT_STR) {
        if (strlen(text) >= VEER__CONFIG_STR_MAX)
            return veer__error_set(err, VEER_ECONFIG, o->flag, "%s: value from %s is longer than %d bytes",
                                   o->flag, source, VEER__CONFIG_STR_MAX - 1);
        memcpy(base, text, strlen(text) + 1);
        return 0;
    }
    if (o->kind == OPT_BOOL) {
        if (strcmp(text, "1") == 0 || strcmp(text, "true") == 0 || strcmp(text, "yes") == 0)
            *(uint32_t *)base = 1;
        else if (strcmp(text, "0") == 0 || strcmp(text, "false") == 0 || strcmp(text, "no") == 0)
            *(uint32_t *)base = 0;
        else
            return veer__error_set(err, VEER_ECONFIG, o->flag,
                                   "%s: expected 0 or 1 (from %s), got '%s'", o->flag, source, text);
        return 0;
    }
    char *end = NULL;
    errno = 0;
    unsigned long long v = strtoull(text, &end, 10);
    if (errno != 0 || end == text || *end != '\0' || text[0] == '-' || v < o->min || v > o->max)
        return veer__error_set(err, VEER_ECONFIG, o->flag,
                               "%s: expected an integer from %" PRIu32 " to %" PRIu32
                               " (from %s), got '%s'",
                               o->flag, o->min, o->max, source, text);
    *(uint32_t *)base = (uint32_t)v;
    return 0;
}

/* libzmq binds to an interface or an address, not to a host name, so "localhost" is written
 * as the address it always means here. */
static void localhost_to_address(char *ep)
{
    static const char prefix[] = "tcp://localhost:";
    if (strncmp(ep, prefix, sizeof prefix - 1) != 0)
        return;
    char rest[VEER__CONFIG_STR_MAX];
    snprintf(rest, sizeof rest, "%s", ep + sizeof prefix - 1);
    snprintf(ep, VEER__CONFIG_STR_MAX, "tcp://127.0.0.1:%.400s", rest);
}

static int check_endpoint(const char *flag, const char *ep, veer_error *err)
{
    if (strncmp(ep, "tcp://", 6) != 0 && strncmp(ep, "ipc://", 6) != 0)
        return veer__error_set(err, VEER_ECONFIG, flag,
                               "%s: '%s' is not a tcp:// or ipc:// endpoint", flag, ep);
    if (ep[6] == '\0')
        return veer__error_set(err, VEER_ECONFIG, flag, "%s: endpoint '%s' has no address", flag, ep);
    return 0;
}

/* An integer option where empty means "off" (the table's integer kind has no "off"): *on is
 * whether `text` was given, *value its value from 0 to max. */
static int optional_u32(const char *flag, const char *text, uint32_t max, const char *what, int *on,
                        uint32_t *value, veer_error *err)
{
    *on = text[0] != '\0';
    if (!*on)
        return 0;
    char *end = NULL;
    errno = 0;
    unsigned long long v = strtoull(text, &end, 10);
    if (errno != 0 || end == text || *end != '\0' || text[0] == '-' || v > max)
        return veer__error_set(err, VEER_ECONFIG, flag,
                               "%s: expected %s from 0 to %" PRIu32 ", or empty for none; got '%s'", flag, what,
                               max, text);
    *value = (uint32_t)v;
    return 0;
}

static int check_whole(veer__config *cfg, const int given[OPTION_COUNT], veer_error *err)
{
    for (size_t i = 0; i < OPTION_COUNT; i++) {
        const opt_desc *o = &OPTIONS[i];
        if (o->required && !given[i])
            return veer__error_set(err, VEER_ECONFIG, o->flag, "%s (or %s) is required: %s",
                                   o->flag, o->env, o->help);
    }
    int rc;
    localhost_to_address(cfg->act_endpoint);
    localhost_to_address(cfg->admin_endpoint);
    localhost_to_address(cfg->events_endpoint);
    if ((rc = check_endpoint("--act", cfg->act_endpoint, err)) < 0 ||
        (rc = check_endpoint("--admin", cfg->admin_endpoint, err)) < 0 ||
        (rc = check_endpoint("--events", cfg->events_endpoint, err)) < 0)
        return rc;
    if (strcmp(cfg->act_endpoint, cfg->admin_endpoint) == 0)
        return veer__error_set(err, VEER_ECONFIG, "--admin", "--admin must differ from --act (both '%s')",
                               cfg->act_endpoint);
    if (strcmp(cfg->events_endpoint, cfg->admin_endpoint) == 0 ||
        strcmp(cfg->events_endpoint, cfg->act_endpoint) == 0)
        return veer__error_set(err, VEER_ECONFIG, "--events",
                               "--events must differ from --act and --admin ('%s')", cfg->events_endpoint);
    if (cfg->server_key_path[0] != '\0' && cfg->allowed_keys_path[0] == '\0')
        return veer__error_set(err, VEER_ECONFIG, "--allowed-keys",
                               "--server-key needs --allowed-keys: a file of client public keys");
    if (cfg->allowed_keys_path[0] != '\0' && cfg->server_key_path[0] == '\0')
        return veer__error_set(err, VEER_ECONFIG, "--server-key",
                               "--allowed-keys needs --server-key: the server's secret key file");
    if (cfg->act_auth && cfg->server_key_path[0] == '\0')
        return veer__error_set(err, VEER_ECONFIG, "--act-auth", "--act-auth needs --server-key and --allowed-keys");
    if (cfg->act_threads > 1 && cfg->act_batch < 2)
        return veer__error_set(err, VEER_ECONFIG, "--act-threads",
                               "--act-threads %u needs --act-batch 2 or more: the threads share "
                               "the pass over a batch's states",
                               cfg->act_threads);
    if ((rc = optional_u32("--act-cpu", cfg->act_cpu, 1023, "a CPU number", &cfg->act_cpu_on,
                           &cfg->act_cpu_index, err)) < 0 ||
        (rc = optional_u32("--cpu-latency-us", cfg->cpu_latency, 100000, "microseconds", &cfg->cpu_latency_on,
                           &cfg->cpu_latency_us, err)) < 0)
        return rc;
    if (cfg->state_dir[0] == '\0')
        return veer__error_set(err, VEER_ECONFIG, "--state-dir", "--state-dir must not be empty");
    return 0;
}

int veer__config_parse(veer__config *cfg, int argc, char **argv, veer_error *err)
{
    int given[OPTION_COUNT] = {0};
    int rc;
    memset(cfg, 0, sizeof *cfg);
    for (size_t i = 0; i < OPTION_COUNT; i++) {
        if (OPTIONS[i].fallback != NULL &&
            (rc = set_value(cfg, &OPTIONS[i], OPTIONS[i].fallback, "the default", err)) < 0)
            return rc;
    }
    for (size_t i = 0; i < OPTION_COUNT; i++) {
        const char *v = getenv(OPTIONS[i].env);
        if (v == NULL)
            continue;
        if ((rc = set_value(cfg, &OPTIONS[i], v, OPTIONS[i].env, err)) < 0)
            return rc;
        given[i] = 1;
    }
    for (int a = 1; a < argc; a++) {
        const char *arg = argv[a];
        if (strcmp(arg, "--help") == 0 || strcmp(arg, "-h") == 0)
            return VEER__CONFIG_HELP;
        if (strcmp(arg, "--version") == 0)
            return VEER__CONFIG_VERSION;
        /* Accept both "--flag value" and "--flag=value". */
        const char *eq = strchr(arg, '=');
        size_t name_len = eq ? (size_t)(eq - arg) : strlen(arg);
        const opt_desc *o = NULL;
        size_t idx = 0;
        for (size_t i = 0; i < OPTION_COUNT; i++) {
            if (strlen(OPTIONS[i].flag) == name_len && strncmp(OPTIONS[i].flag, arg, name_len) == 0) {
                o = &OPTIONS[i];
                idx = i;
                break;
            }
        }
        if (o == NULL)
            return veer__error_set(err, VEER_ECONFIG, arg, "unknown option '%s' (see veerd --help)", arg);
        const char *value = NULL;
        if (eq != NULL)
            value = eq + 1;
        else if (o->kind == OPT_BOOL && (a + 1 >= argc || strncmp(argv[a + 1], "--", 2) == 0))
            value = "1"; /* a bare boolean flag switches the option on */
        else if (a + 1 < argc)
            value = argv[++a];
        else
            return veer__error_set(err, VEER_ECONFIG, o->flag, "%s needs a value", o->flag);
        if ((rc = set_value(cfg, o, value, "the command line", err)) < 0)
            return rc;
        given[idx] = 1;
    }
    return check_whole(cfg, given, err);
}

void veer__config_help(void *out)
{
    FILE *f = out;
    fprintf(f,
            "Usage: veerd --bundle MODEL.veer [options]\n"
            "\n"
            "veerd serves a frozen forward-backward model to real-time controllers over ZeroMQ:\n"
            "controllers ask for actions on the act socket, supervisors register tasks and switch\n"
            "channels on the admin socket, operators subscribe to the events socket. Every\n"
            "acknowledged task and switch is journaled in the state directory and restored on\n"
            "start.\n"
            "\n"
            "Each option may also come from the environment variable shown; the flag wins.\n"
            "Values: --flag VALUE or --flag=VALUE.\n\n");
    for (size_t i = 0; i < OPTION_COUNT; i++) {
        const opt_desc *o = &OPTIONS[i];
        fprintf(f, "  %s %s   (%s", o->flag, o->kind == OPT_U32 ? "N" : o->kind == OPT_BOOL ? "[0|1]" : "VALUE",
                o->env);
        if (o->required)
            fprintf(f, ", required");
        else if (o->fallback != NULL)
            fprintf(f, ", default %s", o->fallback);
        if (o->kind == OPT_U32)
            fprintf(f, ", %" PRIu32 "..%" PRIu32, o->min, o->max);
        fprintf(f, ")\n      ");
        for (const char *c = o->help; *c; c++) {
            fputc(*c, f);
            if (*c == '\n')
                fputs("      ", f);
        }
        fputc('\n', f);
    }
    fprintf(f,
            "\n  --help      this text\n  --version   veerd's version\n"
            "\nSignals: SIGTERM or SIGINT stop taking requests, answer those in flight, flush the\n"
            "journal and exit 0.\n"
            "Exit codes: 0 clean stop, 1 start-up failure (bundle, state directory, sockets),\n"
            "2 bad configuration (the message names the flag).\n");
}

void veer__config_print(const veer__config *cfg, void *out)
{
    FILE *f = out;
    for (size_t i = 0; i < OPTION_COUNT; i++) {
        const opt_desc *o = &OPTIONS[i];
        const char *base = (const char *)cfg + o->offset;
        if (o->kind == OPT_STR)
            fprintf(f, "veerd: config %s = %s\n", o->flag, base);
        else
            fprintf(f, "veerd: config %s = %" PRIu32 "\n", o->flag, *(const uint32_t *)base);
    }
}
