/* Wire helpers shared by the act thread and the admin loop: receiving one ROUTER request
 * (routing envelope + one payload frame), sending a reply behind the same envelope, and packing
 * Error and Describe replies. Nothing here allocates except libzmq itself (which allocates for
 * frames over 33 bytes; that is libzmq's cost and outside our control). */
#ifndef VEER_SERVICE_WIRE_H
#define VEER_SERVICE_WIRE_H

#include <stddef.h>
#include <stdint.h>

#include <zmq.h>

#include "veer/runtime.h"
#include "veer_wire.pb-c.h"

#define VEER__PROTOCOL 1
#define VEER__ENVELOPE_MAX 7 /* routing frames kept; a request has at most this many + payload */

/* One received request: the routing frames (identity, and the empty delimiter a REQ peer adds)
 * and the payload. Initialise once, reuse for every request. */
typedef struct veer__wire_msg {
    zmq_msg_t frames[VEER__ENVELOPE_MAX + 1];
    int n;            /* frames received, payload last */
    int overflow;     /* 1: the request had more frames than we keep (the extra were dropped) */
} veer__wire_msg;

void veer__wire_msg_init(veer__wire_msg *m);
void veer__wire_msg_close(veer__wire_msg *m);

/* Receives one multi-frame request (flags: 0 or ZMQ_DONTWAIT). Returns 0, or -1 with errno
 * (EAGAIN when nothing is waiting). */
int veer__wire_recv(void *socket, veer__wire_msg *m, int flags);

static inline const uint8_t *veer__wire_payload(veer__wire_msg *m, size_t *len)
{
    *len = zmq_msg_size(&m->frames[m->n - 1]);
    return zmq_msg_data(&m->frames[m->n - 1]);
}

/* Sends the envelope of `m` (consumed) and then `len` bytes of `reply`. Returns 0 or -1. */
int veer__wire_send(void *socket, veer__wire_msg *m, const void *reply, size_t len);

/* Creates a ROUTER socket for `endpoint` and binds it: libzmq drops connections that send more
 * than twice max_message_bytes; CURVE server with `secret_key` (32 bytes) and ZAP `domain` when
 * the key is not NULL; receive timeout `rcvtimeo_ms` (-1: none). VEER_EIO naming `flag` when the
 * bind fails. */
int veer__wire_router(void *zmq_ctx, const char *endpoint, const char *flag, uint32_t max_message_bytes,
                      int rcvtimeo_ms, const uint8_t *secret_key, const char *domain, void **out, veer_error *err);

/* Packs a Reply carrying `err` (code, name, message, field) into buf; returns the size, or 0
 * when cap is too small (it never is for VEER__WIRE_ERROR_CAP). */
#define VEER__WIRE_ERROR_CAP (64 + VEER_ERROR_FIELD_MAX + VEER_ERROR_MESSAGE_MAX)
size_t veer__wire_pack_error(uint64_t id, const veer_error *err, uint8_t *buf, size_t cap);

/* Fills `d` from the model (pointers into `info` and `scratch`, which must hold
 * info->state_dim pointers) for describe replies. */
void veer__wire_describe(Veer__Wire__DescribeReply *d, const veer_model_info *info,
                         uint32_t default_deadline_us, char **scratch);

#endif
