/* Latency histograms with log-linear buckets (the HDR histogram design of G. Tene's
 * HdrHistogram; veer's own layout and code).
 *
 * Key choice: the bucket of a value is found with one count-leading-zeros and two shifts, and
 * the counters are a flat array of 64-bit atomics written by one thread with relaxed load and
 * store. Recording therefore costs a few nanoseconds, allocates nothing and never waits, which is
 * what the act path needs. Everything slower (percentiles, iteration) is on the reader's side.
 *
 * Layout. Octave k holds the values [2^k, 2^(k+1)) in 128 buckets of width 2^(k-7). Numbering
 * the buckets of all octaves from octave VEER__OCT_FIRST = floor(log2(1000)) = 9 gives a "raw"
 * index; the histogram stores raw indices from raw(1 µs) to raw(60 s), 3302 buckets.
 */
#include "veer/histogram.h"

#include <math.h>
#include <stdatomic.h>
#include <string.h>

#include "base/base.h"

#define VEER__SUB_BITS 7 /* log2(VEER_HIST_SUB_BUCKETS) */
#define VEER__OCT_FIRST 9
#define VEER__RAW_FIRST 122u /* raw(1000): (1000 >> 2) - 128 */
#define VEER__RAW_LAST 3423u /* raw(6e10): 26 * 128 + (6e10 >> 28) - 128 */
#define VEER__BUCKETS (VEER__RAW_LAST - VEER__RAW_FIRST + 1u)

_Static_assert(VEER_HIST_SUB_BUCKETS == (1u << VEER__SUB_BITS), "sub-bucket count is 2^SUB_BITS");
_Static_assert((VEER_HIST_LOWEST_NS >> (VEER__OCT_FIRST - VEER__SUB_BITS)) - 128u ==
                   VEER__RAW_FIRST,
               "first raw index");
_Static_assert((35 - VEER__OCT_FIRST) * 128u + (VEER_HIST_HIGHEST_NS >> (35 - VEER__SUB_BITS)) -
                       128u ==
                   VEER__RAW_LAST,
               "last raw index (60 s lies in octave 35)");

struct veer_hist {
    _Atomic uint64_t min; /* UINT64_MAX while empty */
    _Atomic uint64_t max;
    _Atomic uint64_t sum;
    _Atomic uint64_t underflow;
    _Atomic uint64_t overflow;
    _Atomic uint64_t counts[VEER__BUCKETS];
};

/* The bucket of a value already clamped to [LOWEST, HIGHEST]. */
static inline uint32_t bucket_of(uint64_t v)
{
    unsigned k = 63u - (unsigned)__builtin_clzll(v);
    uint64_t sub = v >> (k - VEER__SUB_BITS); /* 128..255 */
    uint32_t raw = (uint32_t)((k - VEER__OCT_FIRST) << VEER__SUB_BITS) + (uint32_t)(sub - 128u);
    return raw - VEER__RAW_FIRST;
}

static inline uint64_t clamp_value(uint64_t v)
{
    if (v < VEER_HIST_LOWEST_NS)
        return VEER_HIST_LOWEST_NS;
    if (v > VEER_HIST_HIGHEST_NS)
        return VEER_HIST_HIGHEST_NS;
    return v;
}

static void bucket_bounds(uint32_t index, uint64_t *lowest, uint64_t *highest)
{
    uint32_t raw = index + VEER__RAW_FIRST;
    unsigned k = VEER__OCT_FIRST + (raw >> VEER__SUB_BITS);
    uint64_t sub = (raw & (VEER_HIST_SUB_BUCKETS - 1u)) + VEER_HIST_SUB_BUCKETS;
    unsigned shift = k - VEER__SUB_BITS;
    *lowest = sub << shift;
    *highest = ((sub + 1u) << shift) - 1u;
}

/* A single-writer increment: nobody else writes the counter, so a plain load and store suffice,
 * and relaxed atomics keep concurrent readers from seeing a torn value. */
static inline void bump(_Atomic uint64_t *c, uint64_t n)
{
    atomic_store_explicit(c, atomic_load_explicit(c, memory_order_relaxed) + n,
                          memory_order_relaxed);
}

static inline uint64_t rd(const _Atomic uint64_t *c)
{
    return atomic_load_explicit((_Atomic uint64_t *)c, memory_order_relaxed);
}

static inline void wr(_Atomic uint64_t *c, uint64_t v)
{
    atomic_store_explicit(c, v, memory_order_relaxed);
}

uint32_t veer_hist_bucket_count(void)
{
    return VEER__BUCKETS;
}

static void hist_zero(veer_hist *h)
{
    for (uint32_t i = 0; i < VEER__BUCKETS; i++)
        wr(&h->counts[i], 0);
    wr(&h->min, UINT64_MAX);
    wr(&h->max, 0);
    wr(&h->sum, 0);
    wr(&h->underflow, 0);
    wr(&h->overflow, 0);
}

