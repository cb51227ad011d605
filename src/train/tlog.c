/* Loading and checking the transition log (see tlog.h). Each file is read once into memory,
 * hashed (its exact bytes, for the bundle's provenance) and parsed with the .npy reader; only
 * float32 is accepted for real-valued arrays, because converting float64 logs silently would
 * change the data the model is trained on. Discrete actions may also be stored as integers. */
#include "train/tlog.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "base/npy.h"

static const char *base_name(const char *p)
{
    const char *s = strrchr(p, '/');
    return s ? s + 1 : p;
}

/* Reads `path` whole, hashes it into `hex` and parses it. */
static int load_file(const char *path, veer__npy *a, char hex[2 * VEER_DIGEST_BYTES + 1],
                     veer_error *err)
{
    FILE *f = fopen(path, "rb");
    if (f == NULL)
        return veer__error_set(err, VEER_EIO, base_name(path), "%s: cannot open: %s", path,
                               strerror(errno));
    long size = -1;
    if (fseek(f, 0, SEEK_END) == 0)
        size = ftell(f);
    if (size < 0 || fseek(f, 0, SEEK_SET) != 0) {
        fclose(f);
        return veer__error_set(err, VEER_EIO, base_name(path), "%s: cannot read", path);
    }
    unsigned char *buf = veer__malloc((size_t)size);
    if (buf == NULL) {
        fclose(f);
        return veer__error_set(err, VEER_ENOMEM, base_name(path), "%s: no memory", path);
    }
    int rc = 0;
    if (size > 0 && fread(buf, 1, (size_t)size, f) != (size_t)size) {
        rc = veer__error_set(err, VEER_EIO, base_name(path), "%s: read failed", path);
        goto done;
    }
    uint8_t d[VEER_DIGEST_BYTES];
    if ((rc = veer__digest(buf, (size_t)size, d)) != 0) {
        veer__error_set(err, rc, base_name(path), "%s: hashing failed", path);
        goto done;
    }
    for (int i = 0; i < VEER_DIGEST_BYTES; i++)
        snprintf(hex + 2 * i, 3, "%02x", d[i]);
    rc = veer__npy_parse(buf, (size_t)size, a, err);
    if (rc != 0 && err != NULL) {
        char msg[VEER_ERROR_MESSAGE_MAX];
        memcpy(msg, err->message, sizeof msg);
        snprintf(err->field, sizeof err->field, "%s", base_name(path));
        snprintf(err->message, sizeof err->message, "%.100s: %.150s", path, msg);
    }
done:
    veer__free(buf);
    fclose(f);
    return rc;
}

/* A float32 array of shape (n, width), or (n,) when width is 1 and `flat_ok`. */
static int check_shape(const char *path, const veer__npy *a, uint32_t width, int flat_ok,
                       const char *what, veer_error *err)
{
    if (a->dtype != VEER_NPY_F32)
        return veer__error_set(err, VEER_ELOG, base_name(path),
                               "%.120s: %s must be float32, not %s (convert with "
                               "arr.astype(np.float32) after checking the values)",
                               path, what, veer__npy_dtype_name(a->dtype));
    int ok = (a->ndim == 2 && a->shape[1] == width) || (flat_ok && a->ndim == 1 && width == 1);
    if (!ok)
        return veer__error_set(err, VEER_ELOG, base_name(path),
                               "%.120s: %s must have shape (n, %u)%s", path, what, width,
                               flat_ok && width == 1 ? " or (n,)" : "");
    return 0;
}

static int check_finite(const char *path, const float *x, size_t n, uint32_t w, veer_error *err)
{
    for (size_t i = 0; i < n * w; i++)
        if (!isfinite(x[i]))
            return veer__error_set(err, VEER_ELOG, base_name(path),
                                   "%.120s: row %zu, column %zu is %g; every value must be finite",
                                   path, i / w, i % w, (double)x[i]);
    return 0;
}

