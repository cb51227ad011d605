/* The .npy reader and writer against files NumPy 1.24's numpy.save wrote
 * (tests/train/data/make_npy_fixtures.py; format reference: numpy.lib.format, NEP 1), and a
 * fuzz-style robustness test: thousands of corrupted headers and truncations must each give
 * VEER_ENPY (never a crash, never a silently different array). */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "base/base.h"
#include "base/npy.h"

#ifndef VEER_TEST_DATA
#error "VEER_TEST_DATA must name tests/train/data"
#endif

static void path_of(char *out, size_t cap, const char *name)
{
    snprintf(out, cap, "%s/%s", VEER_TEST_DATA, name);
}

static unsigned char *slurp(const char *name, size_t *len)
{
    char p[512];
    path_of(p, sizeof p, name);
    FILE *f = fopen(p, "rb");
    assert_non_null(f);
    fseek(f, 0, SEEK_END);
    long n = ftell(f);
    fseek(f, 0, SEEK_SET);
    unsigned char *b = malloc((size_t)n);
    assert_int_equal(fread(b, 1, (size_t)n, f), (size_t)n);
    fclose(f);
    *len = (size_t)n;
    return b;
}

static void read_fixture(const char *name, veer__npy *a)
{
    char p[512];
    path_of(p, sizeof p, name);
    veer_error err;
    int rc = veer__npy_read(p, a, &err);
    if (rc != 0)
        fail_msg("%s: %s", p, err.message);
}

static void test_read_f32(void **state)
{
    (void)state;
    const char *names[] = {"f32_3x4.npy", "v2_f32_3x4.npy"};
    for (int k = 0; k < 2; k++) {
        veer__npy a;
        read_fixture(names[k], &a);
        assert_int_equal(a.dtype, VEER_NPY_F32);
        assert_int_equal(a.ndim, 2);
        assert_int_equal(a.shape[0], 3);
        assert_int_equal(a.shape[1], 4);
        const float *v = a.data;
        for (int i = 0; i < 12; i++)
            assert_true(v[i] == 0.25f * (float)i - 1.0f); /* exact in binary */
        veer__npy_free(&a);
    }
}

static void test_read_other_dtypes(void **state)
{
    (void)state;
    veer__npy a;
    read_fixture("f64_5.npy", &a);
    assert_int_equal(a.dtype, VEER_NPY_F64);
    assert_int_equal(a.ndim, 1);
    assert_int_equal(a.shape[0], 5);
    for (int i = 0; i < 5; i++)
        assert_true(((double *)a.data)[i] == -1.0 + 0.5 * i);
    veer__npy_free(&a);

    read_fixture("i64_2x3.npy", &a);
    assert_int_equal(a.dtype, VEER_NPY_I64);
    for (int i = 0; i < 6; i++)
        assert_int_equal(((int64_t *)a.data)[i], i - 3);
    veer__npy_free(&a);

    read_fixture("i32_3.npy", &a);
    assert_int_equal(a.dtype, VEER_NPY_I32);
    assert_int_equal(((int32_t *)a.data)[1], -8);
    veer__npy_free(&a);

    read_fixture("bool_3.npy", &a);
    assert_int_equal(a.dtype, VEER_NPY_BOOL);
    assert_memory_equal(a.data, ((unsigned char[]){1, 0, 1}), 3);
    veer__npy_free(&a);

    read_fixture("u8_3.npy", &a);
    assert_int_equal(a.dtype, VEER_NPY_U8);
    assert_memory_equal(a.data, ((unsigned char[]){0, 200, 255}), 3);
    veer__npy_free(&a);
}

static void test_read_converted(void **state)
{
    (void)state;
    veer__npy a;
    read_fixture("be_f4_2x2.npy", &a);
    const float want[4] = {1.5f, -2.0f, 3.25f, 0.001f};
    assert_memory_equal(a.data, want, sizeof want);
    veer__npy_free(&a);

    read_fixture("fortran_f4_2x3.npy", &a);
    assert_int_equal(a.shape[0], 2);
    assert_int_equal(a.shape[1], 3);
    for (int i = 0; i < 6; i++)
        assert_true(((float *)a.data)[i] == (float)i); /* back in C order */
    veer__npy_free(&a);

    read_fixture("scalar_f4.npy", &a);
    assert_int_equal(a.ndim, 0);
    assert_int_equal(a.count, 1);
    assert_true(((float *)a.data)[0] == 7.5f);
    veer__npy_free(&a);

    read_fixture("empty_f4_0x3.npy", &a);
    assert_int_equal(a.ndim, 2);
    assert_int_equal(a.count, 0);
    veer__npy_free(&a);
}

