/* Fuzz target: veerd's admin path (src/service/admin.c, spec.c, registry.c, store.c) decoding
 * Requests from supervisors, served by the real admin module on a real ZeroMQ ROUTER socket
 * (inproc) from a libuv loop, with a real journal in a private directory, the task encoding on
 * libuv's worker pool, and the small fixture bundle.
 *
 * Each input is one request payload, sent behind the empty delimiter the C client uses. The
 * admin module's decoding entry point is static, so the target drives it as a supervisor does.
 * State (tasks, channels, journal) carries over between inputs, as in a running veerd, and is
 * started afresh every 256 inputs so that a finding reproduces from a short history.
 *
 * Beyond "no crash", it checks that every request gets exactly one reply, within 10 s, that
 * decodes as a protocol 1 Reply whose id is the request's (when the request decoded) and whose
 * error, if any, has a negative code and its name; and that the journal replays to the same
 * number of tasks and channels as the running registry holds (DESIGN.md invariant 6). */
#include <errno.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <uv.h>
#include <zmq.h>

#include "base/base.h"
#include "fuzz_common.h"
#include "service/admin.h"
#include "service/journal.h"
#include "service/store.h"
#include "veer_wire.pb-c.h"

#define MAX_MESSAGE 16384u
#define RESTART_EVERY 256

static veer_bundle *bundle;
static void *zctx, *dealer;
static uv_loop_t loop;
static veer__store store;
static veer__admin *admin;
static int inputs_since_start;

static void open_store(veer__store *s)
{
    veer__registry *registry = NULL;
    veer__channels *channels = NULL;
    if (veer__registry_create(32, &registry) != 0 || veer__channels_create(8, &channels) != 0)
        abort();
    *s = (veer__store){.bundle = bundle,
                       .info = veer_bundle_info(bundle),
                       .registry = registry,
                       .channels = channels,
                       .max_samples = 256,
                       .journal_compact_bytes = 16384};
    veer__journal *j = NULL;
    veer_error err;
    if (veer__journal_open(fuzz_dir("admin"), veer__store_replay, s, &j, NULL, &err) != 0) {
        fprintf(stderr, "fuzz_admin: journal: %s\n", err.message);
        abort();
    }
    s->journal = j;
}

static void close_store(veer__store *s)
{
    veer__journal_close(s->journal);
    veer__registry_destroy(s->registry);
    veer__channels_destroy(s->channels);
}

static void start(void)
{
    /* A closed inproc endpoint is released asynchronously, so each start binds a new name. */
    static unsigned generation;
    char endpoint[64];
    snprintf(endpoint, sizeof endpoint, "inproc://fuzz-admin-%u", generation++);
    char path[400];
    snprintf(path, sizeof path, "%s/%s", fuzz_dir("admin"), VEER__JOURNAL_FILE);
    unlink(path);
    open_store(&store);
    veer__admin_config cfg = {.loop = &loop,
                              .zmq_ctx = zctx,
                              .endpoint = endpoint,
                              .store = &store,
                              .max_message_bytes = MAX_MESSAGE,
                              .default_deadline_us = 1000,
                              .version = "fuzz"};
    veer_error err;
    if (veer__admin_start(&cfg, &admin, &err) != 0) {
        fprintf(stderr, "fuzz_admin: %s\n", err.message);
        abort();
    }
    dealer = zmq_socket(zctx, ZMQ_DEALER);
    int linger = 0;
    zmq_setsockopt(dealer, ZMQ_LINGER, &linger, sizeof linger);
    if (zmq_connect(dealer, endpoint) != 0)
        abort();
    inputs_since_start = 0;
}

static void stopped(void *flag)
{
    *(int *)flag = 1;
}

