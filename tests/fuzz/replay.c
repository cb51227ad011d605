/* The bounded fuzz driver for compilers without libFuzzer (gcc): it replays a starting corpus and
 * then a fixed number of deterministic mutations of it through a target's
 * LLVMFuzzerTestOneInput, so every decoder's fuzz target runs as an ordinary ctest test under
 * any build, the sanitizer builds included.
 *
 * It takes the libFuzzer options the tests use (-runs=N, -max_total_time=T,
 * -max_len=L) and any number of corpus directories or files, so CMake invokes a libFuzzer
 * binary and this driver the same way. Mutations are the classic byte-level ones (bit flips,
 * interesting integers, insertions, deletions, copies, splices between inputs), drawn from a
 * xorshift64* generator (Vigna 2016) started from -rng=K (default 1), so a failure reproduces from K
 * and the iteration number printed before each run in verbose mode (VEER_FUZZ_VERBOSE=1).
 * libFuzzer itself is the tool for long coverage-guided runs; this driver keeps the findings
 * replayed forever and catches regressions near them. */
#include <dirent.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);
int LLVMFuzzerInitialize(int *argc, char ***argv) __attribute__((weak));

typedef struct input {
    uint8_t *data;
    size_t len;
    char *name;
} input;

static input *inputs;
static size_t n_inputs, cap_inputs;
static uint64_t rng_state;

static uint64_t next_u64(void)
{
    uint64_t x = rng_state;
    x ^= x >> 12;
    x ^= x << 25;
    x ^= x >> 27;
    rng_state = x;
    return x * 0x2545F4914F6CDD1DULL;
}

static size_t below(size_t n)
{
    return n ? (size_t)(next_u64() % n) : 0;
}

static void add_file(const char *path)
{
    FILE *f = fopen(path, "rb");
    if (f == NULL)
        return;
    fseek(f, 0, SEEK_END);
    long n = ftell(f);
    fseek(f, 0, SEEK_SET);
    uint8_t *buf = malloc(n > 0 ? (size_t)n : 1);
    if (buf == NULL || (n > 0 && fread(buf, 1, (size_t)n, f) != (size_t)n)) {
        fprintf(stderr, "replay: cannot read %s\n", path);
        exit(2);
    }
    fclose(f);
    if (n_inputs == cap_inputs) {
        cap_inputs = cap_inputs ? 2 * cap_inputs : 64;
        inputs = realloc(inputs, cap_inputs * sizeof *inputs);
    }
    inputs[n_inputs++] = (input){buf, (size_t)n, strdup(path)};
}

static int by_name(const void *a, const void *b)
{
    return strcmp(((const input *)a)->name, ((const input *)b)->name);
}

static void add_path(const char *path)
{
    struct stat st;
    if (stat(path, &st) != 0)
        return;
    if (!S_ISDIR(st.st_mode)) {
        add_file(path);
        return;
    }
    DIR *d = opendir(path);
    struct dirent *e;
    size_t first = n_inputs;
    while (d != NULL && (e = readdir(d)) != NULL) {
        if (e->d_name[0] == '.')
            continue;
        char p[4096];
        snprintf(p, sizeof p, "%s/%s", path, e->d_name);
        add_file(p);
    }
    if (d != NULL)
        closedir(d);
    /* readdir order depends on the file system; sorting keeps runs reproducible. */
    if (n_inputs - first > 1)
        qsort(inputs + first, n_inputs - first, sizeof *inputs, by_name);
}

static const uint64_t INTERESTING[] = {0,
                                       1,
                                       0x7f,
                                       0x80,
                                       0xff,
                                       0x100,
                                       0x7fff,
                                       0x8000,
                                       0xffff,
                                       0x7fffffff,
                                       0x80000000u,
                                       0xffffffffu,
                                       0x7ff0000000000000ULL,
                                       0x7fc00000u,
                                       0xff800000u,
                                       0xffffffffffffffffULL};

