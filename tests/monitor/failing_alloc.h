/* An allocator for the monitor tests that fails the Nth allocation and counts live blocks, to
 * prove every error path of a constructor unwinds without a leak (the technique of SQLite's
 * test_malloc.c and libuv's test-loop-oom.c). Install with veer_set_allocator(&failing_alloc),
 * restore with veer_set_allocator(NULL). Header-only: each test program includes it once. */
#ifndef VEER_TESTS_MONITOR_FAILING_ALLOC_H
#define VEER_TESTS_MONITOR_FAILING_ALLOC_H

#include <stdlib.h>

#include "veer/alloc.h"

static int fail_at = -1;    /* the 0-based allocation to fail; -1 fails none */
static int alloc_calls = 0; /* allocations attempted since the last reset */
static int live_allocs = 0; /* blocks handed out and not yet freed */

static void *fail_malloc(size_t n)
{
    if (alloc_calls++ == fail_at)
        return NULL;
    live_allocs++;
    return malloc(n);
}

static void *fail_calloc(size_t n, size_t s)
{
    if (alloc_calls++ == fail_at)
        return NULL;
    live_allocs++;
    return calloc(n, s);
}

static void *fail_realloc(void *p, size_t n)
{
    return realloc(p, n);
}

static void counting_free(void *p)
{
    if (p != NULL)
        live_allocs--;
    free(p);
}

static const veer_allocator failing_alloc = {fail_malloc, fail_calloc, fail_realloc, counting_free};

#endif
