/* Acting and the public network evaluations. The act path is: check the inputs (finite, and
 * every state feature an embedding reads an integer within its table) before touching any output,
 * evaluate in slices of at most max_batch states, then turn network outputs into actions that
 * are always finite and within bounds. Continuous: actor, affine map from [-1, 1] when the
 * actor is normalised, clip, then Q = F(s, a, z)·z for the clipped action (the value of what
 * is actually done). Discrete: F for every action of every state in one batched evaluation
 * (one pass over the weights instead of action_count passes), argmax of F·z with the lowest
 * index winning ties, Q the maximum; when F ends in a linear layer W, F·z is read as
 * h·(Wᵀz) + b·z (Wᵀz once per task vector, not W h for every action row). The task vector is
 * either one for every state (z_each 0) or one per state (z_each 1, zs is m x z_dim). Nothing
 * here allocates or locks. */
#include <cblas.h>
#include <math.h>
#include <string.h>

#include "runtime/kernels.h"
#include "runtime/workspace.h"
#include "veer/runtime.h"

static void write_fallback(const veer_model_info *info, float *action, float *value,
                           uint32_t *flags)
{
    memcpy(action, info->fallback_action, (size_t)info->action_dim * sizeof *action);
    *value = 0.0f;
    *flags = VEER_ACT_FALLBACK | VEER_ACT_NONFINITE;
}

/* v = F·z for m states of `per` rows each (per: 1 continuous, action_count discrete). */
static void q_values(size_t m, uint32_t per, uint32_t z_dim, const float *fo, const float *z,
                     int z_each, float *v)
{
    if (!z_each) {
        veer__k_row_dot(m * per, z_dim, fo, z, v);
        return;
    }
    for (size_t r = 0; r < m; r++)
        veer__k_row_dot(per, z_dim, fo + r * per * z_dim, z + r * z_dim, v + r * per);
}

/* As q_values when F's final layer is linear, F = W h + b: F·z = h·(Wᵀz) + b·z, with Wᵀz
 * (h's width) once per task vector instead of W h for every action row. h is m x per rows of
 * final->in_dim; u is scratch of final->in_dim floats. */
static void q_values_projected(const veer__layer *final, size_t m, uint32_t per, const float *h,
                               const float *z, int z_each, float *u, float *v)
{
    uint32_t k = final->in_dim, d = final->out_dim;
    size_t groups = z_each ? m : 1, rows = z_each ? per : m * per;
    for (size_t g = 0; g < groups; g++) {
        const float *zg = z + (z_each ? g * d : 0);
        cblas_sgemv(CblasRowMajor, CblasTrans, (int)d, (int)k, 1.0f, final->weight, (int)k, zg, 1,
                    0.0f, u, 1);
        float c = 0.0f;
        if (final->bias != NULL)
            c = cblas_sdot((int)d, final->bias, 1, zg, 1);
        float *vg = v + g * rows;
        for (size_t r = 0; r < rows; r++)
            vg[r] = c;
        cblas_sgemv(CblasRowMajor, CblasNoTrans, (int)rows, (int)k, 1.0f, h + g * rows * k, (int)k,
                    u, 1, 1.0f, vg, 1);
    }
}

/* m states of a continuous bundle. */
static int act_continuous(veer_workspace *ws, size_t m, const float *states, const float *z,
                          int z_each, float *actions, float *values, uint32_t *flags)
{
    const veer_bundle *b = ws->bundle;
    const veer_model_info *info = &b->info;
    uint32_t adim = info->action_dim;
    veer__rows rows = {.n = m,
                       .state_dim = info->state_dim,
                       .states = states,
                       .state_rep = 1,
                       .action_dim = adim,
                       .zs = z,
                       .z_dim = info->z_dim,
                       .z_rep = 1,
                       .z_shared = !z_each};
    const float *y;
    int rc = veer__net_eval(&b->actor, &ws->bufs, &rows, &y);
    if (rc != 0)
        return rc;

    for (size_t r = 0; r < m; r++) {
        uint32_t f = 0;
        for (uint32_t j = 0; j < adim; j++) {
            float lo = info->action_low[j], hi = info->action_high[j];
            float v = y[r * adim + j], a;
            if (b->actor_normalized) {
                if (v < -1.0f || v > 1.0f)
                    f |= VEER_ACT_CLIPPED;
                a = lo + (v + 1.0f) * 0.5f * (hi - lo);
            } else {
                if (v < lo || v > hi)
                    f |= VEER_ACT_CLIPPED;
                a = v;
            }
            /* Always clamp: the affine map can round a hair past a bound. NaN passes both
             * tests and is caught below. */
            a = a < lo ? lo : a;
            a = a > hi ? hi : a;
            ws->actions[r * adim + j] = a;
        }
        flags[r] = f;
    }

    rows.actions = ws->actions;
    const float *fo;
    if ((rc = veer__net_eval(&b->forward, &ws->bufs, &rows, &fo)) != 0)
        return rc;
    q_values(m, 1, info->z_dim, fo, z, z_each, ws->values);

    for (size_t r = 0; r < m; r++) {
        const float *a = ws->actions + r * adim;
        if (!isfinite(ws->values[r]) || !veer__k_all_finite(adim, a)) {
            write_fallback(info, actions + r * adim, &values[r], &flags[r]);
            continue;
        }
        memcpy(actions + r * adim, a, (size_t)adim * sizeof *a);
        values[r] = ws->values[r];
    }
    return 0;
}

