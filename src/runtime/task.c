/* The task encoder: turns a reward specification (reward samples, weighted goal states, or
 * rewards over the bundle's reference states) into a task vector z for one bundle.
 *
 * The key choice is streaming. States go through B in fixed-size chunks (one batched call, so
 * one sgemm per layer), and each chunk is folded into running sums at once: the weighted sum
 * Σ r_i B(s_i) as a gemv, the second moment Σ B Bᵀ for the covariance correction as a syrk, and
 * the least-squares fit behind the expressiveness R² as a streaming QR (LAPACK's dtpqrt folds
 * each chunk into the R factor so far). Scratch memory is therefore fixed by the chunk size and
 * z_dim, whatever the number of samples. Everything that feeds a solve or a fit is
 * accumulated in double precision, and LAPACK is called through its _work entry points so that
 * every allocation goes through veer's hook.
 *
 * Besides the public runtime API (bundle info, B), the encoder uses one private call: a
 * backward-only workspace (runtime/workspace.h), since sizing and clearing F's action_count-times
 * larger buffers would cost more than B itself on small sets. The encoder owns its workspace for
 * the length of one call, so concurrent calls share nothing.
 */
#include "veer/runtime.h"

#include <cblas.h>
#include <float.h>
#include <lapacke.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "runtime/workspace.h"

/* States per B call. Large enough that the layers run as real matrix products (OpenBLAS's
 * sgemm reaches its speed well below this), small enough that the scratch stays a few MiB
 * even for 1024-wide layers. */
#define VEER__TASK_CHUNK 256u

/* ---- Checking the specification -------------------------------------------------------- */

/* What the checks resolve from a spec and the bundle's defaults. */
typedef struct task_plan {
    veer_task_source source;
    uint32_t n;
    int rescale;
    int center;
    int cov_correction;
    double ridge;
    double rescale_norm;
    double mean;         /* mean of the values */
    double subtract;     /* what is subtracted from each value before the sum (mean or 0) */
    double tss;          /* Σ (v - mean)², the fit's centred total sum of squares */
    const float *b_rows; /* REFERENCE: the bundle's precomputed B rows */
} task_plan;

static int task_check_flag(int v, int allow_default, const char *field, veer_error *err)
{
    if (v == 0 || v == 1 || (allow_default && v == VEER_OPT_DEFAULT))
        return 0;
    return veer__error_set(err, VEER_EFIELD, field, "%s must be %s0 or 1, got %d", field,
                           allow_default ? "VEER_OPT_DEFAULT (-1), " : "", v);
}

static int task_check_options(const veer_model_info *info, const veer_task_spec *spec,
                              task_plan *plan, veer_error *err)
{
    int rc;
    if (spec->source != VEER_TASK_SAMPLES && spec->source != VEER_TASK_GOALS &&
        spec->source != VEER_TASK_REFERENCE)
        return veer__error_set(err, VEER_EFIELD, "source",
                               "source must be VEER_TASK_SAMPLES, _GOALS or _REFERENCE, got %d",
                               (int)spec->source);
    if ((rc = task_check_flag(spec->rescale, 1, "rescale", err)) != 0 ||
        (rc = task_check_flag(spec->center, 1, "center", err)) != 0 ||
        (rc = task_check_flag(spec->cov_correction, 0, "cov_correction", err)) != 0)
        return rc;
    if (spec->source == VEER_TASK_GOALS && spec->center == 1)
        return veer__error_set(err, VEER_EFIELD, "center",
                               "centring applies to rewards; goal weights are used as given");
    if (spec->cov_correction && spec->source != VEER_TASK_SAMPLES)
        return veer__error_set(err, VEER_EFIELD, "cov_correction",
                               "the covariance correction applies to reward samples only");
    if (isnan(spec->ridge) || isinf(spec->ridge))
        return veer__error_set(err, VEER_EFIELD, "ridge", "ridge must be finite");

    plan->source = spec->source;
    plan->rescale = spec->rescale == VEER_OPT_DEFAULT ? (info->rescale != 0) : spec->rescale;
    plan->center = spec->source == VEER_TASK_GOALS    ? 0
                   : spec->center == VEER_OPT_DEFAULT ? (info->center_rewards != 0)
                                                      : spec->center;
    plan->cov_correction = spec->cov_correction;
    plan->ridge = spec->ridge < 0 ? (double)info->ridge : (double)spec->ridge;
    plan->rescale_norm = info->rescale_norm;

    if (plan->cov_correction) {
        if (!(plan->ridge >= 0) || isinf(plan->ridge))
            return veer__error_set(err, VEER_EFIELD, "ridge",
                                   "the bundle's ridge (%g) is not a finite value >= 0",
                                   plan->ridge);
        if (info->cov_b == NULL)
            return veer__error_set(err, VEER_EFIELD, "cov_b",
                                   "the covariance correction needs the training Cov(B), and "
                                   "this bundle has none");
    }
    if (plan->rescale && !(plan->rescale_norm > 0 && isfinite(plan->rescale_norm)))
        return veer__error_set(err, VEER_EFIELD, "rescale_norm",
                               "the bundle's rescale norm (%g) is not positive",
                               plan->rescale_norm);
    if (spec->source == VEER_TASK_REFERENCE && info->reference_count == 0)
        return veer__error_set(err, VEER_EFIELD, "reference",
                               "this bundle has no reference set to take rewards over");
    return 0;
}

