/* Task puts, drops and switches applied to the stored state (see store.h). Each mutating
 * operation writes its journal record and waits for the fdatasync before it changes anything a
 * client can see; a failed write leaves everything as it was, so what a supervisor was told
 * is exactly what is stored. */
#include "service/store.h"

#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "service/log.h"
#include "service/spec.h"

void veer__store_prefix_field(veer_error *err, const char *prefix)
{
    if (err == NULL || strncmp(err->field, prefix, strlen(prefix)) == 0)
        return;
    char f[2 * VEER_ERROR_FIELD_MAX];
    snprintf(f, sizeof f, "%s%s", prefix, err->field);
    size_t n = strlen(f) < sizeof err->field ? strlen(f) : sizeof err->field - 1;
    memcpy(err->field, f, n);
    err->field[n] = '\0';
}

int veer__store_encode(const veer_bundle *bundle, const Veer__Wire__TaskSpec *spec, uint32_t max_samples,
                       float *z, veer_task_report *report, veer_error *err)
{
    const veer_model_info *info = veer_bundle_info(bundle);
    veer_task_spec ts;
    int rc = veer__spec_check(spec, info, max_samples, "put_task.spec", &ts, err);
    if (rc < 0)
        return rc;
    float *ones = NULL;
    if (ts.source == VEER_TASK_GOALS && ts.values == NULL) {
        /* "No weights" means weight 1 for every goal. */
        ones = veer__malloc((size_t)ts.count * sizeof *ones);
        if (ones == NULL)
            return veer__error_set(err, VEER_ENOMEM, "put_task.spec", NULL);
        for (uint32_t i = 0; i < ts.count; i++)
            ones[i] = 1.0f;
        ts.values = ones;
    }
    rc = veer_task_encode(bundle, &ts, z, report, err);
    veer__free(ones);
    if (rc < 0)
        veer__store_prefix_field(err, "put_task.spec.");
    return rc;
}

static int journal(veer__store *s, Veer__Journal__JournalRecord *rec, veer_error *err)
{
    if (s->journal == NULL)
        return 0;
    int rc = veer__journal_append(s->journal, rec, err);
    if (rc < 0)
        veer__log_error("journal append failed: %s", err ? err->message : veer_strerror(rc));
    return rc;
}

/* A put record for `task`, pointing into it (rec and put live on the caller's stack). */
static void put_record(veer__task *task, Veer__Journal__JournalRecord *rec, Veer__Journal__TaskPut *put)
{
    veer__journal__task_put__init(put);
    put->name = task->name;
    put->spec = task->content->spec;
    put->digest.data = task->content->digest;
    put->digest.len = 32;
    veer__journal__journal_record__init(rec);
    rec->body_case = VEER__JOURNAL__JOURNAL_RECORD__BODY_PUT;
    rec->put = put;
}

int veer__store_acknowledge(veer__store *s, veer__task *task, veer_error *err)
{
    Veer__Journal__TaskPut put;
    Veer__Journal__JournalRecord rec;
    put_record(task, &rec, &put);
    int rc = journal(s, &rec, err);
    if (rc < 0)
        return rc;
    task->acknowledged = 1;
    if (s->events != NULL)
        veer__events_task_stored(s->events, task->name, task->content->digest);
    return 0;
}

uint32_t veer__store_active_on(veer__store *s, const char *name, const char **out, uint32_t max)
{
    uint32_t n = 0;
    for (uint32_t i = 0; i < veer__channels_capacity(s->channels) && n < max; i++) {
        veer__channel *ch = veer__channels_slot(s->channels, i);
        if (ch == NULL)
            continue;
        veer__active_task *t = atomic_load_explicit(&ch->active, memory_order_relaxed);
        if (t != NULL && strcmp(t->task, name) == 0)
            out[n++] = ch->name;
    }
    return n;
}

int veer__store_drop(veer__store *s, const char *name, veer_error *err)
{
    veer__task *t = veer__registry_find(s->registry, name);
    if (t == NULL)
        return veer__error_set(err, VEER_ENOTASK, "drop_task.name", "there is no task '%s'", name);
    if (!t->acknowledged)
        return veer__error_set(err, VEER_ENOTREADY, "drop_task.name", "task '%s' is still being stored", name);
    if (t->active_on > 0) {
        const char *chans[4];
        uint32_t n = veer__store_active_on(s, name, chans, 4);
        return veer__error_set(err, VEER_ETASKACTIVE, "drop_task.name",
                               "task '%s' is active on %u channel(s) (%s%s%s%s); switch them to another task first",
                               name, t->active_on, n > 0 ? chans[0] : "", n > 1 ? ", " : "", n > 1 ? chans[1] : "",
                               t->active_on > 2 ? ", ..." : "");
    }
    Veer__Journal__TaskDrop drop = VEER__JOURNAL__TASK_DROP__INIT;
    drop.name = (char *)name;
    Veer__Journal__JournalRecord rec = VEER__JOURNAL__JOURNAL_RECORD__INIT;
    rec.body_case = VEER__JOURNAL__JOURNAL_RECORD__BODY_DROP;
    rec.drop = &drop;
    int rc = journal(s, &rec, err);
    if (rc < 0)
        return rc;
    if (s->events != NULL)
        veer__events_task_dropped(s->events, name);
    veer__registry_remove(s->registry, t);
    return 0;
}

