/* veer drift monitors: do live states still look like the training states?
 *
 * A drift monitor compares the states a machine visits with statistics of the training states
 * (the bundle's veer_model_info carries them; this module takes plain arrays, so it knows
 * nothing of bundles). Over a sliding window of the last `window` states it keeps:
 *
 *   PSI      per feature, the Population Stability Index over the training quantile bins:
 *            PSI = Σ_b (p_live,b − p_train,b) ln(p_live,b / p_train,b). The bins come from the
 *            training quantile edges, so every training share is p_train,b = 1/bins. An empty
 *            live bin would make the logarithm infinite, so live shares are floored at
 *            `psi_floor` (default 1e-4; common practice, no source).
 *   shift    per feature, the standardised mean shift (live mean − training mean) / training std.
 *   exceed   the share of window states whose Mahalanobis distance to the training mean, with the
 *            training precision matrix, exceeds the training 99th percentile distance: about
 *            1 % while nothing has drifted.
 *
 * and per state, whether it lies beyond the training 99.9th percentile distance ("out of
 * coverage": the policy there was learned from almost no data).
 *
 * Levels with hysteresis. PSI per feature is OK, WATCH (raised at 0.10) or ALARM (raised at
 * 0.25); these are the usual bands of credit-risk scorecard monitoring (common practice, no
 * source). A level falls back only when PSI drops below a lower clear threshold (defaults 0.08
 * and 0.20), so a statistic hovering at a threshold does not flap. The exceedance level is OK or
 * ALARM: raised when the rate reaches `exceed_raise` × 1 % (default 3×) and cleared below
 * `exceed_clear` × 1 % (default 2×). Levels are evaluated only once the window is full, because
 * statistics over a part-filled window are noisier than the thresholds assume.
 *
 * Why those defaults: with a full window of W states and no drift, the number of exceedances
 * is Binomial(W, 0.01); for W = 1000 it reaches 30 (3 %) with probability about 1e-7, so false
 * alarms are rare, and it stays under 20 (2 %) with probability about 0.997, so an alarm clears
 * soon after the shift ends. PSI without drift is about (bins − 1) / W (the chi-square
 * approximation: 0.009 for 10 bins and W = 1000), far under 0.08.
 *
 * Threading contract.
 *   - One writer thread per monitor calls veer_drift_add, veer_drift_reset, veer_drift_read
 *     and veer_drift_publish. Adding allocates nothing and takes no lock.
 *   - veer_drift_check (the per-state coverage test) reads only the immutable training
 *     statistics: any thread, concurrently with everything, allocation-free; fit for the act
 *     path.
 *   - Other threads read through veer_drift_snapshot, which returns the report the writer last
 *     published. The writer publishes when a level changes, every `publish_every` states, and
 *     on veer_drift_publish; publishing swaps a buffer (triple buffering), so neither side ever
 *     waits for the other. Readers are serialised among themselves by a mutex the writer never
 *     takes.
 *
 * Errors: functions returning int return 0 or a negative VEER_E* code (veer/error.h); where they
 * take a `veer_error *` (NULL allowed) it names the offending field.
 */
#ifndef VEER_DRIFT_H
#define VEER_DRIFT_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"

