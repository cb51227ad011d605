/* Reading veerd's drift gauges from its HTTP /metrics endpoint (Prometheus text exposition
 * format), as an operator's scraper would. A plain HTTP/1.0 GET over a blocking socket with a
 * short receive timeout: the demo reads it once a second from the supervisor thread, never from
 * the control loop. Hand-written because the request is one line and the few gauges we need are
 * "name value" lines; a general HTTP client library would add a dependency for nothing.
 */
#define _GNU_SOURCE
#include <netdb.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/time.h>
#include <unistd.h>

#include "demo_run.h"

static int find_gauge(const char *text, const char *name, double *out)
{
    size_t len = strlen(name);
    for (const char *p = text; p && *p; p = strchr(p, '\n'), p = p ? p + 1 : NULL) {
        if (strncmp(p, name, len) == 0 && (p[len] == ' ' || p[len] == '{')) {
            /* "name value" or "name{labels} value": veerd labels its drift gauges by scope. */
            const char *v0 = p[len] == ' ' ? p + len + 1 : strstr(p + len, "} ");
            if (v0 == NULL)
                return -1;
            v0 += p[len] == ' ' ? 0 : 2;
            char *end;
            double v = strtod(v0, &end);
            if (end == v0)
                return -1;
            *out = v;
            return 0;
        }
    }
    return -1;
}

int veer_demo_metrics_drift(const char *hostport, veer_demo_drift *d)
{
    char host[128], port[16];
    const char *colon = strrchr(hostport, ':');
    if (colon == NULL || (size_t)(colon - hostport) >= sizeof host ||
        strlen(colon + 1) >= sizeof port)
        return -1;
    memcpy(host, hostport, (size_t)(colon - hostport));
    host[colon - hostport] = '\0';
    snprintf(port, sizeof port, "%s", colon + 1);

    struct addrinfo hints = {.ai_family = AF_UNSPEC, .ai_socktype = SOCK_STREAM}, *ai;
    if (getaddrinfo(host, port, &hints, &ai) != 0)
        return -1;
    int fd = socket(ai->ai_family, ai->ai_socktype, ai->ai_protocol);
    struct timeval tv = {0, 300000};
    if (fd >= 0) {
        setsockopt(fd, SOL_SOCKET, SO_RCVTIMEO, &tv, sizeof tv);
        setsockopt(fd, SOL_SOCKET, SO_SNDTIMEO, &tv, sizeof tv);
    }
    int ok = fd >= 0 && connect(fd, ai->ai_addr, ai->ai_addrlen) == 0;
    freeaddrinfo(ai);
    static char buf[1 << 17];
    size_t got = 0;
    if (ok) {
        char req[256];
        int n = snprintf(req, sizeof req, "GET /metrics HTTP/1.0\r\nHost: %s\r\n\r\n", hostport);
        ok = write(fd, req, (size_t)n) == n;
        for (ssize_t r;
             ok && got < sizeof buf - 1 && (r = read(fd, buf + got, sizeof buf - 1 - got)) > 0;)
            got += (size_t)r;
    }
    if (fd >= 0)
        close(fd);
    buf[got] = '\0';
    const char *body = strstr(buf, "\r\n\r\n");
    if (!ok || body == NULL || strncmp(buf, "HTTP/1.", 7) != 0 || strncmp(buf + 9, "200", 3) != 0)
        return -1;
    if (find_gauge(body, "veer_drift_level", &d->level) != 0 ||
        find_gauge(body, "veer_drift_psi_max", &d->psi_max) != 0 ||
        find_gauge(body, "veer_drift_psi_overall_level", &d->psi_level) != 0 ||
        find_gauge(body, "veer_drift_exceed_rate", &d->exceed_rate) != 0 ||
        find_gauge(body, "veer_drift_exceed_level", &d->exceed_level) != 0)
        return -1;
    return 0;
}
