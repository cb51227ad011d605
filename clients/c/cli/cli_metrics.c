/* Fetching and reading veerd's /metrics (see cli_metrics.h for why this source). */
#include "cli_metrics.h"

#include <errno.h>
#include <http_parser.h>
#include <math.h>
#include <netdb.h>
#include <poll.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <time.h>
#include <unistd.h>

#include "base/base.h"
#include "cli.h"

/* ---- HTTP GET ----------------------------------------------------------------------------- */

typedef struct fetch {
    char *body;
    size_t len, cap;
    int complete;
    int oom;
} fetch;

static int on_body(http_parser *p, const char *at, size_t len)
{
    fetch *f = p->data;
    if (f->len + len + 1 > f->cap) {
        size_t cap = f->cap ? f->cap : 65536;
        while (cap < f->len + len + 1)
            cap *= 2;
        char *b = veer__realloc(f->body, cap);
        if (b == NULL) {
            f->oom = 1;
            return 1;
        }
        f->body = b;
        f->cap = cap;
    }
    memcpy(f->body + f->len, at, len);
    f->len += len;
    f->body[f->len] = '\0';
    return 0;
}

static int on_complete(http_parser *p)
{
    ((fetch *)p->data)->complete = 1;
    return 0;
}

static int64_t now_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000 + ts.tv_nsec / 1000000;
}

/* Connects with a deadline; returns the socket or -1. */
static int connect_to(const char *host, const char *port, int64_t deadline, char *why,
                      size_t why_cap)
{
    struct addrinfo hints = {.ai_family = AF_UNSPEC, .ai_socktype = SOCK_STREAM}, *res = NULL;
    int rc = getaddrinfo(host, port, &hints, &res);
    if (rc != 0) {
        snprintf(why, why_cap, "cannot resolve '%s': %s", host, gai_strerror(rc));
        return -1;
    }
    int fd = -1;
    for (struct addrinfo *ai = res; ai != NULL && fd < 0; ai = ai->ai_next) {
        fd = socket(ai->ai_family, ai->ai_socktype | SOCK_NONBLOCK | SOCK_CLOEXEC, ai->ai_protocol);
        if (fd < 0)
            continue;
        if (connect(fd, ai->ai_addr, ai->ai_addrlen) != 0 && errno != EINPROGRESS) {
            snprintf(why, why_cap, "cannot connect to %s:%s: %s", host, port, strerror(errno));
            close(fd);
            fd = -1;
            continue;
        }
        struct pollfd pfd = {.fd = fd, .events = POLLOUT};
        int wait = (int)(deadline - now_ms());
        int err = 0;
        socklen_t len = sizeof err;
        if (wait <= 0 || poll(&pfd, 1, wait) != 1 ||
            getsockopt(fd, SOL_SOCKET, SO_ERROR, &err, &len) != 0 || err != 0) {
            snprintf(why, why_cap, "cannot connect to %s:%s: %s", host, port,
                     err ? strerror(err) : "no answer in time");
            close(fd);
            fd = -1;
        }
    }
    freeaddrinfo(res);
    return fd;
}

