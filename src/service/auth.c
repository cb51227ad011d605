/* Key files, the loopback rule and the ZAP handler (see auth.h). The handler answers 200 only
 * for the CURVE mechanism, one of our two domains and a listed key; everything else gets 400,
 * and libzmq then closes the connection before any request reaches veerd. */
#include "service/auth.h"

#include <ctype.h>
#include <errno.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <zmq.h>

#include "base/base.h"
#include "service/log.h"

int veer__auth_endpoint_is_local(const char *endpoint)
{
    if (strncmp(endpoint, "ipc://", 6) == 0)
        return 1;
    if (strncmp(endpoint, "tcp://", 6) != 0)
        return 0;
    const char *host = endpoint + 6;
    const char *colon = strrchr(host, ':');
    if (colon == NULL)
        return 0;
    size_t n = (size_t)(colon - host);
    if ((n == 9 && strncmp(host, "localhost", 9) == 0) || (n == 5 && strncmp(host, "[::1]", 5) == 0))
        return 1;
    /* 127.a.b.c with every part a number from 0 to 255. */
    if (n < 7 || strncmp(host, "127.", 4) != 0)
        return 0;
    int parts = 0;
    const char *p = host;
    while (p < colon) {
        int v = 0, digits = 0;
        while (p < colon && isdigit((unsigned char)*p)) {
            v = v * 10 + (*p - '0');
            p++;
            digits++;
        }
        if (digits == 0 || digits > 3 || v > 255)
            return 0;
        parts++;
        if (p < colon) {
            if (*p != '.')
                return 0;
            p++;
        }
    }
    return parts == 4;
}

/* Trims a line in place; a line whose first visible character is '#' is a comment. Only at
 * the start: '#' is one of Z85's 85 characters, so it may appear inside a key. */
static char *trim(char *line)
{
    while (isspace((unsigned char)*line))
        line++;
    if (*line == '#')
        *line = '\0';
    size_t n = strlen(line);
    while (n > 0 && isspace((unsigned char)line[n - 1]))
        line[--n] = '\0';
    return line;
}

static int decode_key(const char *text, uint8_t key[32])
{
    return strlen(text) == 40 && zmq_z85_decode(key, text) != NULL;
}

int veer__auth_read_secret(const char *path, const char *flag, uint8_t secret[32], char public_z85[41],
                           veer_error *err)
{
    FILE *f = fopen(path, "r");
    if (f == NULL)
        return veer__error_set(err, VEER_ECONFIG, flag, "%s: cannot open '%s': %s", flag, path, strerror(errno));
    char line[256];
    int found = 0;
    while (!found && fgets(line, sizeof line, f) != NULL) {
        char *t = trim(line);
        if (*t == '\0')
            continue;
        if (!decode_key(t, secret)) {
            fclose(f);
            return veer__error_set(err, VEER_ECONFIG, flag,
                                   "%s: '%s' does not hold a 40-character Z85 secret key (make one with `veer "
                                   "keygen`)",
                                   flag, path);
        }
        found = 1;
    }
    fclose(f);
    if (!found)
        return veer__error_set(err, VEER_ECONFIG, flag, "%s: '%s' is empty", flag, path);
    char secret_z85[41];
    zmq_z85_encode(secret_z85, secret, 32);
    if (zmq_curve_public(public_z85, secret_z85) != 0)
        return veer__error_set(err, VEER_ECONFIG, flag, "%s: cannot derive the public key: %s", flag,
                               zmq_strerror(errno));
    memset(secret_z85, 0, sizeof secret_z85);
    return 0;
}

int veer__auth_read_allowed(const char *path, const char *flag, veer__keyset *out, veer_error *err)
{
    memset(out, 0, sizeof *out);
    FILE *f = fopen(path, "r");
    if (f == NULL)
        return veer__error_set(err, VEER_ECONFIG, flag, "%s: cannot open '%s': %s", flag, path, strerror(errno));
    char line[256];
    uint32_t cap = 0, lineno = 0;
    int rc = 0;
    while (fgets(line, sizeof line, f) != NULL) {
        lineno++;
        char *t = trim(line);
        if (*t == '\0')
            continue;
        uint8_t key[32];
        if (!decode_key(t, key)) {
            rc = veer__error_set(err, VEER_ECONFIG, flag,
                                 "%s: line %u of '%s' is not a 40-character Z85 public key", flag, lineno, path);
            break;
        }
        if (out->count == cap) {
            uint32_t ncap = cap ? 2 * cap : 8;
            void *nk = veer__realloc(out->keys, (size_t)ncap * 32);
            if (nk == NULL) {
                rc = veer__error_set(err, VEER_ENOMEM, flag, NULL);
                break;
            }
            out->keys = nk;
            cap = ncap;
        }
        memcpy(out->keys[out->count++], key, 32);
    }
    fclose(f);
    if (rc < 0) {
        veer__keyset_free(out);
        return rc;
    }
    if (out->count == 0)
        veer__log_warn("%s: '%s' lists no keys: no supervisor can connect", flag, path);
    return 0;
}

