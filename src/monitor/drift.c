/* Drift monitors: sliding-window statistics of live states against the training statistics.
 *
 * Key choice: everything a state adds or removes is kept as running counts, so a new state costs
 * a binary search per feature, a handful of table look-ups and one quadratic form, with no
 * allocation. PSI is the one statistic with a logarithm per bin; because the window's size is
 * fixed, a bin's share can only be c / window for an integer c, so the PSI term of every
 * possible count is tabulated at creation and a changed bin updates its feature's PSI by one
 * subtraction and one addition. Running sums are recounted exactly from the window once per
 * window length so floating-point error cannot accumulate.
 *
 * Readers on other threads get reports through a triple buffer (tribuf.c), so neither the
 * writer nor a reader ever waits for the other. Validation lives in drift_validate.c.
 */
#include "monitor.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"

#define VEER__CHECK_STACK_DIM 512u /* veer_drift_check's stack buffer: 4 KiB */

struct veer_drift {
    /* Training statistics, copied and immutable after creation. */
    uint32_t n, bins;
    double *mean, *std, *precision; /* n, n, n x n (symmetrised) */
    float *edges;                   /* n x (bins - 1) */
    double p99_sq, p999_sq;         /* squared distances, compared without a square root */
    double *diff;                   /* n: the writer's scratch for x − μ */
    veer_drift_config cfg;

    /* The window: a ring of `window` slots, each with the state, its bins and its flags. */
    float *ring_states;  /* window x n */
    uint16_t *ring_bins; /* window x n */
    uint8_t *ring_flags; /* window */
    uint32_t head, fill; /* next slot to write; states in the window */
    uint32_t *counts;    /* n x bins: window states per bin */
    double *sums;        /* n: running sums of the window's values */
    uint32_t exceed_count, ooc_count;
    uint64_t states_total, ooc_total;
    uint32_t since_recount;

    /* Levels and the incremental PSI (meaningful once the window is full). */
    double *psi_term; /* window + 1: PSI term of a bin holding c states */
    double *psi_live; /* n */
    veer_drift_level *psi_level;
    veer_drift_level psi_overall, exceed_level;
    uint64_t level_changes;
    uint32_t since_publish;

    /* Publication: three reports behind a triple buffer. */
    veer_drift_report *slot[3];
    veer__tribuf published;
    int published_ready;
    uint64_t publish_seq;
};

#define VEER__FLAG_EXCEED 1u
#define VEER__FLAG_OOC 2u

void veer_drift_config_init(veer_drift_config *cfg)
{
    cfg->window = 1000;
    cfg->psi_floor = 1e-4;
    cfg->psi_watch_raise = 0.10;
    cfg->psi_watch_clear = 0.08;
    cfg->psi_alarm_raise = 0.25;
    cfg->psi_alarm_clear = 0.20;
    cfg->exceed_raise = 3.0;
    cfg->exceed_clear = 2.0;
    cfg->publish_every = 100;
}

const char *veer_drift_level_name(veer_drift_level level)
{
    switch (level) {
    case VEER_DRIFT_OK:
        return "ok";
    case VEER_DRIFT_WATCH:
        return "watch";
    case VEER_DRIFT_ALARM:
        return "alarm";
    }
    return "unknown";
}

uint32_t veer_drift_state_dim(const veer_drift *d)
{
    return d->n;
}

/* ---- Creation ---------------------------------------------------------------------------- */

static veer_drift_report *report_alloc(uint32_t n)
{
    veer_drift_report *r = veer__calloc(1, sizeof *r);
    if (r == NULL)
        return NULL;
    r->state_dim = n;
    r->psi = veer__calloc(n, sizeof *r->psi);
    r->mean_shift = veer__calloc(n, sizeof *r->mean_shift);
    r->psi_level = veer__calloc(n, sizeof *r->psi_level);
    if (!r->psi || !r->mean_shift || !r->psi_level) {
        veer_drift_report_destroy(r);
        return NULL;
    }
    return r;
}

void veer_drift_report_destroy(veer_drift_report *r)
{
    if (r == NULL)
        return;
    veer__free(r->psi);
    veer__free(r->mean_shift);
    veer__free(r->psi_level);
    veer__free(r);
}

int veer_drift_report_create(const veer_drift *d, veer_drift_report **out)
{
    if (d == NULL || out == NULL)
        return VEER_EINVAL;
    *out = report_alloc(d->n);
    return *out ? 0 : VEER_ENOMEM;
}

