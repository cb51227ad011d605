/* Fuzz target: the journal replay (src/service/journal.c) feeding the real store
 * (veer__store_replay, src/service/store.c) over the small fixture bundle, as veerd does at start.
 *
 * Input: the first byte chooses the form. Odd: the rest is the journal file as it is (magic,
 * framing and checksums all fuzzed). Even: the rest is a list of records, each a 16-bit
 * little-endian length and that many payload bytes; the target writes the magic and frames them
 * with correct BLAKE2b-256 checksums, so the fuzzer reaches the record decoding and the store
 * behind the checksum; bytes left over after the last whole record are written raw, as a torn
 * tail.
 *
 * Beyond "no crash", it checks the journal's promises (journal.h, DESIGN.md invariants 5 and 6):
 * - after the first open cut a damaged tail, a second open finds nothing to cut and replays the
 *   same records to the same tasks and channels;
 * - a forced compaction writes only live state: reopening it skips nothing and restores the
 *   same tasks and the same channels with a task.
 * - a channel that the replay restored without a task (its task's record was refused) keeps its
 *   epoch across a compaction (corpus/journal/repro-epoch-lost-after-compaction). */
#include <fcntl.h>
#include <stdatomic.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "base/base.h"
#include "fuzz_common.h"
#include "service/journal.h"
#include "service/store.h"

static veer_bundle *bundle;
static int strict;
static char journal_path[320];

typedef struct state {
    veer__store store;
    veer__journal *journal;
    veer__journal_replay rep;
    uint32_t tasks, channels;
    uint32_t with_task; /* channels with an active task */
    uint64_t epoch_sum; /* of every channel, for the strict check */
} state;

static void put_u32(uint8_t *p, uint32_t v)
{
    for (int i = 0; i < 4; i++)
        p[i] = (uint8_t)(v >> (8 * i));
}

static int write_journal(const uint8_t *data, size_t size)
{
    int fd = open(journal_path, O_WRONLY | O_CREAT | O_TRUNC, 0600);
    if (fd < 0)
        abort();
    int ok = 1;
    if (size > 0 && (data[0] & 1)) {
        ok = write(fd, data + 1, size - 1) == (ssize_t)(size - 1);
    } else {
        const uint8_t *p = size ? data + 1 : data, *end = data + size;
        ok = write(fd, VEER__JOURNAL_MAGIC, 8) == 8;
        while (ok && end - p >= 2) {
            size_t len = (size_t)p[0] | (size_t)p[1] << 8;
            if ((size_t)(end - p - 2) < len)
                break;
            uint8_t head[36];
            put_u32(head, (uint32_t)len);
            veer__digest(p + 2, len, head + 4);
            ok = write(fd, head, sizeof head) == (ssize_t)sizeof head &&
                 write(fd, p + 2, len) == (ssize_t)len;
            p += 2 + len;
        }
        if (ok && p < end)
            ok = write(fd, p, (size_t)(end - p)) == end - p;
    }
    close(fd);
    return ok;
}

static void open_state(state *s, const char *dir)
{
    memset(s, 0, sizeof *s);
    veer__registry *registry = NULL;
    veer__channels *channels = NULL;
    if (veer__registry_create(16, &registry) != 0 || veer__channels_create(8, &channels) != 0)
        abort();
    s->store = (veer__store){.bundle = bundle,
                             .info = veer_bundle_info(bundle),
                             .registry = registry,
                             .channels = channels,
                             .max_samples = 256,
                             .journal_compact_bytes = 1u << 20};
    veer_error err;
    if (veer__journal_open(dir, veer__store_replay, &s->store, &s->journal, &s->rep, &err) != 0) {
        fprintf(stderr, "fuzz_journal: open failed: %s: %s\n", err.field, err.message);
        abort(); /* the directory is ours and writable: only damage is in the input, never an error
                  */
    }
    s->store.journal = s->journal;
    s->tasks = veer__registry_count(registry);
    s->channels = veer__channels_count(channels);
    for (uint32_t i = 0; i < veer__channels_capacity(channels); i++) {
        veer__channel *ch = veer__channels_slot(channels, i);
        if (ch == NULL)
            continue;
        s->with_task += atomic_load(&ch->active) != NULL;
        s->epoch_sum += ch->epoch;
    }
}

static void close_state(state *s)
{
    veer__journal_close(s->journal);
    veer__registry_destroy(s->store.registry);
    veer__channels_destroy(s->store.channels);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    const char *dir = fuzz_dir("journal");
    if (bundle == NULL) {
        strict = 1;
        bundle = fuzz_bundle_open();
        snprintf(journal_path, sizeof journal_path, "%s/%s", dir, VEER__JOURNAL_FILE);
    }
    if (!write_journal(data, size))
        abort();

    state a, b, c;
    open_state(&a, dir);
    close_state(&a);

    open_state(&b, dir);
    if (b.rep.cut || b.rep.records != a.rep.records || b.rep.skipped != a.rep.skipped ||
        b.tasks != a.tasks || b.channels != a.channels) {
        fprintf(
            stderr,
            "fuzz_journal: second replay differs: cut %d, records %llu/%llu, skipped %llu/%llu, "
            "tasks %u/%u, channels %u/%u\n",
            b.rep.cut, (unsigned long long)b.rep.records, (unsigned long long)a.rep.records,
            (unsigned long long)b.rep.skipped, (unsigned long long)a.rep.skipped, b.tasks, a.tasks,
            b.channels, a.channels);
        abort();
    }
    veer_error err;
    if (veer__store_compact(&b.store, 1, &err) != 0) {
        fprintf(stderr, "fuzz_journal: compaction failed: %s: %s\n", err.field, err.message);
        abort();
    }
    close_state(&b);

    open_state(&c, dir);
    if (c.rep.cut || c.rep.skipped != 0 || c.tasks != b.tasks || c.with_task != b.with_task) {
        fprintf(stderr,
                "fuzz_journal: replay after compaction differs: cut %d, skipped %llu, tasks %u/%u, "
                "channels with a task %u/%u\n",
                c.rep.cut, (unsigned long long)c.rep.skipped, c.tasks, b.tasks, c.with_task,
                b.with_task);
        abort();
    }
    if (strict && c.epoch_sum != b.epoch_sum) {
        fprintf(stderr, "fuzz_journal: channel epochs sum to %llu after compaction, %llu before\n",
                (unsigned long long)c.epoch_sum, (unsigned long long)b.epoch_sum);
        abort();
    }
    close_state(&c);
    return 0;
}
