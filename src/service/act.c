/* The act thread (see act.h for the contract).
 *
 * Each wake-up serves a batch in three phases: take the request that woke the thread and up to
 * batch_max - 1 more already queued (never waiting for one), decode and check them all and
 * answer those that need no policy, run the policy once over the states that do (veer_act_each,
 * a task vector per state), then answer those. With batch_max 1, the default, that is one request at a time. A
 * batch helps when controllers tick in phase: for a discrete model one pass over 4 states costs
 * about half of 4 single acts, and the last of four requests no longer waits for three passes.
 *
 * Memory is sized once in veer__act_start from the model and batch_max: the decoding arena (16
 * bytes of arena per byte of the largest request, per slot: room for protobuf-c's structs and
 * unknown-field records), the reply buffer (the largest Reply an Act or Describe can produce,
 * plus an Error), the batch's state, task, action, value and flag rows, the workspace (and the
 * helpers' workspaces under --act-threads). The running p99 of policy time comes from two
 * alternating windows of the monitor's log-linear histogram: the estimate is the p99 of the
 * last full window of 1024 policy evaluations (one per batch), so it follows load changes
 * within about a second at 1 kHz and costs one histogram record per evaluation plus one
 * percentile scan per window. */
#include "service/act.h"

#include <errno.h>
#include <math.h>
#include <pthread.h>
#include <sched.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "service/act_split.h"
#include "service/arena.h"
#include "service/auth.h"
#include "service/log.h"
#include "service/rt.h"
#include "service/state_ring.h"
#include "service/wire.h"
#include "veer/drift.h"
#include "veer/histogram.h"

#define ACT_RECV_TIMEOUT_MS 50 /* how often an idle thread checks for stop and announces quiescence */
#define POLICY_WINDOW 1024u
/* While the estimate predicts that every act would be late, one request in PROBE_EVERY still
 * runs the policy. Without these probes no policy time would ever be recorded again and a
 * passing spike of load would latch the channel into the fallback for good. */
#define PROBE_EVERY 32u
#define ACT_STATE_RING 8192u /* states buffered for the drift monitor: 0.8 s at 10 kHz between drains */
#define ACT_DRAIN_MAX_NS 2000000000ull /* at most 2 s answering queued acts when stopping */

/* One request taken off the socket, carried through the three phases of serve_batch. */
typedef enum slot_kind { SLOT_ERROR, SLOT_DESCRIBE, SLOT_ACT } slot_kind;

typedef struct act_slot {
    veer__wire_msg msg;
    uint64_t t0; /* when it left the socket */
    uint64_t id;
    slot_kind kind;
    veer_error err;                  /* SLOT_ERROR: what the reply says */
    const Veer__Wire__ActRequest *q; /* SLOT_ACT, in the arena: */
    veer__channel *ch;               /* NULL: not in the channel table */
    const veer__active_task *task;   /* NULL: no task, the fallback answers */
    uint64_t deadline_ns;
    uint32_t coverage; /* VEER_ACT_OUT_OF_COVERAGE or 0 */
    uint32_t flags;    /* when settled without the policy */
    int predicted_late;
    int row; /* its row in the batch arrays, -1 when the policy does not run for it */
} act_slot;

struct veer__act {
    veer__act_config cfg;
    const veer_model_info *info;
    void *socket;
    pthread_t thread;
    int thread_started;
    atomic_int stop;

    veer_workspace *ws;
    veer__act_split *split; /* NULL: the pass runs on this thread alone */
    veer__arena arena; /* room for batch_max requests; reset after each batch */
    act_slot *slots;   /* batch_max */
    uint32_t batch_max;
    uint32_t batch_rows;                 /* states queued for this batch's evaluation */
    float *batch_states, *batch_zs;      /* batch_max x state_dim, batch_max x z_dim */
    float *batch_actions, *batch_values; /* batch_max x action_dim, batch_max */
    uint32_t *batch_flags;
    uint8_t *reply_buf;
    size_t reply_cap;
    char **feature_scratch;

