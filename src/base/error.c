/* Error codes, their texts, and filling a veer_error. The table is generated from the one
 * X-macro list in include/veer/error.h so a code, its name and its text cannot drift apart. */
#include "base.h"

#include <stdarg.h>
#include <stdio.h>
#include <string.h>

const char *veer_strerror(int code)
{
    switch (code) {
    case 0:
        return "success";
#define VEER__ERR_TEXT(name, num, text)                                                    \
    case -(num):                                                                           \
        return text;
        VEER_ERRNO_MAP(VEER__ERR_TEXT)
#undef VEER__ERR_TEXT
    default:
        return "unknown error";
    }
}

const char *veer_errname(int code)
{
    switch (code) {
    case 0:
        return "VEER_OK";
#define VEER__ERR_NAME(name, num, text)                                                    \
    case -(num):                                                                           \
        return "VEER_" #name;
        VEER_ERRNO_MAP(VEER__ERR_NAME)
#undef VEER__ERR_NAME
    default:
        return "VEER_EUNKNOWN";
    }
}

void veer_error_clear(veer_error *err)
{
    if (err == NULL)
        return;
    err->code = 0;
    err->field[0] = '\0';
    err->message[0] = '\0';
}

int veer__error_set(veer_error *err, int code, const char *field, const char *fmt, ...)
{
    if (err == NULL)
        return code;
    err->code = code;
    snprintf(err->field, sizeof err->field, "%s", field ? field : "");
    if (fmt == NULL) {
        snprintf(err->message, sizeof err->message, "%s", veer_strerror(code));
    } else {
        va_list ap;
        va_start(ap, fmt);
        vsnprintf(err->message, sizeof err->message, fmt, ap);
        va_end(ap);
    }
    return code;
}