/* Publishes `t` on `ch` with `epoch` and keeps the tasks' active_on counts. */
/* The registry's task now active on `ch`, or NULL. Loop thread. */
static veer__task *active_task_of(veer__store *s, veer__channel *ch)
{
    veer__active_task *a = atomic_load_explicit(&ch->active, memory_order_relaxed);
    return a ? veer__registry_find(s->registry, a->task) : NULL;
}

static int apply_switch(veer__store *s, veer__channel *ch, veer__task *t, uint64_t epoch, veer_error *err)
{
    veer__task *old_task = active_task_of(s, ch);
    int rc = veer__channels_switch(s->channels, ch, t->name, t->content->z, s->info->z_dim, epoch, err);
    if (rc < 0)
        return rc;
    if (old_task != NULL && old_task->active_on > 0)
        old_task->active_on--;
    t->active_on++;
    return 0;
}

int veer__store_switch(veer__store *s, const char *channel, const char *name, veer__channel **out,
                       veer_error *err)
{
    veer__task *t = veer__registry_find(s->registry, name);
    if (t == NULL)
        return veer__error_set(err, VEER_ENOTASK, "switch_channel.task", "there is no task '%s'", name);
    if (!t->acknowledged)
        return veer__error_set(err, VEER_ENOTREADY, "switch_channel.task",
                               "task '%s' is still being encoded; switch once its put is acknowledged", name);
    if (t->content->state != VEER__CONTENT_ENCODED)
        return veer__error_set(err, VEER_ENOTREADY, "switch_channel.task",
                               "task '%s' could not be encoded for the loaded model; put it again", name);
    veer__channel *ch;
    int rc = veer__channels_get_or_create(s->channels, channel, &ch, err);
    if (rc < 0) {
        veer__store_prefix_field(err, "switch_channel.");
        return rc;
    }
    veer__active_task *old = atomic_load_explicit(&ch->active, memory_order_relaxed);
    char from[VEER__TASK_NAME_MAX] = "";
    if (old != NULL)
        memcpy(from, old->task, sizeof from);
    uint64_t epoch = ch->epoch + 1;

    Veer__Journal__ChannelSwitch sw = VEER__JOURNAL__CHANNEL_SWITCH__INIT;
    sw.channel = ch->name;
    sw.task = t->name;
    sw.epoch = epoch;
    Veer__Journal__JournalRecord rec = VEER__JOURNAL__JOURNAL_RECORD__INIT;
    rec.body_case = VEER__JOURNAL__JOURNAL_RECORD__BODY_CHANNEL_SWITCH;
    rec.channel_switch = &sw;
    if ((rc = journal(s, &rec, err)) < 0)
        return rc;
    if ((rc = apply_switch(s, ch, t, epoch, err)) < 0)
        return rc; /* no memory for the new task object: journaled but not live until restart */
    if (s->events != NULL)
        veer__events_switched(s->events, ch->name, from, t->name, epoch);
    *out = ch;
    return 0;
}

static int replay_put(veer__store *s, const Veer__Journal__TaskPut *put)
{
    if (put->spec == NULL || put->name == NULL)
        return VEER_EJOURNAL;
    Veer__Wire__TaskSpec *spec = veer__spec_copy(put->spec);
    if (spec == NULL)
        return VEER_ENOMEM;
    uint8_t digest[32];
    veer_error err;
    int rc = veer__spec_canonical(spec, digest, &err);
    if (rc == 0 && put->digest.len == 32 && memcmp(digest, put->digest.data, 32) != 0)
        veer__log_warn("journal: task '%s' was stored with another digest; this veerd's canonical form differs",
                       put->name);
    veer__task *t = NULL;
    int created = 0;
    if (rc == 0)
        rc = veer__registry_put(s->registry, put->name, spec, digest, &t, &created, &err);
    veer__spec_free(spec);
    if (rc < 0) {
        veer__log_warn("journal: cannot restore task '%s': %s", put->name, err.message);
        return rc;
    }
    t->acknowledged = 1;
    if (t->content->state == VEER__CONTENT_ENCODED)
        return 0;
    float *z = veer__malloc(s->info->z_dim * sizeof *z);
    veer_task_report report;
    if (z == NULL)
        return VEER_ENOMEM;
    rc = veer__store_encode(s->bundle, t->content->spec, s->max_samples, z, &report, &err);
    if (rc == 0)
        rc = veer__content_set_z(t->content, z, s->info->z_dim, &report);
    else {
        /* Kept, so an operator sees it and can drop it; switching to it is refused. */
        t->content->state = VEER__CONTENT_FAILED;
        veer__log_warn("journal: task '%s' does not encode for the loaded model (%s: %s); kept unusable",
                       put->name, err.field, err.message);
        rc = 0;
    }
    veer__free(z);
    return rc;
}