static void free_drift(veer_drift *d)
{
    veer__free(d->mean);
    veer__free(d->std);
    veer__free(d->precision);
    veer__free(d->diff);
    veer__free(d->edges);
    veer__free(d->ring_states);
    veer__free(d->ring_bins);
    veer__free(d->ring_flags);
    veer__free(d->counts);
    veer__free(d->sums);
    veer__free(d->psi_term);
    veer__free(d->psi_live);
    veer__free(d->psi_level);
    for (int i = 0; i < 3; i++)
        veer_drift_report_destroy(d->slot[i]);
    if (d->published_ready)
        veer__tribuf_destroy(&d->published);
    veer__free(d);
}

static void clear_window(veer_drift *d)
{
    size_t n = d->n;
    memset(d->counts, 0, n * d->bins * sizeof *d->counts);
    memset(d->sums, 0, n * sizeof *d->sums);
    memset(d->psi_live, 0, n * sizeof *d->psi_live);
    d->head = d->fill = 0;
    d->exceed_count = d->ooc_count = 0;
    d->states_total = d->ooc_total = 0;
    d->since_recount = d->since_publish = 0;
}

int veer_drift_create(const veer_drift_training *train, const veer_drift_config *cfg,
                      veer_drift **out, veer_error *err)
{
    if (out == NULL || train == NULL)
        return veer__error_set(err, VEER_EINVAL, out ? "train" : "out",
                               "a required pointer is "
                               "NULL");
    *out = NULL;
    veer_drift_config defaults;
    if (cfg == NULL) {
        veer_drift_config_init(&defaults);
        cfg = &defaults;
    }
    int rc = veer__drift_validate(train, cfg, err);
    if (rc != 0)
        return rc;

    size_t n = train->state_dim, e = train->bins - 1u, w = cfg->window;
    veer_drift *d = veer__calloc(1, sizeof *d);
    if (d == NULL)
        return veer__error_set(err, VEER_ENOMEM, "", NULL);
    d->n = (uint32_t)n;
    d->bins = train->bins;
    d->cfg = *cfg;
    d->mean = veer__malloc(n * sizeof *d->mean);
    d->std = veer__malloc(n * sizeof *d->std);
    d->precision = veer__malloc(n * n * sizeof *d->precision);
    d->diff = veer__malloc(n * sizeof *d->diff);
    d->edges = veer__malloc(n * e * sizeof *d->edges);
    d->ring_states = veer__malloc(w * n * sizeof *d->ring_states);
    d->ring_bins = veer__malloc(w * n * sizeof *d->ring_bins);
    d->ring_flags = veer__malloc(w * sizeof *d->ring_flags);
    d->counts = veer__malloc(n * d->bins * sizeof *d->counts);
    d->sums = veer__malloc(n * sizeof *d->sums);
    d->psi_term = veer__malloc((w + 1) * sizeof *d->psi_term);
    d->psi_live = veer__malloc(n * sizeof *d->psi_live);
    d->psi_level = veer__calloc(n, sizeof *d->psi_level);
    for (int i = 0; i < 3; i++)
        d->slot[i] = report_alloc(d->n);
    if (!d->mean || !d->std || !d->precision || !d->diff || !d->edges || !d->ring_states ||
        !d->ring_bins || !d->ring_flags || !d->counts || !d->sums || !d->psi_term || !d->psi_live ||
        !d->psi_level || !d->slot[0] || !d->slot[1] || !d->slot[2])
        goto fail_alloc;
    if (veer__tribuf_init(&d->published, d->slot[0], d->slot[1], d->slot[2]) != 0)
        goto fail_alloc;
    d->published_ready = 1;

    for (size_t i = 0; i < n; i++) {
        d->mean[i] = train->mean[i];
        d->std[i] = sqrt((double)train->cov[i * n + i]);
        for (size_t j = 0; j < n; j++) /* symmetrise: a float inverse is rarely exactly so */
            d->precision[i * n + j] =
                0.5 * ((double)train->precision[i * n + j] + (double)train->precision[j * n + i]);
    }
    memcpy(d->edges, train->quantile_edges, n * e * sizeof *d->edges);
    d->p99_sq = (double)train->mahalanobis_p99 * (double)train->mahalanobis_p99;
    d->p999_sq = (double)train->mahalanobis_p999 * (double)train->mahalanobis_p999;

    double q = 1.0 / d->bins;
    for (size_t c = 0; c <= w; c++) {
        double p = (double)c / (double)w;
        if (p < cfg->psi_floor)
            p = cfg->psi_floor;
        d->psi_term[c] = (p - q) * log(p / q);
    }
    clear_window(d);
    veer_drift_publish(d); /* readers see an empty report, never garbage */
    *out = d;
    return 0;

fail_alloc:
    free_drift(d);
    return veer__error_set(err, VEER_ENOMEM, "window",
                           "cannot allocate a drift window of %zu "
                           "states of %zu features",
                           w, n);
}

