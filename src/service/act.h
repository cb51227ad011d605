/* The act thread: one dedicated thread serving controllers on a ZeroMQ ROUTER socket.
 *
 * Per request it decodes the Request into a preallocated arena, finds the channel in the
 * lock-free channel table, computes the action with its own veer_workspace and packs the reply
 * into a preallocated buffer: no allocation of ours, no lock that admin work can hold, no
 * logging. It answers Act and Describe; anything else gets an EMSGTYPE error naming the admin
 * socket. With batch_max above 1 it takes the requests already queued together (up to
 * batch_max), answers at once those that need no policy (errors, describes, no task, predicted
 * late), evaluates the policy once for the others and then answers them. With threads above 1
 * that pass is shared with helper threads (act_split.h); everything else stays on this thread.
 *
 * Deadlines. The deadline counts from the moment the thread takes the request off the socket
 * (time spent queued inside libzmq before that is invisible to the server; the client's own
 * local deadline covers it). A request whose policy would finish late by the running p99 (or
 * --deadline-percentile) of policy time, or whose reply would leave late, gets the fallback
 * action with VEER_ACT_DEADLINE.
 *
 * Coverage. An action the policy computed for a state beyond the training p99.9 Mahalanobis
 * distance carries VEER_ACT_OUT_OF_COVERAGE (fallback actions do not: they owe nothing to the
 * policy); only that distance test (veer_drift_check) runs on this thread. Every valid state is
 * also copied into a ring for the drift monitor (include/veer/drift.h), whose writer is the loop
 * thread (veer__act_drain_states): the window statistics cost this thread nothing.
 *
 * Unknown channels. An act on a channel nobody has switched yet answers with the fallback action
 * and VEER_ACT_FALLBACK | VEER_ACT_NO_TASK, exactly like a channel that exists with no task: a
 * controller may start before its supervisor, and it needs an action on every tick either way.
 * Malformed requests (bad state, bad channel name) get Error replies. */
#ifndef VEER_SERVICE_ACT_H
#define VEER_SERVICE_ACT_H

#include <stdatomic.h>
#include <stdint.h>

#include "service/channels.h"
#include "veer/runtime.h"

typedef struct veer__act veer__act;

typedef struct veer__act_config {
    void *zmq_ctx;
    const char *endpoint;
    const veer_bundle *bundle;
    veer__channels *channels;
    uint32_t default_deadline_us;
    uint32_t deadline_percentile;     /* 50..100; 0 means 99 */
    uint32_t spin_us;                 /* poll this long without sleeping before blocking */
    uint32_t batch_max;               /* requests answered together at most; 0 or 1: one by one */
    uint32_t threads;                 /* threads sharing a batch's pass (act_split.h); 0, 1: one */
    uint32_t priority;                /* SCHED_FIFO priority of the thread; 0: ordinary */
    int pin;                          /* 1: the thread pins itself to `cpu` before serving */
    uint32_t cpu;
    uint32_t max_message_bytes;
    const uint8_t *server_secret_key; /* 32 bytes: require CURVE; NULL: no authentication */
    int monitors_off; /* 1: no drift monitor, no stage latency recorders (for the overhead
                         benchmark); the coverage flag is then never set */
    uint32_t drift_window; /* states in each drift monitor's window; 0: the monitor's default */
} veer__act_config;

/* Stages of an act request with their own latency recorder. The time a request spends queued
 * inside libzmq before the thread takes it is not measurable here (the request carries no send
 * time), so there is no queue-wait stage. */
typedef enum veer__act_stage {
    VEER__ACT_STAGE_DECODE = 0, /* unpacking the Request into the arena */
    VEER__ACT_STAGE_POLICY = 1, /* the networks, once per batch (only when the policy ran) */
    VEER__ACT_STAGE_REPLY = 2,  /* packing the Reply and handing it to libzmq */
    VEER__ACT_STAGE_TOTAL = 3,  /* off the socket to handed back: every request */
    VEER__ACT_STAGE_COUNT = 4,
} veer__act_stage_id;

/* Act error replies are counted per code, for codes VEER_E1 .. VEER_E(VEER__ACT_ERROR_CODES-1). */
#define VEER__ACT_ERROR_CODES 128

typedef struct veer__act_counters {
    uint64_t acts, fallbacks, deadline_misses, errors, no_task;
    uint64_t policy_passes; /* evaluations of the policy (one per batch that needed it) */
    uint64_t policy_states; /* states those evaluations covered */
} veer__act_counters;

/* Creates the socket, binds it and starts the thread. Returns 0, or VEER_EIO (bind failed;
 * message says why) / VEER_ENOMEM. The caller owns *out. Loop thread. */
int veer__act_start(const veer__act_config *cfg, veer__act **out, veer_error *err);

/* Stops taking requests: the thread answers what is already queued on the socket, closes it
 * and exits; returns once it has. NULL allowed. Loop thread. */
void veer__act_stop(veer__act *a);

/* The drift monitor fed with every valid act state (NULL when the bundle has no training
 * statistics, or with monitors off). Its writer is the thread that calls veer__act_drain_states;
 * read it through veer_drift_snapshot. */
struct veer_drift *veer__act_drift(veer__act *a);

/* Adds up to `max` of the act states waiting in the ring to the service-wide drift monitor and
 * to their channel's monitor (made here on the channel's first state); returns how many. One
 * thread only (veerd's loop), which thereby is every drift monitor's writer. */
uint32_t veer__act_drain_states(veer__act *a, uint32_t max);

/* The drift monitor of the channel in table slot `slot` (veer__channels_index), or NULL when the
 * channel has not acted with a valid state yet, without training statistics, with monitors off,
 * or when its monitor could not be allocated. Only states acted on a channel that was in the
 * table at the time count (an act on a never-switched channel counts for the service only).
 * Same reading rule as veer__act_drift; the thread that drains may also read it directly. */
struct veer_drift *veer__act_channel_drift(veer__act *a, uint32_t slot);

/* States the ring could not take because the drain fell a whole ring behind. Any thread. */
uint64_t veer__act_states_dropped(const veer__act *a);

/* Arrival-to-reply times of act requests (ns), for the metrics endpoint: take intervals with
 * veer_hist_recorder_take from one other thread. */
struct veer_hist_recorder *veer__act_latency(veer__act *a);

/* The recorder of one stage (VEER__ACT_STAGE_TOTAL is veer__act_latency's). NULL with
 * monitors off. Same reading rule. */
struct veer_hist_recorder *veer__act_stage(veer__act *a, veer__act_stage_id stage);

/* Per-channel latency (the total stage) for the first VEER__ACT_CHANNEL_HISTS channels that act:
 * a recorder is bound to a channel by the act thread on the channel's first act and stays bound
 * (channels are never removed). Later channels are counted but have no histogram. Returns the
 * i-th recorder and, through *channel, its channel (NULL while unbound, or with monitors off).
 * Readers as for veer__act_latency. */
#define VEER__ACT_CHANNEL_HISTS 16
struct veer_hist_recorder *veer__act_channel_latency(veer__act *a, uint32_t i, veer__channel **channel);

/* Error replies so far with code `code` (a negative VEER_E*; 0 for codes out of range). */
uint64_t veer__act_errors_by_code(const veer__act *a, int code);

/* Counters so far (any thread; each read atomically). */
void veer__act_counters_get(const veer__act *a, veer__act_counters *out);

#endif
