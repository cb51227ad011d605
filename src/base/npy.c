/* .npy reading and writing (see npy.h). The header parser is a small hand-written tokenizer
 * for the one Python literal the format allows, written to refuse rather than guess: every
 * length is checked before it is read, shapes are checked for overflow, and trailing bytes
 * after the data are an error because they mean the file is not what its header says. */
#include "npy.h"

#include <errno.h>
#include <stdio.h>
#include <string.h>

#include "base.h"

static const unsigned char NPY_MAGIC[6] = {0x93, 'N', 'U', 'M', 'P', 'Y'};

const char *veer__npy_dtype_name(veer__npy_dtype dtype)
{
    switch (dtype) {
    case VEER_NPY_F32: return "float32";
    case VEER_NPY_F64: return "float64";
    case VEER_NPY_I32: return "int32";
    case VEER_NPY_I64: return "int64";
    case VEER_NPY_U8: return "uint8";
    case VEER_NPY_BOOL: return "bool";
    }
    return "unknown";
}

static const char *dtype_descr(veer__npy_dtype dtype)
{
    switch (dtype) {
    case VEER_NPY_F32: return "<f4";
    case VEER_NPY_F64: return "<f8";
    case VEER_NPY_I32: return "<i4";
    case VEER_NPY_I64: return "<i8";
    case VEER_NPY_U8: return "|u1";
    case VEER_NPY_BOOL: return "|b1";
    }
    return NULL;
}

static size_t dtype_size(veer__npy_dtype dtype)
{
    switch (dtype) {
    case VEER_NPY_F32: case VEER_NPY_I32: return 4;
    case VEER_NPY_F64: case VEER_NPY_I64: return 8;
    case VEER_NPY_U8: case VEER_NPY_BOOL: return 1;
    }
    return 0;
}

/* ---- header tokenizer ------------------------------------------------------------------ */

typedef struct cursor {
    const char *p, *end;
} cursor;

static void skip_space(cursor *c)
{
    while (c->p < c->end && (*c->p == ' ' || *c->p == '\t'))
        c->p++;
}

static int expect(cursor *c, char ch)
{
    skip_space(c);
    if (c->p >= c->end || *c->p != ch)
        return -1;
    c->p++;
    return 0;
}

/* A quoted Python string without escapes (the only kind the format's keys and descrs use). */
static int parse_string(cursor *c, char *out, size_t cap)
{
    skip_space(c);
    if (c->p >= c->end || (*c->p != '\'' && *c->p != '"'))
        return -1;
    char q = *c->p++;
    size_t n = 0;
    while (c->p < c->end && *c->p != q) {
        if (*c->p == '\\' || n + 1 >= cap)
            return -1;
        out[n++] = *c->p++;
    }
    if (c->p >= c->end)
        return -1;
    c->p++;
    out[n] = '\0';
    return 0;
}

static int parse_shape(cursor *c, veer__npy *a)
{
    if (expect(c, '(') != 0)
        return -1;
    a->ndim = 0;
    for (;;) {
        skip_space(c);
        if (c->p < c->end && *c->p == ')') {
            c->p++;
            return 0;
        }
        if (a->ndim == VEER_NPY_MAX_DIMS)
            return -1;
        if (c->p >= c->end || *c->p < '0' || *c->p > '9')
            return -1;
        uint64_t v = 0;
        while (c->p < c->end && *c->p >= '0' && *c->p <= '9') {
            if (v > (UINT64_MAX - 9) / 10)
                return -1;
            v = v * 10 + (uint64_t)(*c->p++ - '0');
        }
        if (c->p < c->end && *c->p == 'L') /* Python 2 wrote long integers with a suffix */
            c->p++;
        a->shape[a->ndim++] = v;
        skip_space(c);
        if (c->p < c->end && *c->p == ',') {
            c->p++;
        } else if (c->p < c->end && *c->p == ')') {
            /* A one-element tuple must be written "(n,)"; "(n)" is an integer, not a shape. */
            if (a->ndim == 1)
                return -1;
        } else {
            return -1;
        }
    }
}

static int parse_bool(cursor *c, int *out)
{
    skip_space(c);
    size_t left = (size_t)(c->end - c->p);
    if (left >= 4 && memcmp(c->p, "True", 4) == 0) {
        c->p += 4;
        *out = 1;
        return 0;
    }
    if (left >= 5 && memcmp(c->p, "False", 5) == 0) {
        c->p += 5;
        *out = 0;
        return 0;
    }
    return -1;
}