/* m states of a discrete bundle. */
static int act_discrete(veer_workspace *ws, size_t m, const float *states, const float *z,
                        int z_each, float *actions, float *values, uint32_t *flags)
{
    const veer_bundle *b = ws->bundle;
    const veer_model_info *info = &b->info;
    uint32_t count = info->action_count;
    veer__rows rows = {.n = m * count,
                       .state_dim = info->state_dim,
                       .states = states,
                       .state_rep = count,
                       .actions = b->action_index,
                       .action_dim = 1,
                       .action_cycle = count,
                       .zs = z,
                       .z_dim = info->z_dim,
                       .z_rep = count,
                       .z_shared = !z_each};
    const veer__layer *final = veer__net_final_linear(&b->forward);
    int rc;
    if (final != NULL && count > 1) {
        const float *h;
        if ((rc = veer__net_eval_inner(&b->forward, &ws->bufs, &rows, &h)) != 0)
            return rc;
        q_values_projected(final, m, count, h, z, z_each, ws->zproj, ws->values);
    } else {
        const float *fo;
        if ((rc = veer__net_eval(&b->forward, &ws->bufs, &rows, &fo)) != 0)
            return rc;
        q_values(m, count, info->z_dim, fo, z, z_each, ws->values);
    }

    for (size_t r = 0; r < m; r++) {
        const float *q = ws->values + r * count;
        uint32_t best = 0;
        int finite = 1;
        for (uint32_t a = 0; a < count; a++) {
            finite &= isfinite(q[a]) != 0;
            if (q[a] > q[best]) /* strict: the lowest index wins a tie */
                best = a;
        }
        if (!finite) {
            write_fallback(info, &actions[r], &values[r], &flags[r]);
            continue;
        }
        actions[r] = (float)best;
        values[r] = q[best];
        flags[r] = 0;
    }
    return 0;
}

/* 1 when every state feature that an embedding reads is an integer within its table. */
static int indices_valid(const veer_bundle *b, size_t n, const float *states)
{
    uint32_t sd = b->info.state_dim;
    for (size_t r = 0; r < n; r++)
        for (uint32_t k = 0; k < b->index_check_count; k++) {
            float v = states[r * sd + b->index_features[k]];
            if (!(v >= 0.0f && v < (float)b->index_counts[k]) || v != floorf(v))
                return 0;
        }
    return 1;
}

/* Both batch calls: zs holds one task vector (z_each 0) or one per state (z_each 1). */
static int act_rows(veer_workspace *ws, size_t n, const float *states, const float *zs, int z_each,
                    float *actions, float *values, uint32_t *flags)
{
    /* A backward-only workspace has no buffers for F or the actor (workspace.h). */
    if (ws == NULL || states == NULL || zs == NULL || actions == NULL || ws->backward_only)
        return VEER_EINVAL;
    const veer_model_info *info = &ws->bundle->info;
    if (!veer__k_all_finite(n * info->state_dim, states) ||
        !veer__k_all_finite((z_each ? n : 1) * info->z_dim, zs))
        return VEER_ENONFINITE;
    if (!indices_valid(ws->bundle, n, states))
        return VEER_EINVAL;

    /* Callers that pass NULL for values or flags get them into the workspace's scratch. */
    for (size_t done = 0; done < n; done += ws->max_batch) {
        size_t m = n - done < ws->max_batch ? n - done : ws->max_batch;
        const float *s = states + done * info->state_dim;
        const float *z = z_each ? zs + done * info->z_dim : zs;
        float *a = actions + done * info->action_dim;
        float *v = values ? values + done : ws->slice_values;
        uint32_t *f = flags ? flags + done : ws->slice_flags;
        int rc = info->action_kind == VEER_ACTION_CONTINUOUS
                     ? act_continuous(ws, m, s, z, z_each, a, v, f)
                     : act_discrete(ws, m, s, z, z_each, a, v, f);
        if (rc != 0)
            return rc;
    }
    return 0;
}

int veer_act_batch(veer_workspace *ws, size_t n, const float *states, const float *z,
                   float *actions, float *values, uint32_t *flags)
{
    return act_rows(ws, n, states, z, 0, actions, values, flags);
}

int veer_act_each(veer_workspace *ws, size_t n, const float *states, const float *zs,
                  float *actions, float *values, uint32_t *flags)
{
    return act_rows(ws, n, states, zs, 1, actions, values, flags);
}

int veer_act(veer_workspace *ws, const float *state, const float *z, float *action, float *value,
             uint32_t *flags)
{
    float v;
    uint32_t f;
    int rc = veer_act_batch(ws, 1, state, z, action, &v, &f);
    if (rc == 0) {
        if (value != NULL)
            *value = v;
        if (flags != NULL)
            *flags = f;
    }
    return rc;
}