/* The index of the first NaN or infinity in x, or n. The states can be millions of floats, so
 * blocks are first tested branch-free on the exponent bits (a loop the compiler vectorises)
 * and only a block that holds one is searched. */
static size_t task_first_nonfinite(const float *x, size_t n)
{
    for (size_t start = 0; start < n; start += 4096) {
        size_t end = n - start < 4096 ? n : start + 4096;
        uint32_t bad = 0;
        for (size_t i = start; i < end; i++) {
            uint32_t u;
            memcpy(&u, &x[i], sizeof u);
            bad |= (u & 0x7f800000u) == 0x7f800000u;
        }
        if (bad)
            for (size_t i = start; i < end; i++)
                if (!isfinite(x[i]))
                    return i;
    }
    return n;
}

static int task_check_inputs(const veer_model_info *info, const veer_task_spec *spec,
                             task_plan *plan, veer_error *err)
{
    const char *what = spec->source == VEER_TASK_GOALS ? "weight" : "reward";
    uint32_t limit = VEER_TASK_MAX_COUNT;
    if (spec->max_count != 0 && spec->max_count < limit)
        limit = spec->max_count;

    if (spec->count == 0)
        return veer__error_set(err, VEER_EEMPTY, "count", "the task has no %ss",
                               spec->source == VEER_TASK_GOALS ? "goal" : what);
    if (spec->count > limit)
        return veer__error_set(err, VEER_ETOOMANY, "count", "%u %ss exceed the limit of %u",
                               spec->count, what, limit);
    if (spec->source == VEER_TASK_REFERENCE) {
        if (spec->count != info->reference_count)
            return veer__error_set(err, VEER_EDIM, "count",
                                   "%u rewards given for a reference set of %u states", spec->count,
                                   info->reference_count);
        if (spec->states != NULL)
            return veer__error_set(err, VEER_EFIELD, "states",
                                   "states must be NULL for rewards over the reference set");
        plan->b_rows = info->reference_b;
    } else if (spec->states == NULL) {
        return veer__error_set(err, VEER_EDIM, "states", "%u %ss given but no states", spec->count,
                               what);
    }
    if (spec->values == NULL)
        return veer__error_set(err, VEER_EDIM, "values", "%u states given but no %ss", spec->count,
                               what);

    double sum = 0;
    int any_nonzero = 0;
    for (uint32_t i = 0; i < spec->count; i++) {
        float v = spec->values[i];
        if (!isfinite(v)) {
            char field[40];
            snprintf(field, sizeof field, "values[%u]", i);
            return veer__error_set(err, VEER_ENONFINITE, field, "%s %u is %s", what, i,
                                   isnan(v) ? "NaN" : "infinite");
        }
        any_nonzero |= v != 0;
        sum += v;
    }
    if (spec->states != NULL) {
        size_t total = (size_t)spec->count * info->state_dim;
        size_t k = task_first_nonfinite(spec->states, total);
        if (k < total) {
            char field[48];
            size_t row = k / info->state_dim, col = k % info->state_dim;
            snprintf(field, sizeof field, "states[%zu][%zu]", row, col);
            return veer__error_set(err, VEER_ENONFINITE, field, "state %zu, feature %zu (%s) is %s",
                                   row, col, info->feature_names ? info->feature_names[col] : "?",
                                   isnan(spec->states[k]) ? "NaN" : "infinite");
        }
    }
    if (!any_nonzero)
        return veer__error_set(err, VEER_ENOSIGNAL, "values",
                               "every %s is zero: the task carries no signal", what);

    /* Two passes (mean, then squares) keep the total sum of squares accurate when the
     * rewards sit far from zero, as distances and costs usually do. */
    plan->n = spec->count;
    plan->mean = sum / spec->count;
    double tss = 0;
    for (uint32_t i = 0; i < spec->count; i++) {
        double c = spec->values[i] - plan->mean;
        tss += c * c;
    }
    plan->tss = tss;
    if (plan->center && tss == 0)
        return veer__error_set(err, VEER_ENOSIGNAL, "values",
                               "every reward equals %g, so nothing is left after centring",
                               plan->mean);
    plan->subtract = plan->center ? plan->mean : 0;
    return 0;
}

