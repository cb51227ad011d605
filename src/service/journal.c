/* The journal's framing, replay, tail repair and compaction (see journal.h for the format).
 *
 * Checksum choice: BLAKE2b-256 through veer__digest (libsodium) rather than CRC32C. Both catch a
 * torn write; BLAKE2b also catches any multi-byte damage with certainty for practical purposes,
 * costs about a microsecond per kilobyte (nothing beside the fdatasync that follows every
 * append), needs no hand-written table, and is the digest Python's hashlib computes, so a test
 * or an operator's script can verify a journal with the standard library. The 32 bytes per
 * frame are small beside a task specification. */
#include "service/journal.h"

#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#include "base/base.h"
#include "service/arena.h"
#include "service/log.h"

#define FRAME_HEAD (4u + VEER_DIGEST_BYTES)
#define MAGIC_LEN 8u

struct veer__journal {
    char *dir;
    char *path;
    char *tmp_path;
    int fd;
    int tmp_fd;     /* compaction in progress when >= 0 */
    uint64_t size;
    uint64_t tmp_size;
    uint64_t seq;
    uint64_t tmp_seq;
};

static char *join(const char *dir, const char *name)
{
    size_t n = strlen(dir) + strlen(name) + 2;
    char *p = veer__malloc(n);
    if (p != NULL)
        snprintf(p, n, "%s/%s", dir, name);
    return p;
}

static int write_all(int fd, const void *buf, size_t n)
{
    const unsigned char *p = buf;
    while (n > 0) {
        ssize_t w = write(fd, p, n);
        if (w < 0) {
            if (errno == EINTR)
                continue;
            return -1;
        }
        p += w;
        n -= (size_t)w;
    }
    return 0;
}

/* Reads exactly n bytes; returns the number read (less than n only at end of file) or -1. */
static ssize_t read_full(int fd, void *buf, size_t n)
{
    unsigned char *p = buf;
    size_t got = 0;
    while (got < n) {
        ssize_t r = read(fd, p + got, n - got);
        if (r < 0) {
            if (errno == EINTR)
                continue;
            return -1;
        }
        if (r == 0)
            break;
        got += (size_t)r;
    }
    return (ssize_t)got;
}

static int sync_dir(const char *dir)
{
    int dfd = open(dir, O_RDONLY | O_DIRECTORY);
    if (dfd < 0)
        return -1;
    int rc = fsync(dfd);
    close(dfd);
    return rc;
}

static uint64_t unix_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (uint64_t)ts.tv_sec * 1000000000u + (uint64_t)ts.tv_nsec;
}

/* Packs `rec` into one frame appended at the end of `fd`. */
static int write_frame(int fd, const Veer__Journal__JournalRecord *rec, uint64_t *size, veer_error *err)
{
    size_t len = veer__journal__journal_record__get_packed_size(rec);
    if (len > VEER__JOURNAL_MAX_RECORD)
        return veer__error_set(err, VEER_EIO, "journal", "journal record of %zu bytes is over the limit", len);
    unsigned char *frame = veer__malloc(FRAME_HEAD + len);
    if (frame == NULL)
        return veer__error_set(err, VEER_ENOMEM, "journal", NULL);
    veer__journal__journal_record__pack(rec, frame + FRAME_HEAD);
    frame[0] = (unsigned char)(len & 0xff);
    frame[1] = (unsigned char)((len >> 8) & 0xff);
    frame[2] = (unsigned char)((len >> 16) & 0xff);
    frame[3] = (unsigned char)((len >> 24) & 0xff);
    int rc = veer__digest(frame + FRAME_HEAD, len, frame + 4);
    if (rc == 0 && write_all(fd, frame, FRAME_HEAD + len) != 0)
        rc = veer__error_set(err, VEER_EIO, "journal", "journal write failed: %s", strerror(errno));
    else if (rc < 0)
        veer__error_set(err, rc, "journal", "journal checksum failed");
    veer__free(frame);
    if (rc == 0)
        *size += FRAME_HEAD + len;
    return rc;
}

