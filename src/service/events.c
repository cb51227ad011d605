/* Publishing veerd's events (see events.h). Events are rare (supervisor rates), so each is
 * packed into a heap buffer; the act path never publishes. */
#include "service/events.h"

#include <errno.h>
#include <string.h>
#include <time.h>
#include <zmq.h>

#include "base/base.h"
#include "veer_wire.pb-c.h"

struct veer__events {
    void *socket;
    uint64_t seq;
};

int veer__events_open(void *zmq_ctx, const char *endpoint, veer__events **out, veer_error *err)
{
    veer__events *e = veer__calloc(1, sizeof *e);
    if (e == NULL)
        return veer__error_set(err, VEER_ENOMEM, "--events", NULL);
    e->socket = zmq_socket(zmq_ctx, ZMQ_PUB);
    int linger = 0, one = 1;
    if (e->socket != NULL) {
        zmq_setsockopt(e->socket, ZMQ_LINGER, &linger, sizeof linger);
        if (strchr(endpoint, '[') != NULL)
            zmq_setsockopt(e->socket, ZMQ_IPV6, &one, sizeof one);
    }
    if (e->socket == NULL || zmq_bind(e->socket, endpoint) != 0) {
        int rc = veer__error_set(err, VEER_EIO, "--events", "cannot bind the events socket to '%s': %s", endpoint,
                                 zmq_strerror(errno));
        if (e->socket != NULL)
            zmq_close(e->socket);
        veer__free(e);
        return rc;
    }
    *out = e;
    return 0;
}

void veer__events_close(veer__events *e)
{
    if (e == NULL)
        return;
    zmq_close(e->socket);
    veer__free(e);
}

static void publish(veer__events *e, const char *topic, Veer__Wire__Event *ev)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    ev->time_unix_ns = (uint64_t)ts.tv_sec * 1000000000u + (uint64_t)ts.tv_nsec;
    ev->seq = ++e->seq;
    size_t len = veer__wire__event__get_packed_size(ev);
    uint8_t *buf = veer__malloc(len);
    if (buf == NULL)
        return; /* an event lost to memory pressure shows as a gap in seq */
    veer__wire__event__pack(ev, buf);
    if (zmq_send(e->socket, topic, strlen(topic), ZMQ_SNDMORE | ZMQ_DONTWAIT) >= 0)
        zmq_send(e->socket, buf, len, ZMQ_DONTWAIT);
    veer__free(buf);
}

void veer__events_switched(veer__events *e, const char *channel, const char *from, const char *to,
                           uint64_t epoch)
{
    Veer__Wire__ChannelSwitched s = VEER__WIRE__CHANNEL_SWITCHED__INIT;
    s.channel = (char *)channel;
    s.from_task = (char *)(from ? from : "");
    s.to_task = (char *)to;
    s.epoch = epoch;
    Veer__Wire__Event ev = VEER__WIRE__EVENT__INIT;
    ev.body_case = VEER__WIRE__EVENT__BODY_SWITCHED;
    ev.switched = &s;
    publish(e, "veer.switch", &ev);
}

void veer__events_task_stored(veer__events *e, const char *name, const uint8_t digest[32])
{
    Veer__Wire__TaskStored s = VEER__WIRE__TASK_STORED__INIT;
    s.name = (char *)name;
    s.digest.data = (uint8_t *)digest;
    s.digest.len = 32;
    Veer__Wire__Event ev = VEER__WIRE__EVENT__INIT;
    ev.body_case = VEER__WIRE__EVENT__BODY_TASK_STORED;
    ev.task_stored = &s;
    publish(e, "veer.task", &ev);
}

void veer__events_task_dropped(veer__events *e, const char *name)
{
    Veer__Wire__TaskDropped s = VEER__WIRE__TASK_DROPPED__INIT;
    s.name = (char *)name;
    Veer__Wire__Event ev = VEER__WIRE__EVENT__INIT;
    ev.body_case = VEER__WIRE__EVENT__BODY_TASK_DROPPED;
    ev.task_dropped = &s;
    publish(e, "veer.task", &ev);
}

void veer__events_model_loaded(veer__events *e, const char *version, const uint8_t digest[32])
{
    Veer__Wire__ModelLoaded s = VEER__WIRE__MODEL_LOADED__INIT;
    s.model_version = (char *)version;
    s.digest.data = (uint8_t *)digest;
    s.digest.len = 32;
    Veer__Wire__Event ev = VEER__WIRE__EVENT__INIT;
    ev.body_case = VEER__WIRE__EVENT__BODY_MODEL_LOADED;
    ev.model_loaded = &s;
    publish(e, "veer.model", &ev);
}

void veer__events_drift(veer__events *e, const char *scope, const char *statistic, const char *feature,
                        double value, uint32_t level)
{
    Veer__Wire__DriftAlarm s = VEER__WIRE__DRIFT_ALARM__INIT;
    s.scope = (char *)scope;
    s.statistic = (char *)statistic;
    s.feature = (char *)feature;
    s.value = value;
    s.level = level;
    Veer__Wire__Event ev = VEER__WIRE__EVENT__INIT;
    ev.body_case = VEER__WIRE__EVENT__BODY_DRIFT;
    ev.drift = &s;
    publish(e, "veer.drift", &ev);
}

void veer__events_deadline_burst(veer__events *e, const char *channel, uint32_t misses, double window_s)
{
    Veer__Wire__DeadlineBurst s = VEER__WIRE__DEADLINE_BURST__INIT;
    s.channel = (char *)channel;
    s.misses = misses;
    s.window_s = window_s;
    Veer__Wire__Event ev = VEER__WIRE__EVENT__INIT;
    ev.body_case = VEER__WIRE__EVENT__BODY_DEADLINE_BURST;
    ev.deadline_burst = &s;
    publish(e, "veer.deadline", &ev);
}
