/* libveer_client's supervisor calls: tasks and channels on veerd's admin socket.
 *
 * Each call is one request and one reply. The reply stays unpacked in the client, and the
 * public result structs are views into it, so a caller gets plain C structs without a
 * free function per type; the price is that a result lives only until the next call, which the
 * header says. */
#include "client_internal.h"

#include <string.h>

static int need_admin(veer_client *c, veer_error *err)
{
    if (c->admin_sock == NULL)
        return veer__error_set(err, VEER_EINVAL, "admin_endpoint",
                               "this client was opened without an admin endpoint");
    return 0;
}

static int check_name(const char *name, const char *field, veer_error *err)
{
    if (name == NULL || name[0] == '\0')
        return veer__error_set(err, VEER_EINVAL, field, "%s is empty", field);
    if (strlen(name) >= VEER_CLIENT_NAME_MAX)
        return veer__error_set(err, VEER_EINVAL, field, "%s is longer than %d bytes", field,
                               VEER_CLIENT_NAME_MAX - 1);
    return 0;
}

/* One admin round trip expecting `want` (or Done when `want` is DONE). */
static int call(veer_client *c, Veer__Wire__Request *req, Veer__Wire__Reply__BodyCase want,
                veer_error *err)
{
    int rc = need_admin(c, err);
    if (rc != 0)
        return rc;
    veer__client_release_last(c);
    Veer__Wire__Reply *r;
    if ((rc = veer__client_call(c, c->admin_sock, req, &r, err)) != 0)
        return rc;
    /* Only the expected kind will do: callers read *out from it, and a Done where a task or a
     * channel was expected would leave them a NULL view with a success code. */
    if (r->body_case != want) {
        int got = (int)r->body_case; /* read before the reply is freed */
        veer__wire__reply__free_unpacked(r, &veer__client_heap);
        return veer__error_set(err, VEER_EBADMSG, "reply",
                               "veerd answered with message %d where %d was expected; are the "
                               "client and veerd the same version?",
                               got, (int)want);
    }
    c->last = r;
    return 0;
}

/* Builds task views over `infos`; the active_on lists point into the unpacked reply. */
static int task_views(veer_client *c, Veer__Wire__TaskInfo **infos, size_t n,
                      const veer_client_task **out, veer_error *err)
{
    veer_client_task *v = veer__calloc(n ? n : 1, sizeof *v);
    if (v == NULL)
        return veer__error_set(err, VEER_ENOMEM, "", "out of memory for %zu tasks", n);
    c->views = v;
    for (size_t i = 0; i < n; i++) {
        const Veer__Wire__TaskInfo *t = infos[i];
        v[i].name = t->name;
        if (t->digest.len == sizeof v[i].digest)
            memcpy(v[i].digest, t->digest.data, sizeof v[i].digest);
        v[i].source = t->source;
        v[i].count = t->count;
        v[i].r2 = t->r2;
        v[i].norm_raw = t->norm_raw;
        v[i].z_dim = (uint32_t)t->n_z;
        v[i].z = t->z;
        v[i].active_on_count = (uint32_t)t->n_active_on;
        v[i].active_on = (const char *const *)t->active_on;
        v[i].encoded = t->encoded;
    }
    *out = v;
    return 0;
}

static Veer__Wire__Choice choice(int opt)
{
    if (opt == VEER_OPT_DEFAULT)
        return VEER__WIRE__CHOICE__CHOICE_DEFAULT;
    return opt ? VEER__WIRE__CHOICE__CHOICE_ON : VEER__WIRE__CHOICE__CHOICE_OFF;
}

