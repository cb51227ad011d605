/* Trainer checkpoints: a flat binary file holding everything a resumed run needs to continue
 * as if it had never stopped (parameters, targets, Adam moments and step counts, the random
 * generator, the step) plus a caller blob (the training curve so far).
 *
 * Layout, little-endian as the machine writes it (checkpoints are not meant to move between
 * machines): "VEERCKP1", u32 version 1, u32 fingerprint length + bytes, u64 step, 4 x u64
 * generator state, then per array u64 count + floats, per optimiser u64 t, then u64 blob
 * length + blob, and a BLAKE2b-256 of everything before it, so a torn or edited file is refused
 * rather than half-loaded. Written to "<path>.tmp" and renamed. */
#include <errno.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "train/train.h"

#define CKPT_MAGIC "VEERCKP1"

typedef struct wbuf {
    unsigned char *p;
    size_t len, cap;
    int oom;
} wbuf;

static void put(wbuf *w, const void *data, size_t n)
{
    if (w->oom)
        return;
    if (w->len + n > w->cap) {
        size_t cap = w->cap ? w->cap : 4096;
        while (cap < w->len + n)
            cap *= 2;
        unsigned char *p = veer__realloc(w->p, cap);
        if (p == NULL) {
            w->oom = 1;
            return;
        }
        w->p = p;
        w->cap = cap;
    }
    memcpy(w->p + w->len, data, n);
    w->len += n;
}

static void put_u64(wbuf *w, uint64_t v) { put(w, &v, sizeof v); }

static void put_floats(wbuf *w, const float *x, size_t n)
{
    put_u64(w, n);
    put(w, x, n * sizeof(float));
}

/* The arrays in file order; `each` is called with each and its length. */
#define FOR_EACH_ARRAY(t, X)                                                                   \
    do {                                                                                       \
        for (uint32_t h_ = 0; h_ < (t)->heads; h_++) {                                         \
            X((t)->f[h_]->params, (t)->f[h_]->nparams);                                        \
            X((t)->ft[h_]->params, (t)->ft[h_]->nparams);                                      \
            X((t)->opt_f[h_].m, (t)->opt_f[h_].n);                                             \
            X((t)->opt_f[h_].v, (t)->opt_f[h_].n);                                             \
        }                                                                                      \
        X((t)->b->params, (t)->b->nparams);                                                    \
        X((t)->bt->params, (t)->bt->nparams);                                                  \
        X((t)->opt_b.m, (t)->opt_b.n);                                                         \
        X((t)->opt_b.v, (t)->opt_b.n);                                                         \
        if ((t)->actor) {                                                                      \
            X((t)->actor->params, (t)->actor->nparams);                                        \
            X((t)->opt_actor.m, (t)->opt_actor.n);                                             \
            X((t)->opt_actor.v, (t)->opt_actor.n);                                             \
        }                                                                                      \
        if ((t)->ba) { /* --average: present exactly when the fingerprint says so */         \
            for (uint32_t h_ = 0; h_ < (t)->heads; h_++)                                       \
                X((t)->fa[h_]->params, (t)->fa[h_]->nparams);                                  \
            X((t)->ba->params, (t)->ba->nparams);                                              \
            if ((t)->aa)                                                                       \
                X((t)->aa->params, (t)->aa->nparams);                                          \
        }                                                                                      \
    } while (0)

int veer__trainer_save(const veer__trainer *t, const char *path, const char *fp,
                       const void *extra, size_t extra_len, veer_error *err)
{
    wbuf w = {0};
    uint32_t v = 1, fl = (uint32_t)strlen(fp);
    put(&w, CKPT_MAGIC, 8);
    put(&w, &v, 4);
    put(&w, &fl, 4);
    put(&w, fp, fl);
    put_u64(&w, t->step);
    put(&w, t->rng.s, sizeof t->rng.s);
#define PUT(ptr, count) put_floats(&w, (ptr), (count))
    FOR_EACH_ARRAY(t, PUT);
#undef PUT
    for (uint32_t h = 0; h < t->heads; h++)
        put_u64(&w, t->opt_f[h].t);
    put_u64(&w, t->opt_b.t);
    put_u64(&w, t->actor ? t->opt_actor.t : 0);
    put_u64(&w, extra_len);
    put(&w, extra, extra_len);
    uint8_t dig[VEER_DIGEST_BYTES];
    if (!w.oom && veer__digest(w.p, w.len, dig) == 0)
        put(&w, dig, sizeof dig);
    if (w.oom) {
        veer__free(w.p);
        return veer__error_set(err, VEER_ENOMEM, "checkpoint", "no memory for the checkpoint");
    }
    char tmp[4096];
    snprintf(tmp, sizeof tmp, "%s.tmp", path);
    FILE *f = fopen(tmp, "wb");
    int rc = 0;
    if (f == NULL) {
        rc = veer__error_set(err, VEER_EIO, "--checkpoint", "%.200s: cannot create: %s", tmp,
                             strerror(errno));
    } else {
        int bad = fwrite(w.p, 1, w.len, f) != w.len;
        bad |= fclose(f) != 0;
        if (bad || rename(tmp, path) != 0) {
            remove(tmp);
            rc = veer__error_set(err, VEER_EIO, "--checkpoint", "%.200s: write failed", path);
        }
    }
    veer__free(w.p);
    return rc;
}

