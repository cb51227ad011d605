/* Deadline-miss bursts (see burst.h). The window's miss count is the counter now minus the
 * counter at the newest sample taken at least a window ago (or the oldest kept, early on): the
 * window plus at most one sampling period, exact at the sampling instants. */
#include "service/burst.h"

#include <string.h>

void veer__burst_init(veer__burst *b, uint32_t threshold, uint64_t window_ns)
{
    memset(b, 0, sizeof *b);
    b->threshold = threshold ? threshold : 1;
    b->window_ns = window_ns ? window_ns : 1;
}

int veer__burst_update(veer__burst *b, uint64_t now_ns, uint64_t total, uint32_t *misses)
{
    /* Drop samples older than the window, keeping the newest one at or before its start as the
     * baseline. */
    while (b->count >= 2) {
        uint32_t second = (b->head + VEER__BURST_SAMPLES - b->count + 1) % VEER__BURST_SAMPLES;
        if (now_ns - b->at_ns[second] < b->window_ns)
            break;
        b->count--;
    }
    if (b->count == VEER__BURST_SAMPLES)
        b->count--; /* sampled faster than the ring holds: the oldest goes */
    b->at_ns[b->head] = now_ns;
    b->total[b->head] = total;
    b->head = (b->head + 1) % VEER__BURST_SAMPLES;
    b->count++;
    uint32_t oldest = (b->head + VEER__BURST_SAMPLES - b->count) % VEER__BURST_SAMPLES;
    uint64_t in_window = total - b->total[oldest];
    if (misses != NULL)
        *misses = in_window > UINT32_MAX ? UINT32_MAX : (uint32_t)in_window;
    int covers = now_ns - b->at_ns[oldest] >= b->window_ns;
    if (!b->active && in_window >= b->threshold) {
        b->active = 1;
        return 1;
    }
    if (b->active && covers && in_window < (b->threshold + 1) / 2)
        b->active = 0;
    return 0;
}