static void test_struct_refused(void **state)
{
    (void)state;
    char p[512];
    path_of(p, sizeof p, "struct.npy");
    veer__npy a;
    veer_error err;
    assert_int_equal(veer__npy_read(p, &a, &err), VEER_ENPY);
    assert_string_equal(err.field, "descr");
    assert_non_null(strstr(err.message, "struct.npy"));
    assert_null(a.data);
    path_of(p, sizeof p, "no_such_file.npy");
    assert_int_equal(veer__npy_read(p, &a, &err), VEER_EIO);
}

/* Our writer must produce exactly numpy.save's bytes for the same array. */
static void expect_same_bytes(const char *fixture, veer__npy_dtype dt, uint32_t ndim,
                              const uint64_t *shape, const void *data)
{
    size_t flen;
    unsigned char *want = slurp(fixture, &flen);
    void *got;
    size_t glen;
    assert_int_equal(veer__npy_serialize(dt, ndim, shape, data, &got, &glen, NULL), 0);
    if (glen != flen || memcmp(got, want, flen) != 0)
        fail_msg("%s: our bytes (%zu) differ from numpy.save's (%zu)", fixture, glen, flen);
    veer__free(got);
    free(want);
}

static void test_write_matches_numpy(void **state)
{
    (void)state;
    float f[12];
    for (int i = 0; i < 12; i++)
        f[i] = 0.25f * (float)i - 1.0f;
    expect_same_bytes("f32_3x4.npy", VEER_NPY_F32, 2, (uint64_t[]){3, 4}, f);
    double d[5] = {-1, -0.5, 0, 0.5, 1};
    expect_same_bytes("f64_5.npy", VEER_NPY_F64, 1, (uint64_t[]){5}, d);
    int64_t q[6] = {-3, -2, -1, 0, 1, 2};
    expect_same_bytes("i64_2x3.npy", VEER_NPY_I64, 2, (uint64_t[]){2, 3}, q);
    float s = 7.5f;
    expect_same_bytes("scalar_f4.npy", VEER_NPY_F32, 0, NULL, &s);
    expect_same_bytes("empty_f4_0x3.npy", VEER_NPY_F32, 2, (uint64_t[]){0, 3}, NULL);
    unsigned char u[3] = {0, 200, 255};
    expect_same_bytes("u8_3.npy", VEER_NPY_U8, 1, (uint64_t[]){3}, u);
}

static void test_write_read_file(void **state)
{
    (void)state;
    char p[] = "/tmp/veer_test_npy_XXXXXX";
    int fd = mkstemp(p);
    assert_true(fd >= 0);
    float v[6] = {1, 2, 3, 4, 5, 6};
    assert_int_equal(veer__npy_write(p, VEER_NPY_F32, 2, (uint64_t[]){3, 2}, v, NULL), 0);
    veer__npy a;
    assert_int_equal(veer__npy_read(p, &a, NULL), 0);
    assert_int_equal(a.shape[0], 3);
    assert_memory_equal(a.data, v, sizeof v);
    veer__npy_free(&a);
    remove(p);
}

/* Hand-made bad headers, each naming what is wrong. */
static int parse_header(const char *dict, size_t data_bytes, veer_error *err)
{
    unsigned char buf[512] = {0x93, 'N', 'U', 'M', 'P', 'Y', 1, 0};
    size_t n = strlen(dict);
    buf[8] = (unsigned char)n;
    buf[9] = 0;
    memcpy(buf + 10, dict, n);
    veer__npy a;
    int rc = veer__npy_parse(buf, 10 + n + data_bytes, &a, err);
    veer__npy_free(&a);
    return rc;
}

