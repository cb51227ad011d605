/* The journal: replay round trip, torn and damaged tails cut with the records before them kept,
 * compaction keeping exactly the live records. The frame checksum is checked against libsodium's
 * crypto_generichash called directly (BLAKE2b-256, RFC 7693), not through the journal's code. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <fcntl.h>
#include <sodium.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "service/journal.h"

typedef struct seen {
    int n;
    char kind[64];        /* 'p' put, 'd' drop, 's' switch */
    char name[64][32];
    uint64_t epoch[64];
    size_t floats[64];
    float first_float[64];
} seen;

static int collect(void *ctx, const Veer__Journal__JournalRecord *rec)
{
    seen *s = ctx;
    int i = s->n++;
    switch (rec->body_case) {
    case VEER__JOURNAL__JOURNAL_RECORD__BODY_PUT:
        s->kind[i] = 'p';
        snprintf(s->name[i], 32, "%s", rec->put->name);
        s->floats[i] = rec->put->spec->samples->n_states;
        s->first_float[i] = rec->put->spec->samples->states[0];
        break;
    case VEER__JOURNAL__JOURNAL_RECORD__BODY_DROP:
        s->kind[i] = 'd';
        snprintf(s->name[i], 32, "%s", rec->drop->name);
        break;
    case VEER__JOURNAL__JOURNAL_RECORD__BODY_CHANNEL_SWITCH:
        s->kind[i] = 's';
        snprintf(s->name[i], 32, "%s", rec->channel_switch->task);
        s->epoch[i] = rec->channel_switch->epoch;
        break;
    default:
        s->kind[i] = '?';
    }
    return 0;
}

static char *make_dir(void)
{
    char *d = strdup("/tmp/veer-journal-test-XXXXXX");
    assert_non_null(mkdtemp(d));
    return d;
}

static void remove_dir(char *d)
{
    char cmd[512];
    snprintf(cmd, sizeof cmd, "rm -rf '%s'", d);
    assert_int_equal(system(cmd), 0);
    free(d);
}

static off_t file_size(const char *dir)
{
    char p[512];
    struct stat st;
    snprintf(p, sizeof p, "%s/journal", dir);
    assert_int_equal(stat(p, &st), 0);
    return st.st_size;
}

static void append_put(veer__journal *j, const char *name, size_t nfloat, float first)
{
    float *states = calloc(nfloat, sizeof *states);
    float rewards[1] = {1.0f};
    states[0] = first;
    Veer__Wire__RewardSamples samples = VEER__WIRE__REWARD_SAMPLES__INIT;
    samples.n_states = nfloat;
    samples.states = states;
    samples.n_rewards = 1;
    samples.rewards = rewards;
    Veer__Wire__TaskSpec spec = VEER__WIRE__TASK_SPEC__INIT;
    spec.source_case = VEER__WIRE__TASK_SPEC__SOURCE_SAMPLES;
    spec.samples = &samples;
    Veer__Journal__TaskPut put = VEER__JOURNAL__TASK_PUT__INIT;
    put.name = (char *)name;
    put.spec = &spec;
    Veer__Journal__JournalRecord rec = VEER__JOURNAL__JOURNAL_RECORD__INIT;
    rec.body_case = VEER__JOURNAL__JOURNAL_RECORD__BODY_PUT;
    rec.put = &put;
    veer_error err;
    assert_int_equal(veer__journal_append(j, &rec, &err), 0);
    free(states);
}

static void append_switch(veer__journal *j, const char *channel, const char *task, uint64_t epoch)
{
    Veer__Journal__ChannelSwitch sw = VEER__JOURNAL__CHANNEL_SWITCH__INIT;
    sw.channel = (char *)channel;
    sw.task = (char *)task;
    sw.epoch = epoch;
    Veer__Journal__JournalRecord rec = VEER__JOURNAL__JOURNAL_RECORD__INIT;
    rec.body_case = VEER__JOURNAL__JOURNAL_RECORD__BODY_CHANNEL_SWITCH;
    rec.channel_switch = &sw;
    assert_int_equal(veer__journal_append(j, &rec, NULL), 0);
}

