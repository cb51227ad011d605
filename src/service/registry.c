/* The task registry (see registry.h): two small arrays, names and contents, the second shared
 * by reference count. Order is insertion order so listings and journal compaction are stable. */
#include "service/registry.h"

#include <string.h>

#include "base/base.h"
#include "service/channels.h"
#include "service/spec.h"

struct veer__registry {
    uint32_t max_tasks;
    uint32_t count;
    veer__task **tasks;
    uint32_t contents_count;
    veer__content **contents;
};

int veer__registry_create(uint32_t max_tasks, veer__registry **out)
{
    veer__registry *r = veer__calloc(1, sizeof *r);
    if (r == NULL)
        return VEER_ENOMEM;
    r->max_tasks = max_tasks;
    r->tasks = veer__calloc(max_tasks, sizeof *r->tasks);
    r->contents = veer__calloc(max_tasks, sizeof *r->contents);
    if (r->tasks == NULL || r->contents == NULL) {
        veer__free(r->tasks);
        veer__free(r->contents);
        veer__free(r);
        return VEER_ENOMEM;
    }
    *out = r;
    return 0;
}

static void content_free(veer__content *c)
{
    veer__spec_free(c->spec);
    veer__free(c->z);
    veer__free(c);
}

void veer__registry_destroy(veer__registry *r)
{
    if (r == NULL)
        return;
    for (uint32_t i = 0; i < r->count; i++) {
        veer__free(r->tasks[i]->name);
        veer__free(r->tasks[i]);
    }
    for (uint32_t i = 0; i < r->contents_count; i++)
        content_free(r->contents[i]);
    veer__free(r->tasks);
    veer__free(r->contents);
    veer__free(r);
}

veer__task *veer__registry_find(veer__registry *r, const char *name)
{
    for (uint32_t i = 0; i < r->count; i++)
        if (strcmp(r->tasks[i]->name, name) == 0)
            return r->tasks[i];
    return NULL;
}

static veer__content *find_content(veer__registry *r, const uint8_t digest[32])
{
    for (uint32_t i = 0; i < r->contents_count; i++)
        if (memcmp(r->contents[i]->digest, digest, 32) == 0)
            return r->contents[i];
    return NULL;
}

int veer__registry_put(veer__registry *r, const char *name, const Veer__Wire__TaskSpec *spec,
                       const uint8_t digest[32], veer__task **out, int *created, veer_error *err)
{
    size_t len = strlen(name);
    if (len == 0)
        return veer__error_set(err, VEER_EFIELD, "name", "the task name is empty");
    if (len >= VEER__TASK_NAME_MAX)
        return veer__error_set(err, VEER_EFIELD, "name", "task names are at most %d bytes; this one has %zu",
                               VEER__TASK_NAME_MAX - 1, len);
    veer__task *t = veer__registry_find(r, name);
    if (t != NULL) {
        if (memcmp(t->content->digest, digest, 32) != 0)
            return veer__error_set(err, VEER_ENAMECONFLICT, "name",
                                   "task '%s' exists with a different specification; drop it first or pick "
                                   "another name",
                                   name);
        *out = t;
        *created = 0;
        return 0;
    }
    if (r->count >= r->max_tasks)
        return veer__error_set(err, VEER_ETOOMANY, "name", "the registry holds %u tasks already (--max-tasks)",
                               r->max_tasks);
    t = veer__calloc(1, sizeof *t);
    if (t == NULL || (t->name = veer__strdup(name)) == NULL) {
        veer__free(t);
        return veer__error_set(err, VEER_ENOMEM, "name", NULL);
    }
    veer__content *c = find_content(r, digest);
    if (c == NULL) {
        c = veer__calloc(1, sizeof *c);
        if (c == NULL || (c->spec = veer__spec_copy(spec)) == NULL) {
            veer__free(c);
            veer__free(t->name);
            veer__free(t);
            return veer__error_set(err, VEER_ENOMEM, "spec", NULL);
        }
        memcpy(c->digest, digest, 32);
        c->state = VEER__CONTENT_PENDING;
        r->contents[r->contents_count++] = c;
    }
    c->refs++;
    t->content = c;
    r->tasks[r->count++] = t;
    *out = t;
    *created = 1;
    return 0;
}

void veer__registry_remove(veer__registry *r, veer__task *task)
{
    uint32_t i = 0;
    while (i < r->count && r->tasks[i] != task)
        i++;
    if (i == r->count)
        return;
    memmove(&r->tasks[i], &r->tasks[i + 1], (r->count - i - 1) * sizeof *r->tasks);
    r->count--;
    veer__content *c = task->content;
    if (--c->refs == 0) {
        uint32_t k = 0;
        while (k < r->contents_count && r->contents[k] != c)
            k++;
        memmove(&r->contents[k], &r->contents[k + 1], (r->contents_count - k - 1) * sizeof *r->contents);
        r->contents_count--;
        content_free(c);
    }
    veer__free(task->name);
    veer__free(task);
}

uint32_t veer__registry_count(const veer__registry *r) { return r->count; }
veer__task *veer__registry_at(veer__registry *r, uint32_t i) { return i < r->count ? r->tasks[i] : NULL; }

int veer__content_set_z(veer__content *c, const float *z, uint32_t z_dim, const veer_task_report *report)
{
    float *copy = veer__malloc((size_t)z_dim * sizeof *copy);
    if (copy == NULL)
        return VEER_ENOMEM;
    memcpy(copy, z, (size_t)z_dim * sizeof *copy);
    veer__free(c->z);
    c->z = copy;
    if (report != NULL)
        c->report = *report;
    c->state = VEER__CONTENT_ENCODED;
    return 0;
}
