/* libveer_client: talking to veerd over ZeroMQ, for controllers (acting) and supervisors (tasks
 * and channels). The messages are proto/veer_wire.proto; this header hides them.
 *
 * One object, veer_client, holds up to two sockets: a DEALER on veerd's act socket (opened when
 * act_endpoint is set) and a DEALER on its admin socket (when admin_endpoint is set).
 *
 * Acting has a hard local deadline. veer_client_act sends the state, then waits on the socket
 * (ppoll on ZeroMQ's notification descriptor, microsecond resolution) only until the deadline.
 * When no reply has arrived by then it writes the model's fallback action, learnt from a
 * describe request when the client opened, sets VEER_ACT_FALLBACK | VEER_ACT_DEADLINE and
 * returns 0: it never waits past the deadline. (It stops waiting up to 60 µs early to absorb
 * the kernel's timer slack; how soon the thread runs again after that is the scheduler's
 * business: run a controller thread with a real-time policy for hard bounds.) A reply that arrives
 * later carries an older sequence number and is thrown away by the next call. An act call allocates
 * nothing in this library: the request is packed into a buffer sized at open, the reply is received
 * into a fixed buffer and unpacked with a bump allocator over a fixed arena. (libzmq itself copies
 * messages longer than 33 bytes into memory it allocates; that is outside our control.)
 *
 * Supervisor calls (put, get, list and drop tasks, switch a channel, list channels, status,
 * describe) wait up to timeout_ms for the reply. They allocate: their results point into memory
 * the client owns and stay valid until the next call on the same client or veer_client_close.
 *
 * Thread safety: a veer_client belongs to one thread at a time, because ZeroMQ sockets are not
 * thread-safe. Open one client per thread (a controller thread and a supervisor thread each
 * open their own); moving a client to another thread needs a full memory barrier between the
 * last call on the old thread and the first on the new one. Different clients need no locking.
 *
 * Errors: functions return 0 or a negative VEER_E* code (veer/error.h). When veerd refuses a
 * request, the code, the offending field and the message are veerd's own Error reply, copied
 * into `err` (NULL allowed). VEER_ETIMEDOUT means veerd did not answer in time.
 *
 * Authentication (CurveZMQ, RFC 26): set server_key to veerd's public key and public_key /
 * secret_key to this client's pair (Z85 text, 40 characters each, as `veer keygen` writes).
 * The admin socket then uses CURVE; the act socket too when act_curve is set.
 */
#ifndef VEER_CLIENT_H
#define VEER_CLIENT_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"
#include "veer/histogram.h"
#include "veer/runtime.h" /* VEER_ACT_* flags and veer_task_spec, shared with the runtime */

