/* Trainable networks (see nn.h): forward with kept activations, and the backward pass of each
 * layer kind written out by hand. The derivations are the standard ones: linear layers
 * dW = dYᵀX, dX = dY W; layer normalisation (Ba, Kiros & Hinton 2016, §3 and its appendix):
 * dX = rstd (dX̂ − mean(dX̂) − X̂ mean(dX̂ ⊙ X̂)) with dX̂ = dY ⊙ gain; rescaling to a norm c:
 * y = c x/|x|, dX = (c/|x|)(dY − x̂ (x̂·dY)). Each is checked against central finite
 * differences of an independent double-precision forward pass in tests/train/test_nn.c. */
#include "train/nn.h"

#include <cblas.h>
#include <math.h>
#include <string.h>

#include "base/base.h"

static veer__gemm_log *gemm_log;

void veer__tgemm_record(veer__gemm_log *log) { gemm_log = log; }

void veer__tgemm(int ta, int tb, uint32_t m, uint32_t n, uint32_t k, float alpha, const float *a,
                 uint32_t lda, const float *b, uint32_t ldb, float beta, float *c, uint32_t ldc)
{
    if (gemm_log != NULL) {
        if (gemm_log->count == gemm_log->cap) {
            size_t cap = gemm_log->cap ? gemm_log->cap * 2 : 64;
            veer__gemm_shape *s = veer__realloc(gemm_log->shapes, cap * sizeof *s);
            if (s != NULL) {
                gemm_log->shapes = s;
                gemm_log->cap = cap;
            }
        }
        if (gemm_log->count < gemm_log->cap)
            gemm_log->shapes[gemm_log->count++] = (veer__gemm_shape){ta, tb, m, n, k};
    }
    cblas_sgemm(CblasRowMajor, ta ? CblasTrans : CblasNoTrans, tb ? CblasTrans : CblasNoTrans,
                (blasint)m, (blasint)n, (blasint)k, alpha, a, (blasint)lda, b, (blasint)ldb, beta,
                c, (blasint)ldc);
}

/* ---- building ---------------------------------------------------------------------------- */

int veer__nn_new(uint32_t state_dim, uint32_t action_dim, uint32_t action_count, uint32_t z_dim,
                 uint32_t max_batch, veer__nn **out)
{
    *out = NULL;
    if (max_batch == 0 || state_dim == 0)
        return VEER_EINVAL;
    veer__nn *nn = veer__calloc(1, sizeof *nn);
    if (nn == NULL)
        return VEER_ENOMEM;
    nn->state_dim = state_dim;
    nn->action_dim = action_dim;
    nn->action_count = action_count;
    nn->z_dim = z_dim;
    nn->max_batch = max_batch;
    snprintf(nn->head.name, sizeof nn->head.name, "head");
    *out = nn;
    return 0;
}

int veer__nn_add_branch(veer__nn *nn, const char *name)
{
    if (nn->nbranches == VEER_NN_MAX_BRANCHES)
        return VEER_EINVAL;
    veer__nn_chain *c = &nn->branch[nn->nbranches];
    snprintf(c->name, sizeof c->name, "%s", name);
    return (int)nn->nbranches++;
}

int veer__nn_add_input(veer__nn *nn, uint32_t branch, int kind, uint32_t nfeat,
                       const uint32_t *features, int as_index)
{
    if (branch >= nn->nbranches || nn->branch[branch].ninputs == VEER_NN_MAX_INPUTS)
        return VEER_EINVAL;
    veer__nn_chain *c = &nn->branch[branch];
    veer__nn_input *in = &c->inputs[c->ninputs];
    memset(in, 0, sizeof *in);
    in->kind = kind;
    switch (kind) {
    case VEER_NN_IN_STATE:
        if (nfeat > 0) {
            in->features = veer__malloc(nfeat * sizeof *features);
            if (in->features == NULL)
                return VEER_ENOMEM;
            for (uint32_t i = 0; i < nfeat; i++) {
                if (features[i] >= nn->state_dim) {
                    veer__free(in->features);
                    in->features = NULL;
                    return VEER_EINVAL;
                }
                in->features[i] = features[i];
            }
        }
        in->nfeat = nfeat;
        in->width = nfeat ? nfeat : nn->state_dim;
        break;
    case VEER_NN_IN_ACTION:
        in->as_index = as_index && nn->action_count > 0;
        in->width = nn->action_count == 0 ? nn->action_dim : in->as_index ? 1 : nn->action_count;
        break;
    case VEER_NN_IN_TASK:
        in->width = nn->z_dim;
        break;
    default:
        return VEER_EINVAL;
    }
    c->in_dim += in->width;
    c->ninputs++;
    return 0;
}

