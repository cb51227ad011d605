/* libveer_client: opening and closing a connection to veerd, the request/reply exchange every
 * call shares, and the model description.
 *
 * Both sockets are DEALERs, not REQs: a REQ socket locks up when a reply never comes (it
 * refuses to send again), which is exactly what happens when veerd is stopped or a deadline
 * passes. A DEALER lets us give up, send the next request and drop the stale reply by its id.
 * The admin socket still sends the empty delimiter frame a REQ would, so veerd sees the same
 * envelope from this library as from any REQ-based supervisor; the act socket sends the bare
 * body, as controllers do. Replies are read as "the last frame is the body" either way. */
#include "client_internal.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <string.h>
#include <zmq.h>

static void *heap_alloc(void *data, size_t n)
{
    (void)data;
    return veer__malloc(n);
}

static void heap_free(void *data, void *p)
{
    (void)data;
    veer__free(p);
}

ProtobufCAllocator veer__client_heap = {heap_alloc, heap_free, NULL};

/* The arena: a bump allocator over memory sized at open. protobuf-c frees nothing we need
 * back, because the whole arena is reset before each reply is unpacked. */
static void *arena_alloc(void *data, size_t n)
{
    veer_client *c = data;
    size_t at = (c->arena_used + 15u) & ~(size_t)15u;
    if (at > VEER__CLIENT_ARENA_CAP || n > VEER__CLIENT_ARENA_CAP - at)
        return NULL;
    c->arena_used = at + n;
    return c->arena + at;
}

static void arena_free(void *data, void *p)
{
    (void)data;
    (void)p;
}

void veer__client_arena_reset(veer_client *c)
{
    c->arena_used = 0;
}

void veer_client_options_init(veer_client_options *opts)
{
    memset(opts, 0, sizeof *opts);
}

static int check_key(const char *key, const char *field, veer_error *err)
{
    uint8_t raw[32];
    if (key == NULL || strlen(key) != VEER_CLIENT_KEY_LEN || zmq_z85_decode(raw, key) == NULL)
        return veer__error_set(err, VEER_EINVAL, field,
                               "%s must be a 40-character Z85 CURVE key as `veer keygen` writes",
                               field);
    return 0;
}

static int open_socket(veer_client *c, const char *endpoint, const veer_client_options *o,
                       int curve, const char *field, void **out, veer_error *err)
{
    void *s = zmq_socket(c->zctx, ZMQ_DEALER);
    if (s == NULL)
        return veer__error_set(err, VEER_EIO, field, "cannot create a ZeroMQ socket: %s",
                               zmq_strerror(errno));
    int zero = 0, one = 1;
    zmq_setsockopt(s, ZMQ_LINGER, &zero, sizeof zero);
    /* Queue requests only to a connection that is up: a controller must not have its stale
     * states delivered in a burst when veerd comes back. */
    zmq_setsockopt(s, ZMQ_IMMEDIATE, &one, sizeof one);
    if (curve) {
        if (zmq_setsockopt(s, ZMQ_CURVE_SERVERKEY, o->server_key, VEER_CLIENT_KEY_LEN) != 0 ||
            zmq_setsockopt(s, ZMQ_CURVE_PUBLICKEY, o->public_key, VEER_CLIENT_KEY_LEN) != 0 ||
            zmq_setsockopt(s, ZMQ_CURVE_SECRETKEY, o->secret_key, VEER_CLIENT_KEY_LEN) != 0) {
            zmq_close(s);
            return veer__error_set(err, VEER_EINVAL, "server_key",
                                   "libzmq refused the CURVE keys: %s (is libzmq built with "
                                   "CURVE support?)",
                                   zmq_strerror(errno));
        }
    }
    if (zmq_connect(s, endpoint) != 0) {
        int e = errno;
        zmq_close(s);
        return veer__error_set(err, VEER_EINVAL, field,
                               "cannot connect to '%s': %s (expected tcp://HOST:PORT or "
                               "ipc:///path)",
                               endpoint, zmq_strerror(e));
    }
    *out = s;
    return 0;
}

