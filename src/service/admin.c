/* The admin socket on the libuv loop (see admin.h).
 *
 * A put is answered in one of three ways: at once (bad input, a name conflict, an idempotent
 * repeat, or content another task already encoded), or after an encoding job on the worker
 * pool. A job belongs to one content (one canonical specification); every put of that content
 * that arrives while it runs is queued on it as a waiter holding the client's routing frames, and
 * all are answered when it finishes: after the journal's fdatasync on success, with the
 * encoder's error otherwise. Allocation is fine here: this is supervisor traffic. */
#include "service/admin.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "service/arena.h"
#include "service/auth.h"
#include "service/log.h"
#include "service/spec.h"
#include "service/wire.h"

typedef struct waiter {
    struct waiter *next;
    veer__wire_msg env; /* the client's routing frames, moved out of the request */
    uint64_t id;
    veer__task *task;
} waiter;

typedef struct job {
    uv_work_t work;
    struct veer__admin *admin;
    veer__content *content;
    float *z;
    veer_task_report report;
    int rc;
    veer_error err;
    waiter *waiters;
    struct job *next;
} job;

struct veer__admin {
    veer__admin_config cfg;
    veer__store *store;
    void *socket;
    uv_poll_t poll;
    int polling;
    veer__wire_msg msg;
    job *jobs;
    uint32_t pending;
    int stopping;
    void (*done)(void *);
    void *done_data;
    uint64_t started_ns;
    const char **channel_scratch; /* max channels entries */
    uint32_t channel_scratch_len;
    char **feature_scratch;
};

/* ---- Replies ---------------------------------------------------------------------------- */

static void send_reply(veer__admin *a, veer__wire_msg *env, Veer__Wire__Reply *r)
{
    r->protocol = VEER__PROTOCOL;
    size_t len = veer__wire__reply__get_packed_size(r);
    uint8_t *buf = veer__malloc(len);
    if (buf == NULL) {
        veer__log_error("admin: no memory for a %zu-byte reply; the client will time out", len);
        return;
    }
    veer__wire__reply__pack(r, buf);
    if (veer__wire_send(a->socket, env, buf, len) != 0)
        veer__log_warn("admin: a reply could not be sent (%s)", zmq_strerror(errno));
    veer__free(buf);
}

static void send_error(veer__admin *a, veer__wire_msg *env, uint64_t id, const veer_error *err)
{
    uint8_t buf[VEER__WIRE_ERROR_CAP];
    size_t len = veer__wire_pack_error(id, err, buf, sizeof buf);
    veer__wire_send(a->socket, env, buf, len);
}

static uint32_t spec_count(const Veer__Wire__TaskSpec *spec, uint32_t state_dim)
{
    switch (spec->source_case) {
    case VEER__WIRE__TASK_SPEC__SOURCE_SAMPLES:
        return (uint32_t)spec->samples->n_rewards;
    case VEER__WIRE__TASK_SPEC__SOURCE_GOALS:
        return (uint32_t)(spec->goals->n_states / (state_dim ? state_dim : 1));
    case VEER__WIRE__TASK_SPEC__SOURCE_REFERENCE:
        return (uint32_t)spec->reference->n_rewards;
    default:
        return 0;
    }
}

/* Fills `ti` for `t`; `chans` receives the active channel names (a->channel_scratch or part). */
static void task_info(veer__admin *a, veer__task *t, Veer__Wire__TaskInfo *ti, const char **chans,
                      uint32_t max_chans)
{
    const veer_model_info *info = a->store->info;
    veer__wire__task_info__init(ti);
    veer__content *c = t->content;
    ti->name = t->name;
    ti->digest.data = c->digest;
    ti->digest.len = 32;
    ti->source = (uint32_t)c->spec->source_case; /* the oneof's field numbers are 1, 2, 3 */
    ti->count = spec_count(c->spec, info->state_dim);
    int encoded = c->state == VEER__CONTENT_ENCODED && t->acknowledged;
    ti->encoded = encoded;
    ti->r2 = encoded ? c->report.r2 : NAN;
    ti->norm_raw = encoded ? c->report.norm_raw : NAN;
    if (encoded) {
        ti->n_z = info->z_dim;
        ti->z = c->z;
    }
    ti->n_active_on = veer__store_active_on(a->store, t->name, chans, max_chans);
    ti->active_on = (char **)chans;
}