    veer_hist *window[2];
    int current;
    uint32_t in_window;
    uint64_t policy_p99_ns; /* 0 until the first window is full */
    uint32_t predicted_late_in_row; /* acts sent to the fallback by the estimate since a probe */
    veer_drift *drift;      /* NULL without training statistics; its writer is the loop thread */
    veer__state_ring states; /* act states, tagged with their channel's slot, on their way to the
                                drift monitors */
    /* Per-channel drift monitors, indexed by channel slot; made by the loop thread (the drain)
     * on a channel's first state. The act thread never touches them. */
    veer_drift **channel_drift;
    uint32_t channel_drift_cap; /* the channel table's capacity */
    int channel_drift_failed;   /* a creation failed: memory is short, make no more (the channel
                                   shows no drift series; its states still count for the service) */
    veer_drift_training train;
    veer_drift_config drift_cfg;
    veer_hist_recorder *stage[VEER__ACT_STAGE_COUNT]; /* all NULL with monitors off */
    veer_hist_recorder *channel_latency[VEER__ACT_CHANNEL_HISTS]; /* NULL with monitors off */
    _Atomic(veer__channel *) channel_bound[VEER__ACT_CHANNEL_HISTS]; /* published on first use */

    _Atomic uint64_t acts, fallbacks, deadline_misses, errors, no_task;
    _Atomic uint64_t policy_passes, policy_states; /* evaluations and the states they covered */
    _Atomic uint64_t errors_by_code[VEER__ACT_ERROR_CODES];
};

static void count(_Atomic uint64_t *c) { atomic_fetch_add_explicit(c, 1, memory_order_relaxed); }

static void record_policy_time(veer__act *a, uint64_t ns)
{
    veer_hist_record(a->window[a->current], ns);
    if (++a->in_window < POLICY_WINDOW)
        return;
    uint64_t p99 = 0;
    double pct = a->cfg.deadline_percentile ? (double)a->cfg.deadline_percentile : 99.0;
    if (veer_hist_percentile(a->window[a->current], pct, &p99) == 0)
        a->policy_p99_ns = p99;
    a->current ^= 1;
    veer_hist_reset(a->window[a->current]);
    a->in_window = 0;
}

/* Records into the channel's recorder, binding a free one on the channel's first act. Only this
 * thread binds, so a scan of a few pointers is all it takes; the release store publishes the
 * binding to the metrics reader. */
static void record_channel(veer__act *a, veer__channel *ch, uint64_t ns)
{
    for (uint32_t i = 0; i < VEER__ACT_CHANNEL_HISTS; i++) {
        veer__channel *bound = atomic_load_explicit(&a->channel_bound[i], memory_order_relaxed);
        if (bound == NULL)
            atomic_store_explicit(&a->channel_bound[i], bound = ch, memory_order_release);
        if (bound == ch) {
            veer_hist_recorder_record(a->channel_latency[i], ns);
            return;
        }
    }
}

static size_t pack_reply(veer__act *a, Veer__Wire__Reply *r)
{
    if (veer__wire__reply__get_packed_size(r) > a->reply_cap)
        return 0;
    return veer__wire__reply__pack(r, a->reply_buf);
}

static size_t error_reply(veer__act *a, uint64_t id, const veer_error *err)
{
    count(&a->errors);
    if (err->code < 0 && -err->code < (int)VEER__ACT_ERROR_CODES)
        count(&a->errors_by_code[-err->code]);
    return veer__wire_pack_error(id, err, a->reply_buf, a->reply_cap);
}

/* Phase 1 for an act request: checks it, looks up its channel and task, feeds the drift
 * monitor, and either queues its state for the batch evaluation or settles it without the
 * policy (no task, or predicted to finish late). */
