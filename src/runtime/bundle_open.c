/* Opening and closing bundles: the file framing and integrity checks, in the order that lets
 * a damaged or foreign file be refused before any of its content is trusted: magic, then the
 * BundleFile frame, then the format version, then the BLAKE2b-256 checksum of the payload, and
 * only then the Model is decoded, checked (bundle_check.c) and copied into the runtime's own
 * aligned structures (bundle_build.c). The decoded protobuf is freed before returning, so an
 * open bundle holds the weights once. protobuf-c allocates through veer's hook too, so a test
 * failing the Nth allocation covers the decoder as well. */
#include <errno.h>
#include <stdio.h>
#include <string.h>
#include <sys/stat.h>

#include "base/base.h"
#include "runtime/bundle.h"
#include "runtime/bundle_io.h"

/* protobuf-c's allocator interface over veer's hook; it remembers a failed allocation so an
 * unpack that fails for lack of memory reports VEER_ENOMEM rather than "does not decode". */
typedef struct pb_alloc_state {
    int failed;
} pb_alloc_state;

static void *pb_alloc(void *data, size_t n)
{
    void *p = veer__malloc(n);
    if (p == NULL)
        ((pb_alloc_state *)data)->failed = 1;
    return p;
}

static void pb_free(void *data, void *p)
{
    (void)data;
    veer__free(p);
}

static void free_blocks(struct veer_bundle *b)
{
    void *block = b->blocks;
    while (block != NULL) {
        void *next = *(void **)block;
        veer__free_aligned(block);
        block = next;
    }
}

void veer_bundle_close(veer_bundle *bundle)
{
    if (bundle == NULL)
        return;
    free_blocks(bundle);
    veer__free(bundle);
}

/* Decodes the checked payload and builds the bundle. */
static int load_model(const uint8_t *payload, size_t len, const uint8_t digest[32],
                      veer_bundle **out, veer_error *err)
{
    pb_alloc_state st = {0};
    ProtobufCAllocator pa = {pb_alloc, pb_free, &st};
    Veer__Bundle__Model *m = veer__bundle__model__unpack(&pa, len, payload);
    if (m == NULL) {
        if (st.failed)
            return veer__error_set(err, VEER_ENOMEM, "payload", "no memory to decode the model");
        return veer__error_set(err, VEER_EDECODE, "payload",
                               "the payload passed its checksum but is not a Model message; "
                               "was it written for another schema?");
    }
    int rc = veer__bundle_check(m, err);
    if (rc != 0)
        goto fail_check;

    veer_bundle *b = veer__calloc(1, sizeof *b);
    if (b == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, "bundle", NULL);
        goto fail_check;
    }
    memcpy(b->digest, digest, sizeof b->digest);
    rc = veer__bundle_build(b, m, err);
    if (rc != 0) {
        veer_bundle_close(b);
        goto fail_check;
    }
    *out = b;
fail_check:
    veer__bundle__model__free_unpacked(m, &pa);
    return rc;
}

int veer_bundle_open_mem(const void *data, size_t len, veer_bundle **out, veer_error *err)
{
    const uint8_t *bytes = data;
    veer_error_clear(err);
    if (out == NULL)
        return veer__error_set(err, VEER_EINVAL, "out", "out must not be NULL");
    *out = NULL;
    if (data == NULL && len > 0)
        return veer__error_set(err, VEER_EINVAL, "data", "data is NULL");
    if (len < VEER__BUNDLE_MAGIC_LEN ||
        memcmp(bytes, VEER_BUNDLE_MAGIC, VEER__BUNDLE_MAGIC_LEN) != 0)
        return veer__error_set(err, VEER_ENOTBUNDLE, "magic",
                               "the data does not start with \"%s\": not a model bundle",
                               VEER_BUNDLE_MAGIC);

    pb_alloc_state st = {0};
    ProtobufCAllocator pa = {pb_alloc, pb_free, &st};
    Veer__Bundle__BundleFile *file = veer__bundle__bundle_file__unpack(
        &pa, len - VEER__BUNDLE_MAGIC_LEN, bytes + VEER__BUNDLE_MAGIC_LEN);
    if (file == NULL) {
        if (st.failed)
            return veer__error_set(err, VEER_ENOMEM, "bundle", "no memory to read the bundle");
        return veer__error_set(err, VEER_ENOTBUNDLE, "bundle_file",
                               "the bytes after the magic are not a bundle frame (a truncated "
                               "or damaged file?)");
    }

    int rc;
    uint8_t digest[VEER_DIGEST_BYTES];
    if (file->format_version != VEER_BUNDLE_FORMAT_VERSION) {
        rc = veer__error_set(err, VEER_EVERSION, "format_version",
                             "the bundle has format version %u; this runtime reads version %d",
                             file->format_version, VEER_BUNDLE_FORMAT_VERSION);
        goto done;
    }
    if ((rc = veer__digest(file->payload.data, file->payload.len, digest)) != 0) {
        veer__error_set(err, rc, "checksum", "libsodium failed to initialise");
        goto done;
    }
    if (file->checksum.len != VEER_DIGEST_BYTES ||
        memcmp(file->checksum.data, digest, VEER_DIGEST_BYTES) != 0) {
        rc = veer__error_set(err, VEER_ECHECKSUM, "checksum",
                             file->checksum.len != VEER_DIGEST_BYTES
                                 ? "the checksum has %zu bytes; a BLAKE2b-256 digest has 32"
                                 : "the payload's BLAKE2b-256 digest does not match the "
                                   "checksum (%zu bytes): the file is damaged",
                             file->checksum.len);
        goto done;
    }
    rc = load_model(file->payload.data, file->payload.len, digest, out, err);
done:
    veer__bundle__bundle_file__free_unpacked(file, &pa);
    return rc;
}

int veer_bundle_open(const char *path, veer_bundle **out, veer_error *err)
{
    if (out == NULL)
        return veer__error_set(err, VEER_EINVAL, "out", "out must not be NULL");
    *out = NULL;
    if (path == NULL)
        return veer__error_set(err, VEER_EINVAL, "path", "path is NULL");
    FILE *f = fopen(path, "rb");
    if (f == NULL)
        return veer__error_set(err, VEER_EIO, "path", "cannot open %s: %s", path, strerror(errno));
    int rc;
    struct stat sb;
    if (fstat(fileno(f), &sb) != 0 || !S_ISREG(sb.st_mode)) {
        rc = veer__error_set(err, VEER_EIO, "path", "%s is not a regular file", path);
        goto fail_stat;
    }
    size_t len = (size_t)sb.st_size;
    uint8_t *buf = veer__malloc(len);
    if (buf == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, "path", "no memory to read %zu bytes of %s", len,
                             path);
        goto fail_stat;
    }
    if (fread(buf, 1, len, f) != len) {
        rc = veer__error_set(err, VEER_EIO, "path", "cannot read %s", path);
        goto fail_read;
    }
    rc = veer_bundle_open_mem(buf, len, out, err);
fail_read:
    veer__free(buf);
fail_stat:
    fclose(f);
    return rc;
}

const veer_model_info *veer_bundle_info(const veer_bundle *bundle)
{
    return &bundle->info;
}

size_t veer_bundle_memory(const veer_bundle *bundle)
{
    return bundle->memory + sizeof *bundle;
}
