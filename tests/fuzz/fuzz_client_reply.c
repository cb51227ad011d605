/* Fuzz target: the C client's Reply decoding (clients/c), on its act path (the arena decoder in
 * client_act.c) and its supervisor calls (client.c, client_admin.c, including the views it
 * builds over a reply).
 *
 * A fake veerd runs in a second thread: two ROUTER sockets on ipc:// endpoints in a private
 * directory, answering the client's describe at open with the fixture model's description, and
 * every later request with the input bytes. Replies are matched by id, which the fuzzer cannot
 * know, so the server appends the request's id (Reply field 2) to the input bytes, and for an
 * act also an ActReply (field 10) carrying the request's seq; protobuf's "last field wins" and
 * message merging make that override a valid input and leave a malformed one malformed. After
 * the fuzzed reply the server sends an Error reply with the same id, so a call whose fuzzed reply
 * was discarded still returns at once instead of waiting for its timeout.
 *
 * Input: byte 0 selects the call (low 3 bits: act, describe, list tasks, list channels, status,
 * get task, switch, drop task), bit 6 leaves out the act seq override and bit 7 every override;
 * the rest is the reply. Beyond "no crash", every result the client hands out is read in full
 * (the sanitizers see a view that points past its reply), an act answers finite values within
 * the described bounds, and a describe leaves a model whose arrays have the documented
 * lengths. */
#include <errno.h>
#include <math.h>
#include <pthread.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <zmq.h>

#include "fuzz_common.h"
#include "veer/client.h"
#include "veer_wire.pb-c.h"

static veer_bundle *bundle;
static const veer_model_info *info;
static veer_client *client;
static void *server_ctx;
static pthread_t server_thread;
static char act_ep[300], admin_ep[300];

static pthread_mutex_t mu = PTHREAD_MUTEX_INITIALIZER;
static const uint8_t
    *pending; /* the reply body for the next request; NULL: the fixture's describe */
static size_t pending_len;
static int pending_flags;
static int server_stop;

static size_t put_varint(uint8_t *p, uint64_t v)
{
    size_t n = 0;
    while (v >= 0x80) {
        p[n++] = (uint8_t)(v | 0x80);
        v >>= 7;
    }
    p[n++] = (uint8_t)v;
    return n;
}

static size_t describe_reply(uint64_t id, uint8_t *buf, size_t cap)
{
    Veer__Wire__DescribeReply d = VEER__WIRE__DESCRIBE_REPLY__INIT;
    d.model_version = (char *)info->model_version;
    d.model_digest.data = (uint8_t *)info->digest;
    d.model_digest.len = 32;
    d.state_dim = info->state_dim;
    d.z_dim = info->z_dim;
    d.n_feature_names = info->state_dim;
    d.feature_names = (char **)info->feature_names;
    d.action_kind = (uint32_t)info->action_kind;
    d.action_dim = info->action_dim;
    d.action_count = info->action_count;
    if (info->action_kind == VEER_ACTION_CONTINUOUS) {
        d.n_action_low = d.n_action_high = info->action_dim;
        d.action_low = (float *)info->action_low;
        d.action_high = (float *)info->action_high;
    }
    d.n_fallback_action = info->action_dim;
    d.fallback_action = (float *)info->fallback_action;
    d.default_deadline_us = 1000000;
    Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;
    r.protocol = 1;
    r.id = id;
    r.body_case = VEER__WIRE__REPLY__BODY_DESCRIBE;
    r.describe = &d;
    if (veer__wire__reply__get_packed_size(&r) > cap)
        abort();
    return veer__wire__reply__pack(&r, buf);
}

static size_t error_reply(uint64_t id, uint8_t *buf)
{
    Veer__Wire__Error e = VEER__WIRE__ERROR__INIT;
    e.code = -22;
    e.name = "VEER_EFUZZ";
    e.message = "the fuzz server's closing reply";
    e.field = "fuzz";
    Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;
    r.protocol = 1;
    r.id = id;
    r.body_case = VEER__WIRE__REPLY__BODY_ERROR;
    r.error = &e;
    return veer__wire__reply__pack(&r, buf);
}

/* Sends the routing frames of `env` (n of them) followed by one body. */
static void send_routed(void *sock, zmq_msg_t *env, int n, const void *body, size_t len)
{
    for (int i = 0; i < n; i++) {
        zmq_msg_t copy;
        zmq_msg_init(&copy);
        zmq_msg_copy(&copy, &env[i]);
        zmq_msg_send(&copy, sock, ZMQ_SNDMORE);
    }
    zmq_send(sock, body, len, 0);
}

