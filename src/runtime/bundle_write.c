/* Writing model bundles: pack the Model, checksum the packed bytes, wrap them in a BundleFile
 * and put the magic in front. The checksum covers the exact payload bytes (not a re-encoding),
 * so a reader can verify the file before decoding anything it contains. Writing to a file goes
 * through a temporary name and rename(2) so a service watching the path never reads a torn
 * bundle. */
#include "runtime/bundle_io.h"

#include <errno.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "veer/runtime.h"

int veer__bundle_frame(const uint8_t *payload, size_t payload_len, uint32_t format_version,
                       const uint8_t *checksum, size_t checksum_len, uint8_t **out, size_t *out_len,
                       veer_error *err)
{
    Veer__Bundle__BundleFile file = VEER__BUNDLE__BUNDLE_FILE__INIT;
    file.format_version = format_version;
    file.checksum.data = (uint8_t *)checksum;
    file.checksum.len = checksum != NULL ? checksum_len : 0;
    file.payload.data = (uint8_t *)payload;
    file.payload.len = payload_len;

    size_t body = veer__bundle__bundle_file__get_packed_size(&file);
    uint8_t *buf = veer__malloc(VEER__BUNDLE_MAGIC_LEN + body);
    if (buf == NULL)
        return veer__error_set(err, VEER_ENOMEM, "bundle", "no memory for a %zu-byte bundle",
                               VEER__BUNDLE_MAGIC_LEN + body);
    memcpy(buf, VEER_BUNDLE_MAGIC, VEER__BUNDLE_MAGIC_LEN);
    veer__bundle__bundle_file__pack(&file, buf + VEER__BUNDLE_MAGIC_LEN);
    *out = buf;
    *out_len = VEER__BUNDLE_MAGIC_LEN + body;
    return 0;
}

int veer__bundle_write_model_mem(const Veer__Bundle__Model *m, uint8_t **out, size_t *out_len,
                                 veer_error *err)
{
    size_t n = veer__bundle__model__get_packed_size(m);
    uint8_t *payload = veer__malloc(n);
    if (payload == NULL)
        return veer__error_set(err, VEER_ENOMEM, "payload", "no memory for a %zu-byte model", n);
    veer__bundle__model__pack(m, payload);

    uint8_t digest[VEER_DIGEST_BYTES];
    int rc = veer__digest(payload, n, digest);
    if (rc != 0) {
        veer__error_set(err, rc, "checksum", "libsodium failed to initialise");
        goto done;
    }
    rc = veer__bundle_frame(payload, n, VEER_BUNDLE_FORMAT_VERSION, digest, sizeof digest, out,
                            out_len, err);
done:
    veer__free(payload);
    return rc;
}

int veer__bundle_write_model(const Veer__Bundle__Model *m, const char *path, veer_error *err)
{
    uint8_t *buf = NULL;
    size_t len = 0;
    int rc = veer__bundle_write_model_mem(m, &buf, &len, err);
    if (rc != 0)
        return rc;

    size_t plen = strlen(path);
    char *tmp = veer__malloc(plen + 5);
    if (tmp == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, "path", "no memory for the temporary name");
        goto fail_tmp;
    }
    memcpy(tmp, path, plen);
    memcpy(tmp + plen, ".tmp", 5);

    FILE *f = fopen(tmp, "wb");
    if (f == NULL) {
        rc = veer__error_set(err, VEER_EIO, "path", "cannot create %s: %s", tmp, strerror(errno));
        goto fail_open;
    }
    int ok = fwrite(buf, 1, len, f) == len;
    ok = (fflush(f) == 0) && ok;
    ok = (fclose(f) == 0) && ok;
    if (!ok) {
        rc = veer__error_set(err, VEER_EIO, "path", "cannot write %s: %s", tmp, strerror(errno));
        remove(tmp);
        goto fail_open;
    }
    if (rename(tmp, path) != 0) {
        rc = veer__error_set(err, VEER_EIO, "path", "cannot rename %s to %s: %s", tmp, path,
                             strerror(errno));
        remove(tmp);
    }
fail_open:
    veer__free(tmp);
fail_tmp:
    veer__free(buf);
    return rc;
}