static void take_act(veer__act *a, act_slot *s)
{
    const veer_model_info *info = a->info;
    const Veer__Wire__ActRequest *q = s->q;
    if (q->channel == NULL || q->channel[0] == '\0') {
        veer__error_set(&s->err, VEER_EFIELD, "act.channel", "the channel name is empty");
        s->kind = SLOT_ERROR;
        return;
    }
    if (strlen(q->channel) >= VEER__CHANNEL_NAME_MAX) {
        veer__error_set(&s->err, VEER_EFIELD, "act.channel", "channel names are at most %d bytes",
                        VEER__CHANNEL_NAME_MAX - 1);
        s->kind = SLOT_ERROR;
        return;
    }
    if (q->n_state != info->state_dim) {
        veer__error_set(&s->err, VEER_EDIM, "act.state",
                        "the state has %zu values; the model reads %u", q->n_state,
                        info->state_dim);
        s->kind = SLOT_ERROR;
        return;
    }
    for (size_t i = 0; i < q->n_state; i++) {
        if (!isfinite(q->state[i])) {
            char field[64];
            snprintf(field, sizeof field, "act.state[%zu]", i);
            veer__error_set(&s->err, VEER_ENONFINITE, field, "state[%zu] (%s) is %s", i,
                            info->feature_names[i], isnan(q->state[i]) ? "NaN" : "infinite");
            s->kind = SLOT_ERROR;
            return;
        }
    }

    s->ch = veer__channels_find(a->cfg.channels, q->channel);
    if (a->drift != NULL) {
        /* Only the distance test runs here; the window statistics are updated by the loop thread
         * from the ring (veer__act_drain_states), so their cost stays off the act path. The
         * channel travels as its slot number: one 4-byte store. A channel not in the table yet
         * (nobody switched it) counts for the whole service only. */
        if (veer_drift_check(a->drift, q->state, NULL) == 1)
            s->coverage = VEER_ACT_OUT_OF_COVERAGE;
        veer__state_ring_push_tagged(&a->states, q->state,
                                     s->ch != NULL ? veer__channels_index(a->cfg.channels, s->ch)
                                                   : VEER__STATE_RING_NO_TAG);
    }

    uint32_t deadline_us = q->deadline_us ? q->deadline_us : a->cfg.default_deadline_us;
    s->deadline_ns = (uint64_t)deadline_us * 1000u;
    s->task = s->ch ? atomic_load_explicit(&s->ch->active, memory_order_seq_cst) : NULL;
    if (s->task == NULL) {
        s->flags = VEER_ACT_FALLBACK | VEER_ACT_NO_TASK;
        count(&a->no_task);
        return;
    }
    s->predicted_late = veer__now_ns() - s->t0 + a->policy_p99_ns > s->deadline_ns;
    if (s->predicted_late && ++a->predicted_late_in_row < PROBE_EVERY) {
        /* The reply must leave before the deadline, so a request that cannot make it gets the
         * fallback now rather than a fresh action too late. */
        s->flags = VEER_ACT_FALLBACK | VEER_ACT_DEADLINE;
        return;
    }
    a->predicted_late_in_row = 0;
    s->row = (int)a->batch_rows++;
    memcpy(a->batch_states + (size_t)s->row * info->state_dim, q->state,
           info->state_dim * sizeof(float));
    memcpy(a->batch_zs + (size_t)s->row * info->z_dim, s->task->z, info->z_dim * sizeof(float));
}