static void append_drop(veer__journal *j, const char *name)
{
    Veer__Journal__TaskDrop drop = VEER__JOURNAL__TASK_DROP__INIT;
    drop.name = (char *)name;
    Veer__Journal__JournalRecord rec = VEER__JOURNAL__JOURNAL_RECORD__INIT;
    rec.body_case = VEER__JOURNAL__JOURNAL_RECORD__BODY_DROP;
    rec.drop = &drop;
    assert_int_equal(veer__journal_append(j, &rec, NULL), 0);
}

/* Opens dir's journal, replays into *s, closes it again. */
static veer__journal_replay reopen(const char *dir, seen *s)
{
    veer__journal *j = NULL;
    veer__journal_replay rep;
    memset(s, 0, sizeof *s);
    veer_error err;
    assert_int_equal(veer__journal_open(dir, collect, s, &j, &rep, &err), 0);
    veer__journal_close(j);
    return rep;
}

/* Writes put a, switch c->a epoch 1, put b (a bigger record); returns the offsets where each
 * frame starts and the end. */
static void write_three(const char *dir, off_t ends[4])
{
    veer__journal *j = NULL;
    seen s = {0};
    assert_int_equal(veer__journal_open(dir, collect, &s, &j, NULL, NULL), 0);
    assert_int_equal(s.n, 0);
    ends[0] = file_size(dir);
    append_put(j, "a", 8, 0.5f);
    ends[1] = file_size(dir);
    append_switch(j, "arm", "a", 1);
    ends[2] = file_size(dir);
    append_put(j, "b", 1000, -2.0f);
    ends[3] = file_size(dir);
    veer__journal_close(j);
}

static void test_round_trip(void **state)
{
    char *dir = make_dir();
    off_t ends[4];
    write_three(dir, ends);
    assert_int_equal(ends[0], 8); /* the magic alone */
    seen s = {0};
    veer__journal_replay rep = reopen(dir, &s);
    assert_int_equal(rep.cut, 0);
    assert_int_equal(rep.records, 3);
    assert_int_equal(s.n, 3);
    assert_int_equal(s.kind[0], 'p');
    assert_string_equal(s.name[0], "a");
    assert_int_equal(s.floats[0], 8);
    assert_true(s.first_float[0] == 0.5f);
    assert_int_equal(s.kind[1], 's');
    assert_int_equal(s.epoch[1], 1);
    assert_int_equal(s.kind[2], 'p');
    assert_int_equal(s.floats[2], 1000);
    assert_true(s.first_float[2] == -2.0f);
    remove_dir(dir);
}

/* The frame layout, read by hand: u32 LE length, BLAKE2b-256 of the payload, payload. */
static void test_frame_checksum_is_blake2b(void **state)
{
    char *dir = make_dir();
    off_t ends[4];
    write_three(dir, ends);
    char p[512];
    snprintf(p, sizeof p, "%s/journal", dir);
    FILE *f = fopen(p, "rb");
    assert_non_null(f);
    unsigned char buf[64];
    assert_int_equal(fread(buf, 1, 8, f), 8);
    assert_memory_equal(buf, "VEERJNL1", 8);
    assert_int_equal(fread(buf, 1, 36, f), 36);
    uint32_t len = buf[0] | buf[1] << 8 | buf[2] << 16 | (uint32_t)buf[3] << 24;
    assert_int_equal(8 + 36 + len, ends[1]);
    unsigned char *payload = malloc(len);
    assert_int_equal(fread(payload, 1, len, f), len);
    unsigned char digest[32];
    assert_true(sodium_init() >= 0);
    crypto_generichash(digest, 32, payload, len, NULL, 0);
    assert_memory_equal(digest, buf + 4, 32);
    free(payload);
    fclose(f);
    remove_dir(dir);
}

static void truncate_to(const char *dir, off_t size)
{
    char p[512];
    snprintf(p, sizeof p, "%s/journal", dir);
    assert_int_equal(truncate(p, size), 0);
}

