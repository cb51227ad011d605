/* Evaluating a network (see net.h) on a block of rows with a thread's own buffers.
 *
 * Each branch builds its input rows in `in`, runs its layers ping-ponging between `ping` and
 * `pong` (element-wise layers work in place), and leaves its output side by side with the other
 * branches' in `branches`; the merge and the head then run from there. A branch that reads
 * neither the action nor a per-row z gives the same output for every action of a state, so
 * when the rows repeat each state (discrete acting) it is evaluated once per state and its
 * output copied: for the usual F with a state-action branch and a z branch this halves the work
 * of the z branch. When the rows repeat each state, the first linear layer of a branch (or of a
 * concat head) computes the columns shared by a state's rows once per state (net_repeat.h). */
#include "runtime/net.h"

#include <cblas.h>
#include <string.h>

#include "runtime/kernels.h"
#include "runtime/net_repeat.h"
#include "veer/error.h"

void veer__net_buf_sizes(const veer__net *net, size_t rows, size_t sizes[3])
{
    size_t need[3] = {rows * net->max_in_width, rows * net->max_width, rows * net->branch_width};
    for (int i = 0; i < 3; i++)
        if (need[i] > sizes[i])
            sizes[i] = need[i];
}

/* Writes the input row block for one branch: n rows, row r standing for row r * scale of
 * `rows` (scale is state_rep when the branch runs once per state, else 1). Returns VEER_EINVAL
 * for a discrete action that is not an integer in [0, count). */
static int build_inputs(const veer__branch *br, const veer__rows *rows, size_t n, uint32_t scale,
                        float *in)
{
    uint32_t state_rep = rows->state_rep ? rows->state_rep : 1;
    uint32_t z_rep = rows->z_rep ? rows->z_rep : 1;
    for (size_t u = 0; u < n; u++) {
        float *row = in + u * br->in_width;
        size_t r = u * scale;
        const float *s = rows->states + (r / state_rep) * rows->state_dim;
        size_t arow = rows->action_cycle ? r % rows->action_cycle : r;
        const float *a = rows->actions ? rows->actions + arow * rows->action_dim : NULL;
        const float *z =
            rows->zs ? rows->zs + (rows->z_shared ? 0 : r / z_rep) * rows->z_dim : NULL;
        for (uint32_t i = 0; i < br->input_count; i++) {
            const veer__input *inp = &br->inputs[i];
            switch (inp->kind) {
            case VEER__INPUT_STATE:
                if (inp->features == NULL)
                    memcpy(row, s, (size_t)inp->width * sizeof *row);
                else
                    for (uint32_t j = 0; j < inp->width; j++)
                        row[j] = s[inp->features[j]];
                break;
            case VEER__INPUT_ACTION:
                memcpy(row, a, (size_t)inp->width * sizeof *row);
                break;
            case VEER__INPUT_ACTION_ONEHOT: {
                float v = a[0];
                if (!(v >= 0.0f && v < (float)inp->width) || v != (float)(uint32_t)v)
                    return VEER_EINVAL;
                memset(row, 0, (size_t)inp->width * sizeof *row);
                row[(uint32_t)v] = 1.0f;
                break;
            }
            case VEER__INPUT_ACTION_INDEX:
                row[0] = a[0]; /* the embedding layer checks the range */
                break;
            case VEER__INPUT_TASK:
                memcpy(row, z, (size_t)inp->width * sizeof *row);
                break;
            }
            row += inp->width;
        }
    }
    return 0;
}

/* Runs `count` layers over n rows starting at *cur (width *width); *cur ends at the output. */
static int run_layers(const veer__layer *layers, uint32_t count, const veer__net_bufs *bufs,
                      size_t n, const float **cur_io, uint32_t *width)
{
    float *cur = (float *)*cur_io;
    for (uint32_t i = 0; i < count; i++) {
        const veer__layer *l = &layers[i];
        float *dst = cur == bufs->ping ? bufs->pong : bufs->ping;
        switch (l->kind) {
        case VEER__LAYER_LINEAR:
            veer__k_linear(n, l->in_dim, l->out_dim, cur, l->weight, l->bias, dst);
            cur = dst;
            break;
        case VEER__LAYER_EMBEDDING:
            if (veer__k_embedding(n, l->in_dim, l->counts, l->out_dim, cur, l->weight, dst) != 0)
                return VEER_EINVAL;
            cur = dst;
            break;
        case VEER__LAYER_RELU:
            veer__k_relu(n * l->out_dim, cur);
            break;
        case VEER__LAYER_TANH:
            veer__k_tanh(n * l->out_dim, cur);
            break;
        case VEER__LAYER_LAYER_NORM:
            veer__k_layer_norm(n, l->out_dim, cur, l->weight, l->bias, l->eps, cur);
            break;
        case VEER__LAYER_RESCALE:
            veer__k_rescale_norm(n, l->out_dim, l->norm, cur);
            break;
        }
        *width = l->out_dim;
    }
    *cur_io = cur;
    return 0;
}

