/* veerd's log lines: one line per event on stderr, prefixed "veerd: <level>: ", which systemd's
 * journal and a terminal both read well. Never called on the act path (formatting costs time
 * a controller does not have). */
#ifndef VEER_SERVICE_LOG_H
#define VEER_SERVICE_LOG_H

void veer__log_info(const char *fmt, ...) __attribute__((format(printf, 1, 2)));
void veer__log_warn(const char *fmt, ...) __attribute__((format(printf, 1, 2)));
void veer__log_error(const char *fmt, ...) __attribute__((format(printf, 1, 2)));

#endif
