/* Rendering veerd's metrics (see metrics.h for what is shown and how it is read).
 *
 * Metric names are veer's own, in the exposition format's conventions: a `veer_` prefix, base
 * units (seconds), `_total` on counters. Every family is written with its HELP and TYPE lines
 * even when it has no sample yet, so a scraper sees the same families from the first scrape. */
#include "service/metrics.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "veer/drift.h"
#include "veer/histogram.h"

#define RECENT_SLOTS 10 /* one-second slots behind the "recent" percentiles */

static const char *const STAGE_NAMES[VEER__ACT_STAGE_COUNT] = {"decode", "policy", "reply",
                                                               "total"};

typedef struct stage_hists {
    veer_hist *cumulative;
    veer_hist *recent[RECENT_SLOTS];
} stage_hists;

struct veer__metrics {
    veer__metrics_config cfg;
    stage_hists stage[VEER__ACT_STAGE_COUNT];
    veer_hist *channel[VEER__ACT_CHANNEL_HISTS]; /* cumulative total time per bound channel */
    veer_hist *scratch;
    int slot;
    veer_drift_report *drift; /* NULL without a drift monitor */
    /* Per channel table slot: the report of the channel's drift monitor, made on the first
     * render after the monitor appeared; have_channel marks those snapshotted this render. */
    veer_drift_report **channel_drift;
    uint8_t *have_channel;
    uint32_t channel_slots;
};

int veer__metrics_create(const veer__metrics_config *cfg, veer__metrics **out)
{
    veer__metrics *m = veer__calloc(1, sizeof *m);
    if (m == NULL)
        return VEER_ENOMEM;
    m->cfg = *cfg;
    int rc = veer_hist_create(&m->scratch);
    for (int s = 0; s < VEER__ACT_STAGE_COUNT && rc == 0; s++) {
        rc = veer_hist_create(&m->stage[s].cumulative);
        for (int k = 0; k < RECENT_SLOTS && rc == 0; k++)
            rc = veer_hist_create(&m->stage[s].recent[k]);
    }
    for (int c = 0; c < VEER__ACT_CHANNEL_HISTS && rc == 0; c++)
        rc = veer_hist_create(&m->channel[c]);
    veer_drift *drift = cfg->act ? veer__act_drift(cfg->act) : NULL;
    if (rc == 0 && drift != NULL)
        rc = veer_drift_report_create(drift, &m->drift);
    if (rc == 0 && drift != NULL) {
        m->channel_slots = veer__channels_capacity(cfg->store->channels);
        m->channel_drift = veer__calloc(m->channel_slots, sizeof *m->channel_drift);
        m->have_channel = veer__calloc(m->channel_slots, 1);
        if (m->channel_drift == NULL || m->have_channel == NULL)
            rc = VEER_ENOMEM;
    }
    if (rc != 0) {
        veer__metrics_destroy(m);
        return VEER_ENOMEM;
    }
    *out = m;
    return 0;
}

void veer__metrics_destroy(veer__metrics *m)
{
    if (m == NULL)
        return;
    for (int s = 0; s < VEER__ACT_STAGE_COUNT; s++) {
        veer_hist_destroy(m->stage[s].cumulative);
        for (int k = 0; k < RECENT_SLOTS; k++)
            veer_hist_destroy(m->stage[s].recent[k]);
    }
    for (int c = 0; c < VEER__ACT_CHANNEL_HISTS; c++)
        veer_hist_destroy(m->channel[c]);
    veer_hist_destroy(m->scratch);
    veer_drift_report_destroy(m->drift);
    for (uint32_t i = 0; m->channel_drift != NULL && i < m->channel_slots; i++)
        veer_drift_report_destroy(m->channel_drift[i]);
    veer__free(m->channel_drift);
    veer__free(m->have_channel);
    veer__free(m);
}

/* Moves what the act thread recorded since the last take into the cumulative histogram and
 * the current recent slot. */