static int descr_to_dtype(const char *d, veer__npy_dtype *dt, int *swap)
{
    static const struct {
        const char *code;
        veer__npy_dtype dtype;
    } codes[] = {{"f4", VEER_NPY_F32}, {"f8", VEER_NPY_F64}, {"i4", VEER_NPY_I32},
                 {"i8", VEER_NPY_I64}, {"u1", VEER_NPY_U8},  {"b1", VEER_NPY_BOOL}};
    if (strlen(d) != 3)
        return -1;
    char order = d[0];
    if (order != '<' && order != '>' && order != '|' && order != '=')
        return -1;
    for (size_t i = 0; i < sizeof codes / sizeof codes[0]; i++) {
        if (strcmp(d + 1, codes[i].code) == 0) {
            size_t sz = dtype_size(codes[i].dtype);
            if (sz > 1 && order == '|')
                return -1;
            *dt = codes[i].dtype;
            *swap = (order == '>' && sz > 1);
            return 0;
        }
    }
    return -1;
}

static void byteswap(unsigned char *p, uint64_t count, size_t sz)
{
    for (uint64_t i = 0; i < count; i++, p += sz) {
        for (size_t j = 0; j < sz / 2; j++) {
            unsigned char t = p[j];
            p[j] = p[sz - 1 - j];
            p[sz - 1 - j] = t;
        }
    }
}

/* Fortran order to C order: element with multi-index (i0..ik) sits at the column-major offset
 * in `src` and at the row-major offset in `dst`. */
static void fortran_to_c(const unsigned char *src, unsigned char *dst, const veer__npy *a)
{
    uint64_t idx[VEER_NPY_MAX_DIMS] = {0};
    for (uint64_t r = 0; r < a->count; r++) {
        uint64_t off = 0, stride = 1;
        for (uint32_t k = 0; k < a->ndim; k++) {
            off += idx[k] * stride;
            stride *= a->shape[k];
        }
        memcpy(dst + r * a->itemsize, src + off * a->itemsize, a->itemsize);
        for (uint32_t k = a->ndim; k-- > 0;) { /* advance the row-major multi-index */
            if (++idx[k] < a->shape[k])
                break;
            idx[k] = 0;
        }
    }
}