/* Phase 1: decodes the request in slot s and sorts it into an error, a describe or an act. */
static void take(veer__act *a, act_slot *s)
{
    size_t len = 0;
    const uint8_t *payload = veer__wire_payload(&s->msg, &len);
    Veer__Wire__Request *req = NULL;
    s->kind = SLOT_ERROR;
    s->id = 0;
    s->ch = NULL;
    s->task = NULL;
    s->coverage = s->flags = 0;
    s->predicted_late = 0;
    s->row = -1;

    /* Unpacked before the checks below so that the decode stage is timed on its own. */
    if (!s->msg.overflow && len <= a->cfg.max_message_bytes) {
        req = veer__wire__request__unpack(&a->arena.allocator, len, payload);
        if (a->stage[VEER__ACT_STAGE_DECODE] != NULL)
            veer_hist_recorder_record(a->stage[VEER__ACT_STAGE_DECODE], veer__now_ns() - s->t0);
    }
    if (s->msg.overflow) {
        veer__error_set(&s->err, VEER_EBADMSG, "request",
                        "a request is one frame after the routing frames");
    } else if (len > a->cfg.max_message_bytes) {
        veer__error_set(&s->err, VEER_EMSGSIZE, "request",
                        "the request has %zu bytes; the act socket takes at most %u", len,
                        a->cfg.max_message_bytes);
    } else if (req == NULL) {
        veer__error_set(&s->err, VEER_EBADMSG, "request",
                        "%zu bytes that do not decode as a veer.wire.Request", len);
    } else if ((s->id = req->id, req->protocol != VEER__PROTOCOL)) {
        veer__error_set(&s->err, VEER_EPROTOCOL, "protocol",
                        "protocol %u is not spoken here; veerd speaks %d", req->protocol,
                        VEER__PROTOCOL);
    } else if (req->body_case == VEER__WIRE__REQUEST__BODY_ACT) {
        s->kind = SLOT_ACT;
        s->q = req->act;
        take_act(a, s);
    } else if (req->body_case == VEER__WIRE__REQUEST__BODY_DESCRIBE) {
        s->kind = SLOT_DESCRIBE;
    } else if (req->body_case == VEER__WIRE__REQUEST__BODY__NOT_SET) {
        veer__error_set(&s->err, VEER_EMSGTYPE, "body",
                        "the request has no body this server knows");
    } else {
        veer__error_set(&s->err, VEER_EMSGTYPE, "body",
                        "the act socket answers act and describe; send task and channel requests "
                        "to the admin socket");
    }
}

/* Phase 2: one policy evaluation for every state queued in phase 1. */
static void evaluate(veer__act *a, act_slot *slots, uint32_t n)
{
    uint32_t rows = a->batch_rows;
    if (rows == 0)
        return;
    int probe = 0;
    for (uint32_t i = 0; i < n; i++)
        probe |= slots[i].row >= 0 && slots[i].predicted_late;
    veer__act_rows batch = {.n = rows,
                            .states = a->batch_states,
                            .zs = a->batch_zs,
                            .actions = a->batch_actions,
                            .values = a->batch_values,
                            .flags = a->batch_flags};
    uint64_t t1 = veer__now_ns();
    if (a->split != NULL)
        veer__act_split_run(a->split, a->ws, &batch);
    else
        veer__act_rows_eval(a->info, a->ws, &batch);
    uint64_t t2 = veer__now_ns();
    count(&a->policy_passes);
    atomic_fetch_add_explicit(&a->policy_states, rows, memory_order_relaxed);
    record_policy_time(a, t2 - t1);
    /* A probe faster than the estimate means the load has passed: believe it at once, and let
     * the next full window set a proper percentile again. */
    if (probe && t2 - t1 < a->policy_p99_ns)
        a->policy_p99_ns = t2 - t1;
    if (a->stage[VEER__ACT_STAGE_POLICY] != NULL)
        veer_hist_recorder_record(a->stage[VEER__ACT_STAGE_POLICY], t2 - t1);
}

/* Phase 3 for an act: the action, its flags and the counters. Returns the reply size. */
static size_t reply_act(veer__act *a, act_slot *s, uint64_t now)
{
    const veer_model_info *info = a->info;
    Veer__Wire__ActReply ar = VEER__WIRE__ACT_REPLY__INIT;
    ar.seq = s->q->seq;
    ar.model_version = (char *)info->model_version;
    ar.task = s->task != NULL ? (char *)s->task->task : "";
    ar.epoch = s->task != NULL ? s->task->epoch : 0;
    const float *action = info->fallback_action;
    float value = 0.0f;
    uint32_t flags = s->flags;
    if (s->row >= 0) {
        flags = a->batch_flags[s->row];
        if (now - s->t0 > s->deadline_ns) {
            flags |= VEER_ACT_FALLBACK | VEER_ACT_DEADLINE;
        } else if (!(flags & VEER_ACT_FALLBACK)) {
            action = a->batch_actions + (size_t)s->row * info->action_dim;
            value = a->batch_values[s->row];
        }
    }
    if (flags & VEER_ACT_DEADLINE)
        count(&a->deadline_misses);
    if (flags & VEER_ACT_FALLBACK)
        count(&a->fallbacks);
    count(&a->acts);
    if (s->ch != NULL)
        atomic_fetch_add_explicit(&s->ch->acts, 1, memory_order_relaxed);

    ar.n_action = info->action_dim;
    ar.action = (float *)action;
    ar.value = value;
    /* The coverage flag warns that this action came from a policy with little data behind it;
     * a fallback action did not, so it is not flagged (the monitor still counts the state). */
    ar.flags = flags | ((flags & VEER_ACT_FALLBACK) ? 0 : s->coverage);
    ar.server_us = (uint32_t)((now - s->t0) / 1000u);
    Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;
    r.protocol = VEER__PROTOCOL;
    r.id = s->id;
    r.body_case = VEER__WIRE__REPLY__BODY_ACT;
    r.act = &ar;
    return pack_reply(a, &r);
}