static void take_intervals(veer__metrics *m)
{
    if (m->cfg.act == NULL)
        return;
    for (int s = 0; s < VEER__ACT_STAGE_COUNT; s++) {
        veer_hist_recorder *r = veer__act_stage(m->cfg.act, (veer__act_stage_id)s);
        if (r == NULL)
            continue;
        veer_hist_reset(m->scratch);
        veer_hist_recorder_take(r, m->scratch);
        veer_hist_merge(m->stage[s].cumulative, m->scratch);
        veer_hist_merge(m->stage[s].recent[m->slot], m->scratch);
    }
    for (uint32_t c = 0; c < VEER__ACT_CHANNEL_HISTS; c++) {
        veer__channel *ch;
        veer_hist_recorder *r = veer__act_channel_latency(m->cfg.act, c, &ch);
        if (r != NULL)
            veer_hist_recorder_take(r, m->channel[c]);
    }
}

void veer__metrics_tick(veer__metrics *m)
{
    take_intervals(m);
    m->slot = (m->slot + 1) % RECENT_SLOTS;
    for (int s = 0; s < VEER__ACT_STAGE_COUNT; s++)
        veer_hist_reset(m->stage[s].recent[m->slot]);
}

void veer__metrics_label_value(veer__http_response *resp, const char *value)
{
    const char *run = value;
    for (const char *p = value; *p; p++) {
        const char *esc = *p == '\\' ? "\\\\" : *p == '"' ? "\\\"" : *p == '\n' ? "\\n" : NULL;
        if (esc == NULL)
            continue;
        veer__http_body_append(resp, run, (size_t)(p - run));
        veer__http_body_append(resp, esc, 2);
        run = p + 1;
    }
    veer__http_body_append(resp, run, strlen(run));
}

static void family(veer__http_response *r, const char *name, const char *type, const char *help)
{
    veer__http_body_printf(r, "# HELP %s %s\n# TYPE %s %s\n", name, help, name, type);
}

/* A sample's name with one optional label: name{label="value"}. */
static void sample_name(veer__http_response *r, const char *name, const char *label,
                        const char *value)
{
    veer__http_body_printf(r, "%s", name);
    if (label != NULL) {
        veer__http_body_printf(r, "{%s=\"", label);
        veer__metrics_label_value(r, value);
        veer__http_body_append(r, "\"}", 2);
    }
}

/* One sample: name{label="value"} number. `label` NULL for none. */
static void sample1(veer__http_response *r, const char *name, const char *label, const char *value,
                    double v)
{
    sample_name(r, name, label, value);
    if (isnan(v))
        veer__http_body_printf(r, " NaN\n");
    else if (isinf(v))
        veer__http_body_printf(r, " %sInf\n", v > 0 ? "+" : "-");
    else
        veer__http_body_printf(r, " %.17g\n", v);
}

static void counter_u64(veer__http_response *r, const char *name, const char *label,
                        const char *value, uint64_t v)
{
    sample_name(r, name, label, value);
    veer__http_body_printf(r, " %llu\n", (unsigned long long)v);
}

