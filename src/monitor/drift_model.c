/* The one bridge between a loaded model and a drift monitor: it maps veer_model_info's training
 * statistics onto veer_drift_training. Kept apart from drift.c so the monitor itself knows
 * nothing of bundles and its tests need no model. */
#include "veer/drift.h"
#include "veer/runtime.h"

#include "base/base.h"

int veer_drift_training_from_model(const veer_model_info *info, veer_drift_training *out,
                                   veer_error *err)
{
    if (info == NULL || out == NULL)
        return veer__error_set(err, VEER_EINVAL, info ? "out" : "info",
                               "a required pointer is NULL");
    if (!info->has_stats)
        return veer__error_set(err, VEER_EFIELD, "stats",
                               "the model bundle carries no "
                               "training-state statistics, so drift cannot be monitored");
    *out = (veer_drift_training){
        .state_dim = info->state_dim,
        .mean = info->state_mean,
        .cov = info->state_cov,
        .precision = info->state_precision,
        .bins = info->bins,
        .quantile_edges = info->quantile_edges,
        .mahalanobis_p99 = info->mahalanobis_p99,
        .mahalanobis_p999 = info->mahalanobis_p999,
    };
    return 0;
}
