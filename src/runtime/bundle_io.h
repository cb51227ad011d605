/* Private to libveer (and to the trainer and the tests that make bundles): the bundle file
 * framing. A bundle is the 8-byte magic VEER_BUNDLE_MAGIC followed by one serialized BundleFile
 * whose payload is a serialized Model and whose checksum is BLAKE2b-256 of that payload.
 * Not installed; callers must also include the generated veer_bundle.pb-c.h. */
#ifndef VEER_RUNTIME_BUNDLE_IO_H
#define VEER_RUNTIME_BUNDLE_IO_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"
#include "veer_bundle.pb-c.h"

#define VEER__BUNDLE_MAGIC_LEN 8

/* Packs `m`, checksums it and frames it into a freshly allocated buffer (veer__malloc; the
 * caller releases it with veer__free). The model is written as given: nothing is validated,
 * so tests can write broken bundles on purpose. Returns 0, VEER_ENOMEM or VEER_EIO. */
int veer__bundle_write_model_mem(const Veer__Bundle__Model *m, uint8_t **out, size_t *out_len,
                                 veer_error *err);

/* The same, written to `path` (replaced whole: written to "<path>.tmp", then renamed, so a
 * reader never sees half a bundle). Returns 0, VEER_ENOMEM or VEER_EIO naming the path. */
int veer__bundle_write_model(const Veer__Bundle__Model *m, const char *path, veer_error *err);

/* Frames an already serialized payload with the given version and checksum (both as given, so
 * tests can forge a wrong version or checksum). `checksum` may be NULL for none. */
int veer__bundle_frame(const uint8_t *payload, size_t payload_len, uint32_t format_version,
                       const uint8_t *checksum, size_t checksum_len, uint8_t **out, size_t *out_len,
                       veer_error *err);

#endif
