/* veerd: the action service. main wires the modules together in start-up order and takes
 * them down in reverse:
 *
 *   configuration -> keys and the loopback rule -> model bundle -> registry, channel table
 *   -> journal replay (re-encoding every task for this model) -> ZeroMQ context -> ZAP handler
 *   -> events socket -> act thread -> admin socket on the libuv loop -> signals and a timer.
 *
 * SIGTERM or SIGINT stops the admin socket taking requests, stops the act thread (which first
 * answers what is queued), lets encodings in flight finish and be answered, syncs and closes the
 * journal and exits 0. Exit 2 means bad configuration, exit 1 a start-up failure. */
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>
#include <uv.h>
#include <zmq.h>

#include "base/base.h"
#include "service/act.h"
#include "service/admin.h"
#include "service/auth.h"
#include "service/config.h"
#include "service/events.h"
#include "service/http.h"
#include "service/journal.h"
#include "service/log.h"
#include "service/ops.h"
#include "service/rt.h"
#include "service/store.h"
#include "veer/drift.h"

#ifndef VEER_VERSION
#define VEER_VERSION "0.0.0"
#endif

#define TICK_MS 100

typedef struct veerd {
    veer__config cfg;
    uv_loop_t *loop;
    uv_signal_t sigterm, sigint;
    uv_timer_t tick;
    uv_poll_t zap_poll;
    int zap_polling;
    veer__store store;
    veer__act *act;
    veer__admin *admin;
    veer__zap *zap;
    veer__ops *ops; /* HTTP endpoint, metrics, deadline-burst events */
    int stopping;
    veer_drift_report *drift_report; /* NULL without training statistics */
    veer_drift_level psi_level, exceed_level;
    uint64_t drift_seq;
} veerd;

/* Announces drift level changes on the events socket. The act thread writes the monitor; this
 * reads the snapshot it publishes, so neither waits for the other. */
static void check_drift(veerd *d)
{
    veer_drift *drift = d->act ? veer__act_drift(d->act) : NULL;
    veer_drift_report *r = d->drift_report;
    if (drift == NULL || r == NULL || veer_drift_snapshot(drift, r) != 0 || r->publish_seq == d->drift_seq)
        return;
    d->drift_seq = r->publish_seq;
    if (r->psi_overall != d->psi_level) {
        d->psi_level = r->psi_overall;
        veer__log_warn("drift: PSI level %s (largest %.3f on %s)", veer_drift_level_name(r->psi_overall),
                       r->psi_max, d->store.info->feature_names[r->psi_max_feature]);
        veer__events_drift(d->store.events, "service", "psi", d->store.info->feature_names[r->psi_max_feature],
                           r->psi_max, (uint32_t)r->psi_overall);
    }
    if (r->exceed_level != d->exceed_level) {
        d->exceed_level = r->exceed_level;
        veer__log_warn("drift: exceedance level %s (%.1f %% of the window beyond the training p99 distance)",
                       veer_drift_level_name(r->exceed_level), 100.0 * r->exceed_rate);
        veer__events_drift(d->store.events, "service", "exceedance", "", r->exceed_rate, (uint32_t)r->exceed_level);
    }
}

static void close_handles(void *data)
{
    veerd *d = data;
    uv_close((uv_handle_t *)&d->sigterm, NULL);
    uv_close((uv_handle_t *)&d->sigint, NULL);
    uv_close((uv_handle_t *)&d->tick, NULL);
    if (d->zap_polling) {
        uv_poll_stop(&d->zap_poll);
        uv_close((uv_handle_t *)&d->zap_poll, NULL);
        d->zap_polling = 0;
    }
}

static void on_signal(uv_signal_t *s, int signum)
{
    veerd *d = s->data;
    if (d->stopping)
        return;
    d->stopping = 1;
    veer__log_info("%s: stopping: answering requests in flight", signum == SIGTERM ? "SIGTERM" : "SIGINT");
    uv_signal_stop(&d->sigterm);
    uv_signal_stop(&d->sigint);
    veer__ops_stop(d->ops); /* it reads the act thread's counters: stop it first */
    d->ops = NULL;
    veer__act_stop(d->act); /* returns once queued acts are answered */
    d->act = NULL;
    veer__admin_stop(d->admin, close_handles, d);
}