static void *serve(void *arg)
{
    void **socks = arg;
    static uint8_t out[1 << 17];
    zmq_pollitem_t items[2] = {{socks[0], 0, ZMQ_POLLIN, 0}, {socks[1], 0, ZMQ_POLLIN, 0}};
    for (;;) {
        pthread_mutex_lock(&mu);
        int stop = server_stop;
        pthread_mutex_unlock(&mu);
        if (stop)
            break;
        if (zmq_poll(items, 2, 20) <= 0)
            continue;
        for (int s = 0; s < 2; s++) {
            if (!(items[s].revents & ZMQ_POLLIN))
                continue;
            zmq_msg_t frames[8];
            int n = 0;
            for (;;) {
                zmq_msg_init(&frames[n]);
                while (zmq_msg_recv(&frames[n], socks[s], 0) < 0) {
                    if (errno != EINTR) /* a signal (the leak checker's) may interrupt the wait */
                        abort();
                }
                int more = zmq_msg_more(&frames[n]);
                if (n < 7)
                    n++;
                else
                    zmq_msg_close(&frames[n]);
                if (!more)
                    break;
            }
            Veer__Wire__Request *req = veer__wire__request__unpack(
                NULL, zmq_msg_size(&frames[n - 1]), zmq_msg_data(&frames[n - 1]));
            if (req == NULL)
                abort(); /* the client always sends a decodable request */
            uint64_t id = req->id;
            uint64_t seq = req->body_case == VEER__WIRE__REQUEST__BODY_ACT ? req->act->seq : 0;
            int describe = req->body_case == VEER__WIRE__REQUEST__BODY_DESCRIBE;
            veer__wire__request__free_unpacked(req, NULL);

            /* The input is copied while the lock is held: once the call returns, the driver
             * frees it. */
            pthread_mutex_lock(&mu);
            int have = pending != NULL, flags = pending_flags;
            size_t m = 0;
            if (have) {
                m = pending_len < sizeof out - 64 ? pending_len : sizeof out - 64;
                memcpy(out, pending, m);
            }
            pending = NULL;
            pthread_mutex_unlock(&mu);
            if (!have) {
                if (!describe)
                    abort(); /* only the open and the reset between inputs send unscripted requests
                              */
                m = describe_reply(id, out, sizeof out);
            } else if (!(flags & 0x80)) {
                out[m++] = 0x10; /* field 2 (id), varint */
                m += put_varint(out + m, id);
                if (seq != 0 && !(flags & 0x40)) {
                    uint8_t inner[16];
                    size_t k = 0;
                    inner[k++] = 0x08; /* ActReply field 1 (seq) */
                    k += put_varint(inner + k, seq);
                    out[m++] = 0x52; /* field 10 (act), length-delimited */
                    out[m++] = (uint8_t)k;
                    memcpy(out + m, inner, k);
                    m += k;
                }
            }
            send_routed(socks[s], frames, n - 1, out, m);
            if (have) {
                m = error_reply(id, out);
                send_routed(socks[s], frames, n - 1, out, m);
            }
            for (int i = 0; i < n; i++)
                zmq_msg_close(&frames[i]);
        }
    }
    return NULL;
}

static void *server_socks[2];

static void stop_all(void)
{
    veer_client_close(client);
    pthread_mutex_lock(&mu);
    server_stop = 1;
    pthread_mutex_unlock(&mu);
    pthread_join(server_thread, NULL);
    zmq_close(server_socks[0]);
    zmq_close(server_socks[1]);
    zmq_ctx_term(server_ctx);
    veer_bundle_close(bundle);
}

static void start(void)
{
    const char *dir = fuzz_dir("client");
    bundle = fuzz_bundle_open();
    info = veer_bundle_info(bundle);
    snprintf(act_ep, sizeof act_ep, "ipc://%s/act", dir);
    snprintf(admin_ep, sizeof admin_ep, "ipc://%s/admin", dir);
    server_ctx = zmq_ctx_new();
    server_socks[0] = zmq_socket(server_ctx, ZMQ_ROUTER);
    server_socks[1] = zmq_socket(server_ctx, ZMQ_ROUTER);
    int linger = 0;
    zmq_setsockopt(server_socks[0], ZMQ_LINGER, &linger, sizeof linger);
    zmq_setsockopt(server_socks[1], ZMQ_LINGER, &linger, sizeof linger);
    if (zmq_bind(server_socks[0], act_ep) != 0 || zmq_bind(server_socks[1], admin_ep) != 0)
        abort();
    pthread_create(&server_thread, NULL, serve, server_socks);
    veer_client_options o;
    veer_client_options_init(&o);
    o.act_endpoint = act_ep;
    o.admin_endpoint = admin_ep;
    o.timeout_ms = 10000;
    veer_error err;
    if (veer_client_open(&o, &client, &err) != 0) {
        fprintf(stderr, "fuzz_client_reply: open: %s\n", err.message);
        abort();
    }
    atexit(stop_all);
}