/* Applies one to eight mutations to buf[0..*len) (capacity cap). */
static void mutate(uint8_t *buf, size_t *len, size_t cap)
{
    int n = 1 + (int)below(8);
    for (int k = 0; k < n; k++) {
        size_t l = *len;
        switch (below(9)) {
        case 0: /* flip one bit */
            if (l)
                buf[below(l)] ^= (uint8_t)(1u << below(8));
            break;
        case 1: /* random byte */
            if (l)
                buf[below(l)] = (uint8_t)next_u64();
            break;
        case 2: { /* interesting integer, 1/2/4/8 bytes, little-endian */
            size_t w = (size_t)1 << below(4);
            if (l >= w) {
                uint64_t v = INTERESTING[below(sizeof INTERESTING / sizeof *INTERESTING)];
                size_t at = below(l - w + 1);
                for (size_t i = 0; i < w; i++)
                    buf[at + i] = (uint8_t)(v >> (8 * i));
            }
            break;
        }
        case 3: { /* insert random bytes */
            size_t m = 1 + below(16);
            if (l + m <= cap) {
                size_t at = below(l + 1);
                memmove(buf + at + m, buf + at, l - at);
                for (size_t i = 0; i < m; i++)
                    buf[at + i] = (uint8_t)next_u64();
                *len = l + m;
            }
            break;
        }
        case 4: { /* delete a range */
            if (l) {
                size_t at = below(l), m = 1 + below(l - at < 32 ? l - at : 32);
                memmove(buf + at, buf + at + m, l - at - m);
                *len = l - m;
            }
            break;
        }
        case 5: { /* copy a range over another place */
            if (l > 1) {
                size_t from = below(l), to = below(l), m = 1 + below(16);
                if (from + m > l)
                    m = l - from;
                if (to + m > l)
                    m = l - to;
                memmove(buf + to, buf + from, m);
            }
            break;
        }
        case 6: { /* splice: a piece of another input inserted */
            const input *o = &inputs[below(n_inputs)];
            if (o->len) {
                size_t from = below(o->len), m = 1 + below(o->len - from);
                if (l + m <= cap) {
                    size_t at = below(l + 1);
                    memmove(buf + at + m, buf + at, l - at);
                    memcpy(buf + at, o->data + from, m);
                    *len = l + m;
                }
            }
            break;
        }
        case 7: /* truncate */
            if (l)
                *len = below(l);
            break;
        default: /* add or subtract a small number from a byte (a length or a tag) */
            if (l)
                buf[below(l)] += (uint8_t)(below(33) - 16);
            break;
        }
    }
}

int main(int argc, char **argv)
{
    long runs = 20000, max_len = 0;
    double max_time = 0;
    uint64_t rng_key = 1;
    if (LLVMFuzzerInitialize)
        LLVMFuzzerInitialize(&argc, &argv);
    for (int i = 1; i < argc; i++) {
        if (strncmp(argv[i], "-runs=", 6) == 0)
            runs = atol(argv[i] + 6);
        else if (strncmp(argv[i], "-rng=", 5) == 0)
            rng_key = strtoull(argv[i] + 5, NULL, 10);
        else if (strncmp(argv[i], "-max_total_time=", 16) == 0)
            max_time = atof(argv[i] + 16);
        else if (strncmp(argv[i], "-max_len=", 9) == 0)
            max_len = atol(argv[i] + 9);
        else if (argv[i][0] == '-')
            continue; /* other libFuzzer options mean nothing here */
        else
            add_path(argv[i]);
    }
    rng_state = rng_key ? rng_key * 0x9E3779B97F4A7C15ULL : 0x9E3779B97F4A7C15ULL;
    int verbose = getenv("VEER_FUZZ_VERBOSE") != NULL;

    /* Every corpus file first, exactly as stored: the reproducers of past findings are here. */
    for (size_t i = 0; i < n_inputs; i++) {
        if (verbose)
            fprintf(stderr, "replay: %s\n", inputs[i].name);
        LLVMFuzzerTestOneInput(inputs[i].data, inputs[i].len);
    }
    if (n_inputs == 0) {
        uint8_t empty = 0;
        LLVMFuzzerTestOneInput(&empty, 0);
        add_file("/dev/null");
    }

    size_t largest = 0;
    for (size_t i = 0; i < n_inputs; i++)
        if (inputs[i].len > largest)
            largest = inputs[i].len;
    size_t cap = max_len > 0 ? (size_t)max_len : 2 * largest + 64;
    uint8_t *buf = malloc(cap);
    struct timespec t0, t;
    clock_gettime(CLOCK_MONOTONIC, &t0);
    long done = 0;
    for (; done < runs; done++) {
        const input *base = &inputs[below(n_inputs)];
        size_t len = base->len < cap ? base->len : cap;
        memcpy(buf, base->data, len);
        mutate(buf, &len, cap);
        if (verbose)
            fprintf(stderr, "replay: mutation %ld of %s (%zu bytes)\n", done, base->name, len);
        /* The target gets its own copy of exactly len bytes, so a read past the end is a heap
         * overflow the sanitizer sees, not a read of our spare capacity. */
        uint8_t *exact = malloc(len ? len : 1);
        memcpy(exact, buf, len);
        LLVMFuzzerTestOneInput(exact, len);
        free(exact);
        if (max_time > 0 && (done & 63) == 0) {
            clock_gettime(CLOCK_MONOTONIC, &t);
            if ((double)(t.tv_sec - t0.tv_sec) + 1e-9 * (double)(t.tv_nsec - t0.tv_nsec) > max_time)
                break;
        }
    }
    clock_gettime(CLOCK_MONOTONIC, &t);
    double secs = (double)(t.tv_sec - t0.tv_sec) + 1e-9 * (double)(t.tv_nsec - t0.tv_nsec);
    printf("replay: %zu corpus inputs and %ld mutations in %.2f s, no failure\n", n_inputs, done,
           secs);
    free(buf);
    for (size_t i = 0; i < n_inputs; i++) {
        free(inputs[i].data);
        free(inputs[i].name);
    }
    free(inputs);
    return 0;
}