static void test_bad_headers(void **state)
{
    (void)state;
    static const struct {
        const char *dict;
        size_t data;
        const char *field;
    } cases[] = {
        {"{'descr': '<f2', 'fortran_order': False, 'shape': (2,), }\n", 4, "descr"},
        {"{'descr': '|f4', 'fortran_order': False, 'shape': (2,), }\n", 8, "descr"},
        {"{'descr': '<f4', 'fortran_order': Maybe, 'shape': (2,), }\n", 8, "fortran_order"},
        {"{'descr': '<f4', 'fortran_order': False, 'shape': (2), }\n", 8, "shape"},
        {"{'descr': '<f4', 'fortran_order': False, 'shape': (-2,), }\n", 8, "shape"},
        {"{'descr': '<f4', 'fortran_order': False, 'shape': (1,2,3,4,5,6,7,8,9), }\n", 0,
         "shape"},
        {"{'descr': '<f4', 'fortran_order': False, 'shape': (99999999999, 99999999999), }\n", 0,
         "shape"},
        {"{'descr': '<f4', 'fortran_order': False, }\n", 8, "shape"},
        {"{'descr': '<f4', 'descr': '<f4', 'shape': (2,), }\n", 8, "header"},
        {"{'descr': '<f4', 'fortran_order': False, 'shape': (2,), 'extra': 1}\n", 8, "header"},
        {"{'descr': '<f4', 'fortran_order': False, 'shape': (2,) \n", 8, "header"},
        {"{'descr': '<f4', 'fortran_order': False, 'shape': (2,), } junk\n", 8, "header"},
        {"['descr']\n", 0, "header"},
        {"{'descr': '<f4', 'fortran_order': False, 'shape': (3,), }\n", 8, "data"},
        {"{'descr': '<f4', 'fortran_order': False, 'shape': (1,), }\n", 8, "data"},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        veer_error err;
        int rc = parse_header(cases[i].dict, cases[i].data, &err);
        if (rc != VEER_ENPY || strcmp(err.field, cases[i].field) != 0)
            fail_msg("case %zu: rc %d field '%s' (want ENPY '%s'): %s", i, rc, err.field,
                     cases[i].field, err.message);
    }
    veer_error err;
    veer__npy a;
    unsigned char v9[16] = {0x93, 'N', 'U', 'M', 'P', 'Y', 9, 0, 0, 0};
    assert_int_equal(veer__npy_parse(v9, sizeof v9, &a, &err), VEER_ENPY);
    assert_string_equal(err.field, "version");
    assert_int_equal(veer__npy_parse("PK\3\4 not numpy", 15, &a, &err), VEER_ENPY);
    assert_string_equal(err.field, "magic");
}

/* Fuzz-style: every truncation of a valid file, and 20,000 deterministic random byte
 * mutations of its header. Each result must be either VEER_ENPY or an array whose size agrees
 * with its shape; under the Sanitize build, ASan checks no read strays outside the buffer. */
static uint64_t rng_state = 0x9E3779B97F4A7C15ull;
static uint64_t xorshift(void)
{
    rng_state ^= rng_state << 13;
    rng_state ^= rng_state >> 7;
    rng_state ^= rng_state << 17;
    return rng_state;
}

static void test_fuzz_headers(void **state)
{
    (void)state;
    size_t len;
    unsigned char *good = slurp("f32_3x4.npy", &len);
    for (size_t cut = 0; cut < len; cut++) {
        unsigned char *b = malloc(cut ? cut : 1);
        memcpy(b, good, cut);
        veer__npy a;
        assert_int_equal(veer__npy_parse(b, cut, &a, NULL), VEER_ENPY);
        assert_null(a.data);
        free(b);
    }
    static const char alphabet[] = "{}()':, 0123456789<>|fiub'TrueFalse\n\x93\xff";
    size_t accepted = 0;
    for (int it = 0; it < 20000; it++) {
        unsigned char *b = malloc(len);
        memcpy(b, good, len);
        int nmut = 1 + (int)(xorshift() % 4);
        for (int m = 0; m < nmut; m++) {
            size_t pos = (size_t)(xorshift() % 128); /* the preamble and header */
            b[pos] = (xorshift() & 1) ? (unsigned char)xorshift()
                                      : (unsigned char)alphabet[xorshift() % (sizeof alphabet - 1)];
        }
        veer__npy a;
        int rc = veer__npy_parse(b, len, &a, NULL);
        if (rc == 0) {
            accepted++;
            assert_int_equal(a.count * a.itemsize, len - 128);
            veer__npy_free(&a);
        } else {
            assert_true(rc == VEER_ENPY || rc == VEER_ENOMEM);
            assert_null(a.data);
        }
        free(b);
    }
    /* Mutations of padding spaces are harmless, so some must be accepted. */
    assert_true(accepted > 0);
    free(good);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_read_f32),        cmocka_unit_test(test_read_other_dtypes),
        cmocka_unit_test(test_read_converted),  cmocka_unit_test(test_struct_refused),
        cmocka_unit_test(test_write_matches_numpy), cmocka_unit_test(test_write_read_file),
        cmocka_unit_test(test_bad_headers),     cmocka_unit_test(test_fuzz_headers),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
