/* Spotting a burst of deadline misses: at least `threshold` misses within a sliding window of
 * `window_ns`, read from the act thread's running miss counter. A burst is announced once when
 * it starts; the detector re-arms only after a whole window with fewer than half the threshold,
 * so a service that misses steadily is announced once, not every window. Pure logic on numbers
 * handed in (no clock, no socket), so tests drive it with made-up times. One thread. */
#ifndef VEER_SERVICE_BURST_H
#define VEER_SERVICE_BURST_H

#include <stdint.h>

#define VEER__BURST_SAMPLES 64 /* counter samples kept; the window is cut into at most this many   \
                                */

typedef struct veer__burst {
    uint32_t threshold;
    uint64_t window_ns;
    int active;
    uint32_t head, count;
    uint64_t at_ns[VEER__BURST_SAMPLES];
    uint64_t total[VEER__BURST_SAMPLES];
} veer__burst;

/* threshold >= 1, window_ns > 0. */
void veer__burst_init(veer__burst *b, uint32_t threshold, uint64_t window_ns);

/* Feeds the counter's value at `now_ns` (non-decreasing times; call at least a few times per
 * window). Returns 1 when a burst starts now, else 0; *misses (may be NULL) gets the misses
 * within the window ending now. */
int veer__burst_update(veer__burst *b, uint64_t now_ns, uint64_t total, uint32_t *misses);

#endif
