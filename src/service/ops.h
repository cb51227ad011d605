/* The operators' side of veerd: the HTTP endpoint (/metrics, /healthz, /readyz), the metrics it
 * renders, the drift monitors' updates from the act thread's state ring (service-wide and per
 * channel), and the timer that turns the act thread's counters into events (bursts of deadline
 * misses) and per-channel drift level changes into drift events. It reads the act thread only
 * through its atomics, recorders and the drift monitors' snapshots, so nothing here can make an
 * act wait. Loop thread only. */
#ifndef VEER_SERVICE_OPS_H
#define VEER_SERVICE_OPS_H

#include <stdint.h>
#include <uv.h>

#include "service/act.h"
#include "service/store.h"

typedef struct veer__ops veer__ops;

typedef struct veer__ops_config {
    uv_loop_t *loop;
    const char *http_address; /* "HOST:PORT", or "" for no HTTP endpoint */
    veer__store *store;       /* its events socket gets the burst events */
    veer__act *act;
    const char *version;
    int monitors_off;
    uint32_t burst_misses;    /* a burst: this many deadline misses (0: 10) ... */
    uint32_t burst_window_ms; /* ... within this window (0: 1000) */
} veer__ops_config;

/* Starts the timer and, with an address, the HTTP endpoint. VEER_ECONFIG / VEER_EIO (field
 * "--http") when the address is bad or cannot be bound, VEER_ENOMEM. */
int veer__ops_start(const veer__ops_config *cfg, veer__ops **out, veer_error *err);

/* The HTTP port bound, or -1 without HTTP. */
int veer__ops_http_port(const veer__ops *o);

/* Stops the timer and the HTTP endpoint; after it returns nothing here reads the act thread, so
 * the act thread may be stopped. The memory goes once libuv has closed the handles (the loop
 * must run on). NULL allowed. */
void veer__ops_stop(veer__ops *o);

#endif