/* Walks the frames after the magic; returns the offset of the first bad frame (or the end). */
static uint64_t replay(veer__journal *j, veer__journal_apply_fn apply, void *ctx,
                       veer__journal_replay *rep, int *rc_out, veer_error *err)
{
    uint64_t off = MAGIC_LEN;
    unsigned char head[FRAME_HEAD];
    unsigned char *buf = NULL;
    size_t cap = 0;
    *rc_out = 0;
    struct stat st;
    if (fstat(j->fd, &st) != 0) {
        *rc_out = veer__error_set(err, VEER_EIO, "journal", "cannot stat the journal: %s", strerror(errno));
        return off;
    }
    uint64_t file_size = (uint64_t)st.st_size;
    for (;;) {
        ssize_t r = read_full(j->fd, head, FRAME_HEAD);
        if (r < 0) {
            *rc_out = veer__error_set(err, VEER_EIO, "journal", "reading the journal failed: %s", strerror(errno));
            break;
        }
        if (r == 0)
            break; /* a clean end */
        if ((size_t)r < FRAME_HEAD) {
            snprintf(rep->cut_reason, sizeof rep->cut_reason, "torn frame header (%zd of %u bytes)", r, FRAME_HEAD);
            rep->cut = 1;
            break;
        }
        uint32_t len = (uint32_t)head[0] | (uint32_t)head[1] << 8 | (uint32_t)head[2] << 16 | (uint32_t)head[3] << 24;
        if (len > VEER__JOURNAL_MAX_RECORD || off + FRAME_HEAD + len > file_size) {
            /* Checked before allocating, so a damaged length cannot ask for a gigabyte. */
            snprintf(rep->cut_reason, sizeof rep->cut_reason, "frame length %u runs past the end of the file",
                     len);
            rep->cut = 1;
            break;
        }
        if (len > cap) {
            unsigned char *nb = veer__realloc(buf, len);
            if (nb == NULL) {
                *rc_out = veer__error_set(err, VEER_ENOMEM, "journal", "no memory for a %u-byte journal record", len);
                break;
            }
            buf = nb;
            cap = len;
        }
        r = read_full(j->fd, buf, len);
        if (r < 0) {
            *rc_out = veer__error_set(err, VEER_EIO, "journal", "reading the journal failed: %s", strerror(errno));
            break;
        }
        if ((size_t)r < len) {
            snprintf(rep->cut_reason, sizeof rep->cut_reason, "torn record (%zd of %u bytes)", r, len);
            rep->cut = 1;
            break;
        }
        uint8_t digest[VEER_DIGEST_BYTES];
        if (veer__digest(buf, len, digest) != 0 || memcmp(digest, head + 4, VEER_DIGEST_BYTES) != 0) {
            snprintf(rep->cut_reason, sizeof rep->cut_reason, "checksum mismatch in a %u-byte record", len);
            rep->cut = 1;
            break;
        }
        Veer__Journal__JournalRecord *rec = veer__journal__journal_record__unpack(&veer__pb_heap, len, buf);
        if (rec == NULL) {
            veer__log_warn("journal: record at offset %llu has a good checksum but does not decode; skipped",
                           (unsigned long long)off);
            rep->skipped++;
        } else {
            if (rec->seq > j->seq)
                j->seq = rec->seq;
            if (apply(ctx, rec) < 0) {
                veer__log_warn("journal: record %llu at offset %llu was refused on replay; skipped",
                               (unsigned long long)rec->seq, (unsigned long long)off);
                rep->skipped++;
            } else {
                rep->records++;
            }
            veer__journal__journal_record__free_unpacked(rec, &veer__pb_heap);
        }
        off += FRAME_HEAD + len;
    }
    veer__free(buf);
    return off;
}