int veer_client_task_put(veer_client *c, const char *name, const veer_task_spec *spec,
                         uint32_t state_dim, const veer_client_task **out, veer_error *err)
{
    int rc;
    if (out != NULL)
        *out = NULL;
    if ((rc = check_name(name, "name", err)) != 0)
        return rc;
    if (spec == NULL)
        return veer__error_set(err, VEER_EINVAL, "spec", "the task specification is missing");
    int with_states = spec->source != VEER_TASK_REFERENCE;
    int with_values = spec->source != VEER_TASK_GOALS || spec->values != NULL;
    if (spec->source != VEER_TASK_SAMPLES && spec->source != VEER_TASK_GOALS &&
        spec->source != VEER_TASK_REFERENCE)
        return veer__error_set(err, VEER_EINVAL, "spec.source", "unknown task source %d",
                               (int)spec->source);
    if (spec->count > 0 && with_states && (spec->states == NULL || state_dim == 0))
        return veer__error_set(err, VEER_EINVAL, "spec.states", "the states are missing");
    if (spec->count > 0 && with_values && spec->values == NULL)
        return veer__error_set(err, VEER_EINVAL, "spec.values", "the rewards are missing");
    if (with_states && (uint64_t)spec->count * state_dim > SIZE_MAX / sizeof(float))
        return veer__error_set(err, VEER_ETOOMANY, "spec.count", "too many states");

    size_t n_states = with_states ? (size_t)spec->count * state_dim : 0;
    size_t n_values = with_values ? spec->count : 0;
    Veer__Wire__RewardSamples samples = VEER__WIRE__REWARD_SAMPLES__INIT;
    Veer__Wire__GoalStates goals = VEER__WIRE__GOAL_STATES__INIT;
    Veer__Wire__ReferenceRewards reference = VEER__WIRE__REFERENCE_REWARDS__INIT;
    Veer__Wire__TaskOptions opts = VEER__WIRE__TASK_OPTIONS__INIT;
    Veer__Wire__TaskSpec ts = VEER__WIRE__TASK_SPEC__INIT;
    opts.rescale = choice(spec->rescale);
    opts.center = choice(spec->center);
    opts.cov_correction = spec->cov_correction != 0;
    opts.ridge = spec->ridge < 0 ? 0.0f : spec->ridge;
    ts.options = &opts;
    switch (spec->source) {
    case VEER_TASK_SAMPLES:
        samples.n_states = n_states;
        samples.states = (float *)spec->states;
        samples.n_rewards = n_values;
        samples.rewards = (float *)spec->values;
        ts.source_case = VEER__WIRE__TASK_SPEC__SOURCE_SAMPLES;
        ts.samples = &samples;
        break;
    case VEER_TASK_GOALS:
        goals.n_states = n_states;
        goals.states = (float *)spec->states;
        goals.n_weights = n_values;
        goals.weights = (float *)spec->values;
        ts.source_case = VEER__WIRE__TASK_SPEC__SOURCE_GOALS;
        ts.goals = &goals;
        break;
    default:
        reference.n_rewards = n_values;
        reference.rewards = (float *)spec->values;
        ts.source_case = VEER__WIRE__TASK_SPEC__SOURCE_REFERENCE;
        ts.reference = &reference;
        break;
    }
    Veer__Wire__PutTask put = VEER__WIRE__PUT_TASK__INIT;
    put.name = (char *)name;
    put.spec = &ts;
    Veer__Wire__Request req = VEER__WIRE__REQUEST__INIT;
    req.body_case = VEER__WIRE__REQUEST__BODY_PUT_TASK;
    req.put_task = &put;
    if ((rc = call(c, &req, VEER__WIRE__REPLY__BODY_TASK, err)) != 0)
        return rc;
    if (c->last->body_case == VEER__WIRE__REPLY__BODY_TASK && out != NULL)
        return task_views(c, &c->last->task, 1, out, err);
    return 0;
}

int veer_client_task_get(veer_client *c, const char *name, const veer_client_task **out,
                         veer_error *err)
{
    int rc;
    *out = NULL;
    if ((rc = check_name(name, "name", err)) != 0)
        return rc;
    Veer__Wire__GetTask get = VEER__WIRE__GET_TASK__INIT;
    get.name = (char *)name;
    Veer__Wire__Request req = VEER__WIRE__REQUEST__INIT;
    req.body_case = VEER__WIRE__REQUEST__BODY_GET_TASK;
    req.get_task = &get;
    if ((rc = call(c, &req, VEER__WIRE__REPLY__BODY_TASK, err)) != 0)
        return rc;
    if (c->last->body_case != VEER__WIRE__REPLY__BODY_TASK)
        return veer__error_set(err, VEER_EBADMSG, "reply", "veerd sent no task record");
    return task_views(c, &c->last->task, 1, out, err);
}

int veer_client_task_list(veer_client *c, const veer_client_task **tasks, size_t *count,
                          veer_error *err)
{
    int rc;
    *tasks = NULL;
    *count = 0;
    Veer__Wire__ListTasks list = VEER__WIRE__LIST_TASKS__INIT;
    Veer__Wire__Request req = VEER__WIRE__REQUEST__INIT;
    req.body_case = VEER__WIRE__REQUEST__BODY_LIST_TASKS;
    req.list_tasks = &list;
    if ((rc = call(c, &req, VEER__WIRE__REPLY__BODY_TASKS, err)) != 0)
        return rc;
    if (c->last->body_case != VEER__WIRE__REPLY__BODY_TASKS)
        return 0; /* Done: no tasks */
    *count = c->last->tasks->n_tasks;
    return task_views(c, c->last->tasks->tasks, *count, tasks, err);
}

