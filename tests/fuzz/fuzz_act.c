/* Fuzz target: veerd's act path (src/service/act.c and wire.c) decoding Requests, served by the
 * real act thread on a real ZeroMQ ROUTER socket (inproc), with the small fixture bundle and
 * one channel, "arm", switched to a task.
 *
 * Each input is sent from a DEALER socket as the request payload; an input starting with 0xfe
 * is instead cut into several frames (the count in its second byte), to reach the envelope
 * handling. The act thread's decoding entry point is static, so the target drives it the way a
 * controller does, which also covers the receive and reply framing.
 *
 * Beyond "no crash", it checks what every controller relies on: every request gets exactly one
 * reply, whose last frame decodes as a veer.wire.Reply of protocol 1 carrying an act, describe or
 * error body; an error has a negative code with its name; an act reply has action_dim finite
 * actions within the bundle's bounds (DESIGN.md invariant 4), and no deadline fallback unless the
 * request asked for a deadline under 1 s (the server's default here is 2 s). */
#include <errno.h>
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <zmq.h>

#include "base/base.h"
#include "fuzz_common.h"
#include "service/act.h"
#include "service/channels.h"
#include "veer_wire.pb-c.h"

#define MAX_MESSAGE 4096u

static veer_bundle *bundle;
static const veer_model_info *info;
static void *zctx, *dealer;
static veer__channels *channels;
static veer__act *act;
static uint64_t replies,
    describes; /* received, for telling a lost reply from an unanswered request */

static void stop_all(void)
{
    zmq_close(dealer);
    veer__act_stop(act);
    zmq_ctx_term(zctx);
    veer__channels_destroy(channels);
    veer_bundle_close(bundle);
}

static void start(void)
{
    veer_error err;
    bundle = fuzz_bundle_open();
    info = veer_bundle_info(bundle);
    zctx = zmq_ctx_new();
    if (veer__channels_create(8, &channels) != 0)
        abort();
    veer__channel *ch = NULL;
    float z[256];
    for (uint32_t i = 0; i < info->z_dim && i < 256; i++)
        z[i] = (i % 2 ? -1.0f : 1.0f);
    if (veer__channels_get_or_create(channels, "arm", &ch, &err) != 0 ||
        veer__channels_switch(channels, ch, "reach", z, info->z_dim, 1, &err) != 0)
        abort();
    veer__act_config cfg = {.zmq_ctx = zctx,
                            .endpoint = "inproc://fuzz-act",
                            .bundle = bundle,
                            .channels = channels,
                            .default_deadline_us =
                                2000000, /* generous: a fallback here is a finding */
                            .max_message_bytes = MAX_MESSAGE};
    if (veer__act_start(&cfg, &act, &err) != 0) {
        fprintf(stderr, "fuzz_act: %s\n", err.message);
        abort();
    }
    dealer = zmq_socket(zctx, ZMQ_DEALER);
    int timeout_ms = 10000, linger = 0;
    zmq_setsockopt(dealer, ZMQ_RCVTIMEO, &timeout_ms, sizeof timeout_ms);
    zmq_setsockopt(dealer, ZMQ_LINGER, &linger, sizeof linger);
    if (zmq_connect(dealer, "inproc://fuzz-act") != 0)
        abort();
    atexit(stop_all);
}

/* deadline_us of the request: 0 means the server's default (2 s here). */
static void check_reply(const uint8_t *buf, size_t len, uint32_t deadline_us)
{
    Veer__Wire__Reply *r = veer__wire__reply__unpack(NULL, len, buf);
    if (r == NULL || r->protocol != 1) {
        fprintf(stderr, "fuzz_act: a %zu-byte reply that is not a protocol 1 Reply\n", len);
        abort();
    }
    switch (r->body_case) {
    case VEER__WIRE__REPLY__BODY_ERROR:
        if (r->error->code >= 0 || r->error->name == NULL || r->error->name[0] == '\0')
            abort();
        break;
    case VEER__WIRE__REPLY__BODY_DESCRIBE:
        describes++;
        if (r->describe->state_dim != info->state_dim)
            abort();
        break;
    case VEER__WIRE__REPLY__BODY_ACT: {
        const Veer__Wire__ActReply *a = r->act;
        if (a->n_action != info->action_dim)
            abort();
        for (size_t i = 0; i < a->n_action; i++) {
            if (!isfinite(a->action[i]))
                abort();
            if (info->action_kind == VEER_ACTION_CONTINUOUS &&
                (a->action[i] < info->action_low[i] || a->action[i] > info->action_high[i]))
                abort();
        }
        if ((a->flags & VEER_ACT_DEADLINE) != 0 && (deadline_us == 0 || deadline_us >= 1000000)) {
            fprintf(stderr, "fuzz_act: a deadline fallback with a deadline of 1 s or more\n");
            abort();
        }
        break;
    }
    default:
        fprintf(stderr, "fuzz_act: reply body %d\n", (int)r->body_case);
        abort();
    }
    veer__wire__reply__free_unpacked(r, NULL);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    if (act == NULL)
        start();
    /* libzmq drops a peer that sends more than twice the limit: that is its rule, not ours. */
    if (size > 2 * MAX_MESSAGE)
        return 0;
    /* The payload is the last frame; its deadline decides whether a fallback is a finding. */
    const uint8_t *payload = data;
    size_t payload_len = size, frames = 1, step = 0;
    int multi = size >= 2 && data[0] == 0xfe;
    if (multi) {
        frames = 1 + data[1] % 12;
        step = (size - 2) / frames;
        payload = data + 2 + (frames - 1) * step;
        payload_len = size - 2 - (frames - 1) * step;
    }
    uint32_t deadline_us = 0;
    Veer__Wire__Request *req = veer__wire__request__unpack(NULL, payload_len, payload);
    if (req != NULL && req->body_case == VEER__WIRE__REQUEST__BODY_ACT)
        deadline_us = req->act->deadline_us;
    veer__wire__request__free_unpacked(req, NULL);
    if (multi) {
        for (size_t i = 0; i < frames; i++) {
            size_t n = i + 1 == frames ? payload_len : step;
            zmq_send(dealer, data + 2 + i * step, n, i + 1 == frames ? 0 : ZMQ_SNDMORE);
        }
    } else {
        zmq_send(dealer, data, size, 0);
    }
    /* The server echoes the frames before the payload as an envelope; the reply is the last. */
    zmq_msg_t reply;
    zmq_msg_init(&reply);
    uint64_t t0 = veer__now_ns();
    do {
        int got;
        /* A signal (the leak checker stops every thread to scan memory) interrupts the wait. */
        while ((got = zmq_msg_recv(&reply, dealer, 0)) < 0 && errno == EINTR &&
               veer__now_ns() - t0 < 10000000000ull)
            ;
        if (got < 0) {
            veer__act_counters c;
            veer__act_counters_get(act, &c);
            fprintf(stderr,
                    "fuzz_act: no reply within 10 s to a %zu-byte request; %llu replies received "
                    "before it; "
                    "the act thread answered %llu (acts %llu + errors %llu + describes %llu)\n",
                    size, (unsigned long long)replies,
                    (unsigned long long)(c.acts + c.errors + describes), (unsigned long long)c.acts,
                    (unsigned long long)c.errors, (unsigned long long)describes);
            abort();
        }
    } while (zmq_msg_more(&reply));
    replies++;
    check_reply(zmq_msg_data(&reply), zmq_msg_size(&reply), deadline_us);
    zmq_msg_close(&reply);
    return 0;
}
