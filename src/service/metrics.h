/* veerd's metrics in the Prometheus text exposition format, version 0.0.4 (an open standard:
 * "# HELP" and "# TYPE" lines, then one sample per line; histograms as cumulative `_bucket`
 * samples with an `le` label, then `_sum` and `_count`).
 *
 * The act thread records latencies into interval recorders and counts into atomics; this module
 * reads them from the loop thread only. On every tick (once a second) and every render it takes
 * the recorders' intervals, adds them to one cumulative histogram per stage (what `_bucket`
 * shows) and to the current one-second slot of a ring of ten (what the "recent" percentiles
 * show: the last ten seconds, accurate to the histogram's 0.79 %). The drift statistics come
 * from the monitor's published snapshot. So rendering never makes the act thread wait, and a
 * scrape costs the act path nothing.
 *
 * Drift series come per scope: `scope="service"` for the service-wide monitor (every valid act
 * state), and `scope="channel",channel="NAME"` for each channel's own monitor (the states acted
 * on that channel since it entered the table). Both sit in the same families (veer_drift_psi,
 * veer_drift_exceed_rate, ...), so a query selects one scope: summing a family over every
 * series would count each state twice.
 *
 * Bucket bounds are 1, 2, 5 x 10^k seconds from 1 µs to 50 s. Each `le` count is the number of
 * recorded values whose histogram bucket lies wholly at or below the bound: it never counts a
 * value above `le`, and may leave in the next bucket a value at most 0.79 % below it. */
#ifndef VEER_SERVICE_METRICS_H
#define VEER_SERVICE_METRICS_H

#include <stddef.h>
#include <stdint.h>

#include "service/act.h"
#include "service/http.h"
#include "service/store.h"

typedef struct veer__metrics veer__metrics;

typedef struct veer__metrics_config {
    veer__store *store; /* registry, channel table, model info: loop-thread state */
    veer__act *act;     /* counters, stage recorders, drift monitor */
    const char *version;
    int monitors_off;
} veer__metrics_config;

/* Extra counters owned by the operators' side (see ops.h), shown with the rest. */
typedef struct veer__metrics_extra {
    uint64_t deadline_bursts;
    uint64_t http_requests;
} veer__metrics_extra;

/* Allocates the histograms and the drift report. VEER_ENOMEM. Loop thread. */
int veer__metrics_create(const veer__metrics_config *cfg, veer__metrics **out);
void veer__metrics_destroy(veer__metrics *m); /* NULL allowed */

/* Takes the recorders' intervals and starts the next one-second slot. Loop thread, once a
 * second. */
void veer__metrics_tick(veer__metrics *m);

/* Appends the whole exposition to `resp` (and sets its content type). Loop thread. */
void veer__metrics_render(veer__metrics *m, const veer__metrics_extra *extra,
                          veer__http_response *resp);

/* 1 when the service is ready (model loaded, no task waiting for or failing its encoding);
 * otherwise 0 with a sentence saying why in `reason`. Loop thread. */
int veer__metrics_ready(veer__metrics *m, char *reason, size_t cap);

/* Appends `value` to `resp` with backslash, double quote and newline escaped as the exposition
 * format's label values require. */
void veer__metrics_label_value(veer__http_response *resp, const char *value);

#endif
