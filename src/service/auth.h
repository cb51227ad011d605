/* Who may connect: CurveZMQ (RFC 26) through libzmq's CURVE mechanism, with a ZAP handler
 * (RFC 27) that admits a client only when its long-term public key is in the allowed-keys file;
 * and, with no keys configured, the rule that the admin socket binds only to loopback or ipc://.
 *
 * Key files are Z85 text as `veer keygen` writes them: the server's secret key file holds one
 * 40-character line; the allowed-keys file holds one public key per line, with blank lines and
 * lines starting with '#' (comments) allowed. The ZAP socket is served from veerd's loop thread. */
#ifndef VEER_SERVICE_AUTH_H
#define VEER_SERVICE_AUTH_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"

#define VEER__ZAP_ADMIN_DOMAIN "veer.admin"
#define VEER__ZAP_ACT_DOMAIN "veer.act"

/* 1 when `endpoint` is ipc:// or tcp:// on 127.0.0.0/8, localhost or [::1]; 0 otherwise. */
int veer__auth_endpoint_is_local(const char *endpoint);

/* Reads the server's secret key and derives its public key (Z85, 40 characters + NUL).
 * VEER_ECONFIG naming `flag` when the file is missing or does not hold one Z85 key. */
int veer__auth_read_secret(const char *path, const char *flag, uint8_t secret[32], char public_z85[41],
                           veer_error *err);

typedef struct veer__keyset {
    uint32_t count;
    uint8_t (*keys)[32];
} veer__keyset;

/* Reads the allowed public keys. VEER_ECONFIG naming `flag` and the line for a bad key. An
 * empty file is allowed (nobody gets in) but logged. */
int veer__auth_read_allowed(const char *path, const char *flag, veer__keyset *out, veer_error *err);
void veer__keyset_free(veer__keyset *k);
int veer__keyset_contains(const veer__keyset *k, const uint8_t key[32]);

typedef struct veer__zap veer__zap;

/* Binds the ZAP handler socket (inproc://zeromq.zap.01) in `zmq_ctx`; `keys` must outlive it.
 * Must be open before any CURVE socket accepts a connection. */
int veer__zap_open(void *zmq_ctx, const veer__keyset *keys, veer__zap **out, veer_error *err);
void veer__zap_close(veer__zap *z); /* NULL allowed */
void *veer__zap_socket(veer__zap *z);

/* Answers every ZAP request waiting (non-blocking). Returns how many were denied so far. */
uint64_t veer__zap_serve(veer__zap *z);

#endif
