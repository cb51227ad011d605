/* Validation of a drift monitor's training statistics and configuration, before anything is
 * allocated: every rejected value is named in the veer_error (field and a sentence), so an
 * operator can fix the bundle or the settings without reading code. */
#include "monitor.h"

#include <math.h>
#include <stdio.h>

#include "base/base.h"

static int check_finite(const float *v, size_t count, const char *name, veer_error *err)
{
    for (size_t i = 0; i < count; i++) {
        if (!isfinite(v[i])) {
            char field[48];
            snprintf(field, sizeof field, "%s[%zu]", name, i);
            return veer__error_set(err, VEER_ENONFINITE, field,
                                   "%s is %g; training statistics "
                                   "must be finite",
                                   field, (double)v[i]);
        }
    }
    return 0;
}

static int validate_training(const veer_drift_training *t, veer_error *err)
{
    if (t->state_dim == 0 || t->state_dim > VEER_DRIFT_MAX_DIM)
        return veer__error_set(err, VEER_EFIELD, "state_dim", "state_dim is %u; it must be 1..%u",
                               t->state_dim, VEER_DRIFT_MAX_DIM);
    if (t->bins < 2 || t->bins > VEER_DRIFT_MAX_BINS)
        return veer__error_set(err, VEER_EFIELD, "bins", "bins is %u; it must be 2..%u", t->bins,
                               VEER_DRIFT_MAX_BINS);
    if (!t->mean || !t->cov || !t->precision || !t->quantile_edges)
        return veer__error_set(err, VEER_EINVAL,
                               !t->mean        ? "mean"
                               : !t->cov       ? "cov"
                               : !t->precision ? "precision"
                                               : "quantile_edges",
                               "a training statistic is missing (NULL)");
    size_t n = t->state_dim, e = t->bins - 1u;
    int rc;
    if ((rc = check_finite(t->mean, n, "mean", err)) != 0 ||
        (rc = check_finite(t->cov, n * n, "cov", err)) != 0 ||
        (rc = check_finite(t->precision, n * n, "precision", err)) != 0 ||
        (rc = check_finite(t->quantile_edges, n * e, "quantile_edges", err)) != 0)
        return rc;
    for (size_t i = 0; i < n; i++) {
        if (t->cov[i * n + i] < 0.0f)
            return veer__error_set(err, VEER_EFIELD, "cov",
                                   "cov[%zu,%zu] is %g; a variance "
                                   "cannot be negative",
                                   i, i, (double)t->cov[i * n + i]);
        double pii = t->precision[i * n + i];
        if (!(pii > 0.0))
            return veer__error_set(err, VEER_EFIELD, "precision",
                                   "precision[%zu,%zu] is %g; "
                                   "a precision matrix has a positive diagonal",
                                   i, i, pii);
        for (size_t j = 0; j < i; j++) {
            double a = t->precision[i * n + j], b = t->precision[j * n + i];
            double scale = sqrt(pii * (double)t->precision[j * n + j]);
            if (fabs(a - b) > 1e-3 * scale)
                return veer__error_set(err, VEER_EFIELD, "precision",
                                       "precision[%zu,%zu] = %g but precision[%zu,%zu] = %g; the "
                                       "matrix must be symmetric",
                                       i, j, a, j, i, b);
        }
        for (size_t b = 1; b < e; b++)
            if (t->quantile_edges[i * e + b] < t->quantile_edges[i * e + b - 1])
                return veer__error_set(err, VEER_EFIELD, "quantile_edges",
                                       "quantile_edges of feature %zu decrease at edge %zu; "
                                       "edges must be non-decreasing",
                                       i, b);
    }
    if (!(t->mahalanobis_p99 > 0.0f) || !isfinite(t->mahalanobis_p99))
        return veer__error_set(err, VEER_EFIELD, "mahalanobis_p99",
                               "mahalanobis_p99 is %g; it must be a positive finite distance",
                               (double)t->mahalanobis_p99);
    if (!(t->mahalanobis_p999 >= t->mahalanobis_p99) || !isfinite(t->mahalanobis_p999))
        return veer__error_set(err, VEER_EFIELD, "mahalanobis_p999",
                               "mahalanobis_p999 is %g; it must be finite and at least "
                               "mahalanobis_p99 (%g)",
                               (double)t->mahalanobis_p999, (double)t->mahalanobis_p99);
    return 0;
}

static int validate_config(const veer_drift_config *c, uint32_t bins, veer_error *err)
{
    if (c->window < 1 || c->window > VEER_DRIFT_MAX_WINDOW)
        return veer__error_set(err, VEER_EFIELD, "window", "window is %u; it must be 1..%u",
                               c->window, VEER_DRIFT_MAX_WINDOW);
    if (!(c->psi_floor > 0.0 && c->psi_floor < 1.0 / bins))
        return veer__error_set(err, VEER_EFIELD, "psi_floor",
                               "psi_floor is %g; it must lie in "
                               "(0, 1/bins = %g)",
                               c->psi_floor, 1.0 / bins);
    const struct {
        const char *name;
        double v;
    } th[] = {{"psi_watch_clear", c->psi_watch_clear}, {"psi_watch_raise", c->psi_watch_raise},
              {"psi_alarm_clear", c->psi_alarm_clear}, {"psi_alarm_raise", c->psi_alarm_raise},
              {"exceed_clear", c->exceed_clear},       {"exceed_raise", c->exceed_raise}};
    for (size_t i = 0; i < sizeof th / sizeof th[0]; i++)
        if (!(th[i].v > 0.0) || !isfinite(th[i].v))
            return veer__error_set(err, VEER_EFIELD, th[i].name,
                                   "%s is %g; it must be positive and finite", th[i].name, th[i].v);
    if (!(c->psi_watch_clear < c->psi_watch_raise))
        return veer__error_set(err, VEER_EFIELD, "psi_watch_clear",
                               "psi_watch_clear (%g) must be below psi_watch_raise (%g)",
                               c->psi_watch_clear, c->psi_watch_raise);
    if (!(c->psi_watch_raise < c->psi_alarm_raise))
        return veer__error_set(err, VEER_EFIELD, "psi_alarm_raise",
                               "psi_alarm_raise (%g) must be above psi_watch_raise (%g)",
                               c->psi_alarm_raise, c->psi_watch_raise);
    if (!(c->psi_alarm_clear < c->psi_alarm_raise && c->psi_alarm_clear >= c->psi_watch_clear))
        return veer__error_set(err, VEER_EFIELD, "psi_alarm_clear",
                               "psi_alarm_clear (%g) must lie in [psi_watch_clear (%g), "
                               "psi_alarm_raise (%g))",
                               c->psi_alarm_clear, c->psi_watch_clear, c->psi_alarm_raise);
    if (!(c->exceed_raise <= 100.0))
        return veer__error_set(err, VEER_EFIELD, "exceed_raise",
                               "exceed_raise is %g; a rate of %g %% can never be reached",
                               c->exceed_raise, c->exceed_raise);
    if (!(c->exceed_clear < c->exceed_raise))
        return veer__error_set(err, VEER_EFIELD, "exceed_clear",
                               "exceed_clear (%g) must be below exceed_raise (%g)", c->exceed_clear,
                               c->exceed_raise);
    return 0;
}

int veer__drift_validate(const veer_drift_training *train, const veer_drift_config *cfg,
                         veer_error *err)
{
    int rc = validate_training(train, err);
    return rc != 0 ? rc : validate_config(cfg, train->bins, err);
}
