/* The trainer's one random number generator: xoshiro256** (Blackman & Vigna, "Scrambled
 * linear pseudorandom number generators", ACM TOMS 2021), initialised through splitmix64 as its
 * authors recommend. Hand-written because it is ten lines and must give the same stream on
 * every platform, which is what makes "same flags, one thread, same bundle" hold; its state
 * is four words, so a checkpoint stores it exactly. Normals use the Box-Muller transform. */
#ifndef VEER_TRAIN_RNG_H
#define VEER_TRAIN_RNG_H

#include <math.h>
#include <stdint.h>

typedef struct veer__rng {
    uint64_t s[4];
} veer__rng;

static inline uint64_t veer__rng_splitmix(uint64_t *x)
{
    uint64_t z = (*x += 0x9E3779B97F4A7C15ull);
    z = (z ^ (z >> 30)) * 0xBF58476D1CE4E5B9ull;
    z = (z ^ (z >> 27)) * 0x94D049BB133111EBull;
    return z ^ (z >> 31);
}

static inline void veer__rng_init(veer__rng *r, uint64_t key)
{
    for (int i = 0; i < 4; i++)
        r->s[i] = veer__rng_splitmix(&key);
}

static inline uint64_t veer__rng_next(veer__rng *r)
{
    uint64_t *s = r->s;
    uint64_t x = s[1] * 5;
    uint64_t result = ((x << 7) | (x >> 57)) * 9;
    uint64_t t = s[1] << 17;
    s[2] ^= s[0];
    s[3] ^= s[1];
    s[1] ^= s[2];
    s[0] ^= s[3];
    s[2] ^= t;
    s[3] = (s[3] << 45) | (s[3] >> 19);
    return result;
}

/* Uniform in [0, 1) with 53 random bits. */
static inline double veer__rng_uniform(veer__rng *r)
{
    return (double)(veer__rng_next(r) >> 11) * (1.0 / 9007199254740992.0);
}

/* Uniform integer in [0, n), n > 0 (Lemire's multiply-shift; its bias is below 2^-32 for the
 * sizes used here). */
static inline uint64_t veer__rng_below(veer__rng *r, uint64_t n)
{
    return (uint64_t)(((unsigned __int128)veer__rng_next(r) * n) >> 64);
}

/* Standard normal (Box-Muller; one of the pair is discarded to keep the state simple). */
static inline double veer__rng_normal(veer__rng *r)
{
    double u1 = veer__rng_uniform(r), u2 = veer__rng_uniform(r);
    if (u1 < 1e-300)
        u1 = 1e-300;
    return sqrt(-2.0 * log(u1)) * cos(6.283185307179586 * u2);
}

#endif
