/* The journal: veerd's append-only record of acknowledged task puts, task drops and channel
 * switches, in one file in the state directory, replayed on start.
 *
 * File: the 8 magic bytes "VEERJNL1", then frames of
 *     u32 little-endian payload length | 32-byte BLAKE2b-256 of the payload | payload
 * where the payload is one serialized veer.journal.JournalRecord (proto/veer_journal.proto).
 *
 * Every append is on disk (fdatasync) before it returns, so the caller acknowledges only what
 * survives a crash. On open, the first frame that is short, over-long or fails its checksum
 * marks a torn or damaged tail: the file is truncated there with a warning and veerd starts with
 * everything before it. A frame whose checksum holds but which does not decode is skipped with a
 * warning (the framing is intact, so what follows is still trusted).
 *
 * One thread (veerd's loop) owns a journal; nothing here is thread-safe. */
#ifndef VEER_SERVICE_JOURNAL_H
#define VEER_SERVICE_JOURNAL_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"
#include "veer_journal.pb-c.h"

#define VEER__JOURNAL_MAGIC "VEERJNL1"
#define VEER__JOURNAL_FILE "journal"
#define VEER__JOURNAL_MAX_RECORD (1u << 30) /* a longer length field means damage */

typedef struct veer__journal veer__journal;

/* Called for each good record during replay, in order. A negative return is logged as a
 * warning and the record skipped; it never stops the replay. `rec` lives for the call. */
typedef int (*veer__journal_apply_fn)(void *ctx, const Veer__Journal__JournalRecord *rec);

typedef struct veer__journal_replay {
    uint64_t records;      /* applied */
    uint64_t skipped;      /* undecodable or refused by `apply` */
    int cut;               /* 1: a damaged tail was truncated */
    uint64_t cut_offset;   /* where the file now ends, when cut */
    uint64_t cut_bytes;    /* bytes removed */
    char cut_reason[128];
} veer__journal_replay;

/* Opens (creating when missing) `dir`/journal, replays it through `apply`, cuts a damaged
 * tail, and leaves the file ready for appends. `report` may be NULL. On error (the directory or
 * file cannot be created, read or truncated) returns VEER_EIO or VEER_ENOMEM with err set.
 * The caller owns *out; close it with veer__journal_close. */
int veer__journal_open(const char *dir, veer__journal_apply_fn apply, void *ctx,
                       veer__journal **out, veer__journal_replay *report, veer_error *err);

/* Closes the file (after a final fdatasync). NULL is allowed. */
void veer__journal_close(veer__journal *j);

/* Sets rec->seq and rec->time_unix_ns, writes one frame and fdatasyncs. On failure the file is
 * cut back to where it was, so a half-written frame never stays; returns VEER_EIO/VEER_ENOMEM. */
int veer__journal_append(veer__journal *j, Veer__Journal__JournalRecord *rec, veer_error *err);

/* Current file size in bytes. */
uint64_t veer__journal_size(const veer__journal *j);

/* Compaction: begin writes a fresh file beside the journal, add puts records into it, commit
 * fdatasyncs it, renames it over the journal and syncs the directory, so a crash at any point
 * leaves either the old journal or the new one, never neither. abort removes the fresh file. */
int veer__journal_compact_begin(veer__journal *j, veer_error *err);
int veer__journal_compact_add(veer__journal *j, Veer__Journal__JournalRecord *rec, veer_error *err);
int veer__journal_compact_commit(veer__journal *j, veer_error *err);
void veer__journal_compact_abort(veer__journal *j);

#endif