int veer_client_open(const veer_client_options *o, veer_client **out, veer_error *err)
{
    int rc;
    *out = NULL;
    if (o == NULL || (o->act_endpoint == NULL && o->admin_endpoint == NULL))
        return veer__error_set(err, VEER_EINVAL, "act_endpoint",
                               "give veerd's act endpoint, its admin endpoint, or both");
    if (o->server_key != NULL) {
        if ((rc = check_key(o->server_key, "server_key", err)) != 0 ||
            (rc = check_key(o->public_key, "public_key", err)) != 0 ||
            (rc = check_key(o->secret_key, "secret_key", err)) != 0)
            return rc;
    }

    veer_client *c = veer__calloc(1, sizeof *c);
    if (c == NULL)
        return veer__error_set(err, VEER_ENOMEM, "", "out of memory opening the client");
    c->timeout_ms = o->timeout_ms ? o->timeout_ms : 5000;
    c->next_id = 1;
    c->act_fd = -1;
    c->arena_alloc = (ProtobufCAllocator){arena_alloc, arena_free, c};
    c->zctx = zmq_ctx_new();
    if (c->zctx == NULL) {
        rc = veer__error_set(err, VEER_EIO, "", "cannot create a ZeroMQ context: %s",
                             zmq_strerror(errno));
        goto fail_ctx;
    }
    if (o->admin_endpoint != NULL &&
        (rc = open_socket(c, o->admin_endpoint, o, o->server_key != NULL, "admin_endpoint",
                          &c->admin_sock, err)) != 0)
        goto fail_sockets;
    if (o->act_endpoint != NULL) {
        rc = open_socket(c, o->act_endpoint, o, o->server_key != NULL && o->act_curve,
                         "act_endpoint", &c->act_sock, err);
        if (rc != 0)
            goto fail_sockets;
        size_t len = sizeof c->act_fd;
        zmq_getsockopt(c->act_sock, ZMQ_FD, &c->act_fd, &len);
        c->recv_buf = veer__malloc(VEER__CLIENT_RECV_CAP);
        c->arena = veer__malloc(VEER__CLIENT_ARENA_CAP);
        if (c->recv_buf == NULL || c->arena == NULL) {
            rc = veer__error_set(err, VEER_ENOMEM, "", "out of memory for the act buffers");
            goto fail_sockets;
        }
        if (veer_hist_create(&c->histogram) != 0) {
            rc = veer__error_set(err, VEER_ENOMEM, "", "out of memory for the act histogram");
            goto fail_sockets;
        }
        if ((rc = veer_client_describe(c, NULL, err)) != 0)
            goto fail_sockets;
    }
    *out = c;
    return 0;

fail_sockets:
    veer_client_close(c);
    return rc;
fail_ctx:
    veer__free(c);
    return rc;
}

void veer__client_release_last(veer_client *c)
{
    if (c->last != NULL)
        veer__wire__reply__free_unpacked(c->last, &veer__client_heap);
    c->last = NULL;
    veer__free(c->views);
    c->views = NULL;
}

void veer_client_close(veer_client *c)
{
    if (c == NULL)
        return;
    if (c->act_sock != NULL)
        zmq_close(c->act_sock);
    if (c->admin_sock != NULL)
        zmq_close(c->admin_sock);
    if (c->zctx != NULL)
        zmq_ctx_term(c->zctx);
    veer__client_release_last(c);
    if (c->describe != NULL)
        veer__wire__reply__free_unpacked(c->describe, &veer__client_heap);
    veer__free(c->feature_names);
    veer__free(c->send_buf);
    veer__free(c->recv_buf);
    veer__free(c->arena);
    veer_hist_destroy(c->histogram);
    veer__free(c);
}

int veer__client_error_from_reply(const Veer__Wire__Error *e, veer_error *err)
{
    int code = e->code < 0 ? e->code : VEER_EBADMSG;
    if (err != NULL) {
        err->code = code;
        snprintf(err->field, sizeof err->field, "%s", e->field ? e->field : "");
        snprintf(err->message, sizeof err->message, "%s",
                 e->message && e->message[0] ? e->message : veer_strerror(code));
    }
    return code;
}