/* ---- Streaming least squares for the expressiveness R² ------------------------------- */

/* The fit of y on [B, 1] as a running QR of the augmented matrix [B, 1, y]: its R factor
 * holds everything a least-squares solution needs, and its last diagonal entry is the norm
 * of the part of y that no combination of the columns reaches. Each chunk updates R with
 * LAPACK's triangular-pentagonal QR (dtpqrt: R stacked on a dense block, the update step of a
 * tall-skinny QR), which never re-factorises the rows R already summarises. */
typedef struct task_fit {
    uint32_t d;    /* z_dim */
    uint32_t cols; /* d + 2 */
    uint32_t nb;   /* dtpqrt's block size */
    double *r;     /* cols x cols, column-major, upper triangular */
    double *block; /* chunk x cols, column-major: the rows being added */
    double *t;     /* nb x cols: dtpqrt's block reflector factors (discarded) */
    double *work;  /* nb x cols */
} task_fit;

static void task_fit_free(task_fit *f)
{
    veer__free(f->r);
    veer__free(f->block);
    veer__free(f->t);
    veer__free(f->work);
}

static int task_fit_init(task_fit *f, uint32_t d, veer_error *err)
{
    memset(f, 0, sizeof *f);
    f->d = d;
    f->cols = d + 2;
    /* A small block measured fastest here (2-3x over 32 for d = 32 and d = 100): the update's
     * cost is in its panels, and narrow panels stay in cache. */
    f->nb = f->cols < 8 ? f->cols : 8;
    f->r = veer__calloc((size_t)f->cols * f->cols, sizeof(double));
    f->block = veer__malloc(sizeof(double) * VEER__TASK_CHUNK * f->cols);
    f->t = veer__malloc(sizeof(double) * f->nb * f->cols);
    f->work = veer__malloc(sizeof(double) * f->nb * f->cols);
    if (f->r == NULL || f->block == NULL || f->t == NULL || f->work == NULL) {
        task_fit_free(f);
        return veer__error_set(err, VEER_ENOMEM, "task", "no memory for the expressiveness fit");
    }
    return 0;
}

/* Adds `rows` rows of B (row-major, d wide) and their centred values y to the fit. */
static void task_fit_add(task_fit *f, const float *b, const double *y, uint32_t rows)
{
    uint32_t d = f->d;
    size_t ld = VEER__TASK_CHUNK;
    for (uint32_t j = 0; j < d; j++) {
        double *col = f->block + (size_t)j * ld;
        for (uint32_t i = 0; i < rows; i++)
            col[i] = b[(size_t)i * d + j];
    }
    double *ones = f->block + (size_t)d * ld, *ys = ones + ld;
    for (uint32_t i = 0; i < rows; i++) {
        ones[i] = 1.0;
        ys[i] = y[i];
    }
    /* dtpqrt fails only on bad arguments, and these are fixed by construction. */
    LAPACKE_dtpqrt_work(LAPACK_COL_MAJOR, (lapack_int)rows, (lapack_int)f->cols, 0,
                        (lapack_int)f->nb, f->r, (lapack_int)f->cols, f->block, (lapack_int)ld,
                        f->t, (lapack_int)f->nb, f->work);
}

/* R² = 1 - RSS / TSS. RSS is the squared tail of y beyond the columns, plus what remains of
 * min ||R11 x - c|| (nonzero only when [B, 1] is rank deficient); dgelsd solves that small
 * problem with the same singular-value cut-off numpy.linalg.lstsq uses by default. */
