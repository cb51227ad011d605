/* Private to libveer: the allocation hook, error filling, the monotonic clock and the content
 * hash. Not installed and not for clients. */
#ifndef VEER_BASE_H
#define VEER_BASE_H

#include <stddef.h>
#include <stdint.h>
#include <time.h>

#include "veer/alloc.h"
#include "veer/error.h"

void *veer__malloc(size_t n);
void *veer__calloc(size_t n, size_t size);
void *veer__realloc(void *p, size_t n);
void veer__free(void *p);
char *veer__strdup(const char *s);
void *veer__malloc_aligned(size_t n); /* 64-byte aligned; release with veer__free_aligned */
void veer__free_aligned(void *p);

/* Fills `err` (when not NULL) and returns `code`, so error paths read `return veer__error_set(...)`.
 * `fmt` NULL uses the code's fixed text. */
int veer__error_set(veer_error *err, int code, const char *field, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));

/* The one monotonic clock (Redis's monotonic.h idea): every latency and deadline in veer is
 * measured on CLOCK_MONOTONIC, which never jumps with wall-clock corrections. */
static inline uint64_t veer__now_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (uint64_t)ts.tv_sec * 1000000000u + (uint64_t)ts.tv_nsec;
}

/* BLAKE2b-256 (libsodium's crypto_generichash, the same digest as Python's
 * hashlib.blake2b(digest_size=32)). Used for bundle checksums and task content hashes. */
#define VEER_DIGEST_BYTES 32
int veer__digest(const void *data, size_t len, uint8_t out[VEER_DIGEST_BYTES]);

#endif
