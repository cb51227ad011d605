/* Task specifications as they arrive on the wire: checking them against the loaded model, with
 * the offending field named, and reducing them to the canonical form whose digest identifies a
 * task's content.
 *
 * Canonical form: the TaskSpec message with -0.0 written as 0.0 and goal weights that are all 1
 * written as no weights (the protocol's "1 for every goal"), serialized by protobuf-c. Its
 * packing is deterministic (fields in number order, repeated floats packed), and Python's
 * SerializeToString(deterministic=True) produces the same bytes, so a client can compute a
 * task's digest itself. The digest is BLAKE2b-256 of those bytes. Options are kept as given:
 * "the bundle's default" and an explicit value are different specifications, because the default
 * may change with the next model. */
#ifndef VEER_SERVICE_SPEC_H
#define VEER_SERVICE_SPEC_H

#include <stdint.h>

#include "veer/runtime.h"
#include "veer_wire.pb-c.h"

/* Rewrites `spec` into canonical form in place, then writes its digest. 0 or VEER_ENOMEM. */
int veer__spec_canonical(Veer__Wire__TaskSpec *spec, uint8_t digest[32], veer_error *err);

/* Checks `spec` against the model (`info`) and the limit, and fills `out` to point into it
 * (out is valid while spec lives). Errors name the field under `prefix` (e.g. "put_task.spec"):
 * VEER_EFIELD no source or a bad option, VEER_EEMPTY no samples, VEER_EDIM a length that does not
 * fit state_dim or the reference set, VEER_ETOOMANY over max_samples, VEER_ENONFINITE,
 * VEER_ENOSIGNAL all rewards or weights zero. */
int veer__spec_check(const Veer__Wire__TaskSpec *spec, const veer_model_info *info, uint32_t max_samples,
                     const char *prefix, veer_task_spec *out, veer_error *err);

/* A heap copy of `spec` (through veer__malloc), freed with veer__spec_free. NULL on no memory. */
Veer__Wire__TaskSpec *veer__spec_copy(const Veer__Wire__TaskSpec *spec);
void veer__spec_free(Veer__Wire__TaskSpec *spec);

#endif
