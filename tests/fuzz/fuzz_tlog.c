/* Fuzz target: the trainer's transition log reader (src/train/tlog.c): veer__tlog_load over
 * .npy files written from the input.
 *
 * Input: byte 0 chooses the declared action space (bit 0: discrete with 4 actions, else 2
 * continuous actions in [-1, 1]; bit 1: tabular states with counts 5, 5; bit 2: an episode-end
 * file; bit 3: the ends are time-limit cuts), then up to four files (states, actions, next states,
 * episode ends), each a 16-bit little-endian length and that many bytes. Beyond "no crash", an
 * accepted log must keep the reader's promises (tlog.h): n rows of finite values, actions within
 * the declared bounds or count, episode ends turned into 0/1 continuation flags (always 1 for
 * time-limit cuts). */
#include <fcntl.h>
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "fuzz_common.h"
#include "train/tlog.h"

static char paths[4][320];

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    if (paths[0][0] == '\0') {
        static const char *names[4] = {"states.npy", "actions.npy", "next_states.npy", "dones.npy"};
        for (int i = 0; i < 4; i++)
            snprintf(paths[i], sizeof paths[i], "%s/%s", fuzz_dir("tlog"), names[i]);
    }
    if (size == 0)
        return 0;
    int mode = data[0];
    const uint8_t *p = data + 1, *end = data + size;
    for (int i = 0; i < 4; i++) {
        size_t len = 0;
        if (end - p >= 2) {
            len = (size_t)p[0] | (size_t)p[1] << 8;
            p += 2;
            if (len > (size_t)(end - p))
                len = (size_t)(end - p);
        }
        int fd = open(paths[i], O_WRONLY | O_CREAT | O_TRUNC, 0600);
        if (fd < 0 || write(fd, p, len) != (ssize_t)len)
            abort();
        close(fd);
        p += len;
    }
    static const float low[2] = {-1.0f, -1.0f}, high[2] = {1.0f, 1.0f};
    static const uint32_t counts[2] = {5, 5};
    veer__tlog_spec spec = {.states_path = paths[0],
                            .actions_path = paths[1],
                            .next_states_path = paths[2],
                            .dones_path = (mode & 4) ? paths[3] : NULL,
                            .ends_truncated = (mode & 8) != 0};
    if (mode & 1) {
        spec.action_count = 4;
        spec.action_dim = 1;
    } else {
        spec.action_dim = 2;
        spec.low = low;
        spec.high = high;
    }
    if (mode & 2) {
        spec.nstate_counts = 2;
        spec.state_counts = counts;
    }
    veer__tlog log;
    veer_error err;
    if (veer__tlog_load(&spec, &log, &err) != 0) {
        if (err.code >= 0)
            abort();
        return 0;
    }
    if (log.n == 0 || log.action_dim != spec.action_dim)
        abort();
    for (size_t i = 0; i < log.n * log.state_dim; i++)
        if (!isfinite(log.states[i]) || !isfinite(log.next_states[i]))
            abort();
    for (size_t i = 0; i < log.n; i++) {
        if ((log.cont[i] != 0.0f && log.cont[i] != 1.0f) ||
            (spec.ends_truncated && log.cont[i] != 1.0f))
            abort();
        for (uint32_t k = 0; k < log.action_dim; k++) {
            float a = log.actions[i * log.action_dim + k];
            if ((mode & 1) ? (a < 0 || a >= 4 || a != floorf(a)) : !(a >= -1.0f && a <= 1.0f))
                abort();
        }
    }
    veer__tlog_free(&log);
    return 0;
}
