/* veer latency histograms: fixed-size, log-linear, lock-free to record.
 *
 * The design follows the HDR histogram (G. Tene, HdrHistogram): values fall into power-of-two
 * octaves, each split into equal linear sub-buckets, so the bucket width is a fixed fraction of
 * the value and the relative error is bounded over the whole range with a few thousand
 * counters. The code and the layout here are veer's own.
 *
 * Range and resolution. Values are nanoseconds. The tracked range is VEER_HIST_LOWEST_NS (1 µs)
 * to VEER_HIST_HIGHEST_NS (60 s). Each octave [2^k, 2^(k+1)) holds VEER_HIST_SUB_BUCKETS (128)
 * buckets of width 2^k / 128, so any value is reported within 1/128 (0.79 %) of itself. Values
 * below the range are counted in the first bucket and values above it in the last; both are
 * also counted as underflow or overflow, so a reader can tell the clamped part. Minimum, maximum
 * and sum (for the mean) are kept from the values as recorded, not as clamped.
 *
 * Reported values. A percentile is the highest value of the bucket in which the cumulative count
 * reaches ceil(p/100 * count), clamped to [min, max]: a latency is never reported lower than it
 * was, and is at most 0.79 % higher. The top rank reports the maximum itself; other ranks that
 * fall among overflowed values report the last bucket's ceiling (60.1 s).
 *
 * Threading contract.
 *   - veer_hist_record: ONE writer thread per histogram. The counters are 64-bit atomics
 *     written with relaxed load + store (no read-modify-write instruction is needed when only one
 *     thread writes), so it takes no lock, allocates nothing and costs a few nanoseconds.
 *   - veer_hist_record_shared: any number of writer threads (relaxed fetch-add, compare-and-swap
 *     for min and max). Do not mix it with veer_hist_record on the same histogram.
 *   - Readers (percentile, count, mean, iteration, count_le, snapshot, merge's source) may run
 *     on any thread at any time, concurrently with the writer: they read each counter atomically
 *     and never block the writer. A histogram read while being written is a blend of counters
 *     from slightly different moments (each counter is exact; the total is the sum of the bucket
 *     counters read, so percentiles stay self-consistent). For a consistent interval without
 *     stalling the writer, use the interval recorder (veer_hist_recorder) below.
 *   - veer_hist_reset and veer_hist_merge's destination count as writes: the histogram's one
 *     writer, or nobody writing.
 *
 * Errors: functions returning int return 0 or a negative VEER_E* code (veer/error.h).
 */
#ifndef VEER_HISTOGRAM_H
#define VEER_HISTOGRAM_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"