int veer__journal_open(const char *dir, veer__journal_apply_fn apply, void *ctx,
                       veer__journal **out, veer__journal_replay *report, veer_error *err)
{
    veer__journal_replay local;
    veer__journal_replay *rep = report ? report : &local;
    memset(rep, 0, sizeof *rep);
    *out = NULL;
    int rc;

    if (mkdir(dir, 0700) != 0 && errno != EEXIST)
        return veer__error_set(err, VEER_EIO, "--state-dir", "cannot create state directory '%s': %s", dir,
                               strerror(errno));
    veer__journal *j = veer__calloc(1, sizeof *j);
    if (j == NULL)
        return veer__error_set(err, VEER_ENOMEM, "journal", NULL);
    j->fd = j->tmp_fd = -1;
    j->dir = veer__strdup(dir);
    j->path = join(dir, VEER__JOURNAL_FILE);
    j->tmp_path = join(dir, VEER__JOURNAL_FILE ".compacting");
    if (j->dir == NULL || j->path == NULL || j->tmp_path == NULL) {
        rc = veer__error_set(err, VEER_ENOMEM, "journal", NULL);
        goto fail_paths;
    }
    /* A compaction that crashed before its rename left only a scratch file: the old journal
     * is still whole, so the scratch file goes. */
    unlink(j->tmp_path);

    j->fd = open(j->path, O_RDWR | O_CREAT | O_CLOEXEC, 0600);
    if (j->fd < 0) {
        rc = veer__error_set(err, VEER_EIO, "--state-dir", "cannot open journal '%s': %s", j->path, strerror(errno));
        goto fail_paths;
    }
    char magic[MAGIC_LEN];
    ssize_t r = read_full(j->fd, magic, MAGIC_LEN);
    if (r < 0) {
        rc = veer__error_set(err, VEER_EIO, "journal", "cannot read journal '%s': %s", j->path, strerror(errno));
        goto fail_open;
    }
    uint64_t good_end;
    if (r < (ssize_t)MAGIC_LEN || memcmp(magic, VEER__JOURNAL_MAGIC, MAGIC_LEN) != 0) {
        /* A new file, a crash during creation, or something that is not our journal. Only the
         * first two are expected; the third is kept aside rather than overwritten. */
        struct stat st;
        if (fstat(j->fd, &st) == 0 && st.st_size > (off_t)MAGIC_LEN) {
            /* Damage at the very start leaves nothing to trust. Refusing to start would leave the
             * machine without its controller, so the file is kept aside for the operator and
             * veerd starts empty, loudly. */
            char *aside = join(dir, VEER__JOURNAL_FILE ".unreadable");
            if (aside == NULL || rename(j->path, aside) != 0) {
                rc = veer__error_set(err, VEER_EJOURNAL, "journal",
                                     "'%s' is not a veerd journal and cannot be moved aside: %s", j->path,
                                     strerror(errno));
                veer__free(aside);
                goto fail_open;
            }
            veer__log_warn("journal: '%s' has no journal header; moved it to '%s' and started with no tasks",
                           j->path, aside);
            veer__free(aside);
            rep->cut = 1;
            rep->cut_bytes = (uint64_t)st.st_size;
            snprintf(rep->cut_reason, sizeof rep->cut_reason, "unreadable file header");
            close(j->fd);
            j->fd = open(j->path, O_RDWR | O_CREAT | O_TRUNC | O_CLOEXEC, 0600);
            if (j->fd < 0) {
                rc = veer__error_set(err, VEER_EIO, "--state-dir", "cannot create journal '%s': %s", j->path,
                                     strerror(errno));
                goto fail_paths;
            }
        }
        else if (r > 0) {
            rep->cut = 1;
            rep->cut_bytes = (uint64_t)r;
            snprintf(rep->cut_reason, sizeof rep->cut_reason, "torn file header");
        }
        if (ftruncate(j->fd, 0) != 0 || lseek(j->fd, 0, SEEK_SET) != 0 ||
            write_all(j->fd, VEER__JOURNAL_MAGIC, MAGIC_LEN) != 0 || fdatasync(j->fd) != 0 || sync_dir(dir) != 0) {
            rc = veer__error_set(err, VEER_EIO, "journal", "cannot start journal '%s': %s", j->path, strerror(errno));
            goto fail_open;
        }
        good_end = MAGIC_LEN;
    } else {
        good_end = replay(j, apply, ctx, rep, &rc, err);
        if (rc < 0)
            goto fail_open;
        struct stat st;
        if (fstat(j->fd, &st) != 0) {
            rc = veer__error_set(err, VEER_EIO, "journal", "cannot stat journal: %s", strerror(errno));
            goto fail_open;
        }
        if ((uint64_t)st.st_size > good_end) {
            rep->cut = 1;
            rep->cut_offset = good_end;
            rep->cut_bytes = (uint64_t)st.st_size - good_end;
            if (ftruncate(j->fd, (off_t)good_end) != 0 || fdatasync(j->fd) != 0) {
                rc = veer__error_set(err, VEER_EIO, "journal", "cannot cut the damaged journal tail: %s",
                                     strerror(errno));
                goto fail_open;
            }
        }
    }
    if (rep->cut)
        veer__log_warn("journal: %s at offset %llu; cut %llu bytes there and kept the %llu records before it",
                       rep->cut_reason, (unsigned long long)good_end, (unsigned long long)rep->cut_bytes,
                       (unsigned long long)rep->records);
    if (lseek(j->fd, (off_t)good_end, SEEK_SET) < 0) {
        rc = veer__error_set(err, VEER_EIO, "journal", "seek failed: %s", strerror(errno));
        goto fail_open;
    }
    j->size = good_end;
    *out = j;
    return 0;

fail_open:
    close(j->fd);
fail_paths:
    veer__free(j->dir);
    veer__free(j->path);
    veer__free(j->tmp_path);
    veer__free(j);
    return rc;
}

