/* Real-time tuning of veerd's act path, as robotics and low-latency deployments usually do it:
 * a fixed SCHED_FIFO priority for the act thread and libzmq's I/O threads, and a held CPU
 * wake-up latency request (/dev/cpu_dma_latency, the kernel's PM QoS interface) that keeps idle
 * CPUs out of deep sleep states. Both are opt-in (--act-priority, --cpu-latency-us): they take
 * capabilities a plain service does not have (CAP_SYS_NICE or an RLIMIT_RTPRIO, and write access
 * to /dev/cpu_dma_latency), and they change how the whole machine schedules and idles.
 *
 * Order matters: libzmq applies its thread options when its I/O threads start (the first socket)
 * and aborts the process if the kernel refuses them, so veerd first proves it may use the
 * priority (veer__rt_check_fifo) and only then hands it to the context. */
#ifndef VEER_SERVICE_RT_H
#define VEER_SERVICE_RT_H

#include <pthread.h>
#include <stdint.h>

#include "veer/error.h"

/* Whether this process may run threads at SCHED_FIFO priority `priority` (1..99): tries it on
 * the calling thread and puts the thread back as it was. VEER_ECONFIG naming `flag` when the
 * kernel refuses, with what to grant. */
int veer__rt_check_fifo(uint32_t priority, const char *flag, veer_error *err);

/* Puts the calling thread at SCHED_FIFO `priority`. */
int veer__rt_set_fifo(uint32_t priority, veer_error *err);

/* Makes threads created with `attr` start at SCHED_FIFO `priority` (0: leaves attr as it is), so
 * they never run a request at ordinary priority. Call after veer__rt_check_fifo succeeded. */
void veer__rt_attr_fifo(pthread_attr_t *attr, uint32_t priority);

/* Makes the I/O threads of the ZeroMQ context `zctx` start at SCHED_FIFO `priority`. Call before
 * the context's first socket, after veer__rt_check_fifo succeeded. */
int veer__rt_zmq_fifo(void *zctx, uint32_t priority, veer_error *err);

/* Whether `cpu` is one this process may run on (its affinity mask); VEER_ECONFIG naming `flag`
 * otherwise. */
int veer__rt_check_cpu(uint32_t cpu, const char *flag, veer_error *err);

/* Pins the calling thread to `cpu`. */
int veer__rt_pin_self(uint32_t cpu, veer_error *err);

/* Makes the I/O threads of the ZeroMQ context `zctx` start pinned to `cpu`. Call before the
 * context's first socket. */
int veer__rt_zmq_cpu(void *zctx, uint32_t cpu, veer_error *err);

/* Asks the kernel to keep CPU wake-up latency at or below `us` microseconds for as long as the
 * returned descriptor stays open (the request ends when it is closed, or the process exits).
 * *fd_out receives the descriptor. VEER_ECONFIG naming `flag` when the interface is missing or
 * not writable. */
int veer__rt_hold_cpu_latency(uint32_t us, const char *flag, int *fd_out, veer_error *err);

#endif
