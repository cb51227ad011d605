/* The events socket: a ZeroMQ PUB socket on which veerd announces what changed, as two frames,
 * a topic ("veer.switch", "veer.task", "veer.drift", "veer.deadline", "veer.model") for prefix
 * subscriptions and one serialized veer.wire.Event. Publishing never blocks: a subscriber that
 * falls behind loses events (their seq numbers show the gap) rather than slowing the service.
 * Loop thread only. */
#ifndef VEER_SERVICE_EVENTS_H
#define VEER_SERVICE_EVENTS_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"

typedef struct veer__events veer__events;

/* Creates and binds the PUB socket. VEER_EIO with the reason when the bind fails. */
int veer__events_open(void *zmq_ctx, const char *endpoint, veer__events **out, veer_error *err);
void veer__events_close(veer__events *e); /* NULL allowed */

void veer__events_switched(veer__events *e, const char *channel, const char *from, const char *to,
                           uint64_t epoch);
void veer__events_task_stored(veer__events *e, const char *name, const uint8_t digest[32]);
void veer__events_task_dropped(veer__events *e, const char *name);
void veer__events_drift(veer__events *e, const char *scope, const char *statistic, const char *feature,
                        double value, uint32_t level);
/* `misses` deadline misses within `window_s` seconds; `channel` "" for the whole service. Topic
 * "veer.deadline". */
void veer__events_deadline_burst(veer__events *e, const char *channel, uint32_t misses, double window_s);
void veer__events_model_loaded(veer__events *e, const char *version, const uint8_t digest[32]);

#endif
