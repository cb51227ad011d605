/* Private to libveer_client: the client object and the helpers its three source files share
 * (client.c opens, closes and describes; client_act.c is the controller's act path;
 * client_admin.c the supervisor calls). Not installed and not for users of the library. */
#ifndef VEER_CLIENT_INTERNAL_H
#define VEER_CLIENT_INTERNAL_H

#include <protobuf-c/protobuf-c.h>

#include "base/base.h"
#include "veer/client.h"
#include "veer_wire.pb-c.h"

/* Buffers for the act path, sized once at open. A request is a few bytes of framing plus the
 * state; a reply the action plus two short strings. Replies longer than the receive buffer
 * are not ours to decode and are discarded. */
#define VEER__CLIENT_RECV_CAP 16384u
#define VEER__CLIENT_ARENA_CAP 65536u

struct veer_client {
    void *zctx;
    void *act_sock;   /* DEALER to veerd's act ROUTER, or NULL */
    void *admin_sock; /* DEALER to veerd's admin ROUTER, or NULL */
    int act_fd;       /* ZeroMQ's notification descriptor for act_sock (edge-triggered) */
    uint32_t timeout_ms;
    uint64_t next_id; /* request ids and act sequence numbers, one counter, never reused */

    /* The model, from the last describe reply (kept unpacked; the view points into it). */
    Veer__Wire__Reply *describe;
    const char **feature_names;
    veer_client_model model;
    int have_model;

    /* Act path memory: packed request, received reply, and the bump arena protobuf-c unpacks
     * the reply into. All allocated at open. */
    uint8_t *send_buf;
    size_t send_cap;
    uint8_t *recv_buf;
    uint8_t *arena;
    size_t arena_used;
    ProtobufCAllocator arena_alloc;
    veer_client_act_stats stats;
    veer_hist *histogram; /* act round trips (act socket only) */

    /* The last supervisor reply and the views built over it; freed on the next call. */
    Veer__Wire__Reply *last;
    void *views;
};

/* Frees the last supervisor reply and the views over it. */
void veer__client_release_last(veer_client *c);

/* protobuf-c allocators: the heap one goes through veer__malloc, the arena one never frees. */
extern ProtobufCAllocator veer__client_heap;
void veer__client_arena_reset(veer_client *c);

/* Sends one request without blocking, behind the envelope veerd expects (an empty delimiter on
 * the admin socket, none on the act socket). Packs into a stack buffer, or a heap one for long
 * requests (supervisor calls only). Returns 0, VEER_ETIMEDOUT when no connection is up to take
 * it, or VEER_EIO / VEER_ENOMEM, with `err`. */
int veer__client_send(veer_client *c, void *sock, const Veer__Wire__Request *req, veer_error *err);

/* Receives one message without blocking into c->recv_buf: returns its body length, -1 when
 * nothing is waiting, or -2 when the body was too long (discarded). */
long veer__client_recv_nowait(veer_client *c, void *sock);

/* Sends `req` on `sock` and waits up to timeout_ms for the reply with the same id, unpacked on
 * the heap into *out (the caller frees it with veer__wire__reply__free_unpacked). A veerd
 * Error reply becomes its code, field and message in `err`, and *out stays NULL. */
int veer__client_call(veer_client *c, void *sock, Veer__Wire__Request *req, Veer__Wire__Reply **out,
                      veer_error *err);

/* Copies a veerd Error reply into `err` and returns its code (VEER_EBADMSG when the code is not
 * a negative number). */
int veer__client_error_from_reply(const Veer__Wire__Error *e, veer_error *err);

#endif