static void reply_task(veer__admin *a, veer__wire_msg *env, uint64_t id, veer__task *t)
{
    Veer__Wire__TaskInfo ti;
    task_info(a, t, &ti, a->channel_scratch, a->channel_scratch_len);
    Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;
    r.id = id;
    r.body_case = VEER__WIRE__REPLY__BODY_TASK;
    r.task = &ti;
    send_reply(a, env, &r);
}

/* ---- Encoding jobs ----------------------------------------------------------------------- */

static void job_work(uv_work_t *w)
{
    job *j = w->data;
    veer__admin *a = j->admin;
    veer_error_clear(&j->err);
    j->rc = veer__store_encode(a->store->bundle, j->content->spec, a->store->max_samples, j->z, &j->report,
                               &j->err);
}

static void forget_task(waiter *list, veer__task *t)
{
    for (waiter *w = list; w != NULL; w = w->next)
        if (w->task == t)
            w->task = NULL;
}

static void job_done(uv_work_t *w, int status)
{
    job *j = w->data;
    veer__admin *a = j->admin;
    for (job **link = &a->jobs; *link != NULL; link = &(*link)->next) {
        if (*link == j) {
            *link = j->next;
            break;
        }
    }
    a->pending--;
    if (status == UV_ECANCELED && j->rc == 0)
        j->rc = veer__error_set(&j->err, VEER_ENOTREADY, "put_task", "veerd is stopping");
    if (j->rc == 0 && veer__content_set_z(j->content, j->z, a->store->info->z_dim, &j->report) < 0)
        j->rc = veer__error_set(&j->err, VEER_ENOMEM, "put_task", NULL);
    if (j->rc < 0 && j->content->state == VEER__CONTENT_PENDING)
        j->content->state = VEER__CONTENT_FAILED;

    while (j->waiters != NULL) {
        waiter *wt = j->waiters;
        j->waiters = wt->next;
        veer__task *t = wt->task;
        if (j->rc < 0) {
            send_error(a, &wt->env, wt->id, &j->err);
            if (t != NULL && !t->acknowledged) {
                forget_task(j->waiters, t);
                veer__registry_remove(a->store->registry, t);
            }
        } else if (t == NULL) {
            veer_error err;
            veer__error_set(&err, VEER_EIO, "put_task", "the task could not be stored");
            send_error(a, &wt->env, wt->id, &err);
        } else if (!t->acknowledged) {
            veer_error err;
            if (veer__store_acknowledge(a->store, t, &err) < 0) {
                send_error(a, &wt->env, wt->id, &err);
                forget_task(j->waiters, t);
                veer__registry_remove(a->store->registry, t);
            } else {
                reply_task(a, &wt->env, wt->id, t);
            }
        } else {
            reply_task(a, &wt->env, wt->id, t);
        }
        veer__wire_msg_close(&wt->env);
        veer__free(wt);
    }
    veer__free(j->z);
    veer__free(j);
    veer__store_compact(a->store, 0, NULL);
    if (a->stopping) {
        if (a->pending == 0 && a->done != NULL)
            a->done(a->done_data);
    } else {
        veer__admin_drain(a); /* our sends may have swallowed the socket's edge */
    }
}

