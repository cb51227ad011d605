/* veerd's HTTP endpoint (see http.h for the contract and the limits).
 *
 * One connection is one uv_tcp_t, one uv_timer_t and one http_parser, freed when both handles
 * have closed. The timer does double duty: while a request is arriving it is the request
 * deadline (armed once, at the request's first byte, and not re-armed by further bytes, which is
 * what defeats a client trickling its header), and between requests it is the idle timeout.
 * Closing after an error reply is a lingering close: the reply is written, the write side shut
 * down, and whatever the client is still sending is read and dropped for a short while before
 * the socket closes. Closing at once would make the kernel answer the unread bytes with a reset,
 * which can destroy the reply before the client reads it. */
#include "service/http.h"

#include <arpa/inet.h>
#include <http_parser.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"

#define LINGER_MS 1000u
#define OVER_LIMIT_EXTRA 16u /* connections past the limit that still get a 503 before closing */
#define READ_BUFFER 4096

typedef struct conn conn;

struct veer__http {
    veer__http_config cfg;
    uv_tcp_t listener;
    int listener_open;
    conn *conns;
    uint32_t live;
    int stopping;
    void (*done)(void *);
    void *done_data;
};

typedef enum { CONN_READING, CONN_LINGERING, CONN_CLOSING } conn_state;

struct conn {
    veer__http *server;
    conn *prev, *next;
    uv_tcp_t tcp;
    uv_timer_t timer;
    uv_shutdown_t shutdown;
    http_parser parser;
    conn_state state;
    int handles_open;
    int in_request; /* a request's first byte has arrived and it is not complete yet */
    int answered;   /* this read's parse produced a final reply; stop parsing */
    int reject;     /* a status decided during parsing (413) */
    size_t body_bytes;
    size_t url_len;
    char *url; /* max_header_bytes + 1 */
    char readbuf[READ_BUFFER];
};

typedef struct write_req {
    uv_write_t req;
    conn *c;
    int close_after;
    char data[];
} write_req;

/* ---- response bodies ---------------------------------------------------------------------- */

static int body_reserve(veer__http_response *r, size_t more)
{
    if (r->failed)
        return -1;
    if (r->len + more + 1 <= r->cap)
        return 0;
    size_t cap = r->cap ? r->cap : 4096;
    while (cap < r->len + more + 1)
        cap *= 2;
    char *p = veer__realloc(r->body, cap);
    if (p == NULL) {
        r->failed = 1;
        return -1;
    }
    r->body = p;
    r->cap = cap;
    return 0;
}

void veer__http_body_append(veer__http_response *r, const char *text, size_t len)
{
    if (body_reserve(r, len) != 0)
        return;
    memcpy(r->body + r->len, text, len);
    r->len += len;
    r->body[r->len] = '\0';
}

void veer__http_body_printf(veer__http_response *r, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    int n = vsnprintf(NULL, 0, fmt, ap);
    va_end(ap);
    if (n < 0 || body_reserve(r, (size_t)n) != 0)
        return;
    va_start(ap, fmt);
    vsnprintf(r->body + r->len, (size_t)n + 1, fmt, ap);
    va_end(ap);
    r->len += (size_t)n;
}

/* ---- addresses ---------------------------------------------------------------------------- */

int veer__http_parse_address(const char *address, struct sockaddr_storage *out, veer_error *err)
{
    char host[128];
    const char *colon = strrchr(address, ':');
    if (address[0] == '\0' || colon == NULL || colon == address ||
        (size_t)(colon - address) >= sizeof host)
        return veer__error_set(err, VEER_ECONFIG, "--http",
                               "--http: '%s' is not HOST:PORT (for example 127.0.0.1:9464)",
                               address);
    memcpy(host, address, (size_t)(colon - address));
    host[colon - address] = '\0';
    char *end = NULL;
    long port = strtol(colon + 1, &end, 10);
    if (colon[1] == '\0' || *end != '\0' || port < 0 || port > 65535)
        return veer__error_set(err, VEER_ECONFIG, "--http",
                               "--http: '%s' has no port from 0 to 65535", address);
    memset(out, 0, sizeof *out);
    if (strcmp(host, "localhost") == 0)
        snprintf(host, sizeof host, "127.0.0.1");
    size_t hl = strlen(host);
    if (host[0] == '[' && hl > 2 && host[hl - 1] == ']') {
        host[hl - 1] = '\0';
        if (uv_ip6_addr(host + 1, (int)port, (struct sockaddr_in6 *)out) == 0)
            return 0;
    } else if (uv_ip4_addr(host, (int)port, (struct sockaddr_in *)out) == 0) {
        return 0;
    }
    return veer__error_set(
        err, VEER_ECONFIG, "--http",
        "--http: '%s' is not an IPv4 address, a bracketed IPv6 address or localhost", host);
}