static int check_indices(const char *path, const float *x, size_t n, uint32_t w,
                         const uint32_t *counts, veer_error *err)
{
    for (size_t i = 0; i < n * w; i++) {
        float v = x[i];
        uint32_t c = counts[i % w];
        if (!(v >= 0.0f && v < (float)c) || v != floorf(v))
            return veer__error_set(err, VEER_ELOG, base_name(path),
                                   "%.120s: row %zu, feature %zu is %g; tabular states must be "
                                   "whole numbers in [0, %u)", path, i / w, i % w, (double)v, c);
    }
    return 0;
}

int veer__tlog_load(const veer__tlog_spec *spec, veer__tlog *log, veer_error *err)
{
    memset(log, 0, sizeof *log);
    veer__npy s = {0}, a = {0}, ns = {0}, dn = {0};
    char hs[65], ha[65], hn[65], hd[65] = "";
    int rc;
    if ((rc = load_file(spec->states_path, &s, hs, err)) != 0 ||
        (rc = load_file(spec->actions_path, &a, ha, err)) != 0 ||
        (rc = load_file(spec->next_states_path, &ns, hn, err)) != 0 ||
        (spec->dones_path && (rc = load_file(spec->dones_path, &dn, hd, err)) != 0))
        goto done;

    const char *sp = spec->states_path, *ap = spec->actions_path, *np = spec->next_states_path;
    if (s.dtype != VEER_NPY_F32 || s.ndim != 2 || s.shape[1] == 0) {
        rc = veer__error_set(err, VEER_ELOG, base_name(sp),
                             "%.120s: states must be a float32 array of shape (n, state_dim)", sp);
        goto done;
    }
    size_t n = s.shape[0];
    uint32_t d = (uint32_t)s.shape[1];
    if (n < 2) {
        rc = veer__error_set(err, VEER_ELOG, base_name(sp),
                             "%.120s: the log holds %zu transitions; training needs at least 2%s",
                             sp, n, n == 0 ? " (the log is empty)" : "");
        goto done;
    }
    if ((rc = check_shape(np, &ns, d, 0, "next states", err)) != 0)
        goto done;
    if (ns.shape[0] != n) {
        rc = veer__error_set(err, VEER_ELOG, base_name(np),
                             "%.120s has %llu rows but the states file has %zu", np,
                             (unsigned long long)ns.shape[0], n);
        goto done;
    }
    if ((rc = check_finite(sp, s.data, n, d, err)) != 0 ||
        (rc = check_finite(np, ns.data, n, d, err)) != 0)
        goto done;
    if (spec->nstate_counts > 0) {
        if (spec->nstate_counts != d) {
            rc = veer__error_set(err, VEER_ELOG, base_name(sp),
                                 "%.120s: %u state counts were given for %u features", sp,
                                 spec->nstate_counts, d);
            goto done;
        }
        if ((rc = check_indices(sp, s.data, n, d, spec->state_counts, err)) != 0 ||
            (rc = check_indices(np, ns.data, n, d, spec->state_counts, err)) != 0)
            goto done;
    }

    /* Actions: float32 (n, dim) or (n,); discrete logs may also hold int32/int64 indices. */
    uint32_t aw = spec->action_count ? 1 : spec->action_dim;
    float *acts = veer__malloc(n * aw * sizeof *acts);
    if (acts == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, "actions", NULL);
        goto done;
    }
    log->actions = acts;
    int int_ok = spec->action_count && (a.dtype == VEER_NPY_I32 || a.dtype == VEER_NPY_I64) &&
                 (a.ndim == 1 || (a.ndim == 2 && a.shape[1] == 1));
    if (int_ok) {
        for (size_t i = 0; i < n && i < a.count; i++) {
            int64_t v = a.dtype == VEER_NPY_I32 ? ((int32_t *)a.data)[i] : ((int64_t *)a.data)[i];
            acts[i] = (v >= 0 && v < (int64_t)spec->action_count) ? (float)v : -1.0f;
        }
    } else if ((rc = check_shape(ap, &a, aw, spec->action_count != 0, "actions", err)) != 0) {
        goto done;
    }
    if (a.shape[0] != n) {
        rc = veer__error_set(err, VEER_ELOG, base_name(ap),
                             "%.120s has %llu rows but the states file has %zu", ap,
                             (unsigned long long)a.shape[0], n);
        goto done;
    }
    if (!int_ok) {
        memcpy(acts, a.data, n * aw * sizeof *acts);
        if ((rc = check_finite(ap, acts, n, aw, err)) != 0)
            goto done;
    }
    for (size_t i = 0; i < n; i++) {
        if (spec->action_count) {
            float v = acts[i];
            if (!(v >= 0.0f && v < (float)spec->action_count) || v != floorf(v)) {
                rc = veer__error_set(err, VEER_ELOG, base_name(ap),
                                     "%.120s: row %zu holds action %g; the declared count is %u "
                                     "(actions are whole numbers 0..%u)", ap, i,
                                     int_ok ? (double)(a.dtype == VEER_NPY_I32
                                                           ? ((int32_t *)a.data)[i]
                                                           : ((int64_t *)a.data)[i])
                                            : (double)v,
                                     spec->action_count, spec->action_count - 1);
                goto done;
            }
        } else {
            for (uint32_t j = 0; j < aw; j++) {
                float v = acts[i * aw + j];
                if (v < spec->low[j] || v > spec->high[j]) {
                    rc = veer__error_set(err, VEER_ELOG, base_name(ap),
                                         "%.120s: row %zu, action %u is %g, outside the declared "
                                         "bounds [%g, %g]", ap, i, j, (double)v,
                                         (double)spec->low[j], (double)spec->high[j]);
                    goto done;
                }
            }
        }
    }

    log->cont = veer__malloc(n * sizeof *log->cont);
    if (log->cont == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, "dones", NULL);
        goto done;
    }
    for (size_t i = 0; i < n; i++)
        log->cont[i] = 1.0f;
    if (spec->dones_path) {
        const char *dp = spec->dones_path;
        int flat = dn.ndim == 1 || (dn.ndim == 2 && dn.shape[1] == 1);
        if (!flat || dn.shape[0] != n ||
            (dn.dtype != VEER_NPY_F32 && dn.dtype != VEER_NPY_BOOL && dn.dtype != VEER_NPY_U8)) {
            rc = veer__error_set(err, VEER_ELOG, base_name(dp),
                                 "%.120s: episode ends must be float32 (or bool) of shape (%zu,)",
                                 dp, n);
            goto done;
        }
        for (size_t i = 0; i < n; i++) {
            double v = dn.dtype == VEER_NPY_F32 ? ((float *)dn.data)[i]
                                                : ((unsigned char *)dn.data)[i];
            if (v != 0.0 && v != 1.0) {
                rc = veer__error_set(err, VEER_ELOG, base_name(dp),
                                     "%.120s: row %zu is %g; episode ends must be 0 or 1", dp, i,
                                     v);
                goto done;
            }
            log->cont[i] = spec->ends_truncated ? 1.0f : (float)(1.0 - v);
        }
    }

    log->n = n;
    log->state_dim = d;
    log->action_dim = aw;
    log->states = s.data;
    log->next_states = ns.data;
    s.data = ns.data = NULL;
    snprintf(log->digest, sizeof log->digest, "blake2b-256 states=%s actions=%s next_states=%s%s%s",
             hs, ha, hn, spec->dones_path ? " dones=" : "", hd);
done:
    veer__npy_free(&s);
    veer__npy_free(&a);
    veer__npy_free(&ns);
    veer__npy_free(&dn);
    if (rc != 0)
        veer__tlog_free(log);
    return rc;
}

void veer__tlog_free(veer__tlog *log)
{
    veer__free(log->states);
    veer__free(log->actions);
    veer__free(log->next_states);
    veer__free(log->cont);
    memset(log, 0, sizeof *log);
}