/* Queues the request's client as a waiter on `c`'s job, starting the job when there is none. */
static int wait_for_encoding(veer__admin *a, veer__task *t, uint64_t id, veer_error *err)
{
    waiter *w = veer__calloc(1, sizeof *w);
    if (w == NULL)
        return veer__error_set(err, VEER_ENOMEM, "put_task", NULL);
    veer__wire_msg_init(&w->env);
    for (int i = 0; i < a->msg.n - 1; i++)
        zmq_msg_move(&w->env.frames[i], &a->msg.frames[i]);
    w->env.n = a->msg.n; /* the payload slot stays empty; send uses the frames before it */
    w->id = id;
    w->task = t;
    job *j = a->jobs;
    while (j != NULL && j->content != t->content)
        j = j->next;
    if (j == NULL) {
        j = veer__calloc(1, sizeof *j);
        float *z = veer__malloc(a->store->info->z_dim * sizeof(float));
        if (j == NULL || z == NULL) {
            veer__free(j);
            veer__free(z);
            /* Give the routing frames back so the caller can still answer. */
            for (int i = 0; i < a->msg.n - 1; i++)
                zmq_msg_move(&a->msg.frames[i], &w->env.frames[i]);
            veer__wire_msg_close(&w->env);
            veer__free(w);
            return veer__error_set(err, VEER_ENOMEM, "put_task", NULL);
        }
        j->admin = a;
        j->content = t->content;
        j->z = z;
        j->work.data = j;
        t->content->state = VEER__CONTENT_PENDING;
        uv_queue_work(a->cfg.loop, &j->work, job_work, job_done);
        j->next = a->jobs;
        a->jobs = j;
        a->pending++;
    }
    w->next = j->waiters;
    j->waiters = w;
    return 0;
}

/* ---- Requests ---------------------------------------------------------------------------- */

/* Returns 1 when the reply was deferred to an encoding job. */
static int handle_put(veer__admin *a, uint64_t id, Veer__Wire__PutTask *p, veer_error *err)
{
    veer__store *s = a->store;
    const char *name = p->name ? p->name : "";
    int rc;
    if (name[0] == '\0') {
        veer__error_set(err, VEER_EFIELD, "put_task.name", "the task name is empty");
        return -1;
    }
    if (p->spec == NULL) {
        veer__error_set(err, VEER_EFIELD, "put_task.spec", "the put carries no task specification");
        return -1;
    }
    veer_task_spec ts;
    uint8_t digest[32];
    if (veer__spec_check(p->spec, s->info, s->max_samples, "put_task.spec", &ts, err) < 0 ||
        veer__spec_canonical(p->spec, digest, err) < 0)
        return -1;
    veer__task *t;
    int created;
    if ((rc = veer__registry_put(s->registry, name, p->spec, digest, &t, &created, err)) < 0) {
        veer__store_prefix_field(err, "put_task.");
        return -1;
    }
    if (t->acknowledged && t->content->state == VEER__CONTENT_ENCODED) {
        reply_task(a, &a->msg, id, t); /* the same put again: nothing to do */
        return 0;
    }
    if (!t->acknowledged && t->content->state == VEER__CONTENT_ENCODED) {
        /* Another name already holds this content, encoded: store the new name at once. */
        if (veer__store_acknowledge(s, t, err) < 0) {
            veer__registry_remove(s->registry, t);
            return -1;
        }
        reply_task(a, &a->msg, id, t);
        veer__store_compact(s, 0, NULL);
        return 0;
    }
    if (wait_for_encoding(a, t, id, err) < 0) {
        if (created)
            veer__registry_remove(s->registry, t);
        return -1;
    }
    return 1;
}

