/* Workspaces (one per acting thread) and the process-wide OpenBLAS settings. A workspace is
 * one aligned block cut into the network buffers, sized for the widest layer of F, B and the
 * actor at the largest row count each can see (discrete acting evaluates F on every action of
 * every state in a slice at once). Creating one also pins OpenBLAS to a single thread: a
 * one-state product is too small to gain from a second thread, and on a shared machine a
 * second thread makes latency depend on whatever else runs on the other core. The task encoder
 * takes a backward-only workspace (B's buffers alone): F's rows are action_count times B's and
 * would dominate both the size and the time to create it. */
#include <cblas.h>
#include <string.h>

#include "base/base.h"
#include "runtime/kernels.h"
#include "runtime/workspace.h"
#include "veer/runtime.h"

#define VEER__MAX_BATCH (1u << 20)
#define VEER__MAX_ROWS (1u << 24)

/* Floats rounded up to whole 64-byte lines, so every piece of the block stays aligned. */
static size_t lines(size_t floats)
{
    return (floats + 15) & ~(size_t)15;
}

/* Builds a workspace: for F, B and the actor, or (backward_only) for B alone. */
static int workspace_build(const veer_bundle *bundle, uint32_t max_batch, int backward_only,
                           veer_workspace **out, veer_error *err)
{
    veer_error_clear(err);
    if (out == NULL || bundle == NULL)
        return veer__error_set(err, VEER_EINVAL, out ? "bundle" : "out", "must not be NULL");
    *out = NULL;
    if (max_batch == 0 || max_batch > VEER__MAX_BATCH)
        return veer__error_set(err, VEER_EINVAL, "max_batch",
                               "max_batch is %u; it must be in 1..%u", max_batch, VEER__MAX_BATCH);

    const veer_model_info *info = &bundle->info;
    size_t per_state = info->action_kind == VEER_ACTION_DISCRETE ? info->action_count : 1;
    size_t f_rows = backward_only ? 0 : (size_t)max_batch * per_state;
    if (f_rows > VEER__MAX_ROWS) /* OpenBLAS takes row counts as int */
        return veer__error_set(err, VEER_EINVAL, "max_batch",
                               "max_batch x action_count is %zu rows; at most %u", f_rows,
                               VEER__MAX_ROWS);
    size_t sizes[3] = {0, 0, 0};
    veer__net_buf_sizes(&bundle->backward, max_batch, sizes);
    if (!backward_only) {
        veer__net_buf_sizes(&bundle->forward, f_rows, sizes);
        if (bundle->has_actor)
            veer__net_buf_sizes(&bundle->actor, max_batch, sizes);
    }
    size_t n_actions = backward_only ? 0 : (size_t)max_batch * info->action_dim;
    /* Only discrete acting projects z through F's last linear layer (policy.c). */
    const veer__layer *final = veer__net_final_linear(&bundle->forward);
    int projects = !backward_only && final != NULL && info->action_kind == VEER_ACTION_DISCRETE;
    size_t n_zproj = projects ? final->in_dim : 0;
    /* Every factor is capped (VEER__MAX_DIM, VEER__MAX_BATCH), so these sums cannot overflow. */
    size_t floats = lines(sizes[0]) + 2 * lines(sizes[1]) + lines(sizes[2]) + lines(n_actions) +
                    lines(f_rows) + lines(n_zproj) + 2 * lines(max_batch);

    veer_workspace *ws = veer__calloc(1, sizeof *ws);
    if (ws == NULL)
        return veer__error_set(err, VEER_ENOMEM, "workspace", NULL);
    float *p = veer__malloc_aligned(floats * sizeof(float));
    if (p == NULL) {
        veer__free(ws);
        return veer__error_set(err, VEER_ENOMEM, "max_batch",
                               "no memory for a %zu-byte workspace; lower max_batch",
                               floats * sizeof(float));
    }
    /* Touch every page now so the first act does not pay for page faults. */
    memset(p, 0, floats * sizeof(float));
    ws->block = p;
    ws->bundle = bundle;
    ws->max_batch = max_batch;
    ws->backward_only = backward_only;
    ws->f_rows = f_rows;
    ws->bufs.rows = backward_only ? max_batch : f_rows;
    ws->bufs.in = p;
    p += lines(sizes[0]);
    ws->bufs.ping = p;
    p += lines(sizes[1]);
    ws->bufs.pong = p;
    p += lines(sizes[1]);
    ws->bufs.branches = p;
    p += lines(sizes[2]);
    ws->actions = p;
    p += lines(n_actions);
    ws->values = p;
    p += lines(f_rows);
    ws->zproj = p;
    p += lines(n_zproj);
    ws->slice_values = p;
    p += lines(max_batch);
    ws->slice_flags = (uint32_t *)p; /* same size and alignment as float */

    openblas_set_num_threads(1);
    veer__k_init();
    *out = ws;
    return 0;
}

int veer_workspace_create(const veer_bundle *bundle, uint32_t max_batch, veer_workspace **out,
                          veer_error *err)
{
    return workspace_build(bundle, max_batch, 0, out, err);
}

int veer__workspace_create_backward(const veer_bundle *bundle, uint32_t max_batch,
                                    veer_workspace **out, veer_error *err)
{
    return workspace_build(bundle, max_batch, 1, out, err);
}

void veer_workspace_destroy(veer_workspace *ws)
{
    if (ws == NULL)
        return;
    veer__free_aligned(ws->block);
    veer__free(ws);
}

int veer_blas_threads(int n)
{
    int prev = openblas_get_num_threads();
    openblas_set_num_threads(n < 1 ? 1 : n);
    return prev;
}

const char *veer_blas_kernel(void)
{
    return openblas_get_corename();
}