/* 1 when every row of a state reads the same z: a shared z, or one per state (z_rep a
 * multiple of state_rep). */
static int same_z_per_state(const veer__rows *rows)
{
    uint32_t rep = rows->state_rep ? rows->state_rep : 1;
    uint32_t z_rep = rows->z_rep ? rows->z_rep : 1;
    return rows->z_shared || z_rep % rep == 0;
}

/* 1 when branch br gives the same output for every row of a state, so runs once per state. */
static int once_per_state(const veer__branch *br, const veer__rows *rows)
{
    uint32_t rep = rows->state_rep ? rows->state_rep : 1;
    return rep > 1 && !br->reads_action && (!br->reads_task || same_z_per_state(rows));
}

/* How a branch's input columns vary across the rows of one state (net_repeat.h). */
static void branch_cols(const veer__branch *br, const veer__rows *rows, veer__rep_cols *cols)
{
    uint32_t col = 0;
    cols->count = br->input_count;
    for (uint32_t i = 0; i < br->input_count; i++) {
        const veer__input *inp = &br->inputs[i];
        int vary = VEER__REP_PER_ROW;
        if (inp->kind == VEER__INPUT_STATE ||
            (inp->kind == VEER__INPUT_TASK && same_z_per_state(rows)))
            vary = VEER__REP_SHARED;
        else if (inp->kind == VEER__INPUT_ACTION_ONEHOT)
            vary = VEER__REP_ONEHOT;
        cols->blocks[i] = (veer__rep_block){.col = col, .width = inp->width, .vary = vary};
        col += inp->width;
    }
}

/* Evaluates branch b into its columns of bufs->branches. With skip_final, the branch's last
 * layer is left out and *direct points at the output before it, not copied (the net's only
 * branch with no head, see veer__net_final_linear). */
static int eval_branch(const veer__net *net, uint32_t b, const veer__net_bufs *bufs,
                       const veer__rows *rows, uint32_t col, int skip_final, const float **direct)
{
    const veer__branch *br = &net->branches[b];
    uint32_t rep = rows->state_rep ? rows->state_rep : 1;
    int once = once_per_state(br, rows);
    size_t n = once ? rows->n / rep : rows->n;

    int rc = build_inputs(br, rows, n, once ? rep : 1, bufs->in);
    if (rc != 0)
        return rc;
    const float *cur = bufs->in;
    uint32_t width = br->in_width;
    const veer__layer *layers = br->layers;
    uint32_t count = br->layer_count - (skip_final ? 1 : 0);
    veer__rep_cols cols;
    if (!once && count > 0 && layers[0].kind == VEER__LAYER_LINEAR) {
        branch_cols(br, rows, &cols);
        if (veer__rep_worth(&cols, rep)) {
            veer__rep_linear(&layers[0], &cols, n, rep, bufs->in, br->in_width, bufs->pong,
                             bufs->ping);
            cur = bufs->ping;
            width = layers[0].out_dim;
            layers++;
            count--;
        }
    }
    rc = run_layers(layers, count, bufs, n, &cur, &width);
    if (rc != 0)
        return rc;
    if (skip_final) {
        *direct = cur;
        return 0;
    }

    size_t stride = net->branch_width;
    if (!once) {
        veer__k_copy_cols(n, width, cur, width, bufs->branches + col, stride);
    } else {
        for (size_t u = 0; u < n; u++)
            for (uint32_t j = 0; j < rep; j++)
                memcpy(bufs->branches + (u * rep + j) * stride + col, cur + u * width,
                       (size_t)width * sizeof *cur);
    }
    return 0;
}