static void render_counters(veer__metrics *m, const veer__metrics_extra *extra,
                            veer__http_response *r)
{
    veer__act_counters c = {0};
    if (m->cfg.act != NULL)
        veer__act_counters_get(m->cfg.act, &c);
    family(r, "veer_acts_total", "counter",
           "Act requests answered with an action (policy or fallback).");
    counter_u64(r, "veer_acts_total", NULL, NULL, c.acts);
    family(r, "veer_act_fallbacks_total", "counter",
           "Act replies that carried the fallback action.");
    counter_u64(r, "veer_act_fallbacks_total", NULL, NULL, c.fallbacks);
    family(r, "veer_act_deadline_misses_total", "counter",
           "Act replies that got the fallback action because the deadline could not be or was not "
           "met.");
    counter_u64(r, "veer_act_deadline_misses_total", NULL, NULL, c.deadline_misses);
    family(r, "veer_act_no_task_total", "counter",
           "Act requests on a channel without an active task.");
    counter_u64(r, "veer_act_no_task_total", NULL, NULL, c.no_task);
    family(r, "veer_act_policy_passes_total", "counter",
           "Evaluations of the policy networks; with --act-batch above 1 one pass can answer "
           "several acts.");
    counter_u64(r, "veer_act_policy_passes_total", NULL, NULL, c.policy_passes);
    family(r, "veer_act_policy_states_total", "counter",
           "States evaluated by those passes (divided by the passes: the mean batch).");
    counter_u64(r, "veer_act_policy_states_total", NULL, NULL, c.policy_states);
    family(r, "veer_act_errors_total", "counter",
           "Error replies on the act socket, by error code.");
    for (int code = 1; code < (int)VEER__ACT_ERROR_CODES && m->cfg.act != NULL; code++) {
        uint64_t n = veer__act_errors_by_code(m->cfg.act, -code);
        if (n != 0)
            counter_u64(r, "veer_act_errors_total", "code", veer_errname(-code), n);
    }
    family(
        r, "veer_drift_states_dropped_total", "counter",
        "Act states the drift monitor did not see because its updates fell a whole ring behind.");
    counter_u64(r, "veer_drift_states_dropped_total", NULL, NULL,
                m->cfg.act ? veer__act_states_dropped(m->cfg.act) : 0);
    family(r, "veer_deadline_bursts_total", "counter",
           "Bursts of deadline misses announced on the events socket.");
    counter_u64(r, "veer_deadline_bursts_total", NULL, NULL, extra ? extra->deadline_bursts : 0);
    family(r, "veer_http_requests_total", "counter", "Requests answered by this HTTP endpoint.");
    counter_u64(r, "veer_http_requests_total", NULL, NULL, extra ? extra->http_requests : 0);
}

static void render_channels(veer__metrics *m, veer__http_response *r)
{
    veer__channels *chs = m->cfg.store->channels;
    uint64_t switches = 0;
    for (uint32_t i = 0; i < veer__channels_capacity(chs); i++) {
        veer__channel *ch = veer__channels_slot(chs, i);
        if (ch != NULL)
            switches += ch->epoch;
    }
    family(r, "veer_switches_total", "counter",
           "Channel switches over the journal's life (the sum of every channel's epoch).");
    counter_u64(r, "veer_switches_total", NULL, NULL, switches);
    family(r, "veer_channel_switches_total", "counter", "Switches of one channel: its epoch.");
    for (uint32_t i = 0; i < veer__channels_capacity(chs); i++) {
        veer__channel *ch = veer__channels_slot(chs, i);
        if (ch != NULL)
            counter_u64(r, "veer_channel_switches_total", "channel", ch->name, ch->epoch);
    }
    family(r, "veer_channel_acts_total", "counter",
           "Act requests answered on one channel since start.");
    for (uint32_t i = 0; i < veer__channels_capacity(chs); i++) {
        veer__channel *ch = veer__channels_slot(chs, i);
        if (ch != NULL)
            counter_u64(r, "veer_channel_acts_total", "channel", ch->name,
                        atomic_load_explicit(&ch->acts, memory_order_relaxed));
    }
    family(r, "veer_channel_task", "gauge", "1 for the task active on each channel.");
    for (uint32_t i = 0; i < veer__channels_capacity(chs); i++) {
        veer__channel *ch = veer__channels_slot(chs, i);
        if (ch == NULL)
            continue;
        /* The loop thread is the only one that switches and frees tasks, so this read is safe. */
        const veer__active_task *t = atomic_load_explicit(&ch->active, memory_order_acquire);
        veer__http_body_printf(r, "veer_channel_task{channel=\"");
        veer__metrics_label_value(r, ch->name);
        veer__http_body_printf(r, "\",task=\"");
        veer__metrics_label_value(r, t ? t->task : "");
        veer__http_body_printf(r, "\"} 1\n");
    }

    uint64_t state[3] = {0};
    veer__registry *reg = m->cfg.store->registry;
    for (uint32_t i = 0; i < veer__registry_count(reg); i++) {
        const veer__task *t = veer__registry_at(reg, i);
        state[t->content->state <= VEER__CONTENT_FAILED ? t->content->state
                                                        : VEER__CONTENT_FAILED]++;
    }
    family(r, "veer_tasks", "gauge", "Tasks in the registry by encoding state.");
    counter_u64(r, "veer_tasks", "state", "pending", state[VEER__CONTENT_PENDING]);
    counter_u64(r, "veer_tasks", "state", "encoded", state[VEER__CONTENT_ENCODED]);
    counter_u64(r, "veer_tasks", "state", "failed", state[VEER__CONTENT_FAILED]);
}

