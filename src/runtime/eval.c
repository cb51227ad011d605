/* The networks' raw outputs for tools, checks, the task encoder and the trainer's evaluation:
 * F(s, a, z), B(s) and the actor, for any number of rows, in slices that fit the workspace.
 * Unlike acting, these report exactly what the networks compute, non-finite values included.
 * A backward-only workspace (workspace.h) has no room for F or the actor; those calls refuse it. */
#include <string.h>

#include "runtime/workspace.h"
#include "veer/runtime.h"

/* Evaluates `net` over n rows in slices of at most `cap` rows, copying each slice's output. */
static int eval_slices(veer_workspace *ws, const veer__net *net, size_t cap, size_t n,
                       const float *states, const float *actions, const float *zs, float *out)
{
    const veer_model_info *info = &ws->bundle->info;
    for (size_t done = 0; done < n; done += cap) {
        size_t m = n - done < cap ? n - done : cap;
        veer__rows rows = {.n = m,
                           .state_dim = info->state_dim,
                           .states = states + done * info->state_dim,
                           .state_rep = 1,
                           .actions = actions ? actions + done * info->action_dim : NULL,
                           .action_dim = info->action_dim,
                           .zs = zs ? zs + done * info->z_dim : NULL,
                           .z_dim = info->z_dim};
        const float *y;
        int rc = veer__net_eval(net, &ws->bufs, &rows, &y);
        if (rc != 0)
            return rc;
        memcpy(out + done * net->out_dim, y, m * net->out_dim * sizeof *y);
    }
    return 0;
}

int veer_eval_forward(veer_workspace *ws, size_t n, const float *states, const float *actions,
                      const float *zs, float *out)
{
    if (ws == NULL || states == NULL || actions == NULL || zs == NULL || out == NULL ||
        ws->backward_only)
        return VEER_EINVAL;
    return eval_slices(ws, &ws->bundle->forward, ws->f_rows, n, states, actions, zs, out);
}

int veer_eval_backward(veer_workspace *ws, size_t n, const float *states, float *out)
{
    if (ws == NULL || states == NULL || out == NULL)
        return VEER_EINVAL;
    return eval_slices(ws, &ws->bundle->backward, ws->max_batch, n, states, NULL, NULL, out);
}

int veer_eval_actor(veer_workspace *ws, size_t n, const float *states, const float *zs, float *out)
{
    if (ws == NULL || states == NULL || zs == NULL || out == NULL || !ws->bundle->has_actor ||
        ws->backward_only)
        return VEER_EINVAL;
    return eval_slices(ws, &ws->bundle->actor, ws->max_batch, n, states, NULL, zs, out);
}