/* out_r = v_rᵀ M_r (+ the bias row of M_r), with M_r the matrix branch's output of row r. */
static void merge_bilinear(const veer__net *net, const veer__net_bufs *bufs, size_t n)
{
    uint32_t k = net->bilinear_k, out = net->merged_width;
    uint32_t mcol = 0, vcol = 0;
    for (uint32_t b = 0; b < net->branch_count; b++) {
        if (b == net->matrix_branch)
            break;
        mcol += net->branches[b].out_dim;
    }
    vcol = net->matrix_branch == 0 ? net->branches[0].out_dim : 0;
    for (size_t r = 0; r < n; r++) {
        const float *row = bufs->branches + r * net->branch_width;
        const float *m = row + mcol, *v = row + vcol;
        float *y = bufs->ping + r * out;
        float beta = 0.0f;
        if (net->bilinear_bias) {
            memcpy(y, m + (size_t)k * out, (size_t)out * sizeof *y);
            beta = 1.0f;
        }
        cblas_sgemv(CblasRowMajor, CblasTrans, (int)k, (int)out, 1.0f, m, (int)out, v, 1, beta, y,
                    1);
    }
}

const veer__layer *veer__net_final_linear(const veer__net *net)
{
    const veer__layer *last = NULL;
    if (net->head_count > 0) {
        last = &net->head[net->head_count - 1];
    } else if (net->branch_count == 1 && net->merge == VEER__MERGE_CONCAT &&
               net->branches[0].reads_action && net->branches[0].layer_count > 0) {
        /* Reading the action, the branch runs on every row, so its output has the net's rows. */
        last = &net->branches[0].layers[net->branches[0].layer_count - 1];
    }
    return last != NULL && last->kind == VEER__LAYER_LINEAR ? last : NULL;
}

/* veer__net_eval, or with skip_final everything but veer__net_final_linear(net). */
static int eval_net(const veer__net *net, const veer__net_bufs *bufs, const veer__rows *rows,
                    int skip_final, const float **out)
{
    if (skip_final && net->head_count == 0)
        return eval_branch(net, 0, bufs, rows, 0, 1, out);
    uint32_t col = 0;
    for (uint32_t b = 0; b < net->branch_count; b++) {
        int rc = eval_branch(net, b, bufs, rows, col, 0, NULL);
        if (rc != 0)
            return rc;
        col += net->branches[b].out_dim;
    }

    const float *cur = bufs->branches;
    uint32_t width = net->branch_width;
    const veer__layer *head = net->head;
    uint32_t count = net->head_count - (skip_final ? 1 : 0);
    uint32_t rep = rows->state_rep ? rows->state_rep : 1;
    if (net->merge == VEER__MERGE_BILINEAR) {
        merge_bilinear(net, bufs, rows->n);
        cur = bufs->ping;
        width = net->merged_width;
    } else if (count > 0 && head[0].kind == VEER__LAYER_LINEAR) {
        /* Branches that ran once per state give the head's first layer shared columns. */
        veer__rep_cols cols = {.count = net->branch_count};
        for (uint32_t b = 0, c = 0; b < net->branch_count; c += net->branches[b].out_dim, b++)
            cols.blocks[b] = (veer__rep_block){.col = c,
                                               .width = net->branches[b].out_dim,
                                               .vary = once_per_state(&net->branches[b], rows)
                                                           ? VEER__REP_SHARED
                                                           : VEER__REP_PER_ROW};
        if (veer__rep_worth(&cols, rep)) {
            veer__rep_linear(&head[0], &cols, rows->n, rep, bufs->branches, net->branch_width,
                             bufs->pong, bufs->ping);
            cur = bufs->ping;
            width = head[0].out_dim;
            head++;
            count--;
        }
    }
    int rc = run_layers(head, count, bufs, rows->n, &cur, &width);
    if (rc != 0)
        return rc;
    *out = cur;
    return 0;
}

int veer__net_eval(const veer__net *net, const veer__net_bufs *bufs, const veer__rows *rows,
                   const float **out)
{
    return eval_net(net, bufs, rows, 0, out);
}

int veer__net_eval_inner(const veer__net *net, const veer__net_bufs *bufs, const veer__rows *rows,
                         const float **out)
{
    if (veer__net_final_linear(net) == NULL)
        return VEER_EINVAL;
    return eval_net(net, bufs, rows, 1, out);
}
