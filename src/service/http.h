/* veerd's HTTP endpoint: a small HTTP/1.1 server on the libuv loop for operators' read-only
 * views (metrics, liveness, readiness). Requests are parsed by Debian's http-parser
 * (libhttp-parser-dev), which is fuzzed and used widely; a hand-written parser would be one more
 * attack surface for no gain. This module knows nothing of metrics: it hands each complete
 * request's method and path to a handler that fills in a response.
 *
 * Limits, because the port is reachable by whatever can reach the host:
 *   - GET and HEAD only (others: 405 with Allow); malformed requests: 400 and close; HTTP
 *     versions other than 1.x: 505 and close;
 *   - request line and headers at most `max_header_bytes` (431 and close); bodies at most
 *     `max_body_bytes` (413 and close);
 *   - a request must arrive whole within `request_timeout_ms` of its first byte (408 and close),
 *     so a client trickling a header cannot hold a connection; an idle keep-alive connection is
 *     closed after `idle_timeout_ms`;
 *   - at most `max_connections` at once; one more gets 503 and is closed.
 * Everything runs on the loop thread; the server never touches the act thread's memory. */
#ifndef VEER_SERVICE_HTTP_H
#define VEER_SERVICE_HTTP_H

#include <stddef.h>
#include <stdint.h>
#include <sys/socket.h>
#include <uv.h>

#include "veer/error.h"

typedef struct veer__http veer__http;

/* A response under construction: the handler sets status and content type and appends the body
 * with veer__http_body_printf / veer__http_body_append. The server owns the buffer. */
typedef struct veer__http_response {
    int status;               /* 200 unless the handler says otherwise */
    const char *content_type; /* a static string; default "text/plain; charset=utf-8" */
    char *body;
    size_t len, cap;
    int failed; /* set when appending ran out of memory: the server answers 500 */
} veer__http_response;

void veer__http_body_append(veer__http_response *r, const char *text, size_t len);
void veer__http_body_printf(veer__http_response *r, const char *fmt, ...)
    __attribute__((format(printf, 2, 3)));

/* Called for each GET or HEAD request (for HEAD the body is measured and dropped). `path` is the
 * URL's path without the query string. Sets resp->status: 404 for a path it does not serve. */
typedef void (*veer__http_handler)(void *ctx, const char *path, veer__http_response *resp);

typedef struct veer__http_config {
    uv_loop_t *loop;
    const char *address; /* "HOST:PORT", "[V6]:PORT"; "localhost" means 127.0.0.1 */
    veer__http_handler handler;
    void *ctx;
    uint32_t max_connections;    /* 0: 64 */
    uint32_t max_header_bytes;   /* 0: 8192 */
    uint32_t max_body_bytes;     /* 0: 1024 */
    uint32_t request_timeout_ms; /* 0: 5000 */
    uint32_t idle_timeout_ms;    /* 0: 30000 */
} veer__http_config;

/* Parses "HOST:PORT" into a socket address. VEER_ECONFIG with field "--http" when it is not an
 * IPv4 or bracketed IPv6 address (or localhost) with a port 1..65535. */
int veer__http_parse_address(const char *address, struct sockaddr_storage *out, veer_error *err);

/* Binds, listens and starts serving. VEER_ECONFIG (address), VEER_EIO (bind or listen failed,
 * message says why), VEER_ENOMEM. The caller owns *out. Loop thread. */
int veer__http_start(const veer__http_config *cfg, veer__http **out, veer_error *err);

/* The port actually bound (useful with port 0). */
int veer__http_port(const veer__http *h);

/* Stops listening and closes every connection; `done(data)` runs on the loop once every handle
 * is closed and the server freed. NULL h: done runs at once. Loop thread. */
void veer__http_stop(veer__http *h, void (*done)(void *), void *data);

#endif
