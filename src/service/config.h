/* veerd's configuration: every setting has a command-line flag and a VEER_* environment
 * variable (the flag wins), a default, a range, and a line of --help. One table in config.c
 * describes them all, so the parser, the checks and the help text cannot drift apart. */
#ifndef VEER_SERVICE_CONFIG_H
#define VEER_SERVICE_CONFIG_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"

#define VEER__CONFIG_STR_MAX 512

typedef struct veer__config {
    char act_endpoint[VEER__CONFIG_STR_MAX];
    char admin_endpoint[VEER__CONFIG_STR_MAX];
    char events_endpoint[VEER__CONFIG_STR_MAX];
    char bundle_path[VEER__CONFIG_STR_MAX];
    char state_dir[VEER__CONFIG_STR_MAX];
    char http_endpoint[VEER__CONFIG_STR_MAX]; /* "" when off; HOST:PORT (service/http.h) */
    char server_key_path[VEER__CONFIG_STR_MAX];
    char allowed_keys_path[VEER__CONFIG_STR_MAX];
    uint32_t act_auth;             /* 1: controllers must authenticate with CURVE too */
    uint32_t default_deadline_us;
    uint32_t deadline_percentile;  /* of policy time, predicting whether an act finishes late */
    uint32_t act_spin_us;          /* act thread: poll this long before blocking (0: never) */
    uint32_t act_batch;            /* act thread: queued requests answered together, at most */
    uint32_t act_threads;          /* act thread and helpers sharing a batch's pass */
    uint32_t act_priority;         /* SCHED_FIFO priority of the act and libzmq threads (0: off) */
    char act_cpu[VEER__CONFIG_STR_MAX];     /* as given; "" when not pinned */
    int act_cpu_on;                /* 1: pin the act thread and libzmq's I/O threads */
    uint32_t act_cpu_index;
    char cpu_latency[VEER__CONFIG_STR_MAX]; /* as given; "" when off */
    int cpu_latency_on;            /* 1: hold /dev/cpu_dma_latency at cpu_latency_us */
    uint32_t cpu_latency_us;
    uint32_t max_message_bytes;    /* admin socket */
    uint32_t act_max_message_bytes;
    uint32_t max_samples;          /* per task: samples, goals or reference rewards */
    uint32_t max_tasks;
    uint32_t max_channels;
    uint32_t journal_compact_bytes;
    uint32_t monitors;             /* 1: drift monitor and stage latency recorders on */
    uint32_t drift_window;         /* states in each drift monitor's sliding window */
} veer__config;

/* Results of veer__config_parse besides 0 and VEER_ECONFIG. */
#define VEER__CONFIG_HELP 1    /* --help was given: the caller prints veer__config_help, exits 0 */
#define VEER__CONFIG_VERSION 2 /* --version was given */

/* Fills `cfg` from the defaults, then the environment (`getenv`), then `argv`.
 * Returns 0, VEER__CONFIG_HELP, VEER__CONFIG_VERSION, or VEER_ECONFIG with `err->field` set to
 * the flag (e.g. "--max-tasks") and a message saying what was expected. */
int veer__config_parse(veer__config *cfg, int argc, char **argv, veer_error *err);

/* Writes the --help text (every flag, its variable, default and meaning) to `out` (a FILE *). */
void veer__config_help(void *out);

/* Writes the effective configuration, one "flag = value" per line, for the start-up log. */
void veer__config_print(const veer__config *cfg, void *out);

#endif