static uint32_t chain_out(const veer__nn_chain *c)
{
    return c->nlayers ? c->layers[c->nlayers - 1].out : c->in_dim;
}

int veer__nn_add_layer(veer__nn *nn, uint32_t branch, int kind, uint32_t out, uint32_t ncounts,
                       const uint32_t *counts)
{
    veer__nn_chain *c = branch == VEER_NN_HEAD ? &nn->head
                        : branch < nn->nbranches ? &nn->branch[branch] : NULL;
    if (c == NULL || c->nlayers == VEER_NN_MAX_LAYERS)
        return VEER_EINVAL;
    veer__nn_layer *l = &c->layers[c->nlayers];
    memset(l, 0, sizeof *l);
    l->kind = kind;
    l->in = chain_out(c);
    l->init_std = 1.0f;
    switch (kind) {
    case VEER_NN_LINEAR:
        l->out = out;
        l->nw = (size_t)out * l->in;
        l->nb = out;
        break;
    case VEER_NN_EMBEDDING: {
        /* An embedding reads raw indices, so it must come first in a branch. */
        if (c->nlayers != 0 || branch == VEER_NN_HEAD || ncounts == 0 ||
            ncounts > VEER_NN_MAX_COUNTS || ncounts != l->in)
            return VEER_EINVAL;
        size_t rows = 1;
        for (uint32_t i = 0; i < ncounts; i++) {
            if (counts[i] == 0)
                return VEER_EINVAL;
            l->counts[i] = counts[i];
            rows *= counts[i];
        }
        l->ncounts = ncounts;
        l->out = out;
        l->nw = rows * out;
        break;
    }
    case VEER_NN_RELU:
    case VEER_NN_TANH:
        l->out = l->in;
        break;
    case VEER_NN_LAYER_NORM:
        l->out = l->in;
        l->nw = l->nb = l->in;
        l->eps = 1e-5f; /* PyTorch's LayerNorm default, common practice */
        break;
    case VEER_NN_RESCALE_NORM:
        l->out = l->in;
        break;
    default:
        return VEER_EINVAL;
    }
    if (l->out == 0)
        return VEER_EINVAL;
    c->nlayers++;
    return 0;
}

/* The merged width, or 0 when the branches do not fit the merge. */
static uint32_t merged_width(const veer__nn *nn)
{
    if (nn->merge == VEER_NN_BILINEAR) {
        if (nn->nbranches != 2 || nn->matrix_branch > 1 || nn->bilinear_k == 0)
            return 0;
        uint32_t kb = nn->bilinear_k + (nn->bilinear_bias ? 1 : 0);
        uint32_t mo = chain_out(&nn->branch[nn->matrix_branch]);
        uint32_t vo = chain_out(&nn->branch[1 - nn->matrix_branch]);
        if (vo != nn->bilinear_k || mo % kb != 0)
            return 0;
        return mo / kb;
    }
    uint32_t w = 0;
    for (uint32_t b = 0; b < nn->nbranches; b++)
        w += chain_out(&nn->branch[b]);
    return w;
}

int veer__nn_set_merge(veer__nn *nn, int merge, uint32_t k, uint32_t matrix_branch, int bias)
{
    nn->merge = merge == VEER_NN_BILINEAR ? VEER_NN_BILINEAR : VEER_NN_CONCAT;
    nn->bilinear_k = k;
    nn->matrix_branch = matrix_branch;
    nn->bilinear_bias = bias;
    nn->head.in_dim = merged_width(nn);
    return nn->head.in_dim ? 0 : VEER_EINVAL;
}

static size_t widest_of(const veer__nn_chain *c)
{
    size_t w = c->in_dim;
    for (uint32_t i = 0; i < c->nlayers; i++)
        if (c->layers[i].out > w)
            w = c->layers[i].out;
    return w;
}

static void free_buffers(veer__nn *nn)
{
    for (uint32_t b = 0; b <= nn->nbranches; b++) {
        veer__nn_chain *c = b < nn->nbranches ? &nn->branch[b] : &nn->head;
        veer__free_aligned(c->x);
        c->x = NULL;
        for (uint32_t i = 0; i < c->nlayers; i++) {
            veer__free_aligned(c->layers[i].y);
            veer__free(c->layers[i].aux);
            c->layers[i].y = NULL;
            c->layers[i].aux = NULL;
        }
    }
    veer__free_aligned(nn->params);
    veer__free_aligned(nn->grads);
    veer__free_aligned(nn->scratch[0]);
    veer__free_aligned(nn->scratch[1]);
    veer__free(nn->fused_rows);
    nn->params = nn->grads = nn->scratch[0] = nn->scratch[1] = NULL;
    nn->fused_rows = NULL;
}