void veer__keyset_free(veer__keyset *k)
{
    veer__free(k->keys);
    k->keys = NULL;
    k->count = 0;
}

int veer__keyset_contains(const veer__keyset *k, const uint8_t key[32])
{
    for (uint32_t i = 0; i < k->count; i++)
        if (memcmp(k->keys[i], key, 32) == 0)
            return 1;
    return 0;
}

struct veer__zap {
    void *socket;
    const veer__keyset *keys;
    uint64_t denied;
};

int veer__zap_open(void *zmq_ctx, const veer__keyset *keys, veer__zap **out, veer_error *err)
{
    veer__zap *z = veer__calloc(1, sizeof *z);
    if (z == NULL)
        return veer__error_set(err, VEER_ENOMEM, "zap", NULL);
    z->keys = keys;
    z->socket = zmq_socket(zmq_ctx, ZMQ_REP);
    int linger = 0;
    if (z->socket != NULL)
        zmq_setsockopt(z->socket, ZMQ_LINGER, &linger, sizeof linger);
    if (z->socket == NULL || zmq_bind(z->socket, "inproc://zeromq.zap.01") != 0) {
        int rc = veer__error_set(err, VEER_EIO, "--server-key", "cannot start the ZAP handler: %s",
                                 zmq_strerror(errno));
        if (z->socket != NULL)
            zmq_close(z->socket);
        veer__free(z);
        return rc;
    }
    *out = z;
    return 0;
}

void veer__zap_close(veer__zap *z)
{
    if (z == NULL)
        return;
    zmq_close(z->socket);
    veer__free(z);
}

void *veer__zap_socket(veer__zap *z) { return z->socket; }

#define ZAP_FRAMES 8

uint64_t veer__zap_serve(veer__zap *z)
{
    for (;;) {
        zmq_msg_t f[ZAP_FRAMES];
        int n = 0;
        for (int i = 0; i < ZAP_FRAMES; i++)
            zmq_msg_init(&f[i]);
        int more = 1;
        while (more) {
            int slot = n < ZAP_FRAMES ? n : ZAP_FRAMES - 1;
            if (zmq_msg_recv(&f[slot], z->socket, n == 0 ? ZMQ_DONTWAIT : 0) < 0)
                break;
            more = zmq_msg_more(&f[slot]);
            if (n < ZAP_FRAMES)
                n++;
        }
        if (n == 0) {
            for (int i = 0; i < ZAP_FRAMES; i++)
                zmq_msg_close(&f[i]);
            return z->denied;
        }
        /* version, request id, domain, address, routing id, mechanism, credentials... */
        const char *status = "400", *text = "denied";
        char domain[32] = "", mech[16] = "", address[64] = "";
        if (n >= 6) {
            snprintf(domain, sizeof domain, "%.*s", (int)zmq_msg_size(&f[2]), (const char *)zmq_msg_data(&f[2]));
            snprintf(address, sizeof address, "%.*s", (int)zmq_msg_size(&f[3]), (const char *)zmq_msg_data(&f[3]));
            snprintf(mech, sizeof mech, "%.*s", (int)zmq_msg_size(&f[5]), (const char *)zmq_msg_data(&f[5]));
        }
        int version_ok = n >= 1 && zmq_msg_size(&f[0]) == 3 && memcmp(zmq_msg_data(&f[0]), "1.0", 3) == 0;
        int domain_ok = strcmp(domain, VEER__ZAP_ADMIN_DOMAIN) == 0 || strcmp(domain, VEER__ZAP_ACT_DOMAIN) == 0;
        if (version_ok && domain_ok && n == 7 && strcmp(mech, "CURVE") == 0 && zmq_msg_size(&f[6]) == 32 &&
            veer__keyset_contains(z->keys, zmq_msg_data(&f[6]))) {
            status = "200";
            text = "OK";
        } else {
            z->denied++;
            char key[41] = "";
            if (n == 7 && zmq_msg_size(&f[6]) == 32)
                zmq_z85_encode(key, zmq_msg_data(&f[6]), 32);
            veer__log_warn("auth: refused a %s connection from %s on %s%s%s", mech[0] ? mech : "?",
                           address[0] ? address : "?", domain[0] ? domain : "?", key[0] ? " with key " : "", key);
        }
        /* Reply: version, request id, status code, status text, user id, metadata. */
        const char *user = status[0] == '2' ? domain : "";
        zmq_send(z->socket, "1.0", 3, ZMQ_SNDMORE);
        if (n >= 2)
            zmq_send(z->socket, zmq_msg_data(&f[1]), zmq_msg_size(&f[1]), ZMQ_SNDMORE);
        else
            zmq_send(z->socket, "", 0, ZMQ_SNDMORE);
        zmq_send(z->socket, status, 3, ZMQ_SNDMORE);
        zmq_send(z->socket, text, strlen(text), ZMQ_SNDMORE);
        zmq_send(z->socket, user, strlen(user), ZMQ_SNDMORE);
        zmq_send(z->socket, "", 0, 0);
        for (int i = 0; i < ZAP_FRAMES; i++)
            zmq_msg_close(&f[i]);
    }
}