static void flip_byte(const char *dir, off_t at)
{
    char p[512];
    snprintf(p, sizeof p, "%s/journal", dir);
    int fd = open(p, O_RDWR);
    assert_true(fd >= 0);
    unsigned char b;
    assert_int_equal(pread(fd, &b, 1, at), 1);
    b ^= 0x10;
    assert_int_equal(pwrite(fd, &b, 1, at), 1);
    close(fd);
}

static void test_torn_tail_is_cut(void **state)
{
    char *dir = make_dir();
    off_t ends[4];
    write_three(dir, ends);
    /* Every torn length inside the last frame, header included, must keep exactly two. */
    off_t cuts[] = {ends[2] + 1, ends[2] + 20, ends[2] + 36, ends[2] + 37, ends[3] - 1};
    for (size_t i = 0; i < sizeof cuts / sizeof cuts[0]; i++) {
        if (i > 0) { /* put the last record back */
            veer__journal *j = NULL;
            seen s = {0};
            assert_int_equal(veer__journal_open(dir, collect, &s, &j, NULL, NULL), 0);
            append_put(j, "b", 1000, -2.0f);
            veer__journal_close(j);
            assert_int_equal(file_size(dir), ends[3]);
        }
        truncate_to(dir, cuts[i]);
        seen s;
        veer__journal_replay rep = reopen(dir, &s);
        assert_int_equal(rep.cut, 1);
        assert_int_equal(rep.cut_offset, ends[2]);
        assert_int_equal(rep.cut_bytes, cuts[i] - ends[2]);
        assert_int_equal(s.n, 2);
        assert_int_equal(s.kind[1], 's');
        assert_int_equal(file_size(dir), ends[2]); /* truncated on disk, not only skipped */
    }
    /* After the cut, appends land on a frame boundary and replay cleanly. */
    veer__journal *j = NULL;
    seen s = {0};
    assert_int_equal(veer__journal_open(dir, collect, &s, &j, NULL, NULL), 0);
    append_drop(j, "a");
    veer__journal_close(j);
    veer__journal_replay rep = reopen(dir, &s);
    assert_int_equal(rep.cut, 0);
    assert_int_equal(s.n, 3);
    assert_int_equal(s.kind[2], 'd');
    remove_dir(dir);
}

static void test_flipped_byte_is_cut(void **state)
{
    char *dir = make_dir();
    off_t ends[4];
    write_three(dir, ends);
    /* A flipped bit in the last payload: only the last record goes. */
    flip_byte(dir, ends[3] - 100);
    seen s = {0};
    veer__journal_replay rep = reopen(dir, &s);
    assert_int_equal(rep.cut, 1);
    assert_int_equal(s.n, 2);
    assert_int_equal(file_size(dir), ends[2]);
    /* A flipped bit in the middle record's checksum: from there on nothing can be trusted. */
    flip_byte(dir, ends[1] + 10);
    rep = reopen(dir, &s);
    assert_int_equal(rep.cut, 1);
    assert_int_equal(s.n, 1);
    assert_int_equal(file_size(dir), ends[1]);
    /* A damaged length field (claims a huge record). */
    flip_byte(dir, ends[0] + 3);
    rep = reopen(dir, &s);
    assert_int_equal(rep.cut, 1);
    assert_int_equal(s.n, 0);
    assert_int_equal(file_size(dir), 8);
    remove_dir(dir);
}

static void test_torn_header_and_foreign_file(void **state)
{
    char *dir = make_dir();
    char p[512];
    snprintf(p, sizeof p, "%s/journal", dir);
    FILE *f = fopen(p, "wb");
    fwrite("VEER", 1, 4, f);
    fclose(f);
    seen s = {0};
    veer__journal_replay rep = reopen(dir, &s);
    assert_int_equal(rep.cut, 1);
    assert_int_equal(s.n, 0);
    assert_int_equal(file_size(dir), 8);
    /* Something that is not a journal is moved aside, and veerd starts empty. */
    f = fopen(p, "wb");
    fputs("this is not a journal, but somebody's notes", f);
    fclose(f);
    rep = reopen(dir, &s);
    assert_int_equal(rep.cut, 1);
    assert_int_equal(s.n, 0);
    char aside[512];
    snprintf(aside, sizeof aside, "%s/journal.unreadable", dir);
    struct stat st;
    assert_int_equal(stat(aside, &st), 0);
    assert_int_equal(st.st_size, 43);
    remove_dir(dir);
}