/* Resolves the merge width, lays the parameters out and allocates every buffer. */
static int layout(veer__nn *nn, veer_error *err)
{
    if (nn->nbranches == 0)
        return veer__error_set(err, VEER_EINVAL, "branches", "a network needs a branch");
    uint32_t merged = merged_width(nn);
    if (merged == 0)
        return veer__error_set(err, VEER_EINVAL, "merge",
                               "the branches do not fit the merge (bilinear: two branches, the "
                               "vector one giving k values, the matrix one (k + bias) x out)");
    if (nn->head.nlayers > 0 && nn->head.layers[0].in != merged)
        return veer__error_set(err, VEER_EINVAL, "head", "head added before the merge was set");
    nn->head.in_dim = merged;
    nn->out_dim = chain_out(&nn->head);

    size_t off = 0, widest = merged;
    for (uint32_t b = 0; b <= nn->nbranches; b++) {
        veer__nn_chain *c = b < nn->nbranches ? &nn->branch[b] : &nn->head;
        if (widest_of(c) > widest)
            widest = widest_of(c);
        for (uint32_t i = 0; i < c->nlayers; i++) {
            veer__nn_layer *l = &c->layers[i];
            l->w_off = off;
            off += l->nw;
            l->b_off = off;
            off += l->nb;
        }
    }
    nn->nparams = off;
    nn->widest = (uint32_t)widest;
    size_t mb = nn->max_batch;
    nn->params = veer__malloc_aligned((off ? off : 1) * sizeof(float));
    nn->grads = veer__malloc_aligned((off ? off : 1) * sizeof(float));
    nn->scratch[0] = veer__malloc_aligned(mb * widest * sizeof(float));
    nn->scratch[1] = veer__malloc_aligned(mb * widest * sizeof(float));
    int bad = !nn->params || !nn->grads || !nn->scratch[0] || !nn->scratch[1];
    const veer__nn_chain *mc = &nn->branch[nn->matrix_branch];
    nn->fused = nn->merge == VEER_NN_BILINEAR && mc->nlayers == 1 &&
                mc->layers[0].kind == VEER_NN_EMBEDDING;
    if (nn->fused) {
        nn->fused_rows = veer__malloc(mb * sizeof *nn->fused_rows);
        bad |= nn->fused_rows == NULL;
    }
    for (uint32_t b = 0; b <= nn->nbranches; b++) {
        veer__nn_chain *c = b < nn->nbranches ? &nn->branch[b] : &nn->head;
        c->x = veer__malloc_aligned(mb * (c->in_dim ? c->in_dim : 1) * sizeof(float));
        bad |= c->x == NULL;
        int skip_y = nn->fused && c == mc;
        for (uint32_t i = 0; i < c->nlayers; i++) {
            veer__nn_layer *l = &c->layers[i];
            l->y = veer__malloc_aligned((skip_y ? 1 : mb * l->out) * sizeof(float));
            l->aux = veer__malloc(mb * 2 * sizeof(float));
            bad |= !l->y || !l->aux;
        }
    }
    if (bad) {
        free_buffers(nn);
        return veer__error_set(err, VEER_ENOMEM, "network", "no memory for the network");
    }
    memset(nn->grads, 0, (off ? off : 1) * sizeof(float));
    return 0;
}

