/* The operators' side of veerd (see ops.h). A 5 ms timer moves the act states waiting in the act
 * thread's ring into the drift monitors (this thread is their writer); a 100 ms one announces
 * drift level changes, samples the deadline-miss counter for the burst detector and, every tenth
 * time, moves the latency intervals into the metrics' one-second slots. The HTTP handler answers
 * three paths; everything else is 404. */
#include "service/ops.h"

#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "service/burst.h"
#include "service/http.h"
#include "service/log.h"
#include "service/metrics.h"
#include "veer/drift.h"

#define OPS_TICK_MS 100
#define METRICS_EVERY 10 /* ticks: one second */
/* The act states are moved into the drift monitors in small slices, often: at 8,000 acts a
 * second a 100 ms drain was about 1 ms of work in one piece on this thread, and on a 2-core
 * machine that burst delayed the act thread or libzmq's I/O thread for about that long once per
 * drain (closed-loop p99.9 0.76-1.08 ms with the monitors on, 0.24-0.28 ms with them off; our
 * measurement, bench_veerd). Every 5 ms the slice is about 40 states, some 40 us of work. */
#define DRAIN_MS 5

struct veer__ops {
    veer__ops_config cfg;
    uv_timer_t timer, drain;
    int open_timers; /* counted down as they close (veer__ops_stop) */
    veer__http *http;
    veer__metrics *metrics;
    veer__burst burst;
    uint32_t ticks;
    veer__metrics_extra extra;
    /* Per-channel drift events: the levels last announced for the channel in each table slot. */
    veer_drift_report *channel_report; /* NULL without a drift monitor */
    struct channel_levels {
        veer_drift_level psi, exceed;
        uint64_t seq;
    } * channel_levels;
    uint32_t channel_slots;
};

/* Announces per-channel drift level changes (scope: the channel's name), as veerd's main does for
 * the whole service. This thread is the monitors' writer; it reads their published snapshots,
 * which change on every level change, so no change is missed. */
static void check_channel_drift(veer__ops *o)
{
    const veer_model_info *info = o->cfg.store->info;
    veer_drift_report *r = o->channel_report;
    for (uint32_t i = 0; r != NULL && i < o->channel_slots; i++) {
        veer_drift *drift = veer__act_channel_drift(o->cfg.act, i);
        struct channel_levels *seen = &o->channel_levels[i];
        if (drift == NULL || veer_drift_snapshot(drift, r) != 0 || r->publish_seq == seen->seq)
            continue;
        seen->seq = r->publish_seq;
        veer__channel *ch = veer__channels_slot(o->cfg.store->channels, i);
        const char *name = ch != NULL ? ch->name : "";
        if (r->psi_overall != seen->psi) {
            seen->psi = r->psi_overall;
            veer__log_warn("drift: channel '%s': PSI level %s (largest %.3f on %s)", name,
                           veer_drift_level_name(r->psi_overall), r->psi_max,
                           info->feature_names[r->psi_max_feature]);
            if (o->cfg.store->events != NULL)
                veer__events_drift(o->cfg.store->events, name, "psi",
                                   info->feature_names[r->psi_max_feature], r->psi_max,
                                   (uint32_t)r->psi_overall);
        }
        if (r->exceed_level != seen->exceed) {
            seen->exceed = r->exceed_level;
            veer__log_warn("drift: channel '%s': exceedance level %s (%.1f %% of the window beyond "
                           "the training p99 distance)",
                           name, veer_drift_level_name(r->exceed_level), 100.0 * r->exceed_rate);
            if (o->cfg.store->events != NULL)
                veer__events_drift(o->cfg.store->events, name, "exceedance", "", r->exceed_rate,
                                   (uint32_t)r->exceed_level);
        }
    }
}

static void on_drain(uv_timer_t *t)
{
    veer__ops *o = t->data;
    veer__act_drain_states(o->cfg.act, UINT32_MAX);
}

static void on_tick(uv_timer_t *t)
{
    veer__ops *o = t->data;
    veer__act_drain_states(o->cfg.act, UINT32_MAX);
    check_channel_drift(o);
    veer__act_counters c;
    veer__act_counters_get(o->cfg.act, &c);
    uint32_t misses = 0;
    if (veer__burst_update(&o->burst, veer__now_ns(), c.deadline_misses, &misses)) {
        o->extra.deadline_bursts++;
        double window_s = (double)o->burst.window_ns * 1e-9;
        if (o->cfg.store->events != NULL)
            veer__events_deadline_burst(o->cfg.store->events, "", misses, window_s);
        veer__log_warn("deadline: %u misses within %.1f s (controllers got fallback actions)",
                       misses, window_s);
    }
    if (++o->ticks % METRICS_EVERY == 0)
        veer__metrics_tick(o->metrics);
}