typedef struct rbuf {
    const unsigned char *p;
    size_t len, at;
    int bad;
} rbuf;

static void get(rbuf *r, void *out, size_t n)
{
    if (r->bad || n > r->len - r->at) {
        r->bad = 1;
        memset(out, 0, n);
        return;
    }
    memcpy(out, r->p + r->at, n);
    r->at += n;
}

static uint64_t get_u64(rbuf *r)
{
    uint64_t v;
    get(r, &v, sizeof v);
    return v;
}

static void get_floats(rbuf *r, float *x, size_t n)
{
    if (get_u64(r) != n) {
        r->bad = 1;
        return;
    }
    get(r, x, n * sizeof(float));
}

int veer__trainer_load(veer__trainer *t, const char *path, const char *fp, void **extra,
                       size_t *extra_len, veer_error *err)
{
    *extra = NULL;
    *extra_len = 0;
    FILE *f = fopen(path, "rb");
    if (f == NULL)
        return veer__error_set(err, VEER_EIO, "--checkpoint", "%.200s: cannot open: %s", path,
                               strerror(errno));
    long size = -1;
    if (fseek(f, 0, SEEK_END) == 0)
        size = ftell(f);
    unsigned char *buf = size > 0 ? veer__malloc((size_t)size) : NULL;
    int ok = buf != NULL && fseek(f, 0, SEEK_SET) == 0 &&
             fread(buf, 1, (size_t)size, f) == (size_t)size;
    fclose(f);
    int rc = 0;
    uint8_t dig[VEER_DIGEST_BYTES];
    if (!ok || (size_t)size < 8 + VEER_DIGEST_BYTES || memcmp(buf, CKPT_MAGIC, 8) != 0 ||
        veer__digest(buf, (size_t)size - VEER_DIGEST_BYTES, dig) != 0 ||
        memcmp(dig, buf + size - VEER_DIGEST_BYTES, VEER_DIGEST_BYTES) != 0) {
        rc = veer__error_set(err, VEER_ECONFIG, "--checkpoint",
                             "%.200s is not a complete veer checkpoint (damaged or truncated); "
                             "delete it to start afresh", path);
        goto done;
    }
    rbuf r = {buf, (size_t)size - VEER_DIGEST_BYTES, 8, 0};
    uint32_t v, fl;
    get(&r, &v, 4);
    get(&r, &fl, 4);
    if (v != 1 || fl != strlen(fp) || fl > r.len - r.at || memcmp(r.p + r.at, fp, fl) != 0) {
        rc = veer__error_set(err, VEER_ECONFIG, "--checkpoint",
                             "%.200s was written for another log or configuration; delete it "
                             "or pass another --checkpoint path", path);
        goto done;
    }
    r.at += fl;
    t->step = get_u64(&r);
    get(&r, t->rng.s, sizeof t->rng.s);
#define GET(ptr, count) get_floats(&r, (ptr), (count))
    FOR_EACH_ARRAY(t, GET);
#undef GET
    for (uint32_t h = 0; h < t->heads; h++)
        t->opt_f[h].t = get_u64(&r);
    t->opt_b.t = get_u64(&r);
    uint64_t at = get_u64(&r);
    if (t->actor)
        t->opt_actor.t = at;
    uint64_t el = get_u64(&r);
    if (!r.bad && el <= r.len - r.at) {
        *extra = veer__malloc(el + 1);
        if (*extra == NULL) {
            rc = veer__error_set(err, VEER_ENOMEM, "--checkpoint", NULL);
            goto done;
        }
        get(&r, *extra, el);
        ((char *)*extra)[el] = '\0';
        *extra_len = el;
    } else {
        r.bad = 1;
    }
    if (r.bad || r.at != r.len) {
        veer__free(*extra);
        *extra = NULL;
        rc = veer__error_set(err, VEER_ECONFIG, "--checkpoint",
                             "%.200s does not match the networks of this configuration", path);
    }
done:
    veer__free(buf);
    return rc;
}