/* Phase 3: packs and sends slot s's reply and records its latencies. */
static void reply(veer__act *a, act_slot *s)
{
    uint64_t reply_start = veer__now_ns();
    size_t out = 0;
    if (s->kind == SLOT_ACT) {
        out = reply_act(a, s, reply_start);
    } else if (s->kind == SLOT_DESCRIBE) {
        Veer__Wire__DescribeReply d;
        veer__wire_describe(&d, a->info, a->cfg.default_deadline_us, a->feature_scratch);
        Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;
        r.protocol = VEER__PROTOCOL;
        r.id = s->id;
        r.body_case = VEER__WIRE__REPLY__BODY_DESCRIBE;
        r.describe = &d;
        out = pack_reply(a, &r);
    } else {
        out = error_reply(a, s->id, &s->err);
    }
    if (out == 0) { /* the reply did not fit: cannot happen with the sizes computed at start */
        veer_error err;
        veer__error_set(&err, VEER_ENOMEM, "reply", "the reply does not fit the reply buffer");
        out = error_reply(a, s->id, &err);
    }
    veer__wire_send(a->socket, &s->msg, a->reply_buf, out);
    if (a->stage[VEER__ACT_STAGE_TOTAL] != NULL) {
        uint64_t t_end = veer__now_ns();
        if (s->kind == SLOT_ACT)
            veer_hist_recorder_record(a->stage[VEER__ACT_STAGE_REPLY], t_end - reply_start);
        veer_hist_recorder_record(a->stage[VEER__ACT_STAGE_TOTAL], t_end - s->t0);
        if (s->kind == SLOT_ACT && s->ch != NULL)
            record_channel(a, s->ch, t_end - s->t0);
    }
}

/* Serves the n requests in slots[0..n): decode and check them all, answer at once those that
 * need no policy (errors, describes, no task, predicted late: a fallback must not wait for
 * other requests' pass), evaluate the policy once for the rest, then answer those; each group in
 * arrival order. With --act-batch 1 this is one request at a time. */
static void serve_batch(veer__act *a, uint32_t n)
{
    a->batch_rows = 0;
    for (uint32_t i = 0; i < n; i++)
        take(a, &a->slots[i]);
    for (uint32_t i = 0; i < n; i++)
        if (a->slots[i].row < 0)
            reply(a, &a->slots[i]);
    evaluate(a, a->slots, n);
    for (uint32_t i = 0; i < n; i++)
        if (a->slots[i].row >= 0)
            reply(a, &a->slots[i]);
    veer__arena_reset(&a->arena);
}

/* Takes up to batch_max - 1 more requests that are already queued behind the one in slot 0,
 * without waiting for any. Returns how many slots are filled. */
static uint32_t gather(veer__act *a)
{
    uint32_t n = 1;
    a->slots[0].t0 = veer__now_ns();
    while (n < a->batch_max && veer__wire_recv(a->socket, &a->slots[n].msg, ZMQ_DONTWAIT) == 0)
        a->slots[n++].t0 = veer__now_ns();
    return n;
}

/* Waits for the next request. With spin_us set it first polls without sleeping, so a request
 * that arrives soon is taken without the cost of waking a sleeping thread. */
static int act_wait(veer__act *a)
{
    veer__wire_msg *m = &a->slots[0].msg;
    if (a->cfg.spin_us != 0) {
        uint64_t until = veer__now_ns() + (uint64_t)a->cfg.spin_us * 1000u;
        do {
            if (veer__wire_recv(a->socket, m, ZMQ_DONTWAIT) == 0)
                return 0;
            if (errno != EAGAIN)
                return -1;
        } while (veer__now_ns() < until && !atomic_load_explicit(&a->stop, memory_order_acquire));
    }
    return veer__wire_recv(a->socket, m, 0);
}