static void test_compaction_round_trip(void **state)
{
    char *dir = make_dir();
    veer__journal *j = NULL;
    seen s = {0};
    assert_int_equal(veer__journal_open(dir, collect, &s, &j, NULL, NULL), 0);
    /* 20 puts, 19 drops, 50 switches: live are task t19 and channel arm at epoch 50. */
    char name[16];
    for (int i = 0; i < 20; i++) {
        snprintf(name, sizeof name, "t%d", i);
        append_put(j, name, 200, (float)i);
    }
    for (int i = 0; i < 19; i++) {
        snprintf(name, sizeof name, "t%d", i);
        append_drop(j, name);
    }
    for (int e = 1; e <= 50; e++)
        append_switch(j, "arm", "t19", (uint64_t)e);
    uint64_t big = veer__journal_size(j);
    veer_error err;
    assert_int_equal(veer__journal_compact_begin(j, &err), 0);
    append_put(j, "t19", 200, 19.0f); /* an append during compaction goes to the old file */
    append_drop(j, "t19");            /* and is not part of the snapshot being written */
    assert_int_equal(veer__journal_size(j) > big, 1);

    /* The snapshot the registry would write. */
    Veer__Wire__RewardSamples samples = VEER__WIRE__REWARD_SAMPLES__INIT;
    float states[200] = {19.0f};
    float rewards[1] = {1.0f};
    samples.n_states = 200;
    samples.states = states;
    samples.n_rewards = 1;
    samples.rewards = rewards;
    Veer__Wire__TaskSpec spec = VEER__WIRE__TASK_SPEC__INIT;
    spec.source_case = VEER__WIRE__TASK_SPEC__SOURCE_SAMPLES;
    spec.samples = &samples;
    Veer__Journal__TaskPut put = VEER__JOURNAL__TASK_PUT__INIT;
    put.name = "t19";
    put.spec = &spec;
    Veer__Journal__JournalRecord rec = VEER__JOURNAL__JOURNAL_RECORD__INIT;
    rec.body_case = VEER__JOURNAL__JOURNAL_RECORD__BODY_PUT;
    rec.put = &put;
    assert_int_equal(veer__journal_compact_add(j, &rec, &err), 0);
    Veer__Journal__ChannelSwitch sw = VEER__JOURNAL__CHANNEL_SWITCH__INIT;
    sw.channel = "arm";
    sw.task = "t19";
    sw.epoch = 50;
    Veer__Journal__JournalRecord rec2 = VEER__JOURNAL__JOURNAL_RECORD__INIT;
    rec2.body_case = VEER__JOURNAL__JOURNAL_RECORD__BODY_CHANNEL_SWITCH;
    rec2.channel_switch = &sw;
    assert_int_equal(veer__journal_compact_add(j, &rec2, &err), 0);
    assert_int_equal(veer__journal_compact_commit(j, &err), 0);
    uint64_t small = veer__journal_size(j);
    assert_true(small < big / 10);
    assert_int_equal((off_t)small, file_size(dir));
    /* Appends after the commit land in the new file. */
    append_switch(j, "arm", "t19", 51);
    veer__journal_close(j);

    veer__journal_replay rep = reopen(dir, &s);
    assert_int_equal(rep.cut, 0);
    assert_int_equal(s.n, 3);
    assert_int_equal(s.kind[0], 'p');
    assert_string_equal(s.name[0], "t19");
    assert_true(s.first_float[0] == 19.0f);
    assert_int_equal(s.kind[1], 's');
    assert_int_equal(s.epoch[1], 50);
    assert_int_equal(s.epoch[2], 51);
    remove_dir(dir);
}

/* A compaction that died before its rename leaves the old journal whole and a scratch file,
 * which the next open removes. */