void veer_drift_destroy(veer_drift *d)
{
    if (d == NULL)
        return;
    free_drift(d);
}

/* ---- The per-state work ------------------------------------------------------------------ */

/* Squared Mahalanobis distance (x − μ)ᵀ P (x − μ) over P's lower triangle (P is symmetric),
 * with the differences x − μ written once into `diff` (state_dim doubles). */
static double mahalanobis_sq(const veer_drift *d, const float *x, double *diff)
{
    size_t n = d->n;
    for (size_t i = 0; i < n; i++)
        diff[i] = (double)x[i] - d->mean[i];
    double total = 0.0;
    for (size_t i = 0; i < n; i++) {
        const double *row = d->precision + i * n;
        double acc = 0.0;
        for (size_t j = 0; j < i; j++)
            acc += row[j] * diff[j];
        total += diff[i] * (2.0 * acc + row[i] * diff[i]);
    }
    return total > 0.0 ? total : 0.0;
}

/* The same without a buffer, recomputing differences: for veer_drift_check on states too wide
 * for its stack buffer. */
static double mahalanobis_sq_unbuffered(const veer_drift *d, const float *x)
{
    size_t n = d->n;
    double total = 0.0;
    for (size_t i = 0; i < n; i++) {
        double di = (double)x[i] - d->mean[i], acc = 0.0;
        const double *row = d->precision + i * n;
        for (size_t j = 0; j < i; j++)
            acc += row[j] * ((double)x[j] - d->mean[j]);
        total += di * (2.0 * acc + row[i] * di);
    }
    return total > 0.0 ? total : 0.0;
}

/* The bin of x: the number of edges <= x (edge[b−1] <= x < edge[b]). The search halves the
 * range a fixed number of times with a conditional move instead of a branch, because live values
 * land in unpredictable bins and a mispredicted branch per step costs more than the compare. */
static uint32_t bin_of(const float *edges, uint32_t nedges, float x)
{
    const float *base = edges;
    uint32_t len = nedges;
    while (len > 1) {
        uint32_t half = len / 2u;
        base = base[half] <= x ? base + half : base;
        len -= half;
    }
    return (uint32_t)(base - edges) + (*base <= x);
}

static int first_nonfinite(const float *x, uint32_t n)
{
    for (uint32_t i = 0; i < n; i++)
        if (!isfinite(x[i]))
            return (int)i;
    return -1;
}

int veer_drift_check(const veer_drift *d, const float *state, double *distance)
{
    if (d == NULL || state == NULL)
        return VEER_EINVAL;
    if (first_nonfinite(state, d->n) >= 0)
        return VEER_ENONFINITE;
    /* Any thread may call this, so the differences go on this thread's stack. */
    double diff[VEER__CHECK_STACK_DIM];
    double m2 = d->n <= VEER__CHECK_STACK_DIM ? mahalanobis_sq(d, state, diff)
                                              : mahalanobis_sq_unbuffered(d, state);
    if (distance != NULL)
        *distance = sqrt(m2);
    return m2 > d->p999_sq;
}

/* Exact PSI of one feature from its bin counts, with `total` states. */
static double psi_exact(const veer_drift *d, uint32_t f, uint32_t total)
{
    if (total == 0)
        return 0.0;
    double q = 1.0 / d->bins, s = 0.0;
    const uint32_t *c = d->counts + (size_t)f * d->bins;
    if (total == d->cfg.window) { /* the table holds the same terms, without the logarithms */
        for (uint32_t b = 0; b < d->bins; b++)
            s += d->psi_term[c[b]];
        return s;
    }
    for (uint32_t b = 0; b < d->bins; b++) {
        double p = (double)c[b] / (double)total;
        if (p < d->cfg.psi_floor)
            p = d->cfg.psi_floor;
        s += (p - q) * log(p / q);
    }
    return s;
}

/* Recounts the running sums from the window and PSI from the bin counts. */
static void recount(veer_drift *d)
{
    size_t n = d->n;
    memset(d->sums, 0, n * sizeof *d->sums);
    for (uint32_t s = 0; s < d->fill; s++) {
        const float *x = d->ring_states + (size_t)s * n;
        for (size_t i = 0; i < n; i++)
            d->sums[i] += x[i];
    }
    for (uint32_t f = 0; f < d->n; f++)
        d->psi_live[f] = psi_exact(d, f, d->fill);
    d->since_recount = 0;
}

