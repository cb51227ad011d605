/* ROUTER framing and the replies both sockets send (see wire.h). A ROUTER socket hands us the
 * peer's identity frame, then whatever the peer sent: a DEALER sends the payload alone, a REQ
 * adds an empty delimiter before it. Echoing every frame before the payload back in front of the
 * reply serves both kinds of client without asking which one it is. */
#include "service/wire.h"

#include <errno.h>
#include <string.h>

#include "base/base.h"

void veer__wire_msg_init(veer__wire_msg *m)
{
    for (int i = 0; i <= VEER__ENVELOPE_MAX; i++)
        zmq_msg_init(&m->frames[i]);
    m->n = 0;
    m->overflow = 0;
}

void veer__wire_msg_close(veer__wire_msg *m)
{
    for (int i = 0; i <= VEER__ENVELOPE_MAX; i++)
        zmq_msg_close(&m->frames[i]);
    m->n = 0;
}

int veer__wire_recv(void *socket, veer__wire_msg *m, int flags)
{
    m->n = 0;
    m->overflow = 0;
    for (;;) {
        int slot = m->n <= VEER__ENVELOPE_MAX ? m->n : VEER__ENVELOPE_MAX;
        if (m->n > VEER__ENVELOPE_MAX) {
            /* Too many frames: keep overwriting the last slot so the message is consumed. */
            m->overflow = 1;
        }
        if (zmq_msg_recv(&m->frames[slot], socket, m->n == 0 ? flags : 0) < 0) {
            if (m->n == 0)
                return -1;
            if (errno == EINTR)
                continue;
            return -1;
        }
        if (m->n <= VEER__ENVELOPE_MAX)
            m->n++;
        if (!zmq_msg_more(&m->frames[slot]))
            return 0;
    }
}

int veer__wire_send(void *socket, veer__wire_msg *m, const void *reply, size_t len)
{
    for (int i = 0; i < m->n - 1; i++) {
        if (zmq_msg_send(&m->frames[i], socket, ZMQ_SNDMORE | ZMQ_DONTWAIT) < 0)
            return -1;
    }
    /* A ROUTER drops what it cannot route (a peer gone, or its pipe full) rather than block:
     * a slow controller must not stall the act thread for the others. */
    return zmq_send(socket, reply, len, ZMQ_DONTWAIT) < 0 ? -1 : 0;
}

size_t veer__wire_pack_error(uint64_t id, const veer_error *err, uint8_t *buf, size_t cap)
{
    Veer__Wire__Error e = VEER__WIRE__ERROR__INIT;
    e.code = err->code;
    e.name = (char *)veer_errname(err->code);
    e.message = (char *)err->message;
    e.field = (char *)err->field;
    Veer__Wire__Reply r = VEER__WIRE__REPLY__INIT;
    r.protocol = VEER__PROTOCOL;
    r.id = id;
    r.body_case = VEER__WIRE__REPLY__BODY_ERROR;
    r.error = &e;
    if (veer__wire__reply__get_packed_size(&r) > cap)
        return 0;
    return veer__wire__reply__pack(&r, buf);
}

void veer__wire_describe(Veer__Wire__DescribeReply *d, const veer_model_info *info,
                         uint32_t default_deadline_us, char **scratch)
{
    veer__wire__describe_reply__init(d);
    d->model_version = (char *)info->model_version;
    d->model_digest.data = (uint8_t *)info->digest;
    d->model_digest.len = 32;
    d->state_dim = info->state_dim;
    d->z_dim = info->z_dim;
    for (uint32_t i = 0; i < info->state_dim; i++)
        scratch[i] = (char *)info->feature_names[i];
    d->n_feature_names = info->state_dim;
    d->feature_names = scratch;
    d->action_kind = (uint32_t)info->action_kind;
    d->action_dim = info->action_dim;
    d->action_count = info->action_count;
    if (info->action_low != NULL) {
        d->n_action_low = d->n_action_high = info->action_dim;
        d->action_low = (float *)info->action_low;
        d->action_high = (float *)info->action_high;
    }
    d->n_fallback_action = info->action_dim;
    d->fallback_action = (float *)info->fallback_action;
    d->decision_step_s = info->decision_step_s;
    d->discount = info->discount;
    d->default_deadline_us = default_deadline_us;
}

int veer__wire_router(void *zmq_ctx, const char *endpoint, const char *flag, uint32_t max_message_bytes,
                      int rcvtimeo_ms, const uint8_t *secret_key, const char *domain, void **out, veer_error *err)
{
    void *s = zmq_socket(zmq_ctx, ZMQ_ROUTER);
    if (s == NULL)
        return veer__error_set(err, VEER_EIO, flag, "%s: cannot create a socket: %s", flag, zmq_strerror(errno));
    /* Past twice the handled size libzmq drops the connection itself, so a runaway sender
     * cannot make us buffer an arbitrary amount; up to that size the sender gets EMSGSIZE. */
    int64_t hard = 2 * (int64_t)max_message_bytes;
    int linger = 1000, one = 1;
    zmq_setsockopt(s, ZMQ_MAXMSGSIZE, &hard, sizeof hard);
    zmq_setsockopt(s, ZMQ_RCVTIMEO, &rcvtimeo_ms, sizeof rcvtimeo_ms);
    zmq_setsockopt(s, ZMQ_LINGER, &linger, sizeof linger);
    if (strchr(endpoint, '[') != NULL)
        zmq_setsockopt(s, ZMQ_IPV6, &one, sizeof one);
    if (secret_key != NULL) {
        /* libzmq 4.3 admits every CURVE client when no ZAP handler is bound, so main opens the
         * handler before any such socket exists (ZMQ_ZAP_ENFORCE_DOMAIN is still a draft). */
        zmq_setsockopt(s, ZMQ_CURVE_SERVER, &one, sizeof one);
        zmq_setsockopt(s, ZMQ_CURVE_SECRETKEY, secret_key, 32);
        zmq_setsockopt(s, ZMQ_ZAP_DOMAIN, domain, strlen(domain));
    }
    if (zmq_bind(s, endpoint) != 0) {
        int e = errno;
        zmq_close(s);
        return veer__error_set(err, VEER_EIO, flag, "%s: cannot bind to '%s': %s", flag, endpoint, zmq_strerror(e));
    }
    *out = s;
    return 0;
}
