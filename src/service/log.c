/* stderr log lines for veerd. Each line is written with one fprintf so lines from the loop and
 * the act thread's start-up do not interleave mid-line. */
#include "service/log.h"

#include <stdarg.h>
#include <stdio.h>

static void emit(const char *level, const char *fmt, va_list ap)
{
    char line[1024];
    vsnprintf(line, sizeof line, fmt, ap);
    fprintf(stderr, "veerd: %s: %s\n", level, line);
}

void veer__log_info(const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    emit("info", fmt, ap);
    va_end(ap);
}

void veer__log_warn(const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    emit("warning", fmt, ap);
    va_end(ap);
}

void veer__log_error(const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    emit("error", fmt, ap);
    va_end(ap);
}