int veer__nn_finish(veer__nn *nn, veer__rng *rng, veer_error *err)
{
    int rc = layout(nn, err);
    if (rc != 0)
        return rc;
    /* Linear layers: uniform on ±1/sqrt(fan_in) for weights and biases (PyTorch's default
     * initialisation, common practice). Embeddings: normal with the layer's init_std. */
    for (uint32_t b = 0; b <= nn->nbranches; b++) {
        veer__nn_chain *c = b < nn->nbranches ? &nn->branch[b] : &nn->head;
        for (uint32_t i = 0; i < c->nlayers; i++) {
            veer__nn_layer *l = &c->layers[i];
            float *w = nn->params + l->w_off, *bias = nn->params + l->b_off;
            if (l->kind == VEER_NN_LINEAR) {
                double bound = 1.0 / sqrt((double)l->in);
                for (size_t j = 0; j < l->nw; j++)
                    w[j] = (float)((2.0 * veer__rng_uniform(rng) - 1.0) * bound);
                for (size_t j = 0; j < l->nb; j++)
                    bias[j] = (float)((2.0 * veer__rng_uniform(rng) - 1.0) * bound);
            } else if (l->kind == VEER_NN_EMBEDDING) {
                for (size_t j = 0; j < l->nw; j++)
                    w[j] = (float)(veer__rng_normal(rng) * l->init_std);
            } else if (l->kind == VEER_NN_LAYER_NORM) {
                for (size_t j = 0; j < l->nw; j++)
                    w[j] = 1.0f;
                memset(bias, 0, l->nb * sizeof(float));
            }
        }
    }
    return 0;
}

int veer__nn_clone(const veer__nn *src, veer__nn **out)
{
    *out = NULL;
    veer__nn *nn = veer__malloc(sizeof *nn);
    if (nn == NULL)
        return VEER_ENOMEM;
    *nn = *src;
    /* Forget the source's buffers before laying out our own, so a failure frees only ours. */
    for (uint32_t b = 0; b <= nn->nbranches; b++) {
        veer__nn_chain *c = b < nn->nbranches ? &nn->branch[b] : &nn->head;
        c->x = NULL;
        for (uint32_t i = 0; i < c->nlayers; i++)
            c->layers[i].y = c->layers[i].aux = NULL;
        for (uint32_t i = 0; b < nn->nbranches && i < c->ninputs; i++)
            if (c->inputs[i].features != NULL)
                c->inputs[i].features = NULL; /* re-copied below from src */
    }
    nn->params = nn->grads = nn->scratch[0] = nn->scratch[1] = NULL;
    nn->fused_rows = NULL;
    int bad = 0;
    for (uint32_t b = 0; b < nn->nbranches; b++) {
        for (uint32_t i = 0; i < nn->branch[b].ninputs; i++) {
            veer__nn_input *in = &nn->branch[b].inputs[i];
            if (src->branch[b].inputs[i].features != NULL) {
                const uint32_t *f = src->branch[b].inputs[i].features;
                in->features = veer__malloc(in->nfeat * sizeof *f);
                if (in->features != NULL)
                    memcpy(in->features, f, in->nfeat * sizeof *f);
                bad |= in->features == NULL;
            }
        }
    }
    if (bad || layout(nn, NULL) != 0) {
        veer__nn_free(nn);
        return VEER_ENOMEM;
    }
    memcpy(nn->params, src->params, nn->nparams * sizeof(float));
    *out = nn;
    return 0;
}

void veer__nn_free(veer__nn *nn)
{
    if (nn == NULL)
        return;
    free_buffers(nn);
    for (uint32_t b = 0; b < nn->nbranches; b++)
        for (uint32_t i = 0; i < nn->branch[b].ninputs; i++)
            veer__free(nn->branch[b].inputs[i].features);
    veer__free(nn);
}

void veer__nn_zero_grad(veer__nn *nn) { memset(nn->grads, 0, nn->nparams * sizeof(float)); }

void veer__nn_polyak(veer__nn *target, const veer__nn *online, float tau)
{
    float keep = 1.0f - tau;
    float *t = target->params;
    const float *o = online->params;
    for (size_t i = 0; i < target->nparams; i++)
        t[i] = keep * t[i] + tau * o[i];
}

int veer__nn_fold_state_affine(veer__nn *nn, const float *mean, const float *scale)
{
    for (uint32_t b = 0; b < nn->nbranches; b++) {
        veer__nn_chain *c = &nn->branch[b];
        uint32_t off = 0;
        for (uint32_t i = 0; i < c->ninputs; off += c->inputs[i].width, i++) {
            const veer__nn_input *in = &c->inputs[i];
            if (in->kind != VEER_NN_IN_STATE)
                continue;
            if (c->nlayers == 0 || c->layers[0].kind != VEER_NN_LINEAR)
                return VEER_EINVAL;
            veer__nn_layer *l = &c->layers[0];
            float *w = nn->params + l->w_off, *bias = nn->params + l->b_off;
            for (uint32_t k = 0; k < in->width; k++) {
                uint32_t f = in->nfeat ? in->features[k] : k;
                for (uint32_t o = 0; o < l->out; o++) {
                    float *wk = &w[(size_t)o * l->in + off + k];
                    *wk *= scale[f];
                    bias[o] -= *wk * mean[f];
                }
            }
        }
    }
    return 0;
}