/* 1, 2, 5 x 10^k ns from 1 µs to 50 s. */
static int bucket_bounds(uint64_t *out)
{
    int n = 0;
    for (uint64_t decade = 1000; decade <= 10000000000ull; decade *= 10) {
        out[n++] = decade;
        out[n++] = 2 * decade;
        out[n++] = 5 * decade;
    }
    return n;
}

/* One histogram's samples: cumulative buckets at `bounds` (ns), +Inf, _sum and _count, all with
 * the label key="value". */
static void histogram(veer__http_response *r, const char *name, const char *key, const char *value,
                      const veer_hist *h, const uint64_t *bounds, int nb)
{
    uint64_t count = veer_hist_count(h);
    for (int b = 0; b <= nb; b++) {
        veer__http_body_printf(r, "%s_bucket{%s=\"", name, key);
        veer__metrics_label_value(r, value);
        if (b < nb)
            veer__http_body_printf(r, "\",le=\"%.9g\"} %llu\n", (double)bounds[b] * 1e-9,
                                   (unsigned long long)veer_hist_count_le(h, bounds[b]));
        else
            veer__http_body_printf(r, "\",le=\"+Inf\"} %llu\n", (unsigned long long)count);
    }
    veer__http_body_printf(r, "%s_sum{%s=\"", name, key);
    veer__metrics_label_value(r, value);
    veer__http_body_printf(r, "\"} %.17g\n%s_count{%s=\"", (double)veer_hist_sum(h) * 1e-9, name,
                           key);
    veer__metrics_label_value(r, value);
    veer__http_body_printf(r, "\"} %llu\n", (unsigned long long)count);
}

static void render_latency(veer__metrics *m, veer__http_response *r)
{
    uint64_t bounds[32];
    int nb = bucket_bounds(bounds);
    family(r, "veer_act_stage_seconds", "histogram",
           "Time per stage of act requests since start (decode, policy, reply, total).");
    for (int s = 0; s < VEER__ACT_STAGE_COUNT && !m->cfg.monitors_off; s++)
        histogram(r, "veer_act_stage_seconds", "stage", STAGE_NAMES[s], m->stage[s].cumulative,
                  bounds, nb);
    family(r, "veer_channel_act_seconds", "histogram",
           "Total time of act requests per channel since start (the first 16 channels that act).");
    for (uint32_t c = 0; c < VEER__ACT_CHANNEL_HISTS && m->cfg.act != NULL; c++) {
        veer__channel *ch;
        if (veer__act_channel_latency(m->cfg.act, c, &ch) != NULL)
            histogram(r, "veer_channel_act_seconds", "channel", ch->name, m->channel[c], bounds,
                      nb);
    }

    family(r, "veer_act_stage_recent_seconds", "gauge",
           "Percentiles per stage over the last 10 seconds (quantile 1 is the maximum); absent "
           "when nothing "
           "was recorded.");
    static const double quantiles[] = {0.5, 0.9, 0.99, 0.999, 1.0};
    uint64_t recent_count[VEER__ACT_STAGE_COUNT] = {0};
    for (int s = 0; s < VEER__ACT_STAGE_COUNT && !m->cfg.monitors_off; s++) {
        veer_hist_reset(m->scratch);
        for (int k = 0; k < RECENT_SLOTS; k++)
            veer_hist_merge(m->scratch, m->stage[s].recent[k]);
        recent_count[s] = veer_hist_count(m->scratch);
        for (size_t q = 0; q < sizeof quantiles / sizeof quantiles[0]; q++) {
            uint64_t v;
            if (veer_hist_percentile(m->scratch, 100.0 * quantiles[q], &v) != 0)
                break;
            veer__http_body_printf(
                r, "veer_act_stage_recent_seconds{stage=\"%s\",quantile=\"%g\"} %.9g\n",
                STAGE_NAMES[s], quantiles[q], (double)v * 1e-9);
        }
    }
    family(r, "veer_act_stage_recent_count", "gauge",
           "Requests recorded per stage over the last 10 seconds.");
    for (int s = 0; s < VEER__ACT_STAGE_COUNT && !m->cfg.monitors_off; s++)
        veer__http_body_printf(r, "veer_act_stage_recent_count{stage=\"%s\"} %llu\n",
                               STAGE_NAMES[s], (unsigned long long)recent_count[s]);
}