int veer_hist_create(veer_hist **out)
{
    if (out == NULL)
        return VEER_EINVAL;
    *out = veer__malloc_aligned(sizeof(veer_hist));
    if (*out == NULL)
        return VEER_ENOMEM;
    hist_zero(*out);
    return 0;
}

void veer_hist_destroy(veer_hist *h)
{
    veer__free_aligned(h);
}

/* Both public record functions inline this, so the one-value path is a direct call (no hop
 * through the shared library's symbol table) with n a constant 1. */
static inline void record_impl(veer_hist *h, uint64_t value_ns, uint64_t n)
{
    if (value_ns < VEER_HIST_LOWEST_NS)
        bump(&h->underflow, n);
    else if (value_ns > VEER_HIST_HIGHEST_NS)
        bump(&h->overflow, n);
    bump(&h->counts[bucket_of(clamp_value(value_ns))], n);

    uint64_t s = rd(&h->sum), add;
    if (__builtin_mul_overflow(value_ns, n, &add)) /* saturate rather than wrap */
        add = UINT64_MAX;
    wr(&h->sum, s + add < s ? UINT64_MAX : s + add);
    if (value_ns < rd(&h->min))
        wr(&h->min, value_ns);
    if (value_ns > rd(&h->max))
        wr(&h->max, value_ns);
}

void veer_hist_record_n(veer_hist *h, uint64_t value_ns, uint64_t n)
{
    if (n != 0)
        record_impl(h, value_ns, n);
}

void veer_hist_record(veer_hist *h, uint64_t value_ns)
{
    record_impl(h, value_ns, 1);
}

void veer_hist_record_shared(veer_hist *h, uint64_t value_ns)
{
    if (value_ns < VEER_HIST_LOWEST_NS)
        atomic_fetch_add_explicit(&h->underflow, 1, memory_order_relaxed);
    else if (value_ns > VEER_HIST_HIGHEST_NS)
        atomic_fetch_add_explicit(&h->overflow, 1, memory_order_relaxed);
    atomic_fetch_add_explicit(&h->counts[bucket_of(clamp_value(value_ns))], 1,
                              memory_order_relaxed);
    atomic_fetch_add_explicit(&h->sum, value_ns, memory_order_relaxed);

    uint64_t cur = rd(&h->min);
    while (value_ns < cur &&
           !atomic_compare_exchange_weak_explicit(&h->min, &cur, value_ns, memory_order_relaxed,
                                                  memory_order_relaxed)) {
    }
    cur = rd(&h->max);
    while (value_ns > cur &&
           !atomic_compare_exchange_weak_explicit(&h->max, &cur, value_ns, memory_order_relaxed,
                                                  memory_order_relaxed)) {
    }
}

void veer_hist_reset(veer_hist *h)
{
    hist_zero(h);
}

int veer_hist_merge(veer_hist *dst, const veer_hist *src)
{
    if (dst == NULL || src == NULL || dst == src)
        return VEER_EINVAL;
    for (uint32_t i = 0; i < VEER__BUCKETS; i++) {
        uint64_t c = rd(&src->counts[i]);
        if (c != 0)
            bump(&dst->counts[i], c);
    }
    bump(&dst->underflow, rd(&src->underflow));
    bump(&dst->overflow, rd(&src->overflow));
    uint64_t s = rd(&dst->sum), a = rd(&src->sum);
    wr(&dst->sum, s + a < s ? UINT64_MAX : s + a);
    uint64_t m = rd(&src->min);
    if (m < rd(&dst->min))
        wr(&dst->min, m);
    m = rd(&src->max);
    if (m > rd(&dst->max))
        wr(&dst->max, m);
    return 0;
}

int veer_hist_copy(veer_hist *dst, const veer_hist *src)
{
    if (dst == NULL || src == NULL)
        return VEER_EINVAL;
    if (dst == src)
        return 0;
    for (uint32_t i = 0; i < VEER__BUCKETS; i++)
        wr(&dst->counts[i], rd(&src->counts[i]));
    wr(&dst->min, rd(&src->min));
    wr(&dst->max, rd(&src->max));
    wr(&dst->sum, rd(&src->sum));
    wr(&dst->underflow, rd(&src->underflow));
    wr(&dst->overflow, rd(&src->overflow));
    return 0;
}

uint64_t veer_hist_count(const veer_hist *h)
{
    uint64_t n = 0;
    for (uint32_t i = 0; i < VEER__BUCKETS; i++)
        n += rd(&h->counts[i]);
    return n;
}

uint64_t veer_hist_underflow(const veer_hist *h)
{
    return rd(&h->underflow);
}

uint64_t veer_hist_overflow(const veer_hist *h)
{
    return rd(&h->overflow);
}