static void test_interrupted_compaction(void **state)
{
    char *dir = make_dir();
    off_t ends[4];
    write_three(dir, ends);
    char p[512];
    snprintf(p, sizeof p, "%s/journal.compacting", dir);
    FILE *f = fopen(p, "wb");
    fputs("VEERJNL1 half a snapshot", f);
    fclose(f);
    seen s = {0};
    veer__journal_replay rep = reopen(dir, &s);
    assert_int_equal(rep.cut, 0);
    assert_int_equal(s.n, 3);
    struct stat st;
    assert_int_equal(stat(p, &st), -1);
    remove_dir(dir);
}

static uint64_t xorshift(uint64_t *x)
{
    *x ^= *x << 13;
    *x ^= *x >> 7;
    *x ^= *x << 17;
    return *x;
}

/* Random damage (xorshift64, a fixed starting value, so every run checks the same cases):
 * 300 copies of a journal, each truncated at a random length or with 1-3 random bytes changed.
 * Every open must succeed, replay a prefix of the original records in order, and leave a file
 * that opens again without a cut. */
static void test_random_damage(void **state)
{
    char *dir = make_dir();
    veer__journal *j = NULL;
    seen s = {0};
    assert_int_equal(veer__journal_open(dir, collect, &s, &j, NULL, NULL), 0);
    char name[16];
    for (int i = 0; i < 12; i++) {
        snprintf(name, sizeof name, "t%d", i);
        if (i % 3 == 2)
            append_switch(j, "arm", name, (uint64_t)i);
        else
            append_put(j, name, 1 + (size_t)i * 7, (float)i);
    }
    veer__journal_close(j);
    char path[512];
    snprintf(path, sizeof path, "%s/journal", dir);
    FILE *f = fopen(path, "rb");
    unsigned char orig[16384];
    size_t len = fread(orig, 1, sizeof orig, f);
    fclose(f);
    assert_true(len > 1000 && len < sizeof orig);
    seen full;
    reopen(dir, &full);
    assert_int_equal(full.n, 12);

    uint64_t x = 0x9e3779b97f4a7c15ull;
#define NEXT() xorshift(&x)
    for (int round = 0; round < 300; round++) {
        unsigned char copy[16384];
        memcpy(copy, orig, len);
        size_t n = len;
        if (round % 2 == 0) {
            n = (size_t)(NEXT() % len);
        } else {
            int flips = 1 + (int)(NEXT() % 3);
            for (int k = 0; k < flips; k++) {
                size_t at = (size_t)(NEXT() % len);
                copy[at] ^= (unsigned char)(1 + NEXT() % 255);
            }
        }
        f = fopen(path, "wb");
        fwrite(copy, 1, n, f);
        fclose(f);
        seen got;
        veer__journal *jj = NULL;
        memset(&got, 0, sizeof got);
        assert_int_equal(veer__journal_open(dir, collect, &got, &jj, NULL, NULL), 0);
        veer__journal_close(jj);
        /* A damaged magic moves the file aside; remove that copy for the next round. */
        char aside[512];
        snprintf(aside, sizeof aside, "%s/journal.unreadable", dir);
        remove(aside);
        assert_true(got.n <= 12);
        for (int i = 0; i < got.n; i++) {
            assert_int_equal(got.kind[i], full.kind[i]);
            assert_string_equal(got.name[i], full.name[i]);
        }
        seen again;
        veer__journal_replay rep = reopen(dir, &again);
        assert_int_equal(rep.cut, 0);
        assert_int_equal(again.n, got.n);
    }
#undef NEXT
    remove_dir(dir);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_round_trip),
        cmocka_unit_test(test_frame_checksum_is_blake2b),
        cmocka_unit_test(test_torn_tail_is_cut),
        cmocka_unit_test(test_flipped_byte_is_cut),
        cmocka_unit_test(test_torn_header_and_foreign_file),
        cmocka_unit_test(test_compaction_round_trip),
        cmocka_unit_test(test_interrupted_compaction),
        cmocka_unit_test(test_random_damage),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