static volatile uint64_t sink;
static volatile double
    sink_f; /* floats are summed as floats: a negative one cast to an integer is undefined */

static void read_string(const char *s)
{
    if (s == NULL)
        abort(); /* the views promise strings, "" when empty */
    sink += strlen(s);
}

static void read_task(const veer_client_task *t)
{
    read_string(t->name);
    for (uint32_t i = 0; i < t->z_dim; i++)
        sink_f += t->z[i];
    for (uint32_t i = 0; i < t->active_on_count; i++)
        read_string(t->active_on[i]);
}

static void read_model(const veer_client_model *m)
{
    read_string(m->model_version);
    if (m->state_dim == 0 || m->state_dim > VEER_CLIENT_MAX_STATE || m->action_dim == 0)
        abort();
    for (uint32_t i = 0; i < m->state_dim; i++)
        read_string(m->feature_names[i]);
    for (uint32_t i = 0; i < m->action_dim; i++) {
        if (!isfinite(m->fallback_action[i]))
            abort();
        if (m->action_low != NULL)
            sink_f += m->action_low[i] + m->action_high[i];
    }
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    if (client == NULL)
        start();
    if (size == 0)
        return 0;
    pthread_mutex_lock(&mu);
    pending = data + 1;
    pending_len = size - 1;
    pending_flags = data[0];
    pthread_mutex_unlock(&mu);

    veer_error err;
    int op = data[0] & 7;
    switch (op) {
    case 0: {
        const veer_client_model *m = veer_client_model_info(client);
        float *state = calloc(m->state_dim, sizeof *state);
        float *action = calloc(m->action_dim, sizeof *action);
        veer_client_act_result res;
        int rc = veer_client_act(client, "arm", state, 1000000, action, &res, &err);
        if (rc == 0) {
            if (!isfinite(res.value))
                abort();
            for (uint32_t i = 0; i < m->action_dim; i++) {
                if (!isfinite(action[i]))
                    abort();
                if (m->action_low != NULL &&
                    (action[i] < m->action_low[i] || action[i] > m->action_high[i])) {
                    fprintf(stderr, "fuzz_client_reply: action[%u] = %g outside [%g, %g]\n", i,
                            action[i], m->action_low[i], m->action_high[i]);
                    abort();
                }
            }
            sink += strlen(res.task);
        }
        free(state);
        free(action);
        break;
    }
    case 1: {
        const veer_client_model *m = NULL;
        if (veer_client_describe(client, &m, &err) == 0)
            read_model(m);
        read_model(veer_client_model_info(client));
        /* Back to the fixture's model, so every input starts from the same client. */
        if (veer_client_describe(client, &m, &err) != 0)
            abort();
        break;
    }
    case 2: {
        const veer_client_task *tasks = NULL;
        size_t n = 0;
        if (veer_client_task_list(client, &tasks, &n, &err) == 0)
            for (size_t i = 0; i < n; i++)
                read_task(&tasks[i]);
        break;
    }
    case 3: {
        const veer_client_channel *chs = NULL;
        size_t n = 0;
        if (veer_client_channels(client, &chs, &n, &err) == 0)
            for (size_t i = 0; i < n; i++) {
                read_string(chs[i].name);
                read_string(chs[i].task);
            }
        break;
    }
    case 4: {
        const veer_client_status *st = NULL;
        if (veer_client_status_get(client, &st, &err) == 0) {
            read_string(st->model_version);
            read_string(st->version);
        }
        break;
    }
    case 5: {
        const veer_client_task *t = NULL;
        /* Success must come with a view: a Done reply where a task was expected is refused
         * (repro-switch-answered-with-done). */
        if (veer_client_task_get(client, "reach", &t, &err) == 0) {
            if (t == NULL)
                abort();
            read_task(t);
        }
        break;
    }
    case 6: {
        const veer_client_channel *ch = NULL;
        if (veer_client_switch(client, "arm", "reach", &ch, &err) == 0) {
            if (ch == NULL)
                abort();
            read_string(ch->name);
            read_string(ch->task);
        }
        break;
    }
    default:
        veer_client_task_drop(client, "reach", &err);
        break;
    }
    pthread_mutex_lock(&mu);
    pending = NULL; /* a call that sent nothing leaves it unused */
    pthread_mutex_unlock(&mu);
    return 0;
}