/* ---- forward ----------------------------------------------------------------------------- */

static int assemble(veer__nn *nn, veer__nn_chain *c, size_t n, const float *s, const float *a,
                    const float *z)
{
    for (size_t r = 0; r < n; r++) {
        float *x = c->x + r * c->in_dim;
        for (uint32_t i = 0; i < c->ninputs; i++) {
            const veer__nn_input *in = &c->inputs[i];
            if (in->kind == VEER_NN_IN_STATE) {
                const float *row = s + r * nn->state_dim;
                if (in->nfeat)
                    for (uint32_t f = 0; f < in->nfeat; f++)
                        x[f] = row[in->features[f]];
                else
                    memcpy(x, row, nn->state_dim * sizeof(float));
            } else if (in->kind == VEER_NN_IN_ACTION) {
                const float *row = a + r * nn->action_dim;
                if (nn->action_count == 0 || in->as_index) {
                    memcpy(x, row, in->width * sizeof(float));
                } else {
                    float v = row[0];
                    if (!(v >= 0.0f && v < (float)nn->action_count) || v != floorf(v))
                        return VEER_EINVAL;
                    memset(x, 0, in->width * sizeof(float));
                    x[(uint32_t)v] = 1.0f;
                }
            } else {
                memcpy(x, z + r * nn->z_dim, nn->z_dim * sizeof(float));
            }
            x += in->width;
        }
    }
    return 0;
}

static long joint_index(const veer__nn_layer *l, const float *x)
{
    long j = 0;
    for (uint32_t i = 0; i < l->ncounts; i++) {
        float v = x[i];
        if (!(v >= 0.0f && v < (float)l->counts[i]) || v != floorf(v))
            return -1;
        j = j * (long)l->counts[i] + (long)v;
    }
    return j;
}

/* tanh as the odd rational function p(x)/q(x) (degrees 13 and 6) on x clamped to ±7.905, the
 * approximation Eigen uses for float tanh (generic_fast_tanh_float). It vectorises, unlike the
 * C library's tanhf, which took a fifth of a SMALL training step; its largest error against
 * double-precision tanh is 3.5e-7 (checked over [-12, 12] in steps of 1.2e-5). NaN stays NaN. */
static void fast_tanh(const float *x, float *y, size_t count)
{
    const float a1 = 4.89352455891786e-03f, a3 = 6.37261928875436e-04f,
                a5 = 1.48572235717979e-05f, a7 = 5.12229709037114e-08f,
                a9 = -8.60467152213735e-11f, a11 = 2.00018790482477e-13f,
                a13 = -2.76076847742355e-16f, b0 = 4.89352518554385e-03f,
                b2 = 2.26843463243900e-03f, b4 = 1.18534705686654e-04f,
                b6 = 1.19825839466702e-06f, lim = 7.90531110763549805f;
    for (size_t i = 0; i < count; i++) {
        float v = x[i];
        v = v > lim ? lim : v;
        v = v < -lim ? -lim : v;
        float v2 = v * v;
        float p = ((((((a13 * v2 + a11) * v2 + a9) * v2 + a7) * v2 + a5) * v2 + a3) * v2 + a1) * v;
        float q = ((b6 * v2 + b4) * v2 + b2) * v2 + b0;
        y[i] = p / q;
    }
}