static void on_tick(uv_timer_t *t)
{
    veerd *d = t->data;
    veer__channels_reclaim(d->store.channels);
    veer__admin_drain(d->admin);
    check_drift(d);
    if (d->zap != NULL)
        veer__zap_serve(d->zap);
}

static void on_zap(uv_poll_t *p, int status, int events)
{
    veerd *d = p->data;
    veer__zap_serve(d->zap);
}

static int config_exit(const veer_error *err)
{
    fprintf(stderr, "veerd: %s\n", err->message);
    return 2;
}

int main(int argc, char **argv)
{
    static veerd d; /* static: the handles must outlive every libuv callback */
    veer_error err;
    veer_error_clear(&err);
    int rc = veer__config_parse(&d.cfg, argc, argv, &err);
    if (rc == VEER__CONFIG_HELP) {
        veer__config_help(stdout);
        return 0;
    }
    if (rc == VEER__CONFIG_VERSION) {
        printf("veerd %s\n", VEER_VERSION);
        return 0;
    }
    if (rc < 0)
        return config_exit(&err);
    struct sockaddr_storage http_addr;
    if (d.cfg.http_endpoint[0] != '\0' && veer__http_parse_address(d.cfg.http_endpoint, &http_addr, &err) < 0)
        return config_exit(&err);
    signal(SIGPIPE, SIG_IGN);

    /* Who may switch a machine's task: CURVE with listed keys, or local connections only. */
    uint8_t secret[32];
    char public_z85[41];
    veer__keyset keys = {0};
    int auth = d.cfg.server_key_path[0] != '\0';
    if (auth) {
        if (!zmq_has("curve")) {
            veer__error_set(&err, VEER_ECONFIG, "--server-key",
                            "--server-key: this libzmq was built without CURVE support");
            return config_exit(&err);
        }
        if (veer__auth_read_secret(d.cfg.server_key_path, "--server-key", secret, public_z85, &err) < 0 ||
            veer__auth_read_allowed(d.cfg.allowed_keys_path, "--allowed-keys", &keys, &err) < 0)
            return config_exit(&err);
    } else if (!veer__auth_endpoint_is_local(d.cfg.admin_endpoint)) {
        veer__error_set(&err, VEER_ECONFIG, "--admin",
                        "--admin: '%s' is not a loopback address. Without --server-key and --allowed-keys the "
                        "admin socket binds only to tcp://127.0.0.1, tcp://[::1], tcp://localhost or ipc://, "
                        "because whoever reaches it can change what the machine does",
                        d.cfg.admin_endpoint);
        return config_exit(&err);
    }

    /* Real-time tuning is asked for explicitly, so a refusal stops veerd before it touches
     * the state directory rather than serving at a priority nobody chose (rt.h). The latency
     * request lasts as long as the descriptor: until the end of main, or the process. */
    int cpu_latency_fd = -1;
    if (d.cfg.act_priority != 0 && veer__rt_check_fifo(d.cfg.act_priority, "--act-priority", &err) < 0)
        return config_exit(&err);
    if (d.cfg.act_cpu_on && veer__rt_check_cpu(d.cfg.act_cpu_index, "--act-cpu", &err) < 0)
        return config_exit(&err);
    if (d.cfg.cpu_latency_on) {
        if (veer__rt_hold_cpu_latency(d.cfg.cpu_latency_us, "--cpu-latency-us", &cpu_latency_fd, &err) < 0)
            return config_exit(&err);
        veer__log_info("holding a CPU wake-up latency request of %u us", d.cfg.cpu_latency_us);
    }

    veer_bundle *bundle = NULL;
    if (veer_bundle_open(d.cfg.bundle_path, &bundle, &err) < 0) {
        veer__log_error("--bundle: cannot load '%s': %s (%s%s%s)", d.cfg.bundle_path, err.message,
                        veer_errname(err.code), err.field[0] ? ", field " : "", err.field);
        return 1;
    }
    const veer_model_info *info = veer_bundle_info(bundle);
    veer__log_info("model '%s' loaded from %s: state %u, z %u, %s actions (%u)", info->model_version,
                   d.cfg.bundle_path, info->state_dim, info->z_dim,
                   info->action_kind == VEER_ACTION_CONTINUOUS ? "continuous" : "discrete",
                   info->action_kind == VEER_ACTION_CONTINUOUS ? info->action_dim : info->action_count);

    int exit_code = 1;
    veer__registry *registry = NULL;
    veer__channels *channels = NULL;
    veer__journal *journal = NULL;
    veer__events *events = NULL;
    void *zctx = NULL;
    if (veer__registry_create(d.cfg.max_tasks, &registry) < 0 ||
        veer__channels_create(d.cfg.max_channels, &channels) < 0) {
        veer__log_error("no memory for the registry and channel table");
        goto fail_tables;
    }
    d.store = (veer__store){.bundle = bundle,
                            .info = info,
                            .registry = registry,
                            .channels = channels,
                            .max_samples = d.cfg.max_samples,
                            .journal_compact_bytes = d.cfg.journal_compact_bytes};
    veer__journal_replay replay;
    if (veer__journal_open(d.cfg.state_dir, veer__store_replay, &d.store, &journal, &replay, &err) < 0) {
        veer__log_error("%s: %s", err.field, err.message);
        goto fail_tables;
    }
    d.store.journal = journal;
    veer__log_info("journal: %llu records replayed, %llu skipped%s; %u tasks, %u channels restored",
                   (unsigned long long)replay.records, (unsigned long long)replay.skipped,
                   replay.cut ? ", damaged tail cut" : "", veer__registry_count(registry),
                   veer__channels_count(channels));
    /* A restart is a good moment to drop what the journal no longer needs. */
    veer__store_compact(&d.store, 0, NULL);

    zctx = zmq_ctx_new();
    if (zctx == NULL) {
        veer__log_error("cannot create the ZeroMQ context");
        goto fail_journal;
    }
    d.loop = uv_default_loop();
    /* Before the first socket: libzmq starts its I/O threads with it, at the priority and on
     * the CPU set here (both were checked at start, rt.h). */
    if ((d.cfg.act_priority != 0 && veer__rt_zmq_fifo(zctx, d.cfg.act_priority, &err) < 0) ||
        (d.cfg.act_cpu_on && veer__rt_zmq_cpu(zctx, d.cfg.act_cpu_index, &err) < 0)) {
        veer__log_error("%s", err.message);
        goto fail_zmq;
    }
    if (auth) {
        if (veer__zap_open(zctx, &keys, &d.zap, &err) < 0) {
            veer__log_error("%s", err.message);
            goto fail_zmq;
        }
        int fd;
        size_t fd_size = sizeof fd;
        zmq_getsockopt(veer__zap_socket(d.zap), ZMQ_FD, &fd, &fd_size);
        uv_poll_init(d.loop, &d.zap_poll, fd);
        d.zap_poll.data = &d;
        uv_poll_start(&d.zap_poll, UV_READABLE, on_zap);
        d.zap_polling = 1;
        veer__log_info("CURVE on the admin socket%s; server public key %s; %u allowed keys",
                       d.cfg.act_auth ? " and the act socket" : "", public_z85, keys.count);
    }
    if (veer__events_open(zctx, d.cfg.events_endpoint, &events, &err) < 0) {
        veer__log_error("%s", err.message);
        goto fail_zap;
    }
    d.store.events = events;
    veer__act_config acfg = {.zmq_ctx = zctx,
                             .endpoint = d.cfg.act_endpoint,
                             .bundle = bundle,
                             .channels = channels,
                             .default_deadline_us = d.cfg.default_deadline_us,
                             .deadline_percentile = d.cfg.deadline_percentile,
                             .spin_us = d.cfg.act_spin_us,
                             .batch_max = d.cfg.act_batch,
                             .threads = d.cfg.act_threads,
                             .priority = d.cfg.act_priority,
                             .pin = d.cfg.act_cpu_on,
                             .cpu = d.cfg.act_cpu_index,
                             .max_message_bytes = d.cfg.act_max_message_bytes,
                             .server_secret_key = auth && d.cfg.act_auth ? secret : NULL,
                             .monitors_off = !d.cfg.monitors,
                             .drift_window = d.cfg.drift_window};
    if (veer__act_start(&acfg, &d.act, &err) < 0) {
        veer__log_error("%s", err.message);
        goto fail_events;
    }
    if (veer__act_drift(d.act) != NULL && veer_drift_report_create(veer__act_drift(d.act), &d.drift_report) != 0)
        veer__log_warn("no memory for drift reports; drift events are off");
    veer__admin_config mcfg = {.loop = d.loop,
                               .zmq_ctx = zctx,
                               .endpoint = d.cfg.admin_endpoint,
                               .store = &d.store,
                               .act = d.act,
                               .max_message_bytes = d.cfg.max_message_bytes,
                               .default_deadline_us = d.cfg.default_deadline_us,
                               .server_secret_key = auth ? secret : NULL,
                               .version = VEER_VERSION};
    if (veer__admin_start(&mcfg, &d.admin, &err) < 0) {
        veer__log_error("%s", err.message);
        goto fail_act;
    }
    veer__ops_config ocfg = {.loop = d.loop,
                             .http_address = d.cfg.http_endpoint,
                             .store = &d.store,
                             .act = d.act,
                             .version = VEER_VERSION,
                             .monitors_off = !d.cfg.monitors};
    if (veer__ops_start(&ocfg, &d.ops, &err) < 0) {
        veer__log_error("%s", err.message);
        veer__admin_stop(d.admin, NULL, NULL);
        uv_run(d.loop, UV_RUN_NOWAIT); /* lets the admin socket's poll handle close */
        veer__admin_close(d.admin);
        goto fail_act;
    }
    if (d.cfg.http_endpoint[0] != '\0')
        veer__log_info("http: serving /metrics, /healthz and /readyz on port %d", veer__ops_http_port(d.ops));
    uv_signal_init(d.loop, &d.sigterm);
    uv_signal_init(d.loop, &d.sigint);
    d.sigterm.data = d.sigint.data = &d;
    uv_signal_start(&d.sigterm, on_signal, SIGTERM);
    uv_signal_start(&d.sigint, on_signal, SIGINT);
    uv_timer_init(d.loop, &d.tick);
    d.tick.data = &d;
    uv_timer_start(&d.tick, on_tick, TICK_MS, TICK_MS);
    veer__events_model_loaded(events, info->model_version, info->digest);
    /* Act latency depends on the kernel OpenBLAS chose for this CPU (README, "Measured
     * figures"), so the log names it beside the latency an operator reads. */
    veer__log_info("blas: OpenBLAS kernel %s", veer_blas_kernel());
    veer__log_info("ready: act %s, admin %s, events %s (pid %ld)", d.cfg.act_endpoint, d.cfg.admin_endpoint,
                   d.cfg.events_endpoint, (long)getpid());

    uv_run(d.loop, UV_RUN_DEFAULT);

    exit_code = 0;
    veer__admin_close(d.admin);
fail_act:
    veer_drift_report_destroy(d.drift_report);
    veer__act_stop(d.act);
fail_events:
    veer__events_close(events);
fail_zap:
    if (d.zap_polling) {
        uv_close((uv_handle_t *)&d.zap_poll, NULL);
        uv_run(d.loop, UV_RUN_NOWAIT);
    }
    veer__zap_close(d.zap);
fail_zmq:
    zmq_ctx_term(zctx);
    uv_loop_close(d.loop);
fail_journal:
    veer__journal_close(journal);
fail_tables:
    veer__registry_destroy(registry);
    veer__channels_destroy(channels);
    veer_bundle_close(bundle);
    veer__keyset_free(&keys);
    memset(secret, 0, sizeof secret);
    if (cpu_latency_fd >= 0)
        close(cpu_latency_fd);
    if (exit_code == 0)
        veer__log_info("stopped cleanly; journal synced");
    return exit_code;
}
