/* The admin socket, served from veerd's libuv loop: supervisors put, get, list and drop tasks,
 * switch channels, list channels, ask for status and describe. The ROUTER socket's ZMQ_FD is
 * watched with uv_poll; that descriptor is edge-triggered, so every wake-up (and every send,
 * which can swallow the edge) is followed by reading ZMQ_EVENTS until no request is left.
 * Task encoding runs on libuv's worker pool; the reply goes out after the journal's fdatasync.
 * Identical concurrent puts wait on the one encoding already running. */
#ifndef VEER_SERVICE_ADMIN_H
#define VEER_SERVICE_ADMIN_H

#include <stdint.h>
#include <uv.h>

#include "service/act.h"
#include "service/store.h"

typedef struct veer__admin veer__admin;

typedef struct veer__admin_config {
    uv_loop_t *loop;
    void *zmq_ctx;
    const char *endpoint;
    veer__store *store;
    veer__act *act;                   /* for status counters */
    uint32_t max_message_bytes;
    uint32_t default_deadline_us;
    const uint8_t *server_secret_key; /* 32 bytes: CURVE required; NULL: none */
    const char *version;              /* veerd's own */
} veer__admin_config;

/* Binds the socket and starts watching it. VEER_EIO with the reason on a bind failure. */
int veer__admin_start(const veer__admin_config *cfg, veer__admin **out, veer_error *err);

/* Reads every request waiting (also called from a timer as a guard against a lost edge). */
void veer__admin_drain(veer__admin *a);

/* Stops reading requests; puts already encoding still complete and are answered. `done` is
 * called (on the loop) once none is left, possibly before this returns. */
void veer__admin_stop(veer__admin *a, void (*done)(void *), void *data);

/* Closes the socket and frees everything. After veer__admin_stop's `done`. NULL allowed. */
void veer__admin_close(veer__admin *a);

#endif
