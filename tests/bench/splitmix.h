/* splitmix64 (Steele, Lea & Flood 2014, "Fast splittable pseudorandom number generators"; the
 * constants of Vigna's public-domain reference), the benchmarks' one generator: each keeps its
 * own state from a fixed start, so every run draws the same inputs. Header-only, for the
 * benchmark executables. */
#ifndef VEER_BENCH_SPLITMIX_H
#define VEER_BENCH_SPLITMIX_H

#include <stdint.h>

static inline uint64_t bench_splitmix64(uint64_t *state)
{
    uint64_t z = (*state += 0x9e3779b97f4a7c15ull);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ull;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebull;
    return z ^ (z >> 31);
}

#endif