static int task_fit_r2(task_fit *f, uint32_t n, double tss, double *r2, veer_error *err)
{
    lapack_int p = (lapack_int)f->d + 1;
    const double *a = f->r;
    size_t lda = f->cols;
    double tail = a[(size_t)p * lda + (size_t)p];
    double *r11 = veer__calloc((size_t)p * (size_t)p, sizeof(double));
    double *c = veer__malloc(sizeof(double) * (size_t)p);
    double *s = veer__malloc(sizeof(double) * (size_t)p);
    double *work = NULL;
    lapack_int *iwork = NULL;
    int rc = 0;
    if (r11 == NULL || c == NULL || s == NULL)
        goto nomem;
    for (lapack_int j = 0; j < p; j++) {
        for (lapack_int i = 0; i <= j; i++)
            r11[(size_t)j * p + i] = a[(size_t)j * lda + i];
        c[j] = a[(size_t)p * lda + j];
    }
    double query = 0, rcond = DBL_EPSILON * (double)(n > (uint32_t)p ? n : (uint32_t)p);
    lapack_int rank = 0, iquery = 0;
    if (LAPACKE_dgelsd_work(LAPACK_COL_MAJOR, p, p, 1, r11, p, c, p, s, rcond, &rank, &query, -1,
                            &iquery) != 0)
        goto nomem;
    lapack_int lwork = (lapack_int)query, liwork = iquery > 1 ? iquery : 1;
    work = veer__malloc(sizeof(double) * (size_t)lwork);
    iwork = veer__malloc(sizeof(lapack_int) * (size_t)liwork);
    if (work == NULL || iwork == NULL)
        goto nomem;
    if (LAPACKE_dgelsd_work(LAPACK_COL_MAJOR, p, p, 1, r11, p, c, p, s, rcond, &rank, work, lwork,
                            iwork) != 0) {
        rc = veer__error_set(err, VEER_ESINGULAR, "r2",
                             "the least-squares fit for the expressiveness did not converge");
        goto out;
    }
    double rss = tail * tail;
    for (lapack_int i = 0; i < p; i++) {
        double fitted = 0;
        for (lapack_int j = i; j < p; j++)
            fitted += a[(size_t)j * lda + (size_t)i] * c[j];
        double resid = a[(size_t)p * lda + (size_t)i] - fitted;
        rss += resid * resid;
    }
    *r2 = 1.0 - rss / tss;
    goto out;
nomem:
    rc = veer__error_set(err, VEER_ENOMEM, "task", "no memory for the expressiveness fit");
out:
    veer__free(r11);
    veer__free(c);
    veer__free(s);
    veer__free(work);
    veer__free(iwork);
    return rc;
}

/* ---- The covariance correction ------------------------------------------------------- */

/* m := Cov_train(B) (S + ridge I)^-1 m, with S the samples' second moment (upper triangle,
 * d x d). Cholesky, because S + ridge I is symmetric and, unless degenerate, positive
 * definite; its condition estimate tells a factorisation that merely survived rounding from
 * one that can be trusted. */
static int task_correct(const veer_model_info *info, double *s, double ridge, double *m,
                        veer_error *err)
{
    lapack_int d = (lapack_int)info->z_dim;
    for (lapack_int i = 0; i < d; i++)
        s[(size_t)i * d + i] += ridge;
    double *work = veer__malloc(sizeof(double) * 3 * (size_t)d);
    lapack_int *iwork = veer__malloc(sizeof(lapack_int) * (size_t)d);
    double *x = veer__malloc(sizeof(double) * (size_t)d);
    int rc = 0;
    if (work == NULL || iwork == NULL || x == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, "task", "no memory for the covariance correction");
        goto out;
    }
    /* Row-major upper == column-major lower; LAPACK sees the same symmetric matrix. */
    double anorm = LAPACKE_dlansy_work(LAPACK_COL_MAJOR, '1', 'L', d, s, d, work);
    lapack_int info_f = LAPACKE_dpotrf_work(LAPACK_COL_MAJOR, 'L', d, s, d);
    double rcond = 0;
    if (info_f == 0)
        LAPACKE_dpocon_work(LAPACK_COL_MAJOR, 'L', d, s, d, anorm, &rcond, work, iwork);
    if (info_f != 0 || !(rcond > (double)d * DBL_EPSILON)) {
        rc = veer__error_set(err, VEER_ESINGULAR, "ridge",
                             "the samples' second moment of B plus ridge %g is singular "
                             "(condition estimate %.3g): add varied samples or raise the ridge",
                             ridge, rcond);
        goto out;
    }
    memcpy(x, m, sizeof(double) * (size_t)d);
    LAPACKE_dpotrs_work(LAPACK_COL_MAJOR, 'L', d, 1, s, d, x, d);
    for (lapack_int i = 0; i < d; i++) {
        double acc = 0;
        const float *row = info->cov_b + (size_t)i * d;
        for (lapack_int j = 0; j < d; j++)
            acc += (double)row[j] * x[j];
        m[i] = acc;
    }
