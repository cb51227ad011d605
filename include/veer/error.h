/* veer error codes and error details.
 *
 * Every veer function that can fail returns 0 or one negative VEER_E* code. The codes are
 * stable: the wire protocol, the CLI's JSON output and the journal carry their numbers, so a
 * code is never renumbered or reused; new codes are appended to the list below.
 *
 * Functions that can say more take an optional `veer_error *` (NULL is allowed) and fill it
 * with the code, the name of the offending field (for example "forward.head[1].in_dim" or
 * "state[3]") and a readable message.
 */
#ifndef VEER_ERROR_H
#define VEER_ERROR_H

#include <stddef.h>

#ifdef __cplusplus
extern "C" {
#endif

/* X(name, number, text). The numbers are part of the wire protocol. */
#define VEER_ERRNO_MAP(X)                                                                  \
    X(EINVAL, 1, "invalid argument")                                                       \
    X(ENOMEM, 2, "out of memory")                                                          \
    X(EIO, 3, "input/output error")                                                        \
    X(ENOTBUNDLE, 10, "not a model bundle")                                                \
    X(EVERSION, 11, "unsupported bundle format version")                                   \
    X(ECHECKSUM, 12, "bundle checksum mismatch")                                           \
    X(EDECODE, 13, "bundle payload does not decode")                                       \
    X(EDIMCHAIN, 14, "layer dimension chain broken")                                       \
    X(ENETMISSING, 15, "network missing for the action kind")                              \
    X(ENONFINITE, 16, "non-finite value")                                                  \
    X(EBOUNDS, 17, "action bounds invalid")                                                \
    X(EREFSHAPE, 18, "reference set shape mismatch")                                       \
    X(ESTATSSIZE, 19, "statistics of the wrong size")                                      \
    X(EFIELD, 20, "field missing or out of range")                                         \
    X(EFALLBACK, 21, "fallback action invalid")                                            \
    X(EEMPTY, 30, "empty set")                                                             \
    X(EDIM, 31, "wrong dimension")                                                         \
    X(ENOSIGNAL, 32, "the task carries no signal")                                         \
    X(ETOOMANY, 33, "more samples than the configured limit")                              \
    X(ESINGULAR, 34, "covariance singular even with the ridge")                            \
    X(EBADMSG, 40, "malformed message")                                                    \
    X(EMSGTYPE, 41, "unknown message type")                                                \
    X(EMSGSIZE, 42, "message over the size limit")                                         \
    X(ENOCHANNEL, 43, "unknown channel")                                                   \
    X(ENOTASK, 44, "unknown task")                                                         \
    X(ETASKACTIVE, 45, "task is active on a channel")                                      \
    X(ENAMECONFLICT, 46, "task name already used with different content")                 \
    X(EDENIED, 47, "not authorised")                                                       \
    X(ENOTREADY, 48, "service not ready")                                                  \
    X(ETIMEDOUT, 49, "deadline passed")                                                    \
    X(EJOURNAL, 50, "journal damaged")                                                     \
    X(ECONFIG, 51, "invalid configuration")                                                \
    X(ENPY, 60, "bad .npy file")                                                           \
    X(ELOG, 61, "bad transition log")                                                      \
    X(EPROTOCOL, 62, "unsupported wire protocol version")

enum {
#define VEER__ERR_ENUM(name, num, text) VEER_##name = -(num),
    VEER_ERRNO_MAP(VEER__ERR_ENUM)
#undef VEER__ERR_ENUM
};

#define VEER_ERROR_FIELD_MAX 96
#define VEER_ERROR_MESSAGE_MAX 256

typedef struct veer_error {
    int code;                             /* 0 or a VEER_E* code */
    char field[VEER_ERROR_FIELD_MAX];     /* the offending field, "" when none applies */
    char message[VEER_ERROR_MESSAGE_MAX]; /* a sentence saying what is wrong and what to fix */
} veer_error;

/* The fixed text of a code ("unknown error" for a number that is not in the list). */
const char *veer_strerror(int code);

/* The symbolic name of a code, for example "VEER_ECHECKSUM". */
const char *veer_errname(int code);

/* Resets `err` to "no error". NULL is allowed. */
void veer_error_clear(veer_error *err);

#ifdef __cplusplus
}
#endif
#endif
