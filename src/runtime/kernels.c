/* Dense kernels on OpenBLAS (see kernels.h). The heavy lifting is cblas_sgemv/cblas_sgemm; the
 * element-wise kernels are plain loops the compiler vectorises. Reductions (layer-norm mean and
 * variance, norms) accumulate in double so that results agree with a float64 NumPy reference
 * to well within 1e-5 relative, whatever the width. */
#include "runtime/kernels.h"

#include <cblas.h>
#include <math.h>
#include <pthread.h>
#include <string.h>
#include <strings.h>

/* Rows up to which the linear kernels run one sgemv per row (kernels.h): fixed once per process
 * by veer__k_init from the kernel OpenBLAS chose for this CPU, so a host always takes the same
 * path (and the same rounding) for the same rows. */
static size_t gemv_rows_max = VEER__K_GEMV_ROWS_MAX;
static pthread_once_t gemv_once = PTHREAD_ONCE_INIT;

static void pick_gemv_rows(void)
{
    /* Prescott is OpenBLAS's generic x86-64 kernel, the one it falls back to for a CPU it does
     * not recognise (a virtual "Intel Xeon Processor" with AVX-512, December 2026): its sgemv is
     * plain SSE while its sgemm is still blocked, and there sgemm won from two rows on for every
     * layer of the SMALL and STANDARD models (256 x 256: 25 against 31 us for 2 rows, 41
     * against 93 us for 6; 1024 x 1024: 476 against 528 and 727 against 1,584 us). */
    const char *core = openblas_get_corename();
    if (core != NULL && strcasecmp(core, "Prescott") == 0)
        gemv_rows_max = 1;
}

void veer__k_init(void)
{
    pthread_once(&gemv_once, pick_gemv_rows);
}

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
    if (n <= gemv_rows_max) {
        for (size_t r = 0; r < n; r++)
            cblas_sgemv(CblasRowMajor, CblasNoTrans, (int)out, (int)in, 1.0f, w, (int)in,
                        x + r * in, 1, beta, y + r * out, 1);
    } else {
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int)n, (int)out, (int)in, 1.0f, x,
                    (int)in, w, (int)in, beta, y, (int)out);
    }
}

void veer__k_linear_block(size_t n, uint32_t k, uint32_t out, const float *x, size_t ldx,
                          const float *w, size_t ldw, float *y)
{
    if (n == 0 || k == 0)
        return;
    if (n <= gemv_rows_max) {
        for (size_t r = 0; r < n; r++)
            cblas_sgemv(CblasRowMajor, CblasNoTrans, (int)out, (int)k, 1.0f, w, (int)ldw,
                        x + r * ldx, 1, 1.0f, y + r * out, 1);
    } else {
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int)n, (int)out, (int)k, 1.0f, x,
                    (int)ldx, w, (int)ldw, 1.0f, y, (int)out);
    }
}

void veer__k_relu(size_t count, float *x)
{
    for (size_t i = 0; i < count; i++)
        x[i] = x[i] < 0.0f ? 0.0f : x[i]; /* NaN < 0 is false: NaN passes through */
}

/* tanh without a libm call per element: glibc's tanhf does not vectorise and cost ~9 ns each,
 * 64 us per STANDARD act (7 x 1024 values). Below |x| = 0.625, x + x^3 P(x^2) with P a degree-4
 * least-squares fit for relative error (fitted in double with NumPy, common practice); above,
 * 1 - 2 / (e^(2|x|) + 1) with e^y = 2^k e^r, |r| <= ln2/2, and the degree-7 Taylor polynomial
 * for e^r (Cody & Waite's two-part ln 2). Simulated in float32 the worst relative error was
 * 1.35e-7 (about one ulp); test_kernels checks 2.5e-7 against double tanh over [-12, 12].
 * Branch-free so the compiler vectorises it. */
static inline uint32_t bits_of(float f)
{
    uint32_t b;
    memcpy(&b, &f, sizeof b);
    return b;
}

static inline float float_of(uint32_t b)
{
    float f;
    memcpy(&f, &b, sizeof f);
    return f;
}

/* cond ? a : b as a bit mask. With the default -ftrapping-math GCC will not turn a float
 * ?: into a vector blend (it may not evaluate a float operation the source did not ask for),
 * so the selects that keep veer__k_tanh vectorised are spelled out. */
