/* Dense kernels on OpenBLAS (see kernels.h). The heavy lifting is cblas_sgemv/cblas_sgemm; the
 * element-wise kernels are plain loops the compiler vectorises. Reductions (layer-norm mean and
 * variance, norms) accumulate in double so that results agree with a float64 NumPy reference
 * to well within 1e-5 relative, whatever the width. */
#include "runtime/kernels.h"

#include <cblas.h>
#include <math.h>
#include <string.h>

void veer__k_linear(size_t n, uint32_t in, uint32_t out, const float *x, const float *w,
                    const float *b, float *y)
{
    if (n == 0)
        return;
    float beta = 0.0f;
    if (b != NULL) {
        for (size_t r = 0; r < n; r++)
            memcpy(y + r * out, b, (size_t)out * sizeof *b);
        beta = 1.0f;
    }
    if (n == 1)
        cblas_sgemv(CblasRowMajor, CblasNoTrans, (int)out, (int)in, 1.0f, w, (int)in, x, 1, beta,
                    y, 1);
    else
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int)n, (int)out, (int)in, 1.0f, x,
                    (int)in, w, (int)in, beta, y, (int)out);
}

void veer__k_relu(size_t count, float *x)
{
    for (size_t i = 0; i < count; i++)
        x[i] = x[i] < 0.0f ? 0.0f : x[i]; /* NaN < 0 is false: NaN passes through */
}

void veer__k_tanh(size_t count, float *x)
{
    for (size_t i = 0; i < count; i++)
        x[i] = tanhf(x[i]);
}

void veer__k_layer_norm(size_t n, uint32_t dim, const float *x, const float *gain,
                        const float *bias, float eps, float *y)
{
    for (size_t r = 0; r < n; r++) {
        const float *xr = x + r * dim;
        float *yr = y + r * dim;
        double sum = 0.0;
        for (uint32_t i = 0; i < dim; i++)
            sum += xr[i];
        double mean = sum / dim;
        double ss = 0.0;
        for (uint32_t i = 0; i < dim; i++) {
            double d = xr[i] - mean;
            ss += d * d;
        }
        double inv = 1.0 / sqrt(ss / dim + (double)eps);
        for (uint32_t i = 0; i < dim; i++) {
            double v = (xr[i] - mean) * inv;
            if (gain != NULL)
                v *= gain[i];
            if (bias != NULL)
                v += bias[i];
            yr[i] = (float)v;
        }
    }
}

size_t veer__k_rescale_norm(size_t n, uint32_t dim, float norm, float *x)
{
    size_t degenerate = 0;
    for (size_t r = 0; r < n; r++) {
        float *xr = x + r * dim;
        double ss = 0.0;
        for (uint32_t i = 0; i < dim; i++)
            ss += (double)xr[i] * xr[i];
        if (ss == 0.0) {
            memset(xr, 0, (size_t)dim * sizeof *xr);
            degenerate++;
            continue;
        }
        /* In double, ss of floats cannot overflow or underflow to 0 unless the row is all
         * zeros, so the scale is finite; NaN or infinity in the row propagates as such. */
        double scale = (double)norm / sqrt(ss);
        for (uint32_t i = 0; i < dim; i++)
            xr[i] = (float)(xr[i] * scale);
    }
    return degenerate;
}

void veer__k_copy_cols(size_t n, uint32_t width, const float *src, size_t src_stride, float *dst,
                       size_t dst_stride)
{
    for (size_t r = 0; r < n; r++)
        memcpy(dst + r * dst_stride, src + r * src_stride, (size_t)width * sizeof *src);
}

long veer__k_embedding(size_t n, uint32_t in, const uint32_t *counts, uint32_t out,
                       const float *x, const float *table, float *y)
{
    for (size_t r = 0; r < n; r++) {
        const float *xr = x + r * in;
        size_t joint = 0;
        for (uint32_t j = 0; j < in; j++) {
            float v = xr[j];
            /* The comparisons are written so that NaN fails them. */
            if (!(v >= 0.0f && v < (float)counts[j]) || v != floorf(v))
                return -1 - (long)r;
            joint = joint * counts[j] + (size_t)v;
        }
        memcpy(y + r * out, table + joint * out, (size_t)out * sizeof *y);
    }
    return 0;
}

void veer__k_row_dot(size_t n, uint32_t dim, const float *a, const float *z, float *v)
{
    for (size_t r = 0; r < n; r++) {
        const float *ar = a + r * dim;
        double s = 0.0;
        for (uint32_t i = 0; i < dim; i++)
            s += (double)ar[i] * z[i];
        v[r] = (float)s;
    }
}

int veer__k_all_finite(size_t count, const float *x)
{
    int ok = 1;
    for (size_t i = 0; i < count; i++)
        ok &= isfinite(x[i]) != 0;
    return ok;
}