int veer_cli_metrics_fetch(const char *address, uint32_t timeout_ms, char **body, char *why,
                           size_t why_cap)
{
    *body = NULL;
    if (strncmp(address, "http://", 7) == 0)
        address += 7;
    char host[256], port[16];
    const char *colon = strrchr(address, ':');
    size_t hl = colon ? (size_t)(colon - address) : 0;
    size_t pl = colon ? strcspn(colon + 1, "/") : 0;
    if (colon == NULL || hl == 0 || hl >= sizeof host || pl == 0 || pl >= sizeof port) {
        snprintf(why, why_cap, "'%s' is not HOST:PORT", address);
        return VEER_CLI_USAGE;
    }
    memcpy(host, address, hl);
    host[hl] = '\0';
    if (host[0] == '[' && host[hl - 1] == ']') { /* [::1] */
        memmove(host, host + 1, hl - 2);
        host[hl - 2] = '\0';
    }
    memcpy(port, colon + 1, pl);
    port[pl] = '\0';

    int64_t deadline = now_ms() + timeout_ms;
    int fd = connect_to(host, port, deadline, why, why_cap);
    if (fd < 0)
        return VEER_CLI_UNREACHABLE;
    char req[512];
    int rl = snprintf(req, sizeof req,
                      "GET /metrics HTTP/1.1\r\nHost: %s:%s\r\nAccept: text/plain\r\n"
                      "Connection: close\r\n\r\n",
                      host, port);
    if (send(fd, req, (size_t)rl, MSG_NOSIGNAL) != rl) {
        snprintf(why, why_cap, "cannot send to %s: %s", address, strerror(errno));
        close(fd);
        return VEER_CLI_UNREACHABLE;
    }
    http_parser_settings settings;
    http_parser_settings_init(&settings);
    settings.on_body = on_body;
    settings.on_message_complete = on_complete;
    http_parser parser;
    http_parser_init(&parser, HTTP_RESPONSE);
    fetch f = {0};
    parser.data = &f;
    int rc = VEER_CLI_UNREACHABLE;
    snprintf(why, why_cap, "no complete reply from %s within %u ms", address, timeout_ms);
    char buf[16384];
    while (!f.complete) {
        struct pollfd pfd = {.fd = fd, .events = POLLIN};
        int wait = (int)(deadline - now_ms());
        if (wait <= 0 || poll(&pfd, 1, wait) != 1)
            break;
        ssize_t n = recv(fd, buf, sizeof buf, 0);
        if (n < 0 && (errno == EAGAIN || errno == EINTR))
            continue;
        if (n < 0)
            break;
        size_t used =
            http_parser_execute(&parser, &settings, buf, (size_t)n); /* n == 0: end of stream */
        if (f.oom || used != (size_t)n || HTTP_PARSER_ERRNO(&parser) != HPE_OK) {
            snprintf(why, why_cap, "%s sent a malformed HTTP reply (%s)", address,
                     f.oom ? "out of memory" : http_errno_description(HTTP_PARSER_ERRNO(&parser)));
            break;
        }
        if (n == 0)
            break;
    }
    close(fd);
    if (f.complete && parser.status_code == 200) {
        if (f.body == NULL)
            f.body = veer__calloc(1, 1);
        *body = f.body;
        return f.body ? 0 : VEER_CLI_UNREACHABLE;
    }
    if (f.complete) {
        snprintf(why, why_cap, "%s answered HTTP %u: %.200s", address, parser.status_code,
                 f.body ? f.body : "");
        rc = VEER_CLI_REFUSED;
    }
    veer__free(f.body);
    return rc;
}

/* ---- the exposition text ------------------------------------------------------------------ */

void veer_cli_metrics_free(veer_cli_metrics *m)
{
    for (size_t i = 0; i < m->n; i++) {
        for (uint32_t k = 0; k < m->samples[i].n_labels; k++) {
            veer__free(m->samples[i].labels[k].key);
            veer__free(m->samples[i].labels[k].value);
        }
        veer__free(m->samples[i].labels);
        veer__free(m->samples[i].name);
    }
    veer__free(m->samples);
    memset(m, 0, sizeof *m);
}

static char *copy(const char *s, size_t n)
{
    char *c = veer__malloc(n + 1);
    if (c != NULL) {
        memcpy(c, s, n);
        c[n] = '\0';
    }
    return c;
}

static int is_name_char(char c, int first)
{
    return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || c == '_' || c == ':' ||
           (!first && c >= '0' && c <= '9');
}

/* Parses one sample line into *s; returns NULL or the reason. */
static const char *parse_line(const char *p, const char *end, veer_cli_sample *s)
{
    const char *q = p;
    while (q < end && is_name_char(*q, q == p))
        q++;
    if (q == p)
        return "a sample line starts with a metric name";
    s->name = copy(p, (size_t)(q - p));
    if (s->name == NULL)
        return "out of memory";
    p = q;
    if (p < end && *p == '{') {
        p++;
        for (;;) {
            while (p < end && (*p == ' ' || *p == ','))
                p++;
            if (p < end && *p == '}') {
                p++;
                break;
            }
            q = p;
            while (q < end && is_name_char(*q, q == p))
                q++;
            if (q == p || q + 1 >= end || q[0] != '=' || q[1] != '"')
                return "a label is name=\"value\"";
            veer_cli_label *grown = veer__realloc(s->labels, (s->n_labels + 1) * sizeof *grown);
            if (grown == NULL)
                return "out of memory";
            s->labels = grown;
            veer_cli_label *l = &s->labels[s->n_labels];
            l->key = copy(p, (size_t)(q - p));
            l->value = veer__malloc((size_t)(end - q) + 1);
            if (l->key == NULL || l->value == NULL) {
                veer__free(l->key);
                veer__free(l->value);
                return "out of memory";
            }
            s->n_labels++;
            p = q + 2;
            size_t n = 0;
            while (p < end && *p != '"') {
                if (*p == '\\' && p + 1 < end) {
                    p++;
                    l->value[n++] = *p == 'n' ? '\n' : *p;
                } else {
                    l->value[n++] = *p;
                }
                p++;
            }
            if (p >= end)
                return "a label value is not closed";
            l->value[n] = '\0';
            p++;
        }
    }
    while (p < end && *p == ' ')
        p++;
    char num[64];
    size_t nl = strcspn(p, " \n");
    if (nl == 0 || nl >= sizeof num || p + nl > end)
        return "a sample has a value after its name";
    memcpy(num, p, nl);
    num[nl] = '\0';
    char *stop = NULL;
    s->value = strtod(num, &stop); /* reads +Inf, -Inf and NaN too */
    if (*stop != '\0')
        return "the value is not a number";
    return NULL;
}

