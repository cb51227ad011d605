/* libveer_client's act path: one state out, one action back, never later than the caller's
 * deadline.
 *
 * The wait is a ppoll on ZeroMQ's notification descriptor rather than zmq_poll, because
 * zmq_poll counts its timeout in milliseconds and a 1 kHz controller's whole budget is one
 * millisecond. The descriptor is edge-triggered: it only says "something changed", so every
 * wake-up is followed by non-blocking receives until ZeroMQ says nothing is waiting, and only
 * then do we sleep again. Replies whose sequence number is not this call's are late answers to
 * calls that already gave up; they are counted and dropped. */
#define _GNU_SOURCE /* ppoll */
#include "client_internal.h"

#include <math.h>
#include <poll.h>
#include <stdio.h>
#include <string.h>
#include <zmq.h>

#define VEER__CLIENT_WAKE_SLACK_NS 60000u

void veer_client_act_stats_get(const veer_client *c, veer_client_act_stats *out)
{
    *out = c->stats;
}

const veer_hist *veer_client_act_histogram(const veer_client *c)
{
    return c->histogram;
}

static void fill_fallback(const veer_client *c, float *action, veer_client_act_result *res,
                          uint64_t seq, uint32_t flags, uint64_t t0)
{
    memcpy(action, c->model.fallback_action, c->model.action_dim * sizeof *action);
    if (res != NULL) {
        res->seq = seq;
        res->value = 0.0f;
        res->flags = flags;
        res->epoch = 0;
        res->task[0] = '\0';
        res->server_us = 0;
        res->round_trip_ns = veer__now_ns() - t0;
    }
}

/* Accepts a reply only when it is whole: the right length and finite, so a garbled reply can
 * never reach an actuator. */
static int reply_usable(const veer_client *c, const Veer__Wire__ActReply *a)
{
    if (a->n_action != c->model.action_dim)
        return 0;
    for (size_t i = 0; i < a->n_action; i++)
        if (!isfinite(a->action[i]))
            return 0;
    return 1;
}

int veer_client_act(veer_client *c, const char *channel, const float *state, uint32_t deadline_us,
                    float *action, veer_client_act_result *res, veer_error *err)
{
    uint64_t t0 = veer__now_ns();
    if (c->act_sock == NULL || !c->have_model)
        return veer__error_set(err, VEER_EINVAL, "act_endpoint",
                               "this client was opened without an act endpoint");
    uint64_t seq = c->next_id++;
    fill_fallback(c, action, res, seq, VEER_ACT_FALLBACK, t0);
    if (channel == NULL || memchr(channel, '\0', VEER_CLIENT_NAME_MAX) == NULL)
        return veer__error_set(err, VEER_EINVAL, "channel",
                               "the channel name is missing or longer than %d bytes",
                               VEER_CLIENT_NAME_MAX - 1);
    for (uint32_t i = 0; i < c->model.state_dim; i++) {
        if (!isfinite(state[i]))
            return veer__error_set(err, VEER_ENONFINITE, "state", "state[%u] is %s", i,
                                   isnan(state[i]) ? "NaN" : "infinite");
    }
    if (deadline_us == 0)
        deadline_us = c->model.default_deadline_us ? c->model.default_deadline_us : 1000u;
    uint64_t deadline = t0 + (uint64_t)deadline_us * 1000u;
    /* Linux lets a sleeping thread wake up to its timer slack (50 µs by default) late, so the
     * wait ends that much before the deadline: giving up a little early is harmless, handing
     * the controller its fallback late is not. Short deadlines keep nine tenths of their time. */
    uint64_t slack = (uint64_t)deadline_us * 100u;
    if (slack > VEER__CLIENT_WAKE_SLACK_NS)
        slack = VEER__CLIENT_WAKE_SLACK_NS;

    Veer__Wire__ActRequest a = VEER__WIRE__ACT_REQUEST__INIT;
    a.channel = (char *)channel;
    a.n_state = c->model.state_dim;
    a.state = (float *)state;
    a.deadline_us = deadline_us;
    a.seq = seq;
    Veer__Wire__Request req = VEER__WIRE__REQUEST__INIT;
    req.protocol = VEER_CLIENT_PROTOCOL;
    req.id = seq;
    req.body_case = VEER__WIRE__REQUEST__BODY_ACT;
    req.act = &a;
    size_t n = veer__wire__request__get_packed_size(&req);
    if (n > c->send_cap)
        return veer__error_set(err, VEER_EINVAL, "channel",
                               "the request does not fit the "
                               "act buffer sized at open; shorten the channel name");
    veer__wire__request__pack(&req, c->send_buf);
    if (zmq_send(c->act_sock, c->send_buf, n, ZMQ_DONTWAIT) != (int)n) {
        /* Not connected (or the queue is full because veerd stopped reading): there will be
         * no answer in time, so answer now. */
        c->stats.deadline_fallbacks++;
        fill_fallback(c, action, res, seq, VEER_ACT_FALLBACK | VEER_ACT_DEADLINE, t0);
        return 0;
    }
    c->stats.acts++;

    for (;;) {
        long got = veer__client_recv_nowait(c, c->act_sock);
        if (got == -2) {
            c->stats.bad_replies++;
            continue;
        }
        if (got >= 0) {
            veer__client_arena_reset(c);
            Veer__Wire__Reply *r =
                veer__wire__reply__unpack(&c->arena_alloc, (size_t)got, c->recv_buf);
            if (r == NULL) {
                c->stats.bad_replies++;
                continue;
            }
            if (r->body_case == VEER__WIRE__REPLY__BODY_ACT && r->act->seq == seq) {
                const Veer__Wire__ActReply *ar = r->act;
                if (!reply_usable(c, ar)) {
                    c->stats.bad_replies++;
                    continue;
                }
                memcpy(action, ar->action, c->model.action_dim * sizeof *action);
                c->stats.replies++;
                if (ar->model_version != NULL && ar->model_version[0] != '\0' &&
                    strcmp(ar->model_version, c->model.model_version) != 0)
                    c->stats.model_changes++;
                veer_hist_record(c->histogram, veer__now_ns() - t0);
                if (res != NULL) {
                    res->value = isfinite(ar->value) ? ar->value : 0.0f;
                    res->flags = ar->flags;
                    res->epoch = ar->epoch;
                    snprintf(res->task, sizeof res->task, "%s", ar->task ? ar->task : "");
                    res->server_us = ar->server_us;
                    res->round_trip_ns = veer__now_ns() - t0;
                }
                return 0;
            }
            if (r->body_case == VEER__WIRE__REPLY__BODY_ERROR && r->id == seq) {
                c->stats.replies++;
                if (res != NULL)
                    res->round_trip_ns = veer__now_ns() - t0;
                return veer__client_error_from_reply(r->error, err);
            }
            c->stats.late_discarded++;
            continue;
        }
        uint64_t now = veer__now_ns();
        if (now + slack >= deadline)
            break;
        uint64_t left = deadline - slack - now;
        struct timespec ts = {(time_t)(left / 1000000000u), (long)(left % 1000000000u)};
        struct pollfd pfd = {c->act_fd, POLLIN, 0};
        ppoll(&pfd, 1, &ts, NULL);
    }
    c->stats.deadline_fallbacks++;
    veer_hist_record(c->histogram, veer__now_ns() - t0);
    fill_fallback(c, action, res, seq, VEER_ACT_FALLBACK | VEER_ACT_DEADLINE, t0);
    return 0;
}