static void handle_list_tasks(veer__admin *a, uint64_t id)
{
    veer__registry *reg = a->store->registry;
    uint32_t n = veer__registry_count(reg), shown = 0;
    Veer__Wire__TaskInfo *infos = veer__calloc(n ? n : 1, sizeof *infos);
    Veer__Wire__TaskInfo **ptrs = veer__calloc(n ? n : 1, sizeof *ptrs);
    const char **chans = veer__calloc((size_t)(n ? n : 1) * 4, sizeof *chans);
    if (infos == NULL || ptrs == NULL || chans == NULL) {
        veer_error err;
        veer__error_set(&err, VEER_ENOMEM, "list_tasks", NULL);
        send_error(a, &a->msg, id, &err);
    } else {
        for (uint32_t i = 0; i < n; i++) {
            veer__task *t = veer__registry_at(reg, i);
            if (!t->acknowledged)
                continue;
            /* Up to four channel names per task in a listing; get_task shows them all. */
            task_info(a, t, &infos[shown], chans + 4 * shown, 4);
            infos[shown].n_z = 0; /* listings stay small; get_task has z */
            ptrs[shown] = &infos[shown];
            shown++;
        }
        Veer__Wire__TaskList list = VEER__WIRE__TASK_LIST__INIT;
        list.n_tasks = shown;
        list.tasks = ptrs;
        Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;
        r.id = id;
        r.body_case = VEER__WIRE__REPLY__BODY_TASKS;
        r.tasks = &list;
        send_reply(a, &a->msg, &r);
    }
    veer__free(infos);
    veer__free(ptrs);
    veer__free(chans);
}

static void channel_info(veer__channel *ch, Veer__Wire__ChannelInfo *ci)
{
    veer__wire__channel_info__init(ci);
    veer__active_task *t = atomic_load_explicit(&ch->active, memory_order_relaxed);
    ci->name = ch->name;
    ci->task = t ? t->task : "";
    ci->epoch = ch->epoch;
    ci->acts = atomic_load_explicit(&ch->acts, memory_order_relaxed);
}

static void handle_list_channels(veer__admin *a, uint64_t id)
{
    veer__channels *chs = a->store->channels;
    uint32_t n = veer__channels_count(chs), k = 0;
    Veer__Wire__ChannelInfo *infos = veer__calloc(n ? n : 1, sizeof *infos);
    Veer__Wire__ChannelInfo **ptrs = veer__calloc(n ? n : 1, sizeof *ptrs);
    if (infos == NULL || ptrs == NULL) {
        veer_error err;
        veer__error_set(&err, VEER_ENOMEM, "list_channels", NULL);
        send_error(a, &a->msg, id, &err);
    } else {
        for (uint32_t i = 0; i < veer__channels_capacity(chs) && k < n; i++) {
            veer__channel *ch = veer__channels_slot(chs, i);
            if (ch == NULL)
                continue;
            channel_info(ch, &infos[k]);
            ptrs[k] = &infos[k];
            k++;
        }
        Veer__Wire__ChannelList list = VEER__WIRE__CHANNEL_LIST__INIT;
        list.n_channels = k;
        list.channels = ptrs;
        Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;
        r.id = id;
        r.body_case = VEER__WIRE__REPLY__BODY_CHANNELS;
        r.channels = &list;
        send_reply(a, &a->msg, &r);
    }
    veer__free(infos);
    veer__free(ptrs);
}

static void handle_status(veer__admin *a, uint64_t id)
{
    veer__act_counters c = {0};
    if (a->cfg.act != NULL)
        veer__act_counters_get(a->cfg.act, &c);
    uint32_t tasks = 0;
    for (uint32_t i = 0; i < veer__registry_count(a->store->registry); i++)
        tasks += veer__registry_at(a->store->registry, i)->acknowledged;
    Veer__Wire__StatusReply st = VEER__WIRE__STATUS_REPLY__INIT;
    st.model_version = (char *)a->store->info->model_version;
    st.ready = !a->stopping;
    st.uptime_s = (double)(veer__now_ns() - a->started_ns) / 1e9;
    st.tasks = tasks;
    st.channels = veer__channels_count(a->store->channels);
    st.acts = c.acts;
    st.fallbacks = c.fallbacks;
    st.deadline_misses = c.deadline_misses;
    st.version = (char *)a->cfg.version;
    Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;
    r.id = id;
    r.body_case = VEER__WIRE__REPLY__BODY_STATUS;
    r.status = &st;
    send_reply(a, &a->msg, &r);
}