/* One drift sample: name{scope="service"[,feature="..."]} for the whole service (channel NULL),
 * name{scope="channel",channel="...",[,feature="..."]} for one channel. */
static void drift_sample(veer__http_response *r, const char *name, const char *channel,
                         const char *feature, double v)
{
    if (channel == NULL) {
        veer__http_body_printf(r, "%s{scope=\"service\"", name);
    } else {
        veer__http_body_printf(r, "%s{scope=\"channel\",channel=\"", name);
        veer__metrics_label_value(r, channel);
        veer__http_body_append(r, "\"", 1);
    }
    if (feature != NULL) {
        veer__http_body_printf(r, ",feature=\"");
        veer__metrics_label_value(r, feature);
        veer__http_body_append(r, "\"", 1);
    }
    veer__http_body_printf(r, "} %.17g\n", v);
}

/* The samples of family number f (the table in render_drift) from one report. */
static void drift_family(veer__http_response *r, const char *name, size_t f,
                         const veer_drift_report *d, const char *channel,
                         const char *const *names)
{
    switch (f) {
    case 0:
        drift_sample(r, name, channel, NULL, d->fill);
        break;
    case 1:
        drift_sample(r, name, channel, NULL, d->window);
        break;
    case 2:
        drift_sample(r, name, channel, NULL, (double)d->states_total);
        break;
    case 3:
        drift_sample(r, name, channel, NULL, (double)d->out_of_coverage_total);
        break;
    case 4:
        drift_sample(r, name, channel, NULL, d->out_of_coverage_window);
        break;
    case 5:
        for (uint32_t i = 0; i < d->state_dim; i++)
            drift_sample(r, name, channel, names[i], d->psi[i]);
        break;
    case 6:
        for (uint32_t i = 0; i < d->state_dim; i++)
            drift_sample(r, name, channel, names[i], d->mean_shift[i]);
        break;
    case 7:
        for (uint32_t i = 0; i < d->state_dim; i++)
            drift_sample(r, name, channel, names[i], (double)d->psi_level[i]);
        break;
    case 8:
        drift_sample(r, name, channel, NULL, d->psi_max);
        break;
    case 9:
        drift_sample(r, name, channel, NULL, (double)d->psi_overall);
        break;
    case 10:
        drift_sample(r, name, channel, NULL, d->exceed_rate);
        break;
    case 11:
        drift_sample(r, name, channel, NULL, (double)d->exceed_level);
        break;
    case 12:
        drift_sample(r, name, channel, NULL, (double)d->level);
        break;
    }
}

/* Snapshots the per-channel monitors into their reports; marks which ones have one. */
static void snapshot_channels(veer__metrics *m)
{
    for (uint32_t i = 0; i < m->channel_slots; i++) {
        veer_drift *drift = veer__act_channel_drift(m->cfg.act, i);
        m->have_channel[i] = 0;
        if (drift == NULL || veer__channels_slot(m->cfg.store->channels, i) == NULL)
            continue;
        if (m->channel_drift[i] == NULL && veer_drift_report_create(drift, &m->channel_drift[i]) != 0)
            continue; /* no memory: this channel's series are missing from this scrape */
        m->have_channel[i] = veer_drift_snapshot(drift, m->channel_drift[i]) == 0;
    }
}