/* Leaves `ch` with no task at `epoch`; its former task is no longer active on it. */
static void clear_channel(veer__store *s, veer__channel *ch, uint64_t epoch)
{
    veer__task *old_task = active_task_of(s, ch);
    if (old_task != NULL && old_task->active_on > 0)
        old_task->active_on--;
    veer__channels_clear(s->channels, ch, epoch);
}

static int replay_switch(veer__store *s, const Veer__Journal__ChannelSwitch *sw)
{
    veer_error err;
    veer__task *t = veer__registry_find(s->registry, sw->task);
    veer__channel *ch;
    int rc = veer__channels_get_or_create(s->channels, sw->channel, &ch, &err);
    if (rc < 0) {
        veer__log_warn("journal: cannot restore channel '%s': %s", sw->channel, err.message);
        return rc;
    }
    /* Epochs never go backwards, even in a journal whose records disagree. */
    uint64_t epoch = sw->epoch > ch->epoch ? sw->epoch : ch->epoch;
    if (sw->task[0] == '\0') {
        clear_channel(s, ch, epoch); /* compaction's record of a channel without a task */
        return 0;
    }
    if (t == NULL || t->content->state != VEER__CONTENT_ENCODED) {
        /* The supervisor was told this switch happened, so the channel must not go on with the
         * task it replaced: it falls back until someone switches it again. */
        clear_channel(s, ch, epoch);
        veer__log_warn("journal: channel '%s' was switched to task '%s', which is %s; it starts with no task",
                       sw->channel, sw->task, t == NULL ? "missing" : "not encodable");
        return VEER_ENOTASK;
    }
    return apply_switch(s, ch, t, epoch, &err);
}

int veer__store_replay(void *ctx, const Veer__Journal__JournalRecord *rec)
{
    veer__store *s = ctx;
    switch (rec->body_case) {
    case VEER__JOURNAL__JOURNAL_RECORD__BODY_PUT:
        return replay_put(s, rec->put);
    case VEER__JOURNAL__JOURNAL_RECORD__BODY_DROP: {
        veer__task *t = veer__registry_find(s->registry, rec->drop->name);
        if (t == NULL)
            return VEER_ENOTASK;
        if (t->active_on > 0)
            return VEER_ETASKACTIVE;
        veer__registry_remove(s->registry, t);
        return 0;
    }
    case VEER__JOURNAL__JOURNAL_RECORD__BODY_CHANNEL_SWITCH:
        return replay_switch(s, rec->channel_switch);
    default:
        return VEER_EJOURNAL;
    }
}

int veer__store_compact(veer__store *s, int force, veer_error *err)
{
    /* Past the threshold, compact only once the journal has doubled since the last compaction:
     * when the live state alone is near the threshold, compacting after every append would
     * rewrite everything each time. */
    uint64_t size = s->journal ? veer__journal_size(s->journal) : 0;
    if (s->journal == NULL || (!force && (size < s->journal_compact_bytes || size < 2 * s->journal_live_bytes)))
        return 0;
    uint64_t before = veer__journal_size(s->journal);
    int rc = veer__journal_compact_begin(s->journal, err);
    for (uint32_t i = 0; rc == 0 && i < veer__registry_count(s->registry); i++) {
        veer__task *t = veer__registry_at(s->registry, i);
        if (!t->acknowledged)
            continue; /* its put is journaled when its encoding finishes */
        Veer__Journal__TaskPut put;
        Veer__Journal__JournalRecord rec;
        put_record(t, &rec, &put);
        rc = veer__journal_compact_add(s->journal, &rec, err);
    }
    for (uint32_t i = 0; rc == 0 && i < veer__channels_capacity(s->channels); i++) {
        veer__channel *ch = veer__channels_slot(s->channels, i);
        veer__active_task *a = ch ? atomic_load_explicit(&ch->active, memory_order_relaxed) : NULL;
        /* A channel left without a task (its task could not be restored) still has an epoch
         * that must never go backwards, so it is written too, with no task. */
        if (ch == NULL || (a == NULL && ch->epoch == 0))
            continue;
        Veer__Journal__ChannelSwitch sw = VEER__JOURNAL__CHANNEL_SWITCH__INIT;
        sw.channel = ch->name;
        sw.task = a ? (char *)a->task : "";
        sw.epoch = ch->epoch;
        Veer__Journal__JournalRecord rec = VEER__JOURNAL__JOURNAL_RECORD__INIT;
        rec.body_case = VEER__JOURNAL__JOURNAL_RECORD__BODY_CHANNEL_SWITCH;
        rec.channel_switch = &sw;
        rc = veer__journal_compact_add(s->journal, &rec, err);
    }
    if (rc == 0)
        rc = veer__journal_compact_commit(s->journal, err);
    else
        veer__journal_compact_abort(s->journal);
    if (rc == 0)
        s->journal_live_bytes = veer__journal_size(s->journal);
    if (rc == 0)
        veer__log_info("journal compacted from %llu to %llu bytes", (unsigned long long)before,
                       (unsigned long long)veer__journal_size(s->journal));
    else
        veer__log_warn("journal compaction failed (the old journal stays in use): %s", err ? err->message : "");
    return rc;
}