#ifdef __cplusplus
extern "C" {
#endif

#define VEER_CLIENT_PROTOCOL 1     /* the wire protocol version this client speaks */
#define VEER_CLIENT_NAME_MAX 128   /* longest channel or task name, including the NUL */
#define VEER_CLIENT_KEY_LEN 40     /* a Z85 CURVE key, without the NUL */
#define VEER_CLIENT_MAX_STATE 4096 /* largest state the act buffers are sized for */

typedef struct veer_client veer_client;

typedef struct veer_client_options {
    const char *act_endpoint;   /* veerd's act socket, e.g. "tcp://127.0.0.1:7710"; NULL: none */
    const char *admin_endpoint; /* veerd's admin socket; NULL: none */
    uint32_t timeout_ms;        /* how long supervisor calls and the describe at open wait for
                                   a reply; 0 means 5000 */
    const char *server_key;     /* veerd's Z85 public key; NULL: no CURVE */
    const char *public_key;     /* this client's Z85 key pair; both required with server_key */
    const char *secret_key;
    int act_curve; /* 1: use CURVE on the act socket too */
} veer_client_options;

/* Everything zeroed: no endpoints, default timeout, no CURVE. */
void veer_client_options_init(veer_client_options *opts);

/* Opens the sockets named in `opts` (the strings are copied). With an act endpoint it asks
 * veerd to describe its model and waits up to timeout_ms for the answer, because acting needs
 * the fallback action and the state length; VEER_ETIMEDOUT when veerd does not answer.
 * Only admin: no request is sent until the first call. On success the caller owns *out and
 * releases it with veer_client_close. Any thread; the client then belongs to that thread. */
int veer_client_open(const veer_client_options *opts, veer_client **out, veer_error *err);

/* Closes the sockets without waiting for unsent messages and frees everything. NULL allowed. */
void veer_client_close(veer_client *client);

/* ---- The model veerd serves -------------------------------------------------------------- */

typedef struct veer_client_model {
    const char *model_version;
    uint8_t digest[32];
    uint32_t state_dim, z_dim;
    const char *const *feature_names; /* state_dim names */
    uint32_t action_kind;             /* VEER_ACTION_CONTINUOUS or VEER_ACTION_DISCRETE */
    uint32_t action_dim, action_count;
    const float *action_low, *action_high; /* action_dim each (continuous) or NULL */
    const float *fallback_action;          /* action_dim */
    float decision_step_s, discount;
    uint32_t default_deadline_us;
} veer_client_model;

/* The model learnt at open (NULL when the client has no act socket and has not called
 * veer_client_describe). Lives as long as the client, across every other call. */
const veer_client_model *veer_client_model_info(const veer_client *client);

/* Asks veerd again (on the act socket when there is one, otherwise admin) and replaces the
 * stored description; *out (may be NULL) points to it. */
int veer_client_describe(veer_client *client, const veer_client_model **out, veer_error *err);

/* ---- Acting (controllers) ---------------------------------------------------------------- */

typedef struct veer_client_act_result {
    uint64_t seq;   /* this call's sequence number */
    float value;    /* Q(s, a, z); 0 with the fallback action */
    uint32_t flags; /* VEER_ACT_* bits: veerd's, or FALLBACK|DEADLINE set locally */
    uint64_t epoch; /* the channel's switch epoch (0 for a local fallback) */
    char task[VEER_CLIENT_NAME_MAX]; /* the task that produced the action, "" when none */
    uint32_t server_us;              /* time veerd spent on the request */
    uint64_t round_trip_ns;          /* send to reply (or to giving up) on this machine's clock */
} veer_client_act_result;

/* Asks for the action for `state` (state_dim floats) on `channel`, waiting at most
 * `deadline_us` microseconds from entry (0: the model's default deadline); veerd is told the
 * same deadline. Writes action_dim floats to `action` and the details to `result` (may be
 * NULL). Returns 0 with the fallback action and VEER_ACT_FALLBACK | VEER_ACT_DEADLINE when the
 * deadline passes first. Returns VEER_ENONFINITE (state holds NaN or infinity), VEER_EINVAL
 * (no act socket, or a channel name too long) without sending anything, or veerd's own error
 * code when it refuses the request; in every case `action` holds the fallback action.
 * Allocates nothing in this library; the thread that owns the client. */
int veer_client_act(veer_client *client, const char *channel, const float *state,
                    uint32_t deadline_us, float *action, veer_client_act_result *result,
                    veer_error *err);

typedef struct veer_client_act_stats {
    uint64_t acts;               /* veer_client_act calls that sent a request */
    uint64_t replies;            /* replies received in time */
    uint64_t deadline_fallbacks; /* calls answered locally with the fallback */
    uint64_t late_discarded;     /* replies thrown away because their seq was not the current one */
    uint64_t bad_replies;        /* replies that did not decode (discarded) */
    uint64_t model_changes;      /* replies from a model other than the one described at open:
                                    veerd was restarted with another bundle, so the stored
                                    fallback may be stale; call veer_client_describe */
} veer_client_act_stats;

void veer_client_act_stats_get(const veer_client *client, veer_client_act_stats *out);

/* The round trip of every act call that sent a request (reply or local fallback), in
 * nanoseconds, recorded by the client's thread into a histogram the client owns (NULL without
 * an act socket). Readers on other threads may read it while the client acts (see
 * veer/histogram.h for the single-writer contract). */
const veer_hist *veer_client_act_histogram(const veer_client *client);

/* ---- Tasks and channels (supervisors) ----------------------------------------------------- */

typedef struct veer_client_task {
    const char *name;
    uint8_t digest[32]; /* BLAKE2b-256 of the canonical specification */
    uint32_t source;    /* VEER_TASK_SAMPLES, VEER_TASK_GOALS or VEER_TASK_REFERENCE */
    uint32_t count;
    double r2;       /* expressiveness; NaN when it does not apply */
    double norm_raw; /* ||z|| before rescaling */
    uint32_t z_dim;
    const float *z;
    uint32_t active_on_count;
    const char *const *active_on; /* channels whose active task this is */
    int encoded;                  /* 0 while veerd is still encoding it */
} veer_client_task;

typedef struct veer_client_channel {
    const char *name;
    const char *task;
    uint64_t epoch;
    uint64_t acts;
} veer_client_channel;

typedef struct veer_client_status {
    const char *model_version;
    const char *version; /* veerd's own */
    int ready;
    double uptime_s;
    uint32_t tasks, channels;
    uint64_t acts, fallbacks, deadline_misses;
} veer_client_status;

/* Registers `spec` under `name`. Each row of spec->states holds `state_dim` floats (the
 * model's state_dim; veerd checks it and answers VEER_EDIM otherwise). spec->states / values are
 * read, not kept; spec->ridge < 0 and VEER_OPT_DEFAULT options leave the choice to the bundle;
 * spec->max_count is not sent (veerd applies its own limit). Values are sent as they are: veerd
 * is the one judge of NaN, empty sets and limits. *out (may be NULL) is veerd's record of the
 * stored task. */
int veer_client_task_put(veer_client *client, const char *name, const veer_task_spec *spec,
                         uint32_t state_dim, const veer_client_task **out, veer_error *err);
int veer_client_task_get(veer_client *client, const char *name, const veer_client_task **out,
                         veer_error *err);
int veer_client_task_list(veer_client *client, const veer_client_task **tasks, size_t *count,
                          veer_error *err);
/* VEER_ETASKACTIVE when the task is active on a channel: switch the channel away first. */
int veer_client_task_drop(veer_client *client, const char *name, veer_error *err);
/* Makes `task` the channel's active task (creating the channel on its first switch). *out (may
 * be NULL) is the channel after the switch. */
int veer_client_switch(veer_client *client, const char *channel, const char *task,
                       const veer_client_channel **out, veer_error *err);
int veer_client_channels(veer_client *client, const veer_client_channel **channels, size_t *count,
                         veer_error *err);
int veer_client_status_get(veer_client *client, const veer_client_status **out, veer_error *err);

#ifdef __cplusplus
}
#endif
#endif
