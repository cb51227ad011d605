/* Shared by `veer top` and `veer report`: fetching veerd's /metrics over HTTP and reading the
 * Prometheus text exposition format (0.0.4) into samples.
 *
 * Why /metrics and not the admin socket's status: it is the one read-only view that carries
 * everything an operator looks at (latency histograms and percentiles, drift per feature,
 * channels and their tasks, counters), it needs no admin credentials, and it is what a
 * monitoring system scrapes too, so the terminal and the dashboards cannot disagree.
 *
 * The HTTP response is parsed by Debian's http-parser (the library veerd's endpoint uses); only
 * the socket handling is ours. The exposition text is parsed by hand: no Debian C library reads
 * it, and the subset veerd writes (no timestamps needed, escaped label values) is small. */
#ifndef VEER_CLI_METRICS_H
#define VEER_CLI_METRICS_H

#include <stddef.h>
#include <stdint.h>

#define VEER_CLI_DEFAULT_HTTP "127.0.0.1:7713"

typedef struct veer_cli_label {
    char *key, *value;
} veer_cli_label;

typedef struct veer_cli_sample {
    char *name;
    veer_cli_label *labels;
    uint32_t n_labels;
    double value;
} veer_cli_sample;

typedef struct veer_cli_metrics {
    veer_cli_sample *samples;
    size_t n, cap;
} veer_cli_metrics;

/* GETs http://`address`/metrics ("HOST:PORT" or "http://HOST:PORT"). On success *body is a
 * NUL-terminated copy of the response body (the caller frees it with veer__free) and 0 is returned.
 * Otherwise a VEER_CLI_* exit code (unreachable: no connection or no reply within `timeout_ms`;
 * refused: an HTTP status other than 200) with the reason in `why`. */
int veer_cli_metrics_fetch(const char *address, uint32_t timeout_ms, char **body, char *why,
                           size_t why_cap);

/* Parses exposition text into `out` (zeroed by the caller or freed before). Comment lines are
 * skipped. Returns 0, or -1 with the line number and reason in `why` (out is then freed). */
int veer_cli_metrics_parse(const char *text, veer_cli_metrics *out, char *why, size_t why_cap);
void veer_cli_metrics_free(veer_cli_metrics *m);

/* The value of label `key` in `s`, or NULL. */
const char *veer_cli_sample_label(const veer_cli_sample *s, const char *key);

/* The first sample called `name` whose label `key` equals `value` (key NULL: any). Returns 1 and
 * sets *out when found, else 0. */
int veer_cli_metrics_get(const veer_cli_metrics *m, const char *name, const char *key,
                         const char *value, double *out);

/* The same with two labels. */
int veer_cli_metrics_get2(const veer_cli_metrics *m, const char *name, const char *k1,
                          const char *v1, const char *k2, const char *v2, double *out);

/* Bucket bounds and cumulative counts of histogram `name` (without "_bucket") for samples whose
 * label `key` is `value`, sorted by bound; +Inf last. Up to `cap`; returns how many. */
size_t veer_cli_metrics_buckets(const veer_cli_metrics *m, const char *name, const char *key,
                                const char *value, double *le, double *cumulative, size_t cap);

/* The value at quantile q (0..1) from `n` cumulative bucket counts with upper bounds `le`
 * (ascending, +Inf last), interpolated linearly inside the bucket where the rank falls, the usual
 * estimate from a bucketed histogram (as Prometheus's histogram_quantile). NaN when empty. */
double veer_cli_bucket_quantile(const double *le, const double *cumulative, size_t n, double q);

/* A duration in seconds as text with a unit: "850ns", "12.3us", "1.20ms", "1.50s"; "inf" for +Inf
 * and "-" for NaN. */
void veer_cli_duration(double seconds, char *out, size_t cap);

#endif