/* ---- connections -------------------------------------------------------------------------- */

static void server_maybe_done(veer__http *h)
{
    if (!h->stopping || h->live != 0 || h->listener_open)
        return;
    void (*done)(void *) = h->done;
    void *data = h->done_data;
    veer__free(h);
    if (done != NULL)
        done(data);
}

static void on_conn_handle_closed(uv_handle_t *handle)
{
    conn *c = handle->data;
    if (--c->handles_open > 0)
        return;
    veer__http *h = c->server;
    if (c->prev != NULL)
        c->prev->next = c->next;
    else
        h->conns = c->next;
    if (c->next != NULL)
        c->next->prev = c->prev;
    h->live--;
    veer__free(c->url);
    veer__free(c);
    server_maybe_done(h);
}

static void conn_close(conn *c)
{
    if (c->state == CONN_CLOSING)
        return;
    c->state = CONN_CLOSING;
    uv_read_stop((uv_stream_t *)&c->tcp);
    uv_timer_stop(&c->timer);
    uv_close((uv_handle_t *)&c->tcp, on_conn_handle_closed);
    uv_close((uv_handle_t *)&c->timer, on_conn_handle_closed);
}

static void on_timer(uv_timer_t *t);

static void on_shutdown(uv_shutdown_t *req, int status)
{
    (void)req;
    (void)status; /* the linger timer closes the connection either way */
}

/* Lingering close: shut the write side after the queued replies, drop what still arrives. */
static void conn_linger(conn *c)
{
    if (c->state != CONN_READING)
        return;
    c->state = CONN_LINGERING;
    uv_timer_start(&c->timer, on_timer, LINGER_MS, 0);
    if (uv_shutdown(&c->shutdown, (uv_stream_t *)&c->tcp, on_shutdown) != 0)
        conn_close(c);
}

static void on_written(uv_write_t *req, int status)
{
    write_req *w = (write_req *)req;
    conn *c = w->c;
    int close_after = w->close_after;
    veer__free(w);
    if (status < 0)
        conn_close(c);
    else if (close_after)
        conn_linger(c);
}

static const char *reason(int status)
{
    switch (status) {
    case 200:
        return "OK";
    case 400:
        return "Bad Request";
    case 404:
        return "Not Found";
    case 405:
        return "Method Not Allowed";
    case 408:
        return "Request Timeout";
    case 413:
        return "Content Too Large";
    case 431:
        return "Request Header Fields Too Large";
    case 500:
        return "Internal Server Error";
    case 503:
        return "Service Unavailable";
    case 505:
        return "HTTP Version Not Supported";
    default:
        return "Status";
    }
}

/* Queues one response. `with_body` 0 for HEAD. `close_after`: a lingering close follows. */
static void conn_send(conn *c, int status, const char *content_type, const char *body, size_t len,
                      int with_body, int close_after)
{
    if (c->state != CONN_READING)
        return;
    char head[512];
    int hl = snprintf(
        head, sizeof head,
        "HTTP/1.1 %d %s\r\nContent-Type: %s\r\nContent-Length: %zu\r\nCache-Control: no-store\r\n"
        "%s%s\r\n",
        status, reason(status), content_type, len, status == 405 ? "Allow: GET, HEAD\r\n" : "",
        close_after ? "Connection: close\r\n" : "");
    size_t total = (size_t)hl + (with_body ? len : 0);
    write_req *w = veer__malloc(sizeof *w + total);
    if (w == NULL) {
        conn_close(c);
        return;
    }
    memcpy(w->data, head, (size_t)hl);
    if (with_body && len > 0)
        memcpy(w->data + hl, body, len);
    w->c = c;
    w->close_after = close_after;
    uv_buf_t buf = uv_buf_init(w->data, (unsigned)total);
    if (uv_write(&w->req, (uv_stream_t *)&c->tcp, &buf, 1, on_written) != 0) {
        veer__free(w);
        conn_close(c);
    }
}

static void conn_send_error(conn *c, int status, const char *message)
{
    char body[256];
    int n = snprintf(body, sizeof body, "%d %s: %s\n", status, reason(status), message);
    conn_send(c, status, "text/plain; charset=utf-8", body, (size_t)n, 1, 1);
    c->answered = 1;
}

static void on_timer(uv_timer_t *t)
{
    conn *c = t->data;
    if (c->state == CONN_READING && c->in_request)
        conn_send_error(c, 408, "the request did not arrive whole in time");
    else
        conn_close(c); /* idle keep-alive connection, or the linger time is over */
}