static void handle_one(veer__admin *a)
{
    size_t len;
    const uint8_t *payload = veer__wire_payload(&a->msg, &len);
    veer_error err;
    veer_error_clear(&err);
    uint64_t id = 0;
    Veer__Wire__Request *req = NULL;
    Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;

    if (a->msg.overflow) {
        veer__error_set(&err, VEER_EBADMSG, "request", "a request is one frame after the routing frames");
        goto error;
    }
    if (len > a->cfg.max_message_bytes) {
        veer__error_set(&err, VEER_EMSGSIZE, "request",
                        "the request has %zu bytes; the admin socket takes at most %u (--max-message-bytes)", len,
                        a->cfg.max_message_bytes);
        goto error;
    }
    req = veer__wire__request__unpack(&veer__pb_heap, len, payload);
    if (req == NULL) {
        veer__error_set(&err, VEER_EBADMSG, "request", "%zu bytes that do not decode as a veer.wire.Request", len);
        goto error;
    }
    id = req->id;
    if (req->protocol != VEER__PROTOCOL) {
        veer__error_set(&err, VEER_EPROTOCOL, "protocol", "protocol %u is not spoken here; veerd speaks %d",
                        req->protocol, VEER__PROTOCOL);
        goto error;
    }
    r.id = id;
    switch (req->body_case) {
    case VEER__WIRE__REQUEST__BODY_DESCRIBE: {
        Veer__Wire__DescribeReply d;
        veer__wire_describe(&d, a->store->info, a->cfg.default_deadline_us, a->feature_scratch);
        r.body_case = VEER__WIRE__REPLY__BODY_DESCRIBE;
        r.describe = &d;
        send_reply(a, &a->msg, &r);
        break;
    }
    case VEER__WIRE__REQUEST__BODY_STATUS:
        handle_status(a, id);
        break;
    case VEER__WIRE__REQUEST__BODY_PUT_TASK:
        if (handle_put(a, id, req->put_task, &err) < 0)
            goto error;
        break;
    case VEER__WIRE__REQUEST__BODY_GET_TASK: {
        const char *name = req->get_task->name ? req->get_task->name : "";
        veer__task *t = veer__registry_find(a->store->registry, name);
        if (t == NULL || !t->acknowledged) {
            veer__error_set(&err, t ? VEER_ENOTREADY : VEER_ENOTASK, "get_task.name",
                            t ? "task '%s' is still being stored" : "there is no task '%s'", name);
            goto error;
        }
        reply_task(a, &a->msg, id, t);
        break;
    }
    case VEER__WIRE__REQUEST__BODY_LIST_TASKS:
        handle_list_tasks(a, id);
        break;
    case VEER__WIRE__REQUEST__BODY_DROP_TASK: {
        const char *name = req->drop_task->name ? req->drop_task->name : "";
        veer__task *t = veer__registry_find(a->store->registry, name);
        if (t != NULL && t->content->state == VEER__CONTENT_PENDING) {
            veer__error_set(&err, VEER_ENOTREADY, "drop_task.name", "task '%s' is being encoded; retry", name);
            goto error;
        }
        if (veer__store_drop(a->store, name, &err) < 0)
            goto error;
        veer__store_compact(a->store, 0, NULL);
        Veer__Wire__Done done = VEER__WIRE__DONE__INIT;
        r.body_case = VEER__WIRE__REPLY__BODY_DONE;
        r.done = &done;
        send_reply(a, &a->msg, &r);
        break;
    }
    case VEER__WIRE__REQUEST__BODY_SWITCH_CHANNEL: {
        const char *ch_name = req->switch_channel->channel ? req->switch_channel->channel : "";
        const char *task = req->switch_channel->task ? req->switch_channel->task : "";
        veer__channel *ch;
        if (veer__store_switch(a->store, ch_name, task, &ch, &err) < 0)
            goto error;
        veer__store_compact(a->store, 0, NULL);
        Veer__Wire__ChannelInfo ci;
        channel_info(ch, &ci);
        r.body_case = VEER__WIRE__REPLY__BODY_CHANNEL;
        r.channel = &ci;
        send_reply(a, &a->msg, &r);
        break;
    }
    case VEER__WIRE__REQUEST__BODY_LIST_CHANNELS:
        handle_list_channels(a, id);
        break;
    case VEER__WIRE__REQUEST__BODY_ACT:
        veer__error_set(&err, VEER_EMSGTYPE, "body", "act requests go to the act socket, not the admin socket");
        goto error;
    default:
        veer__error_set(&err, VEER_EMSGTYPE, "body", "the request has no body this server knows");
        goto error;
    }
    veer__wire__request__free_unpacked(req, &veer__pb_heap);
    return;

error:
    send_error(a, &a->msg, id, &err);
    if (req != NULL)
        veer__wire__request__free_unpacked(req, &veer__pb_heap);
}