static void handle(void *ctx, const char *path, veer__http_response *resp)
{
    veer__ops *o = ctx;
    o->extra.http_requests++;
    if (strcmp(path, "/metrics") == 0) {
        veer__act_drain_states(o->cfg.act,
                               UINT32_MAX); /* the drift figures include every act so far */
        veer__metrics_render(o->metrics, &o->extra, resp);
    } else if (strcmp(path, "/healthz") == 0) {
        veer__http_body_printf(resp, "alive\n");
    } else if (strcmp(path, "/readyz") == 0) {
        char reason[256];
        if (!veer__metrics_ready(o->metrics, reason, sizeof reason))
            resp->status = 503;
        veer__http_body_printf(resp, "%s: %s\n", resp->status == 200 ? "ready" : "not ready",
                               reason);
    } else {
        resp->status = 404;
        veer__http_body_printf(resp,
                               "404 Not Found: veerd serves /metrics, /healthz and /readyz\n");
    }
}

int veer__ops_start(const veer__ops_config *cfg, veer__ops **out, veer_error *err)
{
    veer__ops *o = veer__calloc(1, sizeof *o);
    if (o == NULL)
        return veer__error_set(err, VEER_ENOMEM, "--http", NULL);
    o->cfg = *cfg;
    veer__burst_init(&o->burst, cfg->burst_misses ? cfg->burst_misses : 10,
                     (uint64_t)(cfg->burst_window_ms ? cfg->burst_window_ms : 1000) * 1000000u);
    veer__metrics_config mc = {.store = cfg->store,
                               .act = cfg->act,
                               .version = cfg->version,
                               .monitors_off = cfg->monitors_off};
    if (veer__metrics_create(&mc, &o->metrics) != 0) {
        veer__free(o);
        return veer__error_set(err, VEER_ENOMEM, "--http", "no memory for the metrics' histograms");
    }
    veer_drift *drift = veer__act_drift(cfg->act);
    if (drift != NULL) {
        o->channel_slots = veer__channels_capacity(cfg->store->channels);
        o->channel_levels = veer__calloc(o->channel_slots, sizeof *o->channel_levels);
        if (o->channel_levels == NULL || veer_drift_report_create(drift, &o->channel_report) != 0) {
            veer__free(o->channel_levels);
            veer__metrics_destroy(o->metrics);
            veer__free(o);
            return veer__error_set(err, VEER_ENOMEM, "--http", "no memory for the drift reports");
        }
    }
    if (cfg->http_address != NULL && cfg->http_address[0] != '\0') {
        veer__http_config hc = {
            .loop = cfg->loop, .address = cfg->http_address, .handler = handle, .ctx = o};
        int rc = veer__http_start(&hc, &o->http, err);
        if (rc < 0) {
            veer_drift_report_destroy(o->channel_report);
            veer__free(o->channel_levels);
            veer__metrics_destroy(o->metrics);
            veer__free(o);
            return rc;
        }
    }
    uv_timer_init(cfg->loop, &o->timer);
    o->timer.data = o;
    uv_timer_start(&o->timer, on_tick, OPS_TICK_MS, OPS_TICK_MS);
    uv_timer_init(cfg->loop, &o->drain);
    o->drain.data = o;
    uv_timer_start(&o->drain, on_drain, DRAIN_MS, DRAIN_MS);
    *out = o;
    return 0;
}

int veer__ops_http_port(const veer__ops *o)
{
    return o != NULL && o->http != NULL ? veer__http_port(o->http) : -1;
}

/* Both timers live inside `o`: it is freed when the second one has closed. */
static void on_timer_closed(uv_handle_t *handle)
{
    veer__ops *o = handle->data;
    if (--o->open_timers > 0)
        return;
    veer_drift_report_destroy(o->channel_report);
    veer__free(o->channel_levels);
    veer__free(o);
}

void veer__ops_stop(veer__ops *o)
{
    if (o == NULL)
        return;
    veer__http_stop(o->http, NULL, NULL);
    o->http = NULL;
    veer__metrics_destroy(o->metrics);
    o->metrics = NULL;
    uv_timer_stop(&o->timer);
    uv_timer_stop(&o->drain);
    o->open_timers = 2;
    uv_close((uv_handle_t *)&o->timer, on_timer_closed);
    uv_close((uv_handle_t *)&o->drain, on_timer_closed);
}