static veer_drift_level next_psi_level(const veer_drift_config *c, veer_drift_level cur, double psi)
{
    switch (cur) {
    case VEER_DRIFT_OK:
        return psi >= c->psi_alarm_raise   ? VEER_DRIFT_ALARM
               : psi >= c->psi_watch_raise ? VEER_DRIFT_WATCH
                                           : VEER_DRIFT_OK;
    case VEER_DRIFT_WATCH:
        return psi >= c->psi_alarm_raise  ? VEER_DRIFT_ALARM
               : psi < c->psi_watch_clear ? VEER_DRIFT_OK
                                          : VEER_DRIFT_WATCH;
    case VEER_DRIFT_ALARM:
    default:
        return psi >= c->psi_alarm_clear   ? VEER_DRIFT_ALARM
               : psi >= c->psi_watch_clear ? VEER_DRIFT_WATCH
                                           : VEER_DRIFT_OK;
    }
}

static unsigned evaluate_levels(veer_drift *d)
{
    unsigned changed = 0;
    veer_drift_level overall = VEER_DRIFT_OK;
    for (uint32_t f = 0; f < d->n; f++) {
        veer_drift_level l = next_psi_level(&d->cfg, d->psi_level[f], d->psi_live[f]);
        if (l != d->psi_level[f]) {
            d->psi_level[f] = l;
            d->level_changes++;
            changed |= VEER_DRIFT_CHANGED_FEATURE;
        }
        if (l > overall)
            overall = l;
    }
    if (overall != d->psi_overall) {
        d->psi_overall = overall;
        d->level_changes++;
        changed |= VEER_DRIFT_CHANGED_PSI;
    }
    double rate = (double)d->exceed_count / (double)d->fill;
    veer_drift_level ex = d->exceed_level;
    if (ex == VEER_DRIFT_OK && rate >= d->cfg.exceed_raise * 0.01)
        ex = VEER_DRIFT_ALARM;
    else if (ex == VEER_DRIFT_ALARM && rate < d->cfg.exceed_clear * 0.01)
        ex = VEER_DRIFT_OK;
    if (ex != d->exceed_level) {
        d->exceed_level = ex;
        d->level_changes++;
        changed |= VEER_DRIFT_CHANGED_EXCEED;
    }
    return changed;
}

int veer_drift_add(veer_drift *d, const float *state, veer_drift_result *res, veer_error *err)
{
    if (d == NULL || state == NULL)
        return veer__error_set(err, VEER_EINVAL, d ? "state" : "monitor",
                               "a required pointer "
                               "is NULL");
    int bad = first_nonfinite(state, d->n);
    if (bad >= 0) {
        if (err == NULL)
            return VEER_ENONFINITE;
        char field[32];
        snprintf(field, sizeof field, "state[%d]", bad);
        return veer__error_set(err, VEER_ENONFINITE, field,
                               "state[%d] is %g; only finite "
                               "states can be monitored",
                               bad, (double)state[bad]);
    }

    size_t n = d->n;
    uint32_t nedges = d->bins - 1u, w = d->cfg.window;
    int full = d->fill == w;
    float *x_slot = d->ring_states + (size_t)d->head * n;
    uint16_t *b_slot = d->ring_bins + (size_t)d->head * n;

    /* Evict the oldest state (the slot about to be overwritten) when the window is full. */
    if (full) {
        uint8_t fl = d->ring_flags[d->head];
        d->exceed_count -= (fl & VEER__FLAG_EXCEED) != 0;
        d->ooc_count -= (fl & VEER__FLAG_OOC) != 0;
    }
    for (size_t i = 0; i < n; i++) {
        uint32_t *c = d->counts + i * d->bins;
        uint32_t nb = bin_of(d->edges + i * nedges, nedges, state[i]);
        if (full) {
            uint32_t ob = b_slot[i];
            d->sums[i] -= x_slot[i];
            if (ob != nb) {
                /* With the fill fixed at `w`, only the two changed bins' terms move. */
                d->psi_live[i] += d->psi_term[c[ob] - 1u] - d->psi_term[c[ob]] +
                                  d->psi_term[c[nb] + 1u] - d->psi_term[c[nb]];
                c[ob]--;
                c[nb]++;
            }
        } else {
            c[nb]++;
        }
        d->sums[i] += state[i];
        x_slot[i] = state[i];
        b_slot[i] = (uint16_t)nb;
    }

    double m2 = mahalanobis_sq(d, state, d->diff);
    uint8_t flags = 0;
    if (m2 > d->p99_sq)
        flags |= VEER__FLAG_EXCEED;
    if (m2 > d->p999_sq)
        flags |= VEER__FLAG_OOC;
    d->ring_flags[d->head] = flags;
    d->exceed_count += (flags & VEER__FLAG_EXCEED) != 0;
    d->ooc_count += (flags & VEER__FLAG_OOC) != 0;
    d->ooc_total += (flags & VEER__FLAG_OOC) != 0;
    d->states_total++;
    d->head = d->head + 1u == w ? 0 : d->head + 1u;
    if (!full)
        d->fill++;

    unsigned changed = 0;
    if (d->fill == w) {
        /* The first time the window fills, and once per window length after, recount exactly. */
        if (!full || ++d->since_recount >= w)
            recount(d);
        changed = evaluate_levels(d);
    }
    if (res != NULL) {
        res->mahalanobis = sqrt(m2);
        res->out_of_coverage = (flags & VEER__FLAG_OOC) != 0;
        res->changed = changed;
    }
    if (changed || (d->cfg.publish_every && ++d->since_publish >= d->cfg.publish_every))
        veer_drift_publish(d);
    return 0;
}