int veer__client_send(veer_client *c, void *sock, const Veer__Wire__Request *req, veer_error *err)
{
    size_t n = veer__wire__request__get_packed_size(req);
    uint8_t small[512];
    uint8_t *buf = n <= sizeof small ? small : veer__malloc(n);
    if (buf == NULL)
        return veer__error_set(err, VEER_ENOMEM, "", "out of memory packing a %zu-byte request", n);
    veer__wire__request__pack(req, buf);
    int rc = 0;
    int delimiter = sock == c->admin_sock;
    if ((delimiter && zmq_send(sock, "", 0, ZMQ_SNDMORE | ZMQ_DONTWAIT) != 0) ||
        zmq_send(sock, buf, n, ZMQ_DONTWAIT) != (int)n) {
        rc = errno == EAGAIN
                 ? veer__error_set(err, VEER_ETIMEDOUT, "",
                                   "veerd is not connected: is it running, and is the endpoint "
                                   "right?")
                 : veer__error_set(err, VEER_EIO, "", "sending to veerd failed: %s",
                                   zmq_strerror(errno));
    }
    if (buf != small)
        veer__free(buf);
    return rc;
}

long veer__client_recv_nowait(veer_client *c, void *sock)
{
    long body = -1;
    int too_long = 0;
    for (;;) {
        int n = zmq_recv(sock, c->recv_buf, VEER__CLIENT_RECV_CAP, ZMQ_DONTWAIT);
        if (n < 0)
            return body; /* nothing (more) waiting */
        body = n;
        too_long = (size_t)n > VEER__CLIENT_RECV_CAP;
        int more = 0;
        size_t len = sizeof more;
        zmq_getsockopt(sock, ZMQ_RCVMORE, &more, &len);
        if (!more)
            break;
    }
    return too_long ? -2 : body;
}

/* Receives one whole message of any size (supervisor replies can be long: a task list). */
static int recv_message(void *sock, zmq_msg_t *body)
{
    for (;;) {
        zmq_msg_t part;
        zmq_msg_init(&part);
        if (zmq_msg_recv(&part, sock, ZMQ_DONTWAIT) < 0) {
            zmq_msg_close(&part);
            return -1;
        }
        zmq_msg_close(body);
        zmq_msg_init(body);
        zmq_msg_move(body, &part);
        zmq_msg_close(&part);
        if (!zmq_msg_more(body))
            return 0;
    }
}

int veer__client_call(veer_client *c, void *sock, Veer__Wire__Request *req, Veer__Wire__Reply **out,
                      veer_error *err)
{
    *out = NULL;
    req->protocol = VEER_CLIENT_PROTOCOL;
    req->id = c->next_id++;
    uint64_t deadline = veer__now_ns() + (uint64_t)c->timeout_ms * 1000000u;
    int rc;
    /* An unconnected DEALER with ZMQ_IMMEDIATE refuses to queue; the connection may simply not
     * be up yet, so keep trying until the timeout. */
    while ((rc = veer__client_send(c, sock, req, err)) == VEER_ETIMEDOUT) {
        if (veer__now_ns() >= deadline)
            goto timed_out;
        zmq_pollitem_t none = {0};
        zmq_poll(&none, 0, 2);
    }
    if (rc != 0)
        return rc;
    for (;;) {
        zmq_msg_t body;
        zmq_msg_init(&body);
        if (recv_message(sock, &body) == 0) {
            Veer__Wire__Reply *r = veer__wire__reply__unpack(
                &veer__client_heap, zmq_msg_size(&body), zmq_msg_data(&body));
            zmq_msg_close(&body);
            if (r == NULL)
                continue; /* not a reply we can read; keep waiting for ours */
            if (r->id != req->id) {
                veer__wire__reply__free_unpacked(r, &veer__client_heap);
                continue; /* a stale reply to an earlier call that timed out */
            }
            if (r->body_case == VEER__WIRE__REPLY__BODY_ERROR) {
                rc = veer__client_error_from_reply(r->error, err);
                veer__wire__reply__free_unpacked(r, &veer__client_heap);
                return rc;
            }
            *out = r;
            return 0;
        }
        zmq_msg_close(&body);
        uint64_t now = veer__now_ns();
        if (now >= deadline)
            break;
        zmq_pollitem_t item = {sock, 0, ZMQ_POLLIN, 0};
        zmq_poll(&item, 1, (long)((deadline - now + 999999u) / 1000000u));
    }
timed_out:
    return veer__error_set(err, VEER_ETIMEDOUT, "",
                           "veerd did not answer within %u ms: is it running, is the endpoint "
                           "right, and (with CURVE) are the keys right?",
                           c->timeout_ms);
}