int veer_cli_metrics_parse(const char *text, veer_cli_metrics *out, char *why, size_t why_cap)
{
    memset(out, 0, sizeof *out);
    unsigned line = 0;
    for (const char *p = text; *p;) {
        const char *end = strchr(p, '\n');
        if (end == NULL)
            end = p + strlen(p);
        line++;
        if (end > p && *p != '#') {
            if (out->n == out->cap) {
                size_t cap = out->cap ? 2 * out->cap : 256;
                veer_cli_sample *g = veer__realloc(out->samples, cap * sizeof *g);
                if (g == NULL) {
                    snprintf(why, why_cap, "out of memory");
                    veer_cli_metrics_free(out);
                    return -1;
                }
                out->samples = g;
                out->cap = cap;
            }
            veer_cli_sample *s = &out->samples[out->n];
            memset(s, 0, sizeof *s);
            out->n++;
            const char *bad = parse_line(p, end, s);
            if (bad != NULL) {
                snprintf(why, why_cap, "line %u: %s", line, bad);
                veer_cli_metrics_free(out);
                return -1;
            }
        }
        p = *end ? end + 1 : end;
    }
    return 0;
}

const char *veer_cli_sample_label(const veer_cli_sample *s, const char *key)
{
    for (uint32_t k = 0; k < s->n_labels; k++)
        if (strcmp(s->labels[k].key, key) == 0)
            return s->labels[k].value;
    return NULL;
}

static int matches(const veer_cli_sample *s, const char *name, const char *key, const char *value)
{
    if (strcmp(s->name, name) != 0)
        return 0;
    if (key == NULL)
        return 1;
    const char *v = veer_cli_sample_label(s, key);
    return v != NULL && strcmp(v, value) == 0;
}

int veer_cli_metrics_get2(const veer_cli_metrics *m, const char *name, const char *k1,
                          const char *v1, const char *k2, const char *v2, double *out)
{
    for (size_t i = 0; i < m->n; i++) {
        if (matches(&m->samples[i], name, k1, v1) &&
            (k2 == NULL || matches(&m->samples[i], name, k2, v2))) {
            *out = m->samples[i].value;
            return 1;
        }
    }
    return 0;
}

int veer_cli_metrics_get(const veer_cli_metrics *m, const char *name, const char *key,
                         const char *value, double *out)
{
    return veer_cli_metrics_get2(m, name, key, value, NULL, NULL, out);
}

size_t veer_cli_metrics_buckets(const veer_cli_metrics *m, const char *name, const char *key,
                                const char *value, double *le, double *cumulative, size_t cap)
{
    char bucket[160];
    snprintf(bucket, sizeof bucket, "%s_bucket", name);
    size_t n = 0;
    for (size_t i = 0; i < m->n && n < cap; i++) {
        const veer_cli_sample *s = &m->samples[i];
        const char *bound = veer_cli_sample_label(s, "le");
        if (bound == NULL || !matches(s, bucket, key, value))
            continue;
        double b = strtod(bound, NULL);
        size_t j = n++;
        while (j > 0 && le[j - 1] > b) { /* insertion: veerd already writes them in order */
            le[j] = le[j - 1];
            cumulative[j] = cumulative[j - 1];
            j--;
        }
        le[j] = b;
        cumulative[j] = s->value;
    }
    return n;
}

void veer_cli_duration(double seconds, char *out, size_t cap)
{
    if (!isfinite(seconds))
        snprintf(out, cap, "%s", seconds > 0 ? "inf" : "-");
    else if (seconds < 1e-6)
        snprintf(out, cap, "%.0fns", seconds * 1e9);
    else if (seconds < 1e-3)
        snprintf(out, cap, "%.1fus", seconds * 1e6);
    else if (seconds < 1.0)
        snprintf(out, cap, "%.2fms", seconds * 1e3);
    else
        snprintf(out, cap, "%.2fs", seconds);
}

/* The value at quantile q from cumulative bucket counts, interpolated inside its bucket (the
 * usual estimate from a bucketed histogram). */
double veer_cli_bucket_quantile(const double *le, const double *cum, size_t n, double q)
{
    if (n == 0 || cum[n - 1] <= 0)
        return NAN;
    double rank = q * cum[n - 1];
    for (size_t i = 0; i < n; i++) {
        if (cum[i] >= rank) {
            double lo = i ? le[i - 1] : 0, below = i ? cum[i - 1] : 0;
            if (isinf(le[i]))
                return lo;
            return lo + (le[i] - lo) * (cum[i] > below ? (rank - below) / (cum[i] - below) : 1);
        }
    }
    return le[n - 1];
}