int veer_client_task_drop(veer_client *c, const char *name, veer_error *err)
{
    int rc;
    if ((rc = check_name(name, "name", err)) != 0)
        return rc;
    Veer__Wire__DropTask drop = VEER__WIRE__DROP_TASK__INIT;
    drop.name = (char *)name;
    Veer__Wire__Request req = VEER__WIRE__REQUEST__INIT;
    req.body_case = VEER__WIRE__REQUEST__BODY_DROP_TASK;
    req.drop_task = &drop;
    return call(c, &req, VEER__WIRE__REPLY__BODY_DONE, err);
}

static int channel_views(veer_client *c, Veer__Wire__ChannelInfo **infos, size_t n,
                         const veer_client_channel **out, veer_error *err)
{
    veer_client_channel *v = veer__calloc(n ? n : 1, sizeof *v);
    if (v == NULL)
        return veer__error_set(err, VEER_ENOMEM, "", "out of memory for %zu channels", n);
    c->views = v;
    for (size_t i = 0; i < n; i++) {
        v[i].name = infos[i]->name;
        v[i].task = infos[i]->task;
        v[i].epoch = infos[i]->epoch;
        v[i].acts = infos[i]->acts;
    }
    *out = v;
    return 0;
}

int veer_client_switch(veer_client *c, const char *channel, const char *task,
                       const veer_client_channel **out, veer_error *err)
{
    int rc;
    if (out != NULL)
        *out = NULL;
    if ((rc = check_name(channel, "channel", err)) != 0 ||
        (rc = check_name(task, "task", err)) != 0)
        return rc;
    Veer__Wire__SwitchChannel sw = VEER__WIRE__SWITCH_CHANNEL__INIT;
    sw.channel = (char *)channel;
    sw.task = (char *)task;
    Veer__Wire__Request req = VEER__WIRE__REQUEST__INIT;
    req.body_case = VEER__WIRE__REQUEST__BODY_SWITCH_CHANNEL;
    req.switch_channel = &sw;
    if ((rc = call(c, &req, VEER__WIRE__REPLY__BODY_CHANNEL, err)) != 0)
        return rc;
    if (c->last->body_case == VEER__WIRE__REPLY__BODY_CHANNEL && out != NULL)
        return channel_views(c, &c->last->channel, 1, out, err);
    return 0;
}

int veer_client_channels(veer_client *c, const veer_client_channel **channels, size_t *count,
                         veer_error *err)
{
    int rc;
    *channels = NULL;
    *count = 0;
    Veer__Wire__ListChannels list = VEER__WIRE__LIST_CHANNELS__INIT;
    Veer__Wire__Request req = VEER__WIRE__REQUEST__INIT;
    req.body_case = VEER__WIRE__REQUEST__BODY_LIST_CHANNELS;
    req.list_channels = &list;
    if ((rc = call(c, &req, VEER__WIRE__REPLY__BODY_CHANNELS, err)) != 0)
        return rc;
    if (c->last->body_case != VEER__WIRE__REPLY__BODY_CHANNELS)
        return 0;
    *count = c->last->channels->n_channels;
    return channel_views(c, c->last->channels->channels, *count, channels, err);
}

int veer_client_status_get(veer_client *c, const veer_client_status **out, veer_error *err)
{
    int rc;
    *out = NULL;
    Veer__Wire__StatusRequest st = VEER__WIRE__STATUS_REQUEST__INIT;
    Veer__Wire__Request req = VEER__WIRE__REQUEST__INIT;
    req.body_case = VEER__WIRE__REQUEST__BODY_STATUS;
    req.status = &st;
    if ((rc = call(c, &req, VEER__WIRE__REPLY__BODY_STATUS, err)) != 0)
        return rc;
    if (c->last->body_case != VEER__WIRE__REPLY__BODY_STATUS)
        return veer__error_set(err, VEER_EBADMSG, "reply", "veerd sent no status");
    veer_client_status *v = veer__calloc(1, sizeof *v);
    if (v == NULL)
        return veer__error_set(err, VEER_ENOMEM, "", "out of memory");
    c->views = v;
    const Veer__Wire__StatusReply *s = c->last->status;
    v->model_version = s->model_version;
    v->version = s->version;
    v->ready = s->ready;
    v->uptime_s = s->uptime_s;
    v->tasks = s->tasks;
    v->channels = s->channels;
    v->acts = s->acts;
    v->fallbacks = s->fallbacks;
    v->deadline_misses = s->deadline_misses;
    *out = v;
    return 0;
}