static void *act_main(void *arg)
{
    veer__act *a = arg;
    if (a->cfg.pin) {
        /* The CPU was checked at start, so this does not fail in practice; if it did, serving
         * unpinned beats not serving. */
        veer_error err;
        if (veer__rt_pin_self(a->cfg.cpu, &err) != 0)
            veer__log_warn("%s", err.message);
    }
    for (;;) {
        if (act_wait(a) == 0) {
            serve_batch(a, gather(a));
        } else if (errno == ETERM) {
            break;
        }
        veer__channels_quiescent(a->cfg.channels);
        if (atomic_load_explicit(&a->stop, memory_order_acquire))
            break;
    }
    /* Stopping: answer what is already queued, then go. Bounded in time, so controllers that
     * keep sending faster than the thread answers cannot hold the stop off for ever. */
    uint64_t drain_end = veer__now_ns() + ACT_DRAIN_MAX_NS;
    while (veer__now_ns() < drain_end &&
           veer__wire_recv(a->socket, &a->slots[0].msg, ZMQ_DONTWAIT) == 0) {
        serve_batch(a, gather(a));
        veer__channels_quiescent(a->cfg.channels);
    }
    veer__channels_quiescent(a->cfg.channels);
    return NULL;
}

static void act_free(veer__act *a)
{
    if (a->socket != NULL)
        zmq_close(a->socket);
    for (uint32_t i = 0; a->slots != NULL && i < a->batch_max; i++)
        veer__wire_msg_close(&a->slots[i].msg);
    veer__free(a->slots);
    veer__free(a->batch_states);
    veer__free(a->batch_zs);
    veer__free(a->batch_actions);
    veer__free(a->batch_values);
    veer__free(a->batch_flags);
    veer__act_split_stop(a->split); /* the act thread has stopped: no pass is running */
    veer_workspace_destroy(a->ws);
    veer__arena_free(&a->arena);
    veer_drift_destroy(a->drift);
    for (uint32_t i = 0; a->channel_drift != NULL && i < a->channel_drift_cap; i++)
        veer_drift_destroy(a->channel_drift[i]);
    veer__free(a->channel_drift);
    veer__state_ring_free(&a->states);
    for (int i = 0; i < VEER__ACT_STAGE_COUNT; i++)
        veer_hist_recorder_destroy(a->stage[i]);
    for (int i = 0; i < VEER__ACT_CHANNEL_HISTS; i++)
        veer_hist_recorder_destroy(a->channel_latency[i]);
    veer_hist_destroy(a->window[0]);
    veer_hist_destroy(a->window[1]);
    veer__free(a->reply_buf);
    veer__free(a->feature_scratch);
    veer__free(a);
}