static void render_drift(veer__metrics *m, veer__http_response *r)
{
    veer_drift *drift = m->cfg.act ? veer__act_drift(m->cfg.act) : NULL;
    veer_drift_report *d = m->drift;
    int have = drift != NULL && d != NULL && veer_drift_snapshot(drift, d) == 0;
    if (have)
        snapshot_channels(m);
    const char *const *names = m->cfg.store->info->feature_names;
    struct {
        const char *name, *type, *help;
    } const fam[] = {
        {"veer_drift_window_states", "gauge",
         "States in the drift window (it is full at veer_drift_window_size)."},
        {"veer_drift_window_size", "gauge", "Configured size of the drift window."},
        {"veer_drift_states_total", "counter", "States the drift monitor has taken."},
        {"veer_drift_out_of_coverage_total", "counter",
         "States beyond the training 99.9th percentile distance."},
        {"veer_drift_out_of_coverage_window", "gauge",
         "Of the window's states, those beyond the training p99.9."},
        {"veer_drift_psi", "gauge",
         "Population Stability Index of each feature over the training quantile bins."},
        {"veer_drift_mean_shift", "gauge",
         "(window mean - training mean) / training std, per feature."},
        {"veer_drift_psi_level", "gauge", "PSI level per feature: 0 ok, 1 watch, 2 alarm."},
        {"veer_drift_psi_max", "gauge", "The largest feature PSI."},
        {"veer_drift_psi_overall_level", "gauge",
         "The highest feature PSI level: 0 ok, 1 watch, 2 alarm."},
        {"veer_drift_exceed_rate", "gauge",
         "Share of window states beyond the training 99th percentile Mahalanobis distance (about "
         "0.01)."},
        {"veer_drift_exceed_level", "gauge", "Exceedance level: 0 ok, 2 alarm."},
        {"veer_drift_level", "gauge", "Overall drift level: 0 ok, 1 watch, 2 alarm."},
    };
    for (size_t f = 0; f < sizeof fam / sizeof fam[0]; f++) {
        family(r, fam[f].name, fam[f].type, fam[f].help);
        if (!have)
            continue;
        drift_family(r, fam[f].name, f, d, NULL, names);
        for (uint32_t i = 0; i < m->channel_slots; i++)
            if (m->have_channel[i])
                drift_family(r, fam[f].name, f, m->channel_drift[i],
                             veer__channels_slot(m->cfg.store->channels, i)->name, names);
    }
}

int veer__metrics_ready(veer__metrics *m, char *reason, size_t cap)
{
    veer__registry *reg = m->cfg.store->registry;
    uint32_t pending = 0;
    const char *failed = NULL;
    for (uint32_t i = 0; i < veer__registry_count(reg); i++) {
        const veer__task *t = veer__registry_at(reg, i);
        if (t->content->state == VEER__CONTENT_PENDING)
            pending++;
        else if (t->content->state == VEER__CONTENT_FAILED && failed == NULL)
            failed = t->name;
    }
    if (m->cfg.act == NULL) {
        snprintf(reason, cap, "the act thread is not running");
        return 0;
    }
    if (failed != NULL) {
        snprintf(reason, cap,
                 "task '%s' cannot be encoded against the loaded model; drop it or load a model "
                 "that can",
                 failed);
        return 0;
    }
    if (pending != 0) {
        snprintf(reason, cap, "%u task(s) are being encoded", pending);
        return 0;
    }
    snprintf(reason, cap, "model '%s' loaded; %u task(s) encoded",
             m->cfg.store->info->model_version, veer__registry_count(reg));
    return 1;
}

void veer__metrics_render(veer__metrics *m, const veer__metrics_extra *extra,
                          veer__http_response *r)
{
    take_intervals(m);
    r->content_type = "text/plain; version=0.0.4; charset=utf-8";
    char reason[256];
    int ready = veer__metrics_ready(m, reason, sizeof reason);
    family(r, "veer_info", "gauge",
           "Constant 1, labelled with veerd's version and the loaded model.");
    veer__http_body_printf(r, "veer_info{version=\"");
    veer__metrics_label_value(r, m->cfg.version ? m->cfg.version : "");
    veer__http_body_printf(r, "\",model_version=\"");
    veer__metrics_label_value(r, m->cfg.store->info->model_version);
    veer__http_body_printf(r, "\",monitors=\"%s\"} 1\n", m->cfg.monitors_off ? "off" : "on");
    family(r, "veer_ready", "gauge",
           "1 when the model is loaded and every task is encoded (as /readyz).");
    sample1(r, "veer_ready", NULL, NULL, ready);
    render_counters(m, extra, r);
    render_channels(m, r);
    render_latency(m, r);
    render_drift(m, r);
}