int veer__npy_parse(const void *buf, size_t len, veer__npy *out, veer_error *err)
{
    memset(out, 0, sizeof *out);
    const unsigned char *b = buf;
    if (buf == NULL || len < 10 || memcmp(b, NPY_MAGIC, 6) != 0)
        return veer__error_set(err, VEER_ENPY, "magic",
                               "not a .npy file: it does not start with \\x93NUMPY");
    unsigned major = b[6], minor = b[7];
    size_t hlen, pre;
    if (major == 1) {
        hlen = (size_t)b[8] | (size_t)b[9] << 8;
        pre = 10;
    } else if (major == 2 || major == 3) {
        if (len < 12)
            return veer__error_set(err, VEER_ENPY, "header", "file ends inside the preamble");
        hlen = (size_t)b[8] | (size_t)b[9] << 8 | (size_t)b[10] << 16 | (size_t)b[11] << 24;
        pre = 12;
    } else {
        return veer__error_set(err, VEER_ENPY, "version",
                               "format version %u.%u is not supported (1.0, 2.0, 3.0 are)",
                               major, minor);
    }
    if (minor != 0)
        return veer__error_set(err, VEER_ENPY, "version",
                               "format version %u.%u is not supported (1.0, 2.0, 3.0 are)",
                               major, minor);
    if (hlen > VEER_NPY_MAX_HEADER || hlen > len - pre)
        return veer__error_set(err, VEER_ENPY, "header",
                               "header length %zu runs past the end of the file (%zu bytes)",
                               hlen, len);

    cursor c = {(const char *)b + pre, (const char *)b + pre + hlen};
    char key[32], descr[16];
    int have_descr = 0, have_order = 0, have_shape = 0, fortran = 0, swap = 0;
    veer__npy a = {0};
    if (expect(&c, '{') != 0)
        return veer__error_set(err, VEER_ENPY, "header", "header is not a dict literal");
    for (;;) {
        skip_space(&c);
        if (c.p < c.end && *c.p == '}') {
            c.p++;
            break;
        }
        if (parse_string(&c, key, sizeof key) != 0 || expect(&c, ':') != 0)
            return veer__error_set(err, VEER_ENPY, "header", "header dict has a malformed key");
        if (strcmp(key, "descr") == 0 && !have_descr) {
            if (parse_string(&c, descr, sizeof descr) != 0 ||
                descr_to_dtype(descr, &a.dtype, &swap) != 0)
                return veer__error_set(err, VEER_ENPY, "descr",
                                       "dtype is not one of float32, float64, int32, int64, "
                                       "uint8, bool (structured dtypes are not supported)");
            have_descr = 1;
        } else if (strcmp(key, "fortran_order") == 0 && !have_order) {
            if (parse_bool(&c, &fortran) != 0)
                return veer__error_set(err, VEER_ENPY, "fortran_order",
                                       "fortran_order is not True or False");
            have_order = 1;
        } else if (strcmp(key, "shape") == 0 && !have_shape) {
            if (parse_shape(&c, &a) != 0)
                return veer__error_set(err, VEER_ENPY, "shape",
                                       "shape is not a tuple of at most %d non-negative integers",
                                       VEER_NPY_MAX_DIMS);
            have_shape = 1;
        } else {
            return veer__error_set(err, VEER_ENPY, "header",
                                   "unexpected or repeated key '%s' in the header", key);
        }
        skip_space(&c);
        if (c.p < c.end && *c.p == ',')
            c.p++;
        else if (c.p >= c.end || *c.p != '}')
            return veer__error_set(err, VEER_ENPY, "header", "header dict is not closed");
    }
    while (c.p < c.end && (*c.p == ' ' || *c.p == '\n' || *c.p == '\t' || *c.p == '\r'))
        c.p++;
    if (c.p != c.end)
        return veer__error_set(err, VEER_ENPY, "header", "unexpected text after the header dict");
    if (!have_descr || !have_order || !have_shape)
        return veer__error_set(err, VEER_ENPY, !have_descr ? "descr"
                                               : !have_order ? "fortran_order" : "shape",
                               "header lacks the key");

    a.itemsize = dtype_size(a.dtype);
    a.count = 1;
    for (uint32_t k = 0; k < a.ndim; k++) {
        if (a.shape[k] != 0 && a.count > SIZE_MAX / a.itemsize / a.shape[k])
            return veer__error_set(err, VEER_ENPY, "shape", "shape is too large for memory");
        a.count *= a.shape[k];
    }
    size_t nbytes = (size_t)a.count * a.itemsize;
    size_t avail = len - pre - hlen;
    if (avail != nbytes)
        return veer__error_set(err, VEER_ENPY, "data",
                               "the header promises %zu data bytes but the file holds %zu",
                               nbytes, avail);
    a.data = veer__malloc(nbytes);
    if (a.data == NULL)
        return veer__error_set(err, VEER_ENOMEM, "data", "no memory for %zu bytes", nbytes);
    const unsigned char *src = b + pre + hlen;
    if (fortran && a.ndim > 1)
        fortran_to_c(src, a.data, &a);
    else if (nbytes > 0)
        memcpy(a.data, src, nbytes);
    if (swap)
        byteswap(a.data, a.count, a.itemsize);
    *out = a;
    return 0;
}

int veer__npy_read(const char *path, veer__npy *out, veer_error *err)
{
    memset(out, 0, sizeof *out);
    FILE *f = fopen(path, "rb");
    if (f == NULL)
        return veer__error_set(err, VEER_EIO, path, "%s: cannot open: %s", path, strerror(errno));
    int rc = 0;
    unsigned char *buf = NULL;
    long size = -1;
    if (fseek(f, 0, SEEK_END) == 0)
        size = ftell(f);
    if (size < 0 || fseek(f, 0, SEEK_SET) != 0) {
        rc = veer__error_set(err, VEER_EIO, path, "%s: cannot determine the size", path);
        goto done;
    }
    buf = veer__malloc((size_t)size);
    if (buf == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, path, "%s: no memory for %ld bytes", path, size);
        goto done;
    }
    if (size > 0 && fread(buf, 1, (size_t)size, f) != (size_t)size) {
        rc = veer__error_set(err, VEER_EIO, path, "%s: read failed", path);
        goto done;
    }
    rc = veer__npy_parse(buf, (size_t)size, out, err);
    if (rc != 0 && err != NULL) {
        /* Prefix the path so the user knows which of several log files is bad. */
        char msg[VEER_ERROR_MESSAGE_MAX];
        memcpy(msg, err->message, sizeof msg);
        size_t pl = strlen(path);
        if (pl > sizeof err->message / 2)
            pl = sizeof err->message / 2;
        memcpy(err->message, path, pl);
        memcpy(err->message + pl, ": ", 2);
        size_t room = sizeof err->message - pl - 3;
        size_t ml = strnlen(msg, room);
        memcpy(err->message + pl + 2, msg, ml);
        err->message[pl + 2 + ml] = '\0';
    }
