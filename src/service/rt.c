/* Real-time tuning (see rt.h). _GNU_SOURCE for the affinity calls (sched_getaffinity,
 * pthread_setaffinity_np), which POSIX does not have. */
#define _GNU_SOURCE
#include "service/rt.h"

#include <errno.h>
#include <fcntl.h>
#include <pthread.h>
#include <sched.h>
#include <string.h>
#include <unistd.h>
#include <zmq.h>

#include "base/base.h"

int veer__rt_check_fifo(uint32_t priority, const char *flag, veer_error *err)
{
    int policy;
    struct sched_param was, want = {.sched_priority = (int)priority};
    int rc = pthread_getschedparam(pthread_self(), &policy, &was);
    if (rc == 0)
        rc = pthread_setschedparam(pthread_self(), SCHED_FIFO, &want);
    if (rc != 0)
        return veer__error_set(err, VEER_ECONFIG, flag,
                               "%s %u: the kernel refuses SCHED_FIFO priority %u (%s); run veerd with "
                               "CAP_SYS_NICE or an RLIMIT_RTPRIO of at least %u (systemd: "
                               "LimitRTPRIO=%u), or leave %s at 0",
                               flag, priority, priority, strerror(rc), priority, priority, flag);
    pthread_setschedparam(pthread_self(), policy, &was);
    return 0;
}

int veer__rt_set_fifo(uint32_t priority, veer_error *err)
{
    struct sched_param p = {.sched_priority = (int)priority};
    int rc = pthread_setschedparam(pthread_self(), SCHED_FIFO, &p);
    if (rc != 0)
        return veer__error_set(err, VEER_ECONFIG, "act_priority", "SCHED_FIFO priority %u: %s", priority,
                               strerror(rc));
    return 0;
}

void veer__rt_attr_fifo(pthread_attr_t *attr, uint32_t priority)
{
    if (priority == 0)
        return;
    struct sched_param sp = {.sched_priority = (int)priority};
    pthread_attr_setinheritsched(attr, PTHREAD_EXPLICIT_SCHED);
    pthread_attr_setschedpolicy(attr, SCHED_FIFO);
    pthread_attr_setschedparam(attr, &sp);
}

int veer__rt_zmq_fifo(void *zctx, uint32_t priority, veer_error *err)
{
    if (zmq_ctx_set(zctx, ZMQ_THREAD_SCHED_POLICY, SCHED_FIFO) != 0 ||
        zmq_ctx_set(zctx, ZMQ_THREAD_PRIORITY, (int)priority) != 0)
        return veer__error_set(err, VEER_ECONFIG, "act_priority",
                               "libzmq does not take thread priorities: %s", zmq_strerror(errno));
    return 0;
}

int veer__rt_check_cpu(uint32_t cpu, const char *flag, veer_error *err)
{
    cpu_set_t allowed;
    CPU_ZERO(&allowed);
    if (sched_getaffinity(0, sizeof allowed, &allowed) != 0)
        return veer__error_set(err, VEER_ECONFIG, flag, "%s: cannot read this process's CPUs: %s", flag,
                               strerror(errno));
    if (cpu >= CPU_SETSIZE || !CPU_ISSET(cpu, &allowed))
        return veer__error_set(err, VEER_ECONFIG, flag,
                               "%s %u: veerd may not run on CPU %u (it may use %d CPUs; see taskset -p "
                               "or the unit's CPUAffinity=)",
                               flag, cpu, cpu, CPU_COUNT(&allowed));
    return 0;
}

int veer__rt_pin_self(uint32_t cpu, veer_error *err)
{
    cpu_set_t set;
    CPU_ZERO(&set);
    CPU_SET(cpu, &set);
    int rc = pthread_setaffinity_np(pthread_self(), sizeof set, &set);
    if (rc != 0)
        return veer__error_set(err, VEER_ECONFIG, "act_cpu", "cannot pin the thread to CPU %u: %s", cpu,
                               strerror(rc));
    return 0;
}

int veer__rt_zmq_cpu(void *zctx, uint32_t cpu, veer_error *err)
{
    if (zmq_ctx_set(zctx, ZMQ_THREAD_AFFINITY_CPU_ADD, (int)cpu) != 0)
        return veer__error_set(err, VEER_ECONFIG, "act_cpu", "libzmq does not take a thread affinity: %s",
                               zmq_strerror(errno));
    return 0;
}

int veer__rt_hold_cpu_latency(uint32_t us, const char *flag, int *fd_out, veer_error *err)
{
    /* The interface takes a binary 32-bit value and holds it while the file stays open
     * (Linux Documentation/power/pm_qos_interface.rst). */
    int fd = open("/dev/cpu_dma_latency", O_WRONLY | O_CLOEXEC);
    if (fd < 0)
        return veer__error_set(err, VEER_ECONFIG, flag,
                               "%s %u: cannot open /dev/cpu_dma_latency (%s); it needs root or write "
                               "access to that device, or leave %s unset",
                               flag, us, strerror(errno), flag);
    int32_t v = (int32_t)us;
    if (write(fd, &v, sizeof v) != (ssize_t)sizeof v) {
        int e = errno;
        close(fd);
        return veer__error_set(err, VEER_ECONFIG, flag, "%s %u: /dev/cpu_dma_latency refused the value (%s)",
                               flag, us, strerror(e));
    }
    *fd_out = fd;
    return 0;
}