#ifdef __cplusplus
extern "C" {
#endif

typedef struct veer_drift veer_drift;

typedef enum veer_drift_level {
    VEER_DRIFT_OK = 0,
    VEER_DRIFT_WATCH = 1,
    VEER_DRIFT_ALARM = 2,
} veer_drift_level;

/* The training statistics (veer_model_info has each of them). All arrays are the caller's and
 * are copied at creation. */
typedef struct veer_drift_training {
    uint32_t state_dim;
    const float *mean;           /* state_dim */
    const float *cov;            /* state_dim x state_dim, row-major; only its diagonal is used */
    const float *precision;      /* state_dim x state_dim, symmetric positive definite */
    uint32_t bins;               /* quantile bins per feature, 2 .. VEER_DRIFT_MAX_BINS */
    const float *quantile_edges; /* state_dim x (bins − 1), non-decreasing per feature; a value
                                    x falls in bin b when edge[b−1] <= x < edge[b] */
    float mahalanobis_p99;       /* distances (not squared), 0 < p99 <= p999 */
    float mahalanobis_p999;
} veer_drift_training;

/* Points `out` at a loaded model's training statistics (veer_model_info from veer/runtime.h:
 * state_mean, state_cov, state_precision, bins, quantile_edges, mahalanobis_p99/p999). The
 * pointers stay the bundle's; veer_drift_create copies what it keeps, so the bundle may close
 * after creation. Errors: VEER_EINVAL (NULL), VEER_EFIELD ("stats": the bundle carries no
 * training statistics). Any thread. */
struct veer_model_info;
int veer_drift_training_from_model(const struct veer_model_info *info, veer_drift_training *out,
                                   veer_error *err);

#define VEER_DRIFT_MAX_BINS 1024u
#define VEER_DRIFT_MAX_WINDOW 1000000u
#define VEER_DRIFT_MAX_DIM 65535u

typedef struct veer_drift_config {
    uint32_t window;        /* states in the sliding window (default 1000) */
    double psi_floor;       /* floor on live bin shares (default 1e-4), in (0, 1/bins) */
    double psi_watch_raise; /* default 0.10 */
    double psi_watch_clear; /* default 0.08 */
    double psi_alarm_raise; /* default 0.25 */
    double psi_alarm_clear; /* default 0.20 */
    double exceed_raise;    /* multiple of 1 % (default 3) */
    double exceed_clear;    /* multiple of 1 % (default 2) */
    uint32_t publish_every; /* publish a snapshot every this many states (default 100) */
} veer_drift_config;

/* Fills `cfg` with the defaults above. */
void veer_drift_config_init(veer_drift_config *cfg);

/* Creates a monitor; the window is allocated here, once. The caller owns *out and releases it
 * with veer_drift_destroy. `cfg` NULL means the defaults.
 * Errors: VEER_EINVAL (NULL pointer), VEER_EFIELD (a count, threshold or statistic out of
 * range, the field named: "window", "bins", "psi_watch_clear", "quantile_edges" when they
 * decrease, "cov" for a negative variance, "precision" when asymmetric or with a non-positive
 * diagonal), VEER_ENONFINITE (a statistic is NaN or infinite, e.g. "mean"), VEER_ENOMEM.
 * Any thread. */
int veer_drift_create(const veer_drift_training *train, const veer_drift_config *cfg,
                      veer_drift **out, veer_error *err);
void veer_drift_destroy(veer_drift *d); /* NULL is allowed */

uint32_t veer_drift_state_dim(const veer_drift *d);

/* What veer_drift_add says about the state it took. */
#define VEER_DRIFT_CHANGED_PSI (1u << 0)     /* the overall PSI level changed */
#define VEER_DRIFT_CHANGED_EXCEED (1u << 1)  /* the exceedance level changed */
#define VEER_DRIFT_CHANGED_FEATURE (1u << 2) /* some feature's PSI level changed */

typedef struct veer_drift_result {
    double mahalanobis;  /* this state's distance */
    int out_of_coverage; /* 1 when beyond the training p99.9 distance */
    unsigned changed;    /* VEER_DRIFT_CHANGED_* bits; 0 when no level changed */
} veer_drift_result;

/* Adds one state (state_dim floats) to the window, evicting the oldest when full, and
 * re-evaluates the levels. `res` may be NULL. Cost: O(state_dim · log bins) for the bins, O(1)
 * per changed bin for PSI (a table of the window's possible PSI terms, made at creation), and
 * the O(state_dim²) distance; an exact recount from the window every `window` states stops the
 * running sums from accumulating rounding error (amortised O(state_dim + bins) more).
 * Errors: VEER_ENONFINITE when the state holds NaN or infinity (field "state[i]"; the state is
 * not added), VEER_EINVAL for NULL pointers. The writer thread; allocates nothing. On an act
 * path pass `err` NULL: filling it formats a message. */
int veer_drift_add(veer_drift *d, const float *state, veer_drift_result *res, veer_error *err);

/* Is `state` beyond the training 99.9th percentile Mahalanobis distance? Returns 1 (out of
 * coverage), 0 (covered), or VEER_ENONFINITE / VEER_EINVAL. Writes the distance to *distance
 * when not NULL. Any thread, concurrently with the writer; allocates nothing. */
int veer_drift_check(const veer_drift *d, const float *state, double *distance);

/* Empties the window and sets every level to OK (publishes the change). The writer thread. */
void veer_drift_reset(veer_drift *d);

/* Every statistic and level. The arrays are the caller's: state_dim entries each, set before
 * reading (veer_drift_report_create does it), or NULL to skip that array. */
typedef struct veer_drift_report {
    uint32_t state_dim;
    uint32_t window;                 /* configured size */
    uint32_t fill;                   /* states now in the window */
    uint64_t states_total;           /* states added since creation or reset */
    uint64_t out_of_coverage_total;  /* of those, beyond the training p99.9 */
    uint32_t out_of_coverage_window; /* in the window */

    double *psi;                 /* per feature; 0 while the window is empty */
    double *mean_shift;          /* per feature, in training standard deviations */
    veer_drift_level *psi_level; /* per feature */
    double psi_max;              /* the largest PSI and its feature */
    uint32_t psi_max_feature;
    veer_drift_level psi_overall; /* the highest feature level */

    uint32_t exceed_count;         /* window states beyond the training p99 distance */
    double exceed_rate;            /* exceed_count / fill (0 when empty) */
    veer_drift_level exceed_level; /* OK or ALARM */

    veer_drift_level level; /* max(psi_overall, exceed_level) */
    uint64_t level_changes; /* counts every change of any level: compare two reports to
                               tell whether something changed in between */
    uint64_t publish_seq;   /* snapshots only: how many times the writer has published */
} veer_drift_report;

/* Allocates a report with its arrays sized for `d`; release with veer_drift_report_destroy. */
int veer_drift_report_create(const veer_drift *d, veer_drift_report **out);
void veer_drift_report_destroy(veer_drift_report *r); /* NULL is allowed */

/* Computes the report from the writer's current state (PSI recomputed exactly from the bin
 * counts). Errors: VEER_EINVAL (NULL), VEER_EDIM (report->state_dim differs). The writer
 * thread; O(state_dim · bins); allocates nothing. */
int veer_drift_read(const veer_drift *d, veer_drift_report *out);

/* Publishes the current report for veer_drift_snapshot readers. The writer thread. */
void veer_drift_publish(veer_drift *d);

/* Copies the last published report into *out. Any thread other than the writer. Errors as
 * veer_drift_read. */
int veer_drift_snapshot(veer_drift *d, veer_drift_report *out);

/* "ok", "watch", "alarm" (for labels and events). */
const char *veer_drift_level_name(veer_drift_level level);

#ifdef __cplusplus
}
#endif
#endif