int veer__act_start(const veer__act_config *cfg, veer__act **out, veer_error *err)
{
    int rc;
    veer__act *a = veer__calloc(1, sizeof *a);
    if (a == NULL)
        return veer__error_set(err, VEER_ENOMEM, "act", NULL);
    a->cfg = *cfg;
    a->info = veer_bundle_info(cfg->bundle);
    atomic_init(&a->stop, 0);
    const veer_model_info *info = a->info;
    a->batch_max = cfg->batch_max ? cfg->batch_max : 1;
    a->slots = veer__calloc(a->batch_max, sizeof *a->slots);
    if (a->slots == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, "act", "no memory for the act thread's buffers");
        goto fail;
    }
    for (uint32_t i = 0; i < a->batch_max; i++)
        veer__wire_msg_init(&a->slots[i].msg);
    size_t bm = a->batch_max;
    a->batch_states = veer__calloc(bm * info->state_dim, sizeof(float));
    a->batch_zs = veer__calloc(bm * info->z_dim, sizeof(float));
    a->batch_actions = veer__calloc(bm * info->action_dim, sizeof(float));
    a->batch_values = veer__calloc(bm, sizeof(float));
    a->batch_flags = veer__calloc(bm, sizeof(uint32_t));

    size_t names = 0;
    for (uint32_t i = 0; i < info->state_dim; i++)
        names += strlen(info->feature_names[i]) + 8;
    a->reply_cap = 1024 + VEER__WIRE_ERROR_CAP + strlen(info->model_version) + names +
                   16u * (size_t)info->action_dim + VEER__TASK_NAME_MAX;
    a->reply_buf = veer__malloc(a->reply_cap);
    a->feature_scratch = veer__calloc(info->state_dim, sizeof(char *));
    if (a->reply_buf == NULL || a->feature_scratch == NULL || a->batch_states == NULL ||
        a->batch_zs == NULL || a->batch_actions == NULL || a->batch_values == NULL ||
        a->batch_flags == NULL ||
        veer__arena_init(&a->arena, bm * (16u * (size_t)cfg->max_message_bytes + 4096)) != 0 ||
        veer_hist_create(&a->window[0]) != 0 || veer_hist_create(&a->window[1]) != 0) {
        rc = veer__error_set(err, VEER_ENOMEM, "act", "no memory for the act thread's buffers");
        goto fail;
    }
    if ((rc = veer_workspace_create(cfg->bundle, a->batch_max, &a->ws, err)) < 0)
        goto fail;
    if (cfg->threads > 1 &&
        (rc = veer__act_split_start(cfg->bundle, cfg->threads - 1, a->batch_max, cfg->spin_us,
                                    cfg->priority, &a->split, err)) < 0)
        goto fail;
    for (int i = 0; i < VEER__ACT_STAGE_COUNT + VEER__ACT_CHANNEL_HISTS && !cfg->monitors_off; i++) {
        veer_hist_recorder **r =
            i < VEER__ACT_STAGE_COUNT ? &a->stage[i] : &a->channel_latency[i - VEER__ACT_STAGE_COUNT];
        if (veer_hist_recorder_create(r) != 0) {
            rc = veer__error_set(err, VEER_ENOMEM, "act", NULL);
            goto fail;
        }
    }
    veer_drift_config_init(&a->drift_cfg);
    if (cfg->drift_window != 0)
        a->drift_cfg.window = cfg->drift_window;
    if (!cfg->monitors_off && info->has_stats && veer_drift_training_from_model(info, &a->train, NULL) == 0 &&
        (rc = veer_drift_create(&a->train, &a->drift_cfg, &a->drift, err)) < 0)
        goto fail;
    if (a->drift != NULL) {
        /* One pointer per table slot (about two per --max-channels); the monitors themselves
         * come with each channel's first state. */
        a->channel_drift_cap = veer__channels_capacity(cfg->channels);
        a->channel_drift = veer__calloc(a->channel_drift_cap, sizeof *a->channel_drift);
        if (a->channel_drift == NULL) {
            rc = veer__error_set(err, VEER_ENOMEM, "act", "no memory for the per-channel drift monitors");
            goto fail;
        }
    }
    if (a->drift != NULL && veer__state_ring_init(&a->states, info->state_dim, ACT_STATE_RING) != 0) {
        rc = veer__error_set(err, VEER_ENOMEM, "act", "no memory for the drift monitor's state ring");
        goto fail;
    }

    if ((rc = veer__wire_router(cfg->zmq_ctx, cfg->endpoint, "--act", cfg->max_message_bytes, ACT_RECV_TIMEOUT_MS,
                                cfg->server_secret_key, VEER__ZAP_ACT_DOMAIN, &a->socket, err)) < 0)
        goto fail;
    /* pthread_create is a full barrier, which is what libzmq asks for when a socket moves to
     * another thread. */
    pthread_attr_t attr;
    pthread_attr_init(&attr);
    veer__rt_attr_fifo(&attr, cfg->priority);
    int prc = pthread_create(&a->thread, &attr, act_main, a);
    pthread_attr_destroy(&attr);
    if (prc != 0) {
        rc = veer__error_set(err, prc == EPERM ? VEER_ECONFIG : VEER_EIO, "act",
                             "cannot start the act thread%s: %s",
                             cfg->priority ? " at SCHED_FIFO priority" : "", strerror(prc));
        goto fail;
    }
    a->thread_started = 1;
    *out = a;
    return 0;