done:
    veer__free(buf);
    fclose(f);
    return rc;
}

void veer__npy_free(veer__npy *a)
{
    if (a == NULL)
        return;
    veer__free(a->data);
    memset(a, 0, sizeof *a);
}

int veer__npy_serialize(veer__npy_dtype dtype, uint32_t ndim, const uint64_t *shape,
                        const void *data, void **buf, size_t *len, veer_error *err)
{
    const char *descr = dtype_descr(dtype);
    if (descr == NULL)
        return veer__error_set(err, VEER_EINVAL, "dtype", "unknown dtype %d", (int)dtype);
    if (ndim > VEER_NPY_MAX_DIMS)
        return veer__error_set(err, VEER_EINVAL, "shape", "more than %d dimensions",
                               VEER_NPY_MAX_DIMS);
    char dict[64 + VEER_NPY_MAX_DIMS * 24];
    int n = snprintf(dict, sizeof dict, "{'descr': '%s', 'fortran_order': False, 'shape': (",
                     descr);
    uint64_t count = 1;
    for (uint32_t k = 0; k < ndim; k++) {
        n += snprintf(dict + n, sizeof dict - (size_t)n, k ? ", %llu" : "%llu",
                      (unsigned long long)shape[k]);
        count *= shape[k];
    }
    n += snprintf(dict + n, sizeof dict - (size_t)n, "%s), }", ndim == 1 ? "," : "");
    /* numpy.save leaves room to grow the first axis in place: spaces for up to 21 digits
     * (numpy.lib.format.GROWTH_AXIS_MAX_DIGITS), then pads to 64 bytes. We do the same so
     * the bytes match numpy's. */
    size_t first_digits = 0;
    if (ndim > 0) {
        char tmp[24];
        first_digits = (size_t)snprintf(tmp, sizeof tmp, "%llu", (unsigned long long)shape[0]);
    }
    size_t grow = ndim > 0 ? 21 - first_digits : 0;
    size_t body = (size_t)n + grow + 1; /* + '\n' */
    size_t pre = 10;
    size_t total_hdr = (pre + body + 63) / 64 * 64;
    if (total_hdr - pre > 65535) {
        pre = 12;
        total_hdr = (pre + body + 63) / 64 * 64;
    }
    size_t hlen = total_hdr - pre;
    size_t nbytes = (size_t)count * dtype_size(dtype);
    unsigned char *out = veer__malloc(total_hdr + nbytes);
    if (out == NULL)
        return veer__error_set(err, VEER_ENOMEM, "data", "no memory for the .npy image");
    memcpy(out, NPY_MAGIC, 6);
    out[6] = pre == 10 ? 1 : 2;
    out[7] = 0;
    for (size_t i = 0; i < pre - 8; i++)
        out[8 + i] = (unsigned char)(hlen >> (8 * i));
    memcpy(out + pre, dict, (size_t)n);
    memset(out + pre + n, ' ', hlen - (size_t)n - 1);
    out[total_hdr - 1] = '\n';
    if (nbytes > 0)
        memcpy(out + total_hdr, data, nbytes);
    *buf = out;
    *len = total_hdr + nbytes;
    return 0;
}

int veer__npy_write(const char *path, veer__npy_dtype dtype, uint32_t ndim,
                    const uint64_t *shape, const void *data, veer_error *err)
{
    void *buf;
    size_t len;
    int rc = veer__npy_serialize(dtype, ndim, shape, data, &buf, &len, err);
    if (rc != 0)
        return rc;
    size_t plen = strlen(path) + 8;
    char *tmp = veer__malloc(plen);
    if (tmp == NULL) {
        veer__free(buf);
        return veer__error_set(err, VEER_ENOMEM, path, "no memory");
    }
    snprintf(tmp, plen, "%s.tmp", path);
    FILE *f = fopen(tmp, "wb");
    if (f == NULL) {
        rc = veer__error_set(err, VEER_EIO, path, "%s: cannot create: %s", tmp, strerror(errno));
        goto done;
    }
    int bad = fwrite(buf, 1, len, f) != len;
    bad |= fclose(f) != 0;
    if (bad || rename(tmp, path) != 0) {
        remove(tmp);
        rc = veer__error_set(err, VEER_EIO, path, "%s: write failed", path);
    }
done:
    veer__free(tmp);
    veer__free(buf);
    return rc;
}