static int layer_forward(veer__nn *nn, veer__nn_layer *l, size_t n, const float *x)
{
    const float *w = nn->params + l->w_off, *b = nn->params + l->b_off;
    float *y = l->y;
    switch (l->kind) {
    case VEER_NN_LINEAR:
        for (size_t r = 0; r < n; r++)
            memcpy(y + r * l->out, b, l->out * sizeof(float));
        veer__tgemm(0, 1, (uint32_t)n, l->out, l->in, 1.0f, x, l->in, w, l->in, 1.0f, y, l->out);
        break;
    case VEER_NN_EMBEDDING:
        for (size_t r = 0; r < n; r++) {
            long j = joint_index(l, x + r * l->in);
            if (j < 0)
                return VEER_EINVAL;
            memcpy(y + r * l->out, w + (size_t)j * l->out, l->out * sizeof(float));
        }
        break;
    case VEER_NN_RELU:
        for (size_t i = 0; i < n * l->out; i++)
            y[i] = x[i] > 0.0f ? x[i] : 0.0f;
        break;
    case VEER_NN_TANH:
        fast_tanh(x, y, n * l->out);
        break;
    case VEER_NN_LAYER_NORM:
        for (size_t r = 0; r < n; r++) {
            const float *xr = x + r * l->in;
            float *yr = y + r * l->out;
            /* Float sums (two passes, so no cancellation) vectorise; a row is a few hundred
             * values, well within float's precision for a mean and a variance. */
            float mean = 0, var = 0;
            for (uint32_t i = 0; i < l->in; i++)
                mean += xr[i];
            mean /= (float)l->in;
            for (uint32_t i = 0; i < l->in; i++)
                var += (xr[i] - mean) * (xr[i] - mean);
            var /= (float)l->in;
            float rstd = 1.0f / sqrtf(var + l->eps);
            l->aux[2 * r] = mean;
            l->aux[2 * r + 1] = rstd;
            for (uint32_t i = 0; i < l->in; i++)
                yr[i] = w[i] * ((xr[i] - mean) * rstd) + b[i];
        }
        break;
    case VEER_NN_RESCALE_NORM: {
        float c = l->norm > 0.0f ? l->norm : sqrtf((float)l->out);
        for (size_t r = 0; r < n; r++) {
            const float *xr = x + r * l->in;
            float *yr = y + r * l->out;
            double ss = 0;
            for (uint32_t i = 0; i < l->in; i++)
                ss += (double)xr[i] * xr[i];
            float nrm = (float)sqrt(ss);
            l->aux[r] = nrm;
            float s = nrm > 1e-12f ? c / nrm : 0.0f; /* a zero row has no direction: keep 0 */
            for (uint32_t i = 0; i < l->in; i++)
                yr[i] = xr[i] * s;
        }
        break;
    }
    }
    return 0;
}

static int chain_forward(veer__nn *nn, veer__nn_chain *c, size_t n)
{
    const float *x = c->x;
    for (uint32_t i = 0; i < c->nlayers; i++) {
        int rc = layer_forward(nn, &c->layers[i], n, x);
        if (rc != 0)
            return rc;
        x = c->layers[i].y;
    }
    return 0;
}

static const float *chain_y(const veer__nn_chain *c)
{
    return c->nlayers ? c->layers[c->nlayers - 1].y : c->x;
}

int veer__nn_forward(veer__nn *nn, size_t n, const float *states, const float *actions,
                     const float *zs, const float **out)
{
    if (n > nn->max_batch)
        return VEER_EINVAL;
    for (uint32_t b = 0; b < nn->nbranches; b++) {
        veer__nn_chain *c = &nn->branch[b];
        int rc = assemble(nn, c, n, states, actions, zs);
        if (rc == 0 && nn->fused && b == nn->matrix_branch) {
            for (size_t r = 0; r < n && rc == 0; r++)
                if ((nn->fused_rows[r] = joint_index(&c->layers[0], c->x + r * c->in_dim)) < 0)
                    rc = VEER_EINVAL;
        } else if (rc == 0) {
            rc = chain_forward(nn, c, n);
        }
        if (rc != 0)
            return rc;
    }
    uint32_t mw = nn->head.in_dim;
    float *m = nn->head.x;
    if (nn->merge == VEER_NN_CONCAT) {
        uint32_t col = 0;
        for (uint32_t b = 0; b < nn->nbranches; b++) {
            uint32_t w = chain_out(&nn->branch[b]);
            const float *y = chain_y(&nn->branch[b]);
            for (size_t r = 0; r < n; r++)
                memcpy(m + r * mw + col, y + r * w, w * sizeof(float));
            col += w;
        }
    } else {
        /* out_r = v̂_rᵀ M_r with M_r the matrix branch's row read as (k + bias) x mw. */
        uint32_t k = nn->bilinear_k, kb = k + (nn->bilinear_bias ? 1 : 0);
        const float *M = chain_y(&nn->branch[nn->matrix_branch]);
        const float *v = chain_y(&nn->branch[1 - nn->matrix_branch]);
        const float *table = nn->params + nn->branch[nn->matrix_branch].layers[0].w_off;
        for (size_t r = 0; r < n; r++) {
            const float *Mr = nn->fused ? table + (size_t)nn->fused_rows[r] * kb * mw
                                        : M + r * (size_t)kb * mw;
            cblas_sgemv(CblasRowMajor, CblasTrans, (blasint)k, (blasint)mw, 1.0f, Mr,
                        (blasint)mw, v + r * k, 1, 0.0f, m + r * mw, 1);
            if (nn->bilinear_bias)
                cblas_saxpy((blasint)mw, 1.0f, Mr + (size_t)k * mw, 1, m + r * mw, 1);
        }
    }
    int rc = chain_forward(nn, &nn->head, n);
    if (rc != 0)
        return rc;
    *out = chain_y(&nn->head);
    return 0;
}