/* ---- parsing ------------------------------------------------------------------------------ */

static int on_message_begin(http_parser *p)
{
    conn *c = p->data;
    c->in_request = 1;
    c->url_len = 0;
    c->body_bytes = 0;
    uv_timer_start(&c->timer, on_timer, c->server->cfg.request_timeout_ms, 0);
    return 0;
}

static int on_url(http_parser *p, const char *at, size_t len)
{
    conn *c = p->data;
    size_t cap = c->server->cfg.max_header_bytes;
    if (c->url_len + len > cap)
        len = cap - c->url_len; /* the parser's header limit ends the request soon after */
    memcpy(c->url + c->url_len, at, len);
    c->url_len += len;
    c->url[c->url_len] = '\0';
    return 0;
}

static int on_body(http_parser *p, const char *at, size_t len)
{
    (void)at;
    conn *c = p->data;
    c->body_bytes += len;
    if (c->body_bytes > c->server->cfg.max_body_bytes) {
        c->reject = 413;
        return 1; /* stops the parser */
    }
    return 0;
}

static int on_message_complete(http_parser *p)
{
    conn *c = p->data;
    veer__http *h = c->server;
    c->in_request = 0;
    uv_timer_start(&c->timer, on_timer, h->cfg.idle_timeout_ms, 0);
    if (p->http_major != 1) {
        conn_send_error(c, 505, "this endpoint speaks HTTP/1.0 and HTTP/1.1");
        return 1;
    }
    int keep = http_should_keep_alive(p);
    int method = p->method;
    if (method != HTTP_GET && method != HTTP_HEAD) {
        static const char text[] = "405 Method Not Allowed: this endpoint answers GET and HEAD\n";
        conn_send(c, 405, "text/plain; charset=utf-8", text, sizeof text - 1, 1, !keep);
        return keep ? 0 : (c->answered = 1, 1);
    }
    struct http_parser_url u;
    http_parser_url_init(&u);
    if (http_parser_parse_url(c->url, c->url_len, 0, &u) != 0) {
        conn_send_error(c, 400, "the request target is not a URL path");
        return 1;
    }
    char path[1024];
    if (u.field_set & (1u << UF_PATH)) {
        size_t n = u.field_data[UF_PATH].len < sizeof path - 1 ? u.field_data[UF_PATH].len
                                                               : sizeof path - 1;
        memcpy(path, c->url + u.field_data[UF_PATH].off, n);
        path[n] = '\0';
    } else {
        snprintf(path, sizeof path, "/");
    }
    veer__http_response resp = {.status = 200, .content_type = "text/plain; charset=utf-8"};
    h->cfg.handler(h->cfg.ctx, path, &resp);
    if (resp.failed)
        conn_send(c, 500, "text/plain; charset=utf-8", "500 Internal Server Error: out of memory\n",
                  41, method != HTTP_HEAD, 1);
    else
        conn_send(c, resp.status, resp.content_type, resp.body ? resp.body : "", resp.len,
                  method != HTTP_HEAD, !keep);
    veer__free(resp.body);
    if (!keep) {
        c->answered = 1;
        return 1;
    }
    return 0;
}

static const http_parser_settings SETTINGS = {
    .on_message_begin = on_message_begin,
    .on_url = on_url,
    .on_body = on_body,
    .on_message_complete = on_message_complete,
};

static void on_alloc(uv_handle_t *handle, size_t suggested, uv_buf_t *buf)
{
    (void)suggested;
    conn *c = handle->data;
    *buf = uv_buf_init(c->readbuf, sizeof c->readbuf);
}

static void on_read(uv_stream_t *stream, ssize_t nread, const uv_buf_t *buf)
{
    conn *c = stream->data;
    if (nread == 0)
        return;
    if (nread < 0) { /* EOF or error: nothing more will come */
        conn_close(c);
        return;
    }
    if (c->state != CONN_READING)
        return; /* lingering: drop it */
    c->answered = 0;
    size_t used = http_parser_execute(&c->parser, &SETTINGS, buf->base, (size_t)nread);
    if (c->answered || c->state != CONN_READING)
        return;
    enum http_errno e = HTTP_PARSER_ERRNO(&c->parser);
    if (c->reject == 413) {
        conn_send_error(c, 413, "a request body here is at most a few hundred bytes");
    } else if (e == HPE_HEADER_OVERFLOW) {
        conn_send_error(c, 431, "the request line and headers are over the size limit");
    } else if (e != HPE_OK || used != (size_t)nread) {
        char msg[160];
        snprintf(msg, sizeof msg, "malformed HTTP request (%s: %s)", http_errno_name(e),
                 http_errno_description(e));
        conn_send_error(c, 400, msg);
    }
}