void veer__journal_close(veer__journal *j)
{
    if (j == NULL)
        return;
    veer__journal_compact_abort(j);
    if (j->fd >= 0) {
        fdatasync(j->fd);
        close(j->fd);
    }
    veer__free(j->dir);
    veer__free(j->path);
    veer__free(j->tmp_path);
    veer__free(j);
}

int veer__journal_append(veer__journal *j, Veer__Journal__JournalRecord *rec, veer_error *err)
{
    rec->seq = j->seq + 1;
    rec->time_unix_ns = unix_ns();
    uint64_t before = j->size;
    int rc = write_frame(j->fd, rec, &j->size, err);
    if (rc == 0 && fdatasync(j->fd) != 0)
        rc = veer__error_set(err, VEER_EIO, "journal", "journal fdatasync failed: %s", strerror(errno));
    if (rc < 0) {
        /* Nothing was acknowledged: take the partial frame back so the next append starts on a
         * frame boundary. If even that fails, replay will cut it as a torn tail. */
        if (ftruncate(j->fd, (off_t)before) == 0)
            lseek(j->fd, (off_t)before, SEEK_SET);
        j->size = before;
        return rc;
    }
    j->seq = rec->seq;
    return 0;
}

uint64_t veer__journal_size(const veer__journal *j) { return j->size; }

int veer__journal_compact_begin(veer__journal *j, veer_error *err)
{
    veer__journal_compact_abort(j);
    j->tmp_fd = open(j->tmp_path, O_RDWR | O_CREAT | O_TRUNC | O_CLOEXEC, 0600);
    if (j->tmp_fd < 0)
        return veer__error_set(err, VEER_EIO, "journal", "cannot create '%s': %s", j->tmp_path, strerror(errno));
    if (write_all(j->tmp_fd, VEER__JOURNAL_MAGIC, MAGIC_LEN) != 0) {
        veer__journal_compact_abort(j);
        return veer__error_set(err, VEER_EIO, "journal", "cannot write '%s': %s", j->tmp_path, strerror(errno));
    }
    j->tmp_size = MAGIC_LEN;
    j->tmp_seq = 0;
    return 0;
}

int veer__journal_compact_add(veer__journal *j, Veer__Journal__JournalRecord *rec, veer_error *err)
{
    if (j->tmp_fd < 0)
        return veer__error_set(err, VEER_EINVAL, "journal", "no compaction in progress");
    rec->seq = ++j->tmp_seq;
    rec->time_unix_ns = unix_ns();
    return write_frame(j->tmp_fd, rec, &j->tmp_size, err);
}

int veer__journal_compact_commit(veer__journal *j, veer_error *err)
{
    if (j->tmp_fd < 0)
        return veer__error_set(err, VEER_EINVAL, "journal", "no compaction in progress");
    if (fdatasync(j->tmp_fd) != 0 || rename(j->tmp_path, j->path) != 0) {
        int e = errno;
        veer__journal_compact_abort(j);
        return veer__error_set(err, VEER_EIO, "journal", "compaction failed: %s", strerror(e));
    }
    /* From here the new file is the journal; the directory sync makes the rename durable. */
    if (sync_dir(j->dir) != 0)
        veer__log_warn("journal: syncing '%s' after compaction failed: %s", j->dir, strerror(errno));
    close(j->fd);
    j->fd = j->tmp_fd;
    j->tmp_fd = -1;
    j->size = j->tmp_size;
    j->seq = j->tmp_seq;
    if (lseek(j->fd, (off_t)j->size, SEEK_SET) < 0)
        return veer__error_set(err, VEER_EIO, "journal", "seek failed: %s", strerror(errno));
    return 0;
}

void veer__journal_compact_abort(veer__journal *j)
{
    if (j->tmp_fd < 0)
        return;
    close(j->tmp_fd);
    j->tmp_fd = -1;
    unlink(j->tmp_path);
}