uint64_t veer_hist_min(const veer_hist *h)
{
    uint64_t m = rd(&h->min);
    return m == UINT64_MAX ? 0 : m;
}

uint64_t veer_hist_max(const veer_hist *h)
{
    return rd(&h->max);
}

uint64_t veer_hist_sum(const veer_hist *h)
{
    return rd(&h->sum);
}

double veer_hist_mean(const veer_hist *h)
{
    uint64_t n = veer_hist_count(h);
    return n == 0 ? 0.0 : (double)rd(&h->sum) / (double)n;
}

/* The rank (1-based) of percentile pct among n values: ceil(pct/100 * n), at least 1. The
 * relative nudge keeps a product like 99.9/100 * 1000 = 999.0000000000001 at rank 999. */
static uint64_t rank_of(double pct, uint64_t n)
{
    double x = pct / 100.0 * (double)n;
    x -= x * 1e-12;
    uint64_t r = (uint64_t)ceil(x);
    if (r < 1)
        r = 1;
    if (r > n)
        r = n;
    return r;
}

/* Finds the highest values of the buckets holding the given ranks (ascending) in one pass, `n`
 * being the count the ranks were computed from. */
static void values_at_ranks(const veer_hist *h, uint64_t n, const uint64_t *ranks, uint64_t *values,
                            int k)
{
    uint64_t cum = 0, lo, hi;
    int j = 0;
    uint64_t mn = veer_hist_min(h), mx = rd(&h->max);
    for (uint32_t i = 0; i < VEER__BUCKETS && j < k; i++) {
        cum += rd(&h->counts[i]);
        while (j < k && cum >= ranks[j]) {
            if (ranks[j] == n) { /* the top rank is the maximum, exact even past the range */
                values[j++] = mx;
                continue;
            }
            bucket_bounds(i, &lo, &hi);
            uint64_t v = hi > mx ? mx : hi;
            values[j++] = v < mn ? mn : v;
        }
    }
    while (j < k) /* a writer raced past the count we read; the maximum is the honest answer */
        values[j++] = mx;
}

int veer_hist_percentile(const veer_hist *h, double pct, uint64_t *value_ns)
{
    if (h == NULL || value_ns == NULL || !(pct >= 0.0 && pct <= 100.0))
        return VEER_EINVAL;
    uint64_t n = veer_hist_count(h);
    *value_ns = 0;
    if (n == 0)
        return VEER_EEMPTY;
    uint64_t r = rank_of(pct, n);
    values_at_ranks(h, n, &r, value_ns, 1);
    return 0;
}

int veer_hist_summarize(const veer_hist *h, veer_hist_summary *out)
{
    if (h == NULL || out == NULL)
        return VEER_EINVAL;
    memset(out, 0, sizeof *out);
    out->count = veer_hist_count(h);
    if (out->count == 0)
        return 0;
    out->underflow = rd(&h->underflow);
    out->overflow = rd(&h->overflow);
    out->min = veer_hist_min(h);
    out->max = rd(&h->max);
    out->mean = (double)rd(&h->sum) / (double)out->count;
    uint64_t ranks[4] = {rank_of(50.0, out->count), rank_of(90.0, out->count),
                         rank_of(99.0, out->count), rank_of(99.9, out->count)};
    uint64_t v[4];
    values_at_ranks(h, out->count, ranks, v, 4);
    out->p50 = v[0];
    out->p90 = v[1];
    out->p99 = v[2];
    out->p999 = v[3];
    return 0;
}

uint64_t veer_hist_bucket_ceiling(uint64_t value_ns)
{
    uint64_t lo, hi;
    bucket_bounds(bucket_of(clamp_value(value_ns)), &lo, &hi);
    return hi;
}

uint64_t veer_hist_count_le(const veer_hist *h, uint64_t bound_ns)
{
    if (bound_ns < VEER_HIST_LOWEST_NS)
        return 0;
    uint64_t lo, hi;
    uint32_t last = bucket_of(clamp_value(bound_ns));
    bucket_bounds(last, &lo, &hi);
    uint32_t end = hi <= bound_ns ? last + 1u : last; /* buckets [0, end) lie wholly <= bound */
    uint64_t n = 0;
    for (uint32_t i = 0; i < end; i++)
        n += rd(&h->counts[i]);
    return n;
}

void veer_hist_iter_init(veer_hist_iter *it, const veer_hist *h)
{
    memset(it, 0, sizeof *it);
    it->hist = h;
}

int veer_hist_iter_next(veer_hist_iter *it)
{
    if (it == NULL || it->hist == NULL)
        return 0;
    while (it->next_index < VEER__BUCKETS) {
        uint32_t i = it->next_index++;
        uint64_t c = rd(&it->hist->counts[i]);
        if (c == 0)
            continue;
        bucket_bounds(i, &it->lowest_ns, &it->highest_ns);
        it->count = c;
        it->cumulative += c;
        return 1;
    }
    return 0;
}