const veer_client_model *veer_client_model_info(const veer_client *c)
{
    return c->have_model ? &c->model : NULL;
}

int veer_client_describe(veer_client *c, const veer_client_model **out, veer_error *err)
{
    void *sock = c->act_sock ? c->act_sock : c->admin_sock;
    Veer__Wire__DescribeRequest d = VEER__WIRE__DESCRIBE_REQUEST__INIT;
    Veer__Wire__Request req = VEER__WIRE__REQUEST__INIT;
    req.body_case = VEER__WIRE__REQUEST__BODY_DESCRIBE;
    req.describe = &d;
    Veer__Wire__Reply *r;
    int rc = veer__client_call(c, sock, &req, &r, err);
    if (rc != 0)
        return rc;
    const Veer__Wire__DescribeReply *m = r->describe;
    const char *why = NULL;
    if (r->body_case != VEER__WIRE__REPLY__BODY_DESCRIBE)
        why = "veerd answered describe with another message";
    else if (m->action_dim == 0 || m->n_fallback_action != m->action_dim)
        why = "veerd's fallback action does not have action_dim values";
    else if (m->state_dim == 0 || m->state_dim > VEER_CLIENT_MAX_STATE)
        why = "veerd's state_dim is 0 or larger than this client supports";
    else if (m->n_feature_names != m->state_dim)
        why = "veerd's feature names are not state_dim in number";
    else if (m->n_action_low != m->n_action_high ||
             (m->n_action_low != 0 && m->n_action_low != m->action_dim))
        why = "veerd's action bounds do not have action_dim values";
    for (size_t i = 0; why == NULL && i < m->n_fallback_action; i++)
        if (!isfinite(m->fallback_action[i]))
            why = "veerd's fallback action is not finite";
    if (why != NULL) {
        veer__wire__reply__free_unpacked(r, &veer__client_heap);
        return veer__error_set(err, VEER_EBADMSG, "describe", "%s", why);
    }
    const char **names = veer__calloc(m->n_feature_names + 1, sizeof *names);
    /* The request buffer holds the framing around a full state: a few bytes per float. */
    size_t cap = 64 + VEER_CLIENT_NAME_MAX + 5u * m->state_dim + 16;
    uint8_t *send_buf = c->act_sock ? veer__malloc(cap) : NULL;
    if (names == NULL || (c->act_sock && send_buf == NULL)) {
        veer__free(names);
        veer__free(send_buf);
        veer__wire__reply__free_unpacked(r, &veer__client_heap);
        return veer__error_set(err, VEER_ENOMEM, "", "out of memory storing the model");
    }
    for (size_t i = 0; i < m->n_feature_names; i++)
        names[i] = m->feature_names[i];
    if (c->describe != NULL)
        veer__wire__reply__free_unpacked(c->describe, &veer__client_heap);
    veer__free(c->feature_names);
    if (send_buf != NULL) {
        veer__free(c->send_buf);
        c->send_buf = send_buf;
        c->send_cap = cap;
    }
    c->describe = r;
    c->feature_names = names;
    veer_client_model *v = &c->model;
    memset(v, 0, sizeof *v);
    v->model_version = m->model_version;
    if (m->model_digest.len == sizeof v->digest)
        memcpy(v->digest, m->model_digest.data, sizeof v->digest);
    v->state_dim = m->state_dim;
    v->z_dim = m->z_dim;
    v->feature_names = names;
    v->action_kind = m->action_kind;
    v->action_dim = m->action_dim;
    v->action_count = m->action_count;
    v->action_low = m->n_action_low ? m->action_low : NULL;
    v->action_high = m->n_action_high ? m->action_high : NULL;
    v->fallback_action = m->fallback_action;
    v->decision_step_s = m->decision_step_s;
    v->discount = m->discount;
    v->default_deadline_us = m->default_deadline_us;
    c->have_model = 1;
    if (out != NULL)
        *out = v;
    return 0;
}