/* ---- backward ---------------------------------------------------------------------------- */

/* dy (n x out) -> dx (n x in) when dx is not NULL; parameter gradients are accumulated. */
static void layer_backward(veer__nn *nn, veer__nn_layer *l, size_t n, const float *x,
                           const float *dy, float *dx)
{
    const float *w = nn->params + l->w_off;
    float *gw = nn->grads + l->w_off, *gb = nn->grads + l->b_off;
    const float *y = l->y;
    switch (l->kind) {
    case VEER_NN_LINEAR:
        veer__tgemm(1, 0, l->out, l->in, (uint32_t)n, 1.0f, dy, l->out, x, l->in, 1.0f, gw, l->in);
        for (size_t r = 0; r < n; r++)
            for (uint32_t j = 0; j < l->out; j++)
                gb[j] += dy[r * l->out + j];
        if (dx)
            veer__tgemm(0, 0, (uint32_t)n, l->in, l->out, 1.0f, dy, l->out, w, l->in, 0.0f, dx,
                        l->in);
        break;
    case VEER_NN_EMBEDDING:
        for (size_t r = 0; r < n; r++) {
            long j = joint_index(l, x + r * l->in); /* valid: the forward pass checked it */
            float *g = gw + (size_t)j * l->out;
            const float *d = dy + r * l->out;
            for (uint32_t i = 0; i < l->out; i++)
                g[i] += d[i];
        }
        if (dx) /* indices have no gradient */
            memset(dx, 0, n * l->in * sizeof(float));
        break;
    case VEER_NN_RELU:
        if (dx)
            for (size_t i = 0; i < n * l->out; i++)
                dx[i] = y[i] > 0.0f ? dy[i] : 0.0f;
        break;
    case VEER_NN_TANH:
        if (dx)
            for (size_t i = 0; i < n * l->out; i++)
                dx[i] = dy[i] * (1.0f - y[i] * y[i]);
        break;
    case VEER_NN_LAYER_NORM:
        for (size_t r = 0; r < n; r++) {
            const float *xr = x + r * l->in, *dyr = dy + r * l->out;
            float mean = l->aux[2 * r], rstd = l->aux[2 * r + 1];
            float m1 = 0, m2 = 0; /* mean(dX̂), mean(dX̂ ⊙ X̂) */
            for (uint32_t i = 0; i < l->in; i++) {
                float xh = (xr[i] - mean) * rstd;
                gw[i] += dyr[i] * xh;
                gb[i] += dyr[i];
                float dxh = dyr[i] * w[i];
                m1 += dxh;
                m2 += dxh * xh;
            }
            if (dx) {
                m1 /= (float)l->in;
                m2 /= (float)l->in;
                float *dxr = dx + r * l->in;
                for (uint32_t i = 0; i < l->in; i++) {
                    float xh = (xr[i] - mean) * rstd;
                    dxr[i] = rstd * (dyr[i] * w[i] - m1 - xh * m2);
                }
            }
        }
        break;
    case VEER_NN_RESCALE_NORM: {
        if (!dx)
            break;
        float c = l->norm > 0.0f ? l->norm : sqrtf((float)l->out);
        for (size_t r = 0; r < n; r++) {
            const float *xr = x + r * l->in, *dyr = dy + r * l->out;
            float *dxr = dx + r * l->in;
            float nrm = l->aux[r];
            if (!(nrm > 1e-12f)) {
                memset(dxr, 0, l->in * sizeof(float));
                continue;
            }
            double dot = 0;
            for (uint32_t i = 0; i < l->in; i++)
                dot += (double)xr[i] * dyr[i];
            float proj = (float)(dot / nrm / nrm), s = c / nrm;
            for (uint32_t i = 0; i < l->in; i++)
                dxr[i] = s * (dyr[i] - xr[i] * proj);
        }
        break;
    }
    }
}

/* Backward through a chain. dy sits in scratch[*cur]; on return the input gradient (when
 * want_dx) sits in scratch[*cur]. */