out:
    veer__free(work);
    veer__free(iwork);
    veer__free(x);
    return rc;
}

/* ---- Encoding ------------------------------------------------------------------------ */

void veer_task_spec_init(veer_task_spec *spec, veer_task_source source)
{
    if (spec == NULL)
        return;
    memset(spec, 0, sizeof *spec);
    spec->source = source;
    spec->rescale = VEER_OPT_DEFAULT;
    spec->center = VEER_OPT_DEFAULT;
    spec->cov_correction = 0;
    spec->ridge = -1.0f;
    spec->max_count = 0;
}

/* Scratch for one call, all released by task_scratch_free. */
typedef struct task_scratch {
    veer_workspace *ws;
    float *b;       /* chunk x d: B of the current chunk */
    float *w;       /* chunk: the weights the chunk's B rows are summed with */
    float *part;    /* d: one chunk's weighted sum */
    double *y;      /* chunk: centred values for the fit */
    double *bd;     /* chunk x d: the chunk in double, for the second moment */
    double *second; /* d x d */
    double *sum;    /* d */
    task_fit fit;
    int has_fit;
} task_scratch;

static void task_scratch_free(task_scratch *t)
{
    veer_workspace_destroy(t->ws);
    veer__free(t->b);
    veer__free(t->w);
    veer__free(t->part);
    veer__free(t->y);
    veer__free(t->bd);
    veer__free(t->second);
    veer__free(t->sum);
    if (t->has_fit)
        task_fit_free(&t->fit);
}

static int task_scratch_init(const veer_bundle *bundle, const task_plan *plan, int want_fit,
                             task_scratch *t, veer_error *err)
{
    size_t d = veer_bundle_info(bundle)->z_dim;
    size_t chunk = plan->n < VEER__TASK_CHUNK ? plan->n : VEER__TASK_CHUNK;
    memset(t, 0, sizeof *t);
    if (plan->source != VEER_TASK_REFERENCE) {
        int rc = veer__workspace_create_backward(bundle, (uint32_t)chunk, &t->ws, err);
        if (rc != 0)
            return rc;
        t->b = veer__malloc(sizeof(float) * chunk * d);
        if (t->b == NULL)
            goto fail;
    }
    t->w = veer__malloc(sizeof(float) * chunk);
    t->part = veer__malloc(sizeof(float) * d);
    t->sum = veer__calloc(d, sizeof(double));
    if (t->w == NULL || t->part == NULL || t->sum == NULL)
        goto fail;
    if (plan->cov_correction) {
        t->bd = veer__malloc(sizeof(double) * chunk * d);
        t->second = veer__calloc(d * d, sizeof(double));
        if (t->bd == NULL || t->second == NULL)
            goto fail;
    }
    if (want_fit) {
        t->y = veer__malloc(sizeof(double) * chunk);
        if (t->y == NULL)
            goto fail;
        int rc = task_fit_init(&t->fit, (uint32_t)d, err);
        if (rc != 0) {
            task_scratch_free(t);
            return rc;
        }
        t->has_fit = 1;
    }
    return 0;
fail:
    task_scratch_free(t);
    return veer__error_set(err, VEER_ENOMEM, "task", "no memory to encode %u states", plan->n);
}

