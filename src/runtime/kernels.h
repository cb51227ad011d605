/* Dense kernels for the networks, on OpenBLAS. Each works on `n` rows stored row-major and
 * contiguous (row stride = width), writes into caller-provided memory and allocates nothing,
 * so the act path can call them freely. Linear layers use sgemv for a single row (OpenBLAS's
 * gemv is faster than a one-row gemm) and sgemm for batches. Prefix veer__k_. */
#ifndef VEER_RUNTIME_KERNELS_H
#define VEER_RUNTIME_KERNELS_H

#include <stddef.h>
#include <stdint.h>

/* Up to this many rows, veer__k_linear runs one sgemv per row instead of one sgemm. OpenBLAS's
 * sgemm first copies both operands into packed panels, which for a few rows costs more than the
 * multiplication: single-threaded on the development host (OpenBLAS 0.3.21, Zen kernel), a
 * 1024 x 1024 layer took 790 us by sgemm for 2 rows against 231 us by two sgemv, 885 against
 * 744 us for 6 rows, and sgemm won from 8 rows (823 against 1007 us); a 256 x 256 layer 25
 * against 8 us for 2 rows. Only narrow layers lose a little (62 x 256: 7.6 against 6.9 us for
 * 6 rows), where both cost next to nothing. OpenBLAS has a direct small-matrix sgemm only for some
 * CPUs (OpenMathLib/OpenBLAS pull request 1914). Discrete acting evaluates action_count rows per
 * state, and a batch of a few acts a few rows, so both land here. The crossing depends on the
 * kernel OpenBLAS picked for the CPU: see veer__k_init. */
#define VEER__K_GEMV_ROWS_MAX 6

/* Fixes the per-row limit for this process from OpenBLAS's kernel: VEER__K_GEMV_ROWS_MAX, or 1
 * under OpenBLAS's generic Prescott kernel, whose sgemv is slower than its sgemm from two rows
 * on (kernels.c). Idempotent and thread-safe; workspace creation calls it, so every act path
 * has. Before it the limit is VEER__K_GEMV_ROWS_MAX. */
void veer__k_init(void);

/* y = x Wᵀ + b for n rows: x is n x in, W is out x in (row-major, as PyTorch stores it),
 * b has out values or is NULL (no bias), y is n x out. x and y must not overlap. */
void veer__k_linear(size_t n, uint32_t in, uint32_t out, const float *x, const float *w,
                    const float *b, float *y);

/* One column block of a linear layer, added into y: y[r] += x[r, 0:k] W[:, 0:k]ᵀ for n rows,
 * with x's rows ldx floats apart and W's rows ldw apart (so x and w may point into the middle
 * of wider rows: a block of a layer's input columns and the matching columns of W, out rows).
 * y is n x out, contiguous. Same sgemv/sgemm choice as veer__k_linear. */
void veer__k_linear_block(size_t n, uint32_t k, uint32_t out, const float *x, size_t ldx,
                          const float *w, size_t ldw, float *y);

/* In place over `count` values: max(x, 0) and tanh(x). NaN stays NaN in both, so a broken
 * network shows up as a non-finite output rather than being hidden by the activation. */
void veer__k_relu(size_t count, float *x);
void veer__k_tanh(size_t count, float *x);

/* Layer normalisation per row (Ba, Kiros & Hinton 2016, "Layer Normalization", eq. 4, with
 * the population variance): y = gain * (x - mean) / sqrt(var + eps) + bias.
 * gain and bias have dim values or are NULL (gain 1, bias 0). In place allowed (x == y).
 * eps must be > 0, so a constant row gives y = bias instead of 0/0. */
void veer__k_layer_norm(size_t n, uint32_t dim, const float *x, const float *gain,
                        const float *bias, float eps, float *y);

/* In place per row: x <- x * norm / ||x||₂. A row whose norm is 0 (or too small for the quotient
 * to be finite) has no direction to keep: it is set to all zeros, which stays finite and keeps
 * F·z = 0 for it. Returns how many rows were so degenerate, for callers that want to flag it. */
size_t veer__k_rescale_norm(size_t n, uint32_t dim, float norm, float *x);

/* Copies a block of n rows x width columns from src (row stride src_stride) to dst (row stride
 * dst_stride): the building block of concatenation. */
void veer__k_copy_cols(size_t n, uint32_t width, const float *src, size_t src_stride, float *dst,
                       size_t dst_stride);

/* Embedding lookup. Each row of x holds `in` indices as floats; index j must be an integer in
 * [0, counts[j]). The joint index is mixed-radix, row-major: ((i0 * c1 + i1) * c2 + i2) ...;
 * y's row is row `joint` of table (rows x out). Returns 0, or -1 - r for the first row r holding
 * an index that is not an integer in range; that row and those after it are not written, and
 * the table is never read out of bounds. */
long veer__k_embedding(size_t n, uint32_t in, const uint32_t *counts, uint32_t out, const float *x,
                       const float *table, float *y);

/* Row-wise dot products: v[r] = a[r,:] · z for n rows of dim values (Q = F(s, a, z) · z). */
void veer__k_row_dot(size_t n, uint32_t dim, const float *a, const float *z, float *v);

/* 1 when all count values are finite. */
int veer__k_all_finite(size_t count, const float *x);

#endif