static void chain_backward(veer__nn *nn, veer__nn_chain *c, size_t n, int *cur, int want_dx)
{
    for (uint32_t i = c->nlayers; i-- > 0;) {
        veer__nn_layer *l = &c->layers[i];
        const float *x = i ? c->layers[i - 1].y : c->x;
        int need = i > 0 || want_dx;
        float *dx = need ? nn->scratch[1 - *cur] : NULL;
        layer_backward(nn, l, n, x, nn->scratch[*cur], dx);
        if (need)
            *cur = 1 - *cur;
    }
}

static int branch_has_cont_action(const veer__nn *nn, const veer__nn_chain *c)
{
    if (nn->action_count != 0)
        return 0;
    for (uint32_t i = 0; i < c->ninputs; i++)
        if (c->inputs[i].kind == VEER_NN_IN_ACTION)
            return 1;
    return 0;
}

void veer__nn_backward(veer__nn *nn, size_t n, const float *dout, float *dactions)
{
    uint32_t mw = nn->head.in_dim;
    int cur = 0;
    memcpy(nn->scratch[0], dout, n * nn->out_dim * sizeof(float));
    chain_backward(nn, &nn->head, n, &cur, 1);
    /* The branches reuse both scratch buffers, so the merged gradient is parked in head.x:
     * the head's backward pass, the only reader of those forward values, is already done.
     * Hence one backward pass per forward pass. */
    float *dm = nn->head.x;
    memcpy(dm, nn->scratch[cur], n * mw * sizeof(float));
    if (dactions)
        memset(dactions, 0, n * nn->action_dim * sizeof(float));

    uint32_t col = 0;
    for (uint32_t b = 0; b < nn->nbranches; b++) {
        veer__nn_chain *c = &nn->branch[b];
        uint32_t w = chain_out(c);
        float *dy = nn->scratch[0];
        if (nn->merge == VEER_NN_CONCAT) {
            for (size_t r = 0; r < n; r++)
                memcpy(dy + r * w, dm + r * mw + col, w * sizeof(float));
            col += w;
        } else {
            uint32_t k = nn->bilinear_k, kb = k + (nn->bilinear_bias ? 1 : 0);
            const float *M = chain_y(&nn->branch[nn->matrix_branch]);
            const float *v = chain_y(&nn->branch[1 - nn->matrix_branch]);
            size_t toff = nn->branch[nn->matrix_branch].layers[0].w_off;
            for (size_t r = 0; r < n; r++) {
                const float *dmr = dm + r * mw;
                if (b == nn->matrix_branch && nn->fused) {
                    /* straight into the table's gradient row */
                    float *g = nn->grads + toff + (size_t)nn->fused_rows[r] * kb * mw;
                    for (uint32_t i = 0; i < kb; i++) {
                        float vi = i < k ? v[r * k + i] : 1.0f;
                        for (uint32_t j = 0; j < mw; j++)
                            g[(size_t)i * mw + j] += vi * dmr[j];
                    }
                } else if (b == nn->matrix_branch) {
                    /* dM_r = [v̂_r] ⊗ dout_r */
                    float *d = dy + r * (size_t)kb * mw;
                    for (uint32_t i = 0; i < kb; i++) {
                        float vi = i < k ? v[r * k + i] : 1.0f;
                        for (uint32_t j = 0; j < mw; j++)
                            d[(size_t)i * mw + j] = vi * dmr[j];
                    }
                } else {
                    /* dv_r = M_r[:k] dout_r */
                    const float *Mr = nn->fused ? nn->params + toff + (size_t)nn->fused_rows[r] * kb * mw
                                                : M + r * (size_t)kb * mw;
                    cblas_sgemv(CblasRowMajor, CblasNoTrans, (blasint)k, (blasint)mw, 1.0f, Mr,
                                (blasint)mw, dmr, 1, 0.0f, dy + r * k, 1);
                }
            }
        }
        if (nn->fused && b == nn->matrix_branch)
            continue; /* its gradient is already in the table */
        int want = dactions != NULL && branch_has_cont_action(nn, c);
        int bc = 0;
        chain_backward(nn, c, n, &bc, want);
        if (want) {
            const float *dx = nn->scratch[bc];
            uint32_t off = 0;
            for (uint32_t i = 0; i < c->ninputs; i++) {
                if (c->inputs[i].kind == VEER_NN_IN_ACTION)
                    for (size_t r = 0; r < n; r++)
                        for (uint32_t j = 0; j < nn->action_dim; j++)
                            dactions[r * nn->action_dim + j] += dx[r * c->in_dim + off + j];
                off += c->inputs[i].width;
            }
        }
    }
}