static void stop(void)
{
    int done = 0;
    veer__admin_stop(admin, stopped, &done);
    while (!done)
        uv_run(&loop, UV_RUN_ONCE);
    uv_run(&loop, UV_RUN_NOWAIT);
    veer__admin_close(admin);
    zmq_close(dealer);
    admin = NULL;

    /* What the running registry held, the journal must give back. */
    uint32_t tasks = 0;
    for (uint32_t i = 0; i < veer__registry_count(store.registry); i++)
        tasks += veer__registry_at(store.registry, i)->acknowledged;
    uint32_t channels = veer__channels_count(store.channels);
    close_store(&store);
    veer__store again;
    open_store(&again);
    if (veer__registry_count(again.registry) != tasks ||
        veer__channels_count(again.channels) != channels) {
        fprintf(stderr,
                "fuzz_admin: the journal replays %u tasks and %u channels; veerd held %u and %u\n",
                veer__registry_count(again.registry), veer__channels_count(again.channels), tasks,
                channels);
        abort();
    }
    close_store(&again);
}

static void finish(void)
{
    stop();
    zmq_ctx_term(zctx);
    uv_loop_close(&loop);
    veer_bundle_close(bundle);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    if (bundle == NULL) {
        bundle = fuzz_bundle_open();
        zctx = zmq_ctx_new();
        uv_loop_init(&loop);
        start();
        atexit(finish);
    } else if (inputs_since_start >= RESTART_EVERY) {
        stop();
        start();
    }
    inputs_since_start++;
    /* libzmq drops a peer that sends more than twice the limit: that is its rule, not ours. */
    if (size > 2 * MAX_MESSAGE)
        return 0;
    Veer__Wire__Request *req = veer__wire__request__unpack(NULL, size, data);
    int decodes = req != NULL;
    uint64_t id = req ? req->id : 0;
    veer__wire__request__free_unpacked(req, NULL);

    zmq_send(dealer, "", 0, ZMQ_SNDMORE);
    zmq_send(dealer, data, size, 0);
    zmq_msg_t frames[2];
    int n = 0;
    uint64_t t0 = veer__now_ns();
    zmq_pollitem_t item = {dealer, 0, ZMQ_POLLIN, 0};
    for (;;) {
        veer__admin_drain(admin);
        uv_run(&loop, UV_RUN_NOWAIT);
        if (zmq_poll(&item, 1, 1) == 1)
            break;
        if (veer__now_ns() - t0 > 10000000000ull) {
            fprintf(stderr, "fuzz_admin: no reply within 10 s\n");
            abort();
        }
    }
    for (;;) {
        zmq_msg_init(&frames[n]);
        while (zmq_msg_recv(&frames[n], dealer, 0) < 0) {
            if (errno != EINTR) /* a signal (the leak checker's) may interrupt the wait */
                abort();
        }
        int more = zmq_msg_more(&frames[n]);
        if (n == 0 && (zmq_msg_size(&frames[0]) != 0 || !more)) {
            fprintf(stderr, "fuzz_admin: the reply lost its delimiter\n");
            abort();
        }
        n++;
        if (!more)
            break;
        if (n == 2) {
            fprintf(stderr, "fuzz_admin: a reply in more than two frames\n");
            abort();
        }
    }
    if (n != 2)
        abort();
    Veer__Wire__Reply *r =
        veer__wire__reply__unpack(NULL, zmq_msg_size(&frames[1]), zmq_msg_data(&frames[1]));
    if (r == NULL || r->protocol != 1 || (decodes && r->id != id) ||
        r->body_case == VEER__WIRE__REPLY__BODY__NOT_SET ||
        r->body_case == VEER__WIRE__REPLY__BODY_ACT) {
        fprintf(stderr, "fuzz_admin: a reply that is not a protocol 1 Reply to request %llu\n",
                (unsigned long long)id);
        abort();
    }
    if (r->body_case == VEER__WIRE__REPLY__BODY_ERROR &&
        (r->error->code >= 0 || r->error->name == NULL || r->error->name[0] == '\0'))
        abort();
    veer__wire__reply__free_unpacked(r, NULL);
    zmq_msg_close(&frames[0]);
    zmq_msg_close(&frames[1]);
    return 0;
}