static void on_connection(uv_stream_t *listener, int status)
{
    veer__http *h = listener->data;
    if (status < 0 || h->stopping)
        return;
    conn *c = veer__calloc(1, sizeof *c);
    char *url = c ? veer__malloc(h->cfg.max_header_bytes + 1u) : NULL;
    if (c == NULL || url == NULL) {
        veer__free(c);
        veer__free(url);
        return; /* the kernel keeps the connection queued; we try again on the next one */
    }
    c->server = h;
    c->url = url;
    c->handles_open = 2;
    uv_tcp_init(h->cfg.loop, &c->tcp);
    uv_timer_init(h->cfg.loop, &c->timer);
    c->tcp.data = c->timer.data = c;
    http_parser_init(&c->parser, HTTP_REQUEST);
    c->parser.data = c;
    c->next = h->conns;
    if (h->conns != NULL)
        h->conns->prev = c;
    h->conns = c;
    h->live++;
    if (uv_accept(listener, (uv_stream_t *)&c->tcp) != 0) {
        conn_close(c);
        return;
    }
    if (h->live > h->cfg.max_connections + OVER_LIMIT_EXTRA) {
        conn_close(c);
        return;
    }
    if (uv_read_start((uv_stream_t *)&c->tcp, on_alloc, on_read) != 0) {
        conn_close(c);
        return;
    }
    if (h->live > h->cfg.max_connections) {
        conn_send_error(c, 503, "too many HTTP connections; try again later");
        return;
    }
    /* A connection that never sends anything is closed after the request timeout too. */
    uv_timer_start(&c->timer, on_timer, h->cfg.request_timeout_ms, 0);
}

/* ---- the server --------------------------------------------------------------------------- */

int veer__http_start(const veer__http_config *cfg, veer__http **out, veer_error *err)
{
    struct sockaddr_storage addr;
    int rc = veer__http_parse_address(cfg->address, &addr, err);
    if (rc < 0)
        return rc;
    veer__http *h = veer__calloc(1, sizeof *h);
    if (h == NULL)
        return veer__error_set(err, VEER_ENOMEM, "--http", NULL);
    h->cfg = *cfg;
    if (h->cfg.max_connections == 0)
        h->cfg.max_connections = 64;
    if (h->cfg.max_header_bytes == 0)
        h->cfg.max_header_bytes = 8192;
    if (h->cfg.max_body_bytes == 0)
        h->cfg.max_body_bytes = 1024;
    if (h->cfg.request_timeout_ms == 0)
        h->cfg.request_timeout_ms = 5000;
    if (h->cfg.idle_timeout_ms == 0)
        h->cfg.idle_timeout_ms = 30000;
    /* A process-wide setting of the library; veerd has one HTTP server. */
    http_parser_set_max_header_size(h->cfg.max_header_bytes);

    uv_tcp_init(cfg->loop, &h->listener);
    h->listener.data = h;
    h->listener_open = 1;
    int uvrc = uv_tcp_bind(&h->listener, (const struct sockaddr *)&addr, 0);
    if (uvrc == 0)
        uvrc = uv_listen((uv_stream_t *)&h->listener, 128, on_connection);
    if (uvrc != 0) {
        rc = veer__error_set(err, VEER_EIO, "--http", "--http: cannot listen on '%s': %s",
                             cfg->address, uv_strerror(uvrc));
        h->stopping = 1;
        veer__http_stop(h, NULL, NULL);
        return rc;
    }
    *out = h;
    return 0;
}

int veer__http_port(const veer__http *h)
{
    struct sockaddr_storage addr;
    int len = sizeof addr;
    if (uv_tcp_getsockname(&h->listener, (struct sockaddr *)&addr, &len) != 0)
        return -1;
    if (addr.ss_family == AF_INET6)
        return ntohs(((struct sockaddr_in6 *)&addr)->sin6_port);
    return ntohs(((struct sockaddr_in *)&addr)->sin_port);
}

static void on_listener_closed(uv_handle_t *handle)
{
    veer__http *h = handle->data;
    h->listener_open = 0;
    server_maybe_done(h);
}

void veer__http_stop(veer__http *h, void (*done)(void *), void *data)
{
    if (h == NULL) {
        if (done != NULL)
            done(data);
        return;
    }
    h->stopping = 1;
    h->done = done;
    h->done_data = data;
    for (conn *c = h->conns; c != NULL; c = c->next)
        conn_close(c);
    uv_close((uv_handle_t *)&h->listener, on_listener_closed);
}