#ifdef __cplusplus
extern "C" {
#endif

#define VEER_HIST_LOWEST_NS 1000ull         /* 1 µs */
#define VEER_HIST_HIGHEST_NS 60000000000ull /* 60 s */
#define VEER_HIST_SUB_BUCKETS 128u          /* buckets per octave: relative error <= 1/128 */

typedef struct veer_hist veer_hist;

/* Allocates a zeroed histogram (about 27 KB, one allocation). The caller owns *out and releases
 * it with veer_hist_destroy. Returns VEER_EINVAL (out NULL) or VEER_ENOMEM. Any thread. */
int veer_hist_create(veer_hist **out);
void veer_hist_destroy(veer_hist *h); /* NULL is allowed */

/* Records one value in nanoseconds. One writer thread per histogram (see the contract above).
 * Never fails, never allocates, takes no lock. */
void veer_hist_record(veer_hist *h, uint64_t value_ns);

/* Records `n` occurrences of one value (for example a value read back from an exported
 * histogram). Same contract as veer_hist_record. */
void veer_hist_record_n(veer_hist *h, uint64_t value_ns, uint64_t n);

/* Records one value from any number of threads at once (atomic read-modify-write). */
void veer_hist_record_shared(veer_hist *h, uint64_t value_ns);

/* Zeroes every counter and the minimum and maximum. A write: the histogram's writer only. */
void veer_hist_reset(veer_hist *h);

/* Adds every count of `src` into `dst` (dst's writer thread; src may be live). Min, max, sum,
 * underflow and overflow combine accordingly. Merging into itself is VEER_EINVAL. */
int veer_hist_merge(veer_hist *dst, const veer_hist *src);

/* Copies `src` into `dst`, replacing dst's content (dst's writer thread; src may be live). */
int veer_hist_copy(veer_hist *dst, const veer_hist *src);

/* Number of values recorded (the sum of the bucket counters). Any thread. */
uint64_t veer_hist_count(const veer_hist *h);

/* Values recorded below VEER_HIST_LOWEST_NS and above VEER_HIST_HIGHEST_NS. Any thread. */
uint64_t veer_hist_underflow(const veer_hist *h);
uint64_t veer_hist_overflow(const veer_hist *h);

/* Smallest and largest value recorded, as recorded (not clamped); 0 when empty. Any thread. */
uint64_t veer_hist_min(const veer_hist *h);
uint64_t veer_hist_max(const veer_hist *h);

/* Sum of the values as recorded, in nanoseconds (a Prometheus histogram's _sum); it stops at
 * UINT64_MAX instead of wrapping (veer_hist_record; the shared variant wraps). Any thread. */
uint64_t veer_hist_sum(const veer_hist *h);

/* Mean of the values as recorded, from a 64-bit sum of nanoseconds (exact while the recorded
 * total stays under 2^64 ns, 584 years). 0 when empty. Any thread. */
double veer_hist_mean(const veer_hist *h);

/* The value at percentile `pct` (0..100; 100 gives the maximum). Writes it to *value_ns.
 * Errors: VEER_EINVAL (pct NaN or outside [0, 100], or a NULL pointer), VEER_EEMPTY (nothing
 * recorded; *value_ns is set to 0). Any thread. */
int veer_hist_percentile(const veer_hist *h, double pct, uint64_t *value_ns);

/* The figures an operator looks at, read in one pass. All 0 for an empty histogram. */
typedef struct veer_hist_summary {
    uint64_t count, underflow, overflow;
    uint64_t min, max;
    double mean;
    uint64_t p50, p90, p99, p999; /* nanoseconds */
} veer_hist_summary;

/* Fills *out. Returns VEER_EINVAL for NULL pointers. Any thread. */
int veer_hist_summarize(const veer_hist *h, veer_hist_summary *out);

/* Number of recorded values whose bucket lies wholly at or below `bound_ns`: the cumulative
 * count a Prometheus "le" bucket needs. Exact when bound_ns is a bucket's highest value
 * (veer_hist_bucket_ceiling), otherwise it leaves out the one bucket that straddles the bound,
 * which is the count at a bound lower by at most 0.79 %. Any thread. */
uint64_t veer_hist_count_le(const veer_hist *h, uint64_t bound_ns);

/* The highest value of the bucket that `value_ns` falls into (after clamping to the range):
 * the bound to choose for exact cumulative counts. Any thread; no histogram needed. */
uint64_t veer_hist_bucket_ceiling(uint64_t value_ns);

/* Iteration over the non-empty buckets, lowest first:
 *
 *     veer_hist_iter it;
 *     veer_hist_iter_init(&it, h);
 *     while (veer_hist_iter_next(&it))
 *         use(it.lowest_ns, it.highest_ns, it.count, it.cumulative);
 *
 * The iterator reads the live histogram; take a copy first for a stable view. */
typedef struct veer_hist_iter {
    const veer_hist *hist;
    uint32_t next_index; /* private */
    uint64_t lowest_ns;  /* the bucket holds values in [lowest_ns, highest_ns] */
    uint64_t highest_ns;
    uint64_t count;      /* values in this bucket */
    uint64_t cumulative; /* values in this bucket and all below it */
} veer_hist_iter;

void veer_hist_iter_init(veer_hist_iter *it, const veer_hist *h);
int veer_hist_iter_next(veer_hist_iter *it); /* 1 while a bucket was produced, then 0 */

/* Number of buckets (the same for every histogram). */
uint32_t veer_hist_bucket_count(void);

/* ---- Interval recorder ---------------------------------------------------------------------
 *
 * Two histograms behind one pointer (the interval-recorder idea of HdrHistogram). The writer
 * records into the active one; a reader swaps in the idle one and, once the writer is known to
 * have left the old one, takes it as the interval's histogram. The writer never waits: it pays
 * one atomic increment per value to announce that it is inside a record. The reader waits at
 * most for one record in flight (it spins, then yields).
 *
 * Threading: one writer thread calls veer_hist_recorder_record; any number of reader threads may
 * call veer_hist_recorder_take (they are serialised among themselves by a mutex the writer never
 * touches). */
typedef struct veer_hist_recorder veer_hist_recorder;

int veer_hist_recorder_create(veer_hist_recorder **out);
void veer_hist_recorder_destroy(veer_hist_recorder *r); /* NULL is allowed */

/* Records one value into the active interval. The one writer thread. */
void veer_hist_recorder_record(veer_hist_recorder *r, uint64_t value_ns);

/* Ends the current interval: adds everything recorded since the previous take into `into` (which
 * the caller owns; reset it first for the interval alone, or keep it to accumulate a total). The
 * recorder starts a fresh interval. Any reader thread. Returns VEER_EINVAL for NULL pointers. */
int veer_hist_recorder_take(veer_hist_recorder *r, veer_hist *into);

#ifdef __cplusplus
}
#endif
#endif