fail:
    act_free(a);
    return rc;
}

void veer__act_stop(veer__act *a)
{
    if (a == NULL)
        return;
    if (a->thread_started) {
        atomic_store_explicit(&a->stop, 1, memory_order_release);
        pthread_join(a->thread, NULL);
    }
    act_free(a);
}

void veer__act_counters_get(const veer__act *a, veer__act_counters *out)
{
    veer__act *m = (veer__act *)a;
    out->acts = atomic_load_explicit(&m->acts, memory_order_relaxed);
    out->fallbacks = atomic_load_explicit(&m->fallbacks, memory_order_relaxed);
    out->deadline_misses = atomic_load_explicit(&m->deadline_misses, memory_order_relaxed);
    out->errors = atomic_load_explicit(&m->errors, memory_order_relaxed);
    out->no_task = atomic_load_explicit(&m->no_task, memory_order_relaxed);
    out->policy_passes = atomic_load_explicit(&m->policy_passes, memory_order_relaxed);
    out->policy_states = atomic_load_explicit(&m->policy_states, memory_order_relaxed);
}

struct veer_drift *veer__act_drift(veer__act *a) { return a->drift; }

/* The channel's monitor, made on its first state. The training statistics were checked when
 * the service-wide monitor was made from them, so only memory can fail here; then the channel
 * goes without (its states still count for the service). */
static veer_drift *channel_drift(veer__act *a, uint32_t slot)
{
    if (slot >= a->channel_drift_cap)
        return NULL;
    if (a->channel_drift[slot] == NULL && !a->channel_drift_failed &&
        veer_drift_create(&a->train, &a->drift_cfg, &a->channel_drift[slot], NULL) < 0) {
        a->channel_drift[slot] = NULL;
        a->channel_drift_failed = 1;
    }
    return a->channel_drift[slot];
}

uint32_t veer__act_drain_states(veer__act *a, uint32_t max)
{
    uint32_t n = 0, tag = VEER__STATE_RING_NO_TAG;
    const float *state;
    while (a->drift != NULL && n < max && (state = veer__state_ring_peek_tagged(&a->states, &tag)) != NULL) {
        veer_drift_add(a->drift, state, NULL, NULL);
        veer_drift *cd = tag != VEER__STATE_RING_NO_TAG ? channel_drift(a, tag) : NULL;
        if (cd != NULL)
            veer_drift_add(cd, state, NULL, NULL);
        veer__state_ring_release(&a->states);
        n++;
    }
    return n;
}

struct veer_drift *veer__act_channel_drift(veer__act *a, uint32_t slot)
{
    return a->drift != NULL && slot < a->channel_drift_cap ? a->channel_drift[slot] : NULL;
}

uint64_t veer__act_states_dropped(const veer__act *a)
{
    return a->drift != NULL ? atomic_load_explicit(&((veer__act *)a)->states.dropped, memory_order_relaxed) : 0;
}
struct veer_hist_recorder *veer__act_latency(veer__act *a) { return a->stage[VEER__ACT_STAGE_TOTAL]; }

struct veer_hist_recorder *veer__act_stage(veer__act *a, veer__act_stage_id stage)
{
    return stage >= 0 && stage < VEER__ACT_STAGE_COUNT ? a->stage[stage] : NULL;
}

struct veer_hist_recorder *veer__act_channel_latency(veer__act *a, uint32_t i, veer__channel **channel)
{
    *channel = NULL;
    if (i >= VEER__ACT_CHANNEL_HISTS || a->channel_latency[i] == NULL)
        return NULL;
    *channel = atomic_load_explicit(&a->channel_bound[i], memory_order_acquire);
    return *channel != NULL ? a->channel_latency[i] : NULL;
}

uint64_t veer__act_errors_by_code(const veer__act *a, int code)
{
    if (code >= 0 || -code >= (int)VEER__ACT_ERROR_CODES)
        return 0;
    return atomic_load_explicit(&((veer__act *)a)->errors_by_code[-code], memory_order_relaxed);
}