/* Streams the rows through B (or the reference set's B rows) and the accumulators. */
static int task_accumulate(const veer_model_info *info, const veer_task_spec *spec,
                           const task_plan *plan, task_scratch *t, veer_error *err)
{
    size_t d = info->z_dim, sdim = info->state_dim;
    for (uint32_t off = 0; off < plan->n; off += VEER__TASK_CHUNK) {
        uint32_t rows = plan->n - off < VEER__TASK_CHUNK ? plan->n - off : VEER__TASK_CHUNK;
        const float *b;
        if (plan->source == VEER_TASK_REFERENCE) {
            b = plan->b_rows + (size_t)off * d;
        } else {
            int rc = veer_eval_backward(t->ws, rows, spec->states + (size_t)off * sdim, t->b);
            if (rc != 0)
                return veer__error_set(err, rc, "states",
                                       "evaluating B on states %u..%u failed: %s", off,
                                       off + rows - 1, veer_strerror(rc));
            b = t->b;
        }
        for (uint32_t i = 0; i < rows; i++)
            t->w[i] = (float)((double)spec->values[off + i] - plan->subtract);
        cblas_sgemv(CblasRowMajor, CblasTrans, (int)rows, (int)d, 1.0f, b, (int)d, t->w, 1, 0.0f,
                    t->part, 1);
        for (size_t j = 0; j < d; j++)
            t->sum[j] += t->part[j];

        if (t->second != NULL) {
            for (size_t k = 0; k < (size_t)rows * d; k++)
                t->bd[k] = b[k];
            cblas_dsyrk(CblasRowMajor, CblasUpper, CblasTrans, (int)d, (int)rows, 1.0, t->bd,
                        (int)d, 1.0, t->second, (int)d);
        }
        if (t->has_fit) {
            for (uint32_t i = 0; i < rows; i++)
                t->y[i] = (double)spec->values[off + i] - plan->mean;
            task_fit_add(&t->fit, b, t->y, rows);
        }
    }
    return 0;
}

int veer_task_encode(const veer_bundle *bundle, const veer_task_spec *spec, float *z,
                     veer_task_report *report, veer_error *err)
{
    veer_error_clear(err);
    if (bundle == NULL)
        return veer__error_set(err, VEER_EINVAL, "bundle", "no bundle given");
    if (spec == NULL)
        return veer__error_set(err, VEER_EINVAL, "spec", "no task specification given");
    if (z == NULL)
        return veer__error_set(err, VEER_EINVAL, "z", "no output buffer for the task vector");

    const veer_model_info *info = veer_bundle_info(bundle);
    task_plan plan;
    memset(&plan, 0, sizeof plan);
    int rc = task_check_options(info, spec, &plan, err);
    if (rc == 0)
        rc = task_check_inputs(info, spec, &plan, err);
    if (rc != 0)
        return rc;

    /* The fit needs more rows than unknowns and some spread in the rewards; nobody reads it
     * without a report, so it is skipped then. */
    uint32_t d = info->z_dim;
    int want_fit =
        report != NULL && plan.source != VEER_TASK_GOALS && plan.n > d + 1 && plan.tss > 0;
    task_scratch t;
    rc = task_scratch_init(bundle, &plan, want_fit, &t, err);
    if (rc != 0)
        return rc;
    rc = task_accumulate(info, spec, &plan, &t, err);
    if (rc != 0)
        goto out;

    double *m = t.sum;
    double scale = plan.source == VEER_TASK_GOALS ? 1.0 : 1.0 / plan.n;
    for (uint32_t j = 0; j < d; j++)
        m[j] *= scale;
    if (plan.cov_correction) {
        for (size_t k = 0; k < (size_t)d * d; k++)
            t.second[k] *= scale;
        rc = task_correct(info, t.second, plan.ridge, m, err);
        if (rc != 0)
            goto out;
    }

    double norm = 0;
    for (uint32_t j = 0; j < d; j++)
        norm += m[j] * m[j];
    norm = sqrt(norm);
    if (!isfinite(norm)) {
        rc = veer__error_set(err, VEER_ENONFINITE, "z",
                             "the task vector is not finite: B overflowed on these states");
        goto out;
    }
    if (norm == 0) {
        rc = veer__error_set(err, VEER_ENOSIGNAL, "z", "the task vector is zero: the %s cancel out",
                             plan.source == VEER_TASK_GOALS ? "weighted goals" : "rewards");
        goto out;
    }
    double factor = plan.rescale ? plan.rescale_norm / norm : 1.0;
    for (uint32_t j = 0; j < d; j++) {
        if (!isfinite((float)(m[j] * factor))) {
            rc = veer__error_set(err, VEER_ENONFINITE, "z",
                                 "the task vector overflows single precision");
            goto out;
        }
    }

    double r2 = NAN;
    if (want_fit) {
        rc = task_fit_r2(&t.fit, plan.n, plan.tss, &r2, err);
        if (rc != 0)
            goto out;
    }
    for (uint32_t j = 0; j < d; j++)
        z[j] = (float)(m[j] * factor);
    if (report != NULL) {
        report->r2 = r2;
        report->norm_raw = norm;
        report->mean_reward = plan.subtract;
    }
out:
    task_scratch_free(&t);
    return rc;
}