void veer_drift_reset(veer_drift *d)
{
    if (d == NULL)
        return;
    clear_window(d);
    int any = d->psi_overall != VEER_DRIFT_OK || d->exceed_level != VEER_DRIFT_OK;
    for (uint32_t f = 0; f < d->n; f++) {
        any |= d->psi_level[f] != VEER_DRIFT_OK;
        d->psi_level[f] = VEER_DRIFT_OK;
    }
    d->psi_overall = d->exceed_level = VEER_DRIFT_OK;
    if (any)
        d->level_changes++;
    veer_drift_publish(d);
}

/* ---- Reports ------------------------------------------------------------------------------ */

int veer_drift_read(const veer_drift *d, veer_drift_report *out)
{
    if (d == NULL || out == NULL)
        return VEER_EINVAL;
    if (out->state_dim != d->n)
        return VEER_EDIM;
    out->window = d->cfg.window;
    out->fill = d->fill;
    out->states_total = d->states_total;
    out->out_of_coverage_total = d->ooc_total;
    out->out_of_coverage_window = d->ooc_count;
    out->psi_max = 0.0;
    out->psi_max_feature = 0;
    for (uint32_t f = 0; f < d->n; f++) {
        double psi = psi_exact(d, f, d->fill);
        if (out->psi)
            out->psi[f] = psi;
        if (out->mean_shift) {
            double shift = 0.0;
            if (d->fill > 0) {
                double diff = d->sums[f] / d->fill - d->mean[f];
                /* A feature constant in training: any difference is infinitely many stds. */
                shift = d->std[f] > 0.0 ? diff / d->std[f]
                        : diff == 0.0   ? 0.0
                                        : copysign(INFINITY, diff);
            }
            out->mean_shift[f] = shift;
        }
        if (out->psi_level)
            out->psi_level[f] = d->psi_level[f];
        if (psi > out->psi_max) {
            out->psi_max = psi;
            out->psi_max_feature = f;
        }
    }
    out->psi_overall = d->psi_overall;
    out->exceed_count = d->exceed_count;
    out->exceed_rate = d->fill ? (double)d->exceed_count / d->fill : 0.0;
    out->exceed_level = d->exceed_level;
    out->level = d->psi_overall > d->exceed_level ? d->psi_overall : d->exceed_level;
    out->level_changes = d->level_changes;
    out->publish_seq = d->publish_seq;
    return 0;
}

static void report_copy(veer_drift_report *dst, const veer_drift_report *src)
{
    size_t n = src->state_dim;
    double *psi = dst->psi, *shift = dst->mean_shift;
    veer_drift_level *lv = dst->psi_level;
    *dst = *src;
    dst->psi = psi;
    dst->mean_shift = shift;
    dst->psi_level = lv;
    if (psi)
        memcpy(psi, src->psi, n * sizeof *psi);
    if (shift)
        memcpy(shift, src->mean_shift, n * sizeof *shift);
    if (lv)
        memcpy(lv, src->psi_level, n * sizeof *lv);
}

void veer_drift_publish(veer_drift *d)
{
    if (d == NULL)
        return;
    d->publish_seq++;
    veer_drift_read(d, veer__tribuf_back(&d->published));
    veer__tribuf_publish(&d->published);
    d->since_publish = 0;
}

int veer_drift_snapshot(veer_drift *d, veer_drift_report *out)
{
    if (d == NULL || out == NULL)
        return VEER_EINVAL;
    if (out->state_dim != d->n)
        return VEER_EDIM;
    report_copy(out, veer__tribuf_read_begin(&d->published));
    veer__tribuf_read_end(&d->published);
    return 0;
}