/* ---- The socket on the loop -------------------------------------------------------------- */

void veer__admin_drain(veer__admin *a)
{
    if (a->stopping)
        return;
    for (;;) {
        uint32_t events = 0;
        size_t size = sizeof events;
        if (zmq_getsockopt(a->socket, ZMQ_EVENTS, &events, &size) != 0 || !(events & ZMQ_POLLIN))
            return;
        if (veer__wire_recv(a->socket, &a->msg, ZMQ_DONTWAIT) != 0)
            return;
        handle_one(a);
    }
}

static void on_readable(uv_poll_t *p, int status, int events)
{
    veer__admin_drain(p->data);
}

int veer__admin_start(const veer__admin_config *cfg, veer__admin **out, veer_error *err)
{
    veer__admin *a = veer__calloc(1, sizeof *a);
    if (a == NULL)
        return veer__error_set(err, VEER_ENOMEM, "admin", NULL);
    a->cfg = *cfg;
    a->store = cfg->store;
    a->started_ns = veer__now_ns();
    veer__wire_msg_init(&a->msg);
    a->channel_scratch_len = veer__channels_capacity(cfg->store->channels);
    a->channel_scratch = veer__calloc(a->channel_scratch_len, sizeof *a->channel_scratch);
    a->feature_scratch = veer__calloc(cfg->store->info->state_dim + 1, sizeof *a->feature_scratch);
    int rc;
    if (a->channel_scratch == NULL || a->feature_scratch == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, "admin", NULL);
        goto fail;
    }
    if ((rc = veer__wire_router(cfg->zmq_ctx, cfg->endpoint, "--admin", cfg->max_message_bytes, -1,
                                cfg->server_secret_key, VEER__ZAP_ADMIN_DOMAIN, &a->socket, err)) < 0)
        goto fail;
    int fd;
    size_t fd_size = sizeof fd;
    zmq_getsockopt(a->socket, ZMQ_FD, &fd, &fd_size);
    uv_poll_init(cfg->loop, &a->poll, fd);
    a->poll.data = a;
    uv_poll_start(&a->poll, UV_READABLE, on_readable);
    a->polling = 1;
    *out = a;
    return 0;

fail:
    if (a->socket != NULL)
        zmq_close(a->socket);
    veer__wire_msg_close(&a->msg);
    veer__free(a->channel_scratch);
    veer__free(a->feature_scratch);
    veer__free(a);
    return rc;
}

void veer__admin_stop(veer__admin *a, void (*done)(void *), void *data)
{
    a->stopping = 1;
    a->done = done;
    a->done_data = data;
    if (a->polling) {
        uv_poll_stop(&a->poll);
        uv_close((uv_handle_t *)&a->poll, NULL);
        a->polling = 0;
    }
    if (a->pending == 0 && done != NULL)
        done(data);
}

void veer__admin_close(veer__admin *a)
{
    if (a == NULL)
        return;
    zmq_close(a->socket);
    veer__wire_msg_close(&a->msg);
    veer__free(a->channel_scratch);
    veer__free(a->feature_scratch);
    veer__free(a);
}