static inline float pick(uint32_t cond, float a, float b)
{
    uint32_t m = 0u - cond;
    return float_of((bits_of(a) & m) | (bits_of(b) & ~m));
}

/* tanh(x) = x + x^3 P(x^2) for |x| < 0.625: P's coefficients, constant term first. */
static const float tanh_small[5] = {-0.3333328068256378f, 0.133314311504364f, -0.05373915657401085f,
                                    0.020637862384319305f, -0.005704042501747608f};
/* e^r for |r| <= ln2 / 2: 1/k! for k = 0..7. */
static const float exp_taylor[8] = {1.0f,      1.0f,       0.5f,       1.0f / 6,
                                    1.0f / 24, 1.0f / 120, 1.0f / 720, 1.0f / 5040};

static inline float horner(const float *c, int n, float x)
{
    float p = c[n - 1];
    for (int k = n - 2; k >= 0; k--)
        p = p * x + c[k];
    return p;
}

void veer__k_tanh(size_t count, float *x)
{
    /* Range tests compare the bits of |x| as integers, ordered like the floats. */
    const uint32_t small_limit = 0x3f200000u; /* 0.625f */
    const uint32_t clamp_limit = 0x41200000u; /* 10.0f; tanh(10) is 1 in float */
    const uint32_t inf_bits = 0x7f800000u;
    for (size_t i = 0; i < count; i++) {
        /* Work on |x| and give the result x's sign at the end (tanh is odd; this also keeps
         * the sign of -0). */
        float v = x[i];
        uint32_t abits = bits_of(v) & 0x7fffffffu, sign = bits_of(v) & 0x80000000u;
        float a = float_of(abits);
        float t = a * a;
        float p = horner(tanh_small, 5, t);
        float small = a + a * t * p;

        /* NaN and large values take 10, so the conversion to int below is always defined. */
        float y = 2.0f * pick(abits < clamp_limit, a, 10.0f);
        const float magic = 12582912.0f; /* 1.5 * 2^23: adding it rounds to an integer */
        float kf = (y * 1.4426950408889634f + magic) - magic;
        float r = (y - kf * 0.693145751953125f) - kf * 1.428606765330187e-06f;
        float e = horner(exp_taylor, 8, r);
        float scale = float_of((uint32_t)((int32_t)kf + 127) << 23);
        float big = 1.0f - 2.0f / (e * scale + 1.0f);

        float mag = pick(abits < small_limit, small, big);
        x[i] = pick(abits > inf_bits, v, float_of(bits_of(mag) | sign)); /* NaN stays NaN */
    }
}

/* Σ (x_i - shift)^p for p = 1 or 2, in double with four independent partial sums: one chain of
 * dependent additions would cost a full add latency per element. */
static double sum_pow(const float *x, uint32_t n, double shift, int squared)
{
    double s[4] = {0.0, 0.0, 0.0, 0.0};
    uint32_t i = 0;
    for (; i + 4 <= n; i += 4)
        for (int k = 0; k < 4; k++) {
            double d = x[i + k] - shift;
            s[k] += squared ? d * d : d;
        }
    for (; i < n; i++) {
        double d = x[i] - shift;
        s[0] += squared ? d * d : d;
    }
    return (s[0] + s[1]) + (s[2] + s[3]);
}

void veer__k_layer_norm(size_t n, uint32_t dim, const float *x, const float *gain,
                        const float *bias, float eps, float *y)
{
    for (size_t r = 0; r < n; r++) {
        const float *xr = x + r * dim;
        float *yr = y + r * dim;
        double mean = sum_pow(xr, dim, 0.0, 0) / dim;
        /* Two passes (mean, then squared deviations) rather than E[x^2] - mean^2, which
         * cancels badly when the mean is large against the spread. */
        double inv = 1.0 / sqrt(sum_pow(xr, dim, mean, 1) / dim + (double)eps);
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
        double ss = sum_pow(xr, dim, 0.0, 1);
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

long veer__k_embedding(size_t n, uint32_t in, const uint32_t *counts, uint32_t out, const float *x,
                       const float *table, float *y)
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
