/* `veer inspect BUNDLE [--json]`: what a model bundle holds, for people and for scripts.
 *
 * The bundle is opened with libveer first, so a file is described only after the runtime's own
 * validator accepted it, and a bad file gets the runtime's error code and field (exit 3). Layer
 * shapes and a few labels are not part of veer_model_info, so the command then decodes the same
 * payload with protobuf-c and checks that its digest is the one libveer loaded: the description
 * is always of the model libveer validated. Text goes to stdout; --json prints one object with
 * the same keys as the Python reader's `python3 -m veer.bundle show --json`.
 */
#include <cjson/cJSON.h>
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"
#include "cli.h"
#include "veer/runtime.h"
#include "veer_bundle.pb-c.h"

typedef struct inspect_file {
    uint8_t *data;
    Veer__Bundle__BundleFile *frame;
    Veer__Bundle__Model *model;
} inspect_file;

static void inspect_file_free(inspect_file *f)
{
    if (f->model)
        veer__bundle__model__free_unpacked(f->model, NULL);
    if (f->frame)
        veer__bundle__bundle_file__free_unpacked(f->frame, NULL);
    veer__free(f->data);
}

/* Reads and decodes the file libveer has just validated. Returns 0, or -1 with a message on
 * stderr when the file cannot be read again or has changed since libveer read it. */
static int inspect_file_read(const char *path, const veer_model_info *info, inspect_file *f)
{
    memset(f, 0, sizeof *f);
    FILE *fp = fopen(path, "rb");
    long len = -1;
    if (fp != NULL && fseek(fp, 0, SEEK_END) == 0)
        len = ftell(fp);
    if (fp == NULL || len < 8 || fseek(fp, 0, SEEK_SET) != 0 ||
        (f->data = veer__malloc((size_t)len)) == NULL ||
        fread(f->data, 1, (size_t)len, fp) != (size_t)len) {
        fprintf(stderr, "veer inspect: %s: cannot read the file again: %s\n", path,
                errno ? strerror(errno) : "short read");
        if (fp)
            fclose(fp);
        return -1;
    }
    fclose(fp);
    uint8_t digest[VEER_DIGEST_BYTES];
    f->frame = veer__bundle__bundle_file__unpack(NULL, (size_t)len - 8, f->data + 8);
    if (f->frame != NULL)
        f->model = veer__bundle__model__unpack(NULL, f->frame->payload.len, f->frame->payload.data);
    if (f->model == NULL ||
        veer__digest(f->frame->payload.data, f->frame->payload.len, digest) != 0 ||
        memcmp(digest, info->digest, VEER_DIGEST_BYTES) != 0) {
        fprintf(stderr, "veer inspect: %s: the file changed while it was being read\n", path);
        return -1;
    }
    return 0;
}

static const char *layer_kind_name(int kind)
{
    switch (kind) {
    case VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR:
        return "linear";
    case VEER__BUNDLE__LAYER_KIND__LAYER_EMBEDDING:
        return "embedding";
    case VEER__BUNDLE__LAYER_KIND__LAYER_RELU:
        return "relu";
    case VEER__BUNDLE__LAYER_KIND__LAYER_TANH:
        return "tanh";
    case VEER__BUNDLE__LAYER_KIND__LAYER_LAYER_NORM:
        return "layer_norm";
    case VEER__BUNDLE__LAYER_KIND__LAYER_RESCALE_NORM:
        return "rescale_norm";
    default:
        return "unset";
    }
}

static const char *input_kind_name(int kind)
{
    switch (kind) {
    case VEER__BUNDLE__INPUT_KIND__INPUT_STATE:
        return "state";
    case VEER__BUNDLE__INPUT_KIND__INPUT_ACTION:
        return "action";
    case VEER__BUNDLE__INPUT_KIND__INPUT_TASK:
        return "task";
    default:
        return "unset";
    }
}

static size_t layers_params(Veer__Bundle__Layer *const *layers, size_t n)
{
    size_t total = 0;
    for (size_t i = 0; i < n; i++)
        total += layers[i]->n_weight + layers[i]->n_bias;
    return total;
}

static size_t network_params(const Veer__Bundle__Network *net)
{
    size_t total = layers_params(net->head, net->n_head);
    for (size_t b = 0; b < net->n_branches; b++)
        total += layers_params(net->branches[b]->layers, net->branches[b]->n_layers);
    return total;
}

static int reads_b(const veer_model_info *info, uint32_t feature)
{
    for (uint32_t i = 0; i < info->b_feature_count; i++)
        if (info->b_features[i] == feature)
            return 1;
    return 0;
}

/* The training standard deviation of one feature: the root of the covariance's diagonal. */
static float feature_std(const veer_model_info *info, uint32_t i)
{
    return sqrtf(fmaxf(info->state_cov[(size_t)i * info->state_dim + i], 0.0f));
}

/* ---- text ------------------------------------------------------------------------------- */

static void print_layers(const char *label, Veer__Bundle__Layer *const *layers, size_t n)
{
    printf("    %s", label);
    for (size_t i = 0; i < n; i++)
        printf("%s%s(%u->%u)", i ? " -> " : "", layer_kind_name(layers[i]->kind), layers[i]->in_dim,
               layers[i]->out_dim);
    printf("%s\n", n ? "" : "(none)");
}

static void print_network(const char *name, const Veer__Bundle__Network *net)
{
    int bilinear = net->merge == VEER__BUNDLE__MERGE_KIND__MERGE_BILINEAR;
    printf("  network %s: %s of %zu branch%s, %zu parameters\n", name,
           bilinear ? "bilinear" : "concat", net->n_branches, net->n_branches == 1 ? "" : "es",
           network_params(net));
    if (bilinear)
        printf("    bilinear: k %u, matrix branch %u, bias %s\n", net->bilinear_k,
               net->matrix_branch, net->bilinear_bias ? "yes" : "no");
    for (size_t b = 0; b < net->n_branches; b++) {
        const Veer__Bundle__Branch *br = net->branches[b];
        printf("    branch %s reads", br->name);
        for (size_t i = 0; i < br->n_inputs; i++) {
            const Veer__Bundle__Input *in = br->inputs[i];
            printf("%s %s", i ? "," : "", input_kind_name(in->kind));
            if (in->n_features) {
                printf("[");
                for (size_t j = 0; j < in->n_features; j++)
                    printf("%s%u", j ? " " : "", in->features[j]);
                printf("]");
            }
            if (in->as_index)
                printf(" (index)");
        }
        printf("\n");
        print_layers("  layers: ", br->layers, br->n_layers);
    }
    print_layers("head: ", net->head, net->n_head);
}

static void print_text(const char *path, const veer_model_info *info, const inspect_file *f,
                       size_t memory)
{
    const Veer__Bundle__Model *m = f->model;
    printf("bundle %s\n", path);
    printf("  model version  %s (format %u)\n", info->model_version, f->frame->format_version);
    printf("  digest         ");
    for (int i = 0; i < VEER_DIGEST_BYTES; i++)
        printf("%02x", info->digest[i]);
    printf("\n  dimensions     state %u, z %u; discount %g, decision step %g s\n", info->state_dim,
           info->z_dim, (double)info->discount, (double)info->decision_step_s);
    printf("  memory         %zu bytes once loaded\n", memory);
    if (info->action_kind == VEER_ACTION_CONTINUOUS) {
        printf("  actions        continuous, %u dimensions%s\n", info->action_dim,
               m->actor_normalized ? " (actor output in [-1, 1], mapped onto the bounds)" : "");
        for (uint32_t i = 0; i < info->action_dim; i++) {
            const char *name = i < m->action->n_names ? m->action->names[i] : "";
            printf("    %2u %-28s [%g, %g]  fallback %g\n", i, name, (double)info->action_low[i],
                   (double)info->action_high[i], (double)info->fallback_action[i]);
        }
    } else {
        printf("  actions        discrete, %u actions; fallback action %u\n", info->action_count,
               (unsigned)info->fallback_action[0]);
        for (uint32_t i = 0; i < m->action->n_names; i++)
            printf("    %2u %s\n", i, m->action->names[i]);
    }
    printf("  features       %u (* read by B: %u of them)%s\n", info->state_dim,
           info->b_feature_count, info->has_stats ? "; training mean and std" : "");
    int width = 0;
    for (uint32_t i = 0; i < info->state_dim; i++) {
        int len = (int)strlen(info->feature_names[i]);
        width = len > width ? len : width;
    }
    for (uint32_t i = 0; i < info->state_dim; i++) {
        printf("    %c %3u %-*s", reads_b(info, i) ? '*' : ' ', i, width, info->feature_names[i]);
        if (info->has_stats)
            printf("  %11.4g  %10.4g", (double)info->state_mean[i], (double)feature_std(info, i));
        printf("\n");
    }
    printf("  task defaults  rescale %s (norm %g), center rewards %s, ridge %g\n",
           info->rescale ? "on" : "off", (double)info->rescale_norm,
           info->center_rewards ? "on" : "off", (double)info->ridge);
    print_network("forward (F)", m->forward);
    print_network("backward (B)", m->backward);
    if (m->actor)
        print_network("actor", m->actor);
    if (info->has_stats)
        printf("  drift stats    %llu states, %u bins per feature, Mahalanobis p99 %g, "
               "p99.9 %g (ridge %g)\n",
               (unsigned long long)info->stats_count, info->bins, (double)info->mahalanobis_p99,
               (double)info->mahalanobis_p999, (double)info->cov_ridge);
    else
        printf("  drift stats    absent: veerd cannot report drift for this model\n");
    printf("  reference set  %u states; Cov(B) %s\n", info->reference_count,
           info->cov_b ? "present" : "absent");
    printf("  provenance     %s, created %s\n", info->producer, info->created);
    printf("    source       %s\n", info->source_digest);
    if (info->settings[0])
        printf("    settings     %s\n", info->settings);
    if (info->notes[0])
        printf("    notes        %s\n", info->notes);
}

/* ---- JSON (the keys of `python3 -m veer.bundle show --json`) ----------------------------- */

/* A float32 as the shortest decimal that reads back as the same float32 ("0.98", not the
 * widened double's "0.98000001907348633"): exact for a machine, readable for a person. */
static cJSON *json_f32(float x)
{
    char buf[32];
    for (int digits = 6; digits <= 9; digits++) {
        snprintf(buf, sizeof buf, "%.*g", digits, (double)x);
        if ((float)strtod(buf, NULL) == x)
            break;
    }
    return cJSON_CreateNumber(strtod(buf, NULL));
}

static void json_add_f32(cJSON *o, const char *key, float x)
{
    cJSON_AddItemToObject(o, key, json_f32(x));
}

static cJSON *json_floats(const float *v, size_t n)
{
    cJSON *a = cJSON_CreateArray();
    for (size_t i = 0; v != NULL && i < n; i++)
        cJSON_AddItemToArray(a, json_f32(v[i]));
    return a;
}

static cJSON *json_layers(Veer__Bundle__Layer *const *layers, size_t n)
{
    cJSON *a = cJSON_CreateArray();
    for (size_t i = 0; i < n; i++) {
        cJSON *l = cJSON_CreateObject();
        cJSON_AddStringToObject(l, "kind", layer_kind_name(layers[i]->kind));
        cJSON_AddNumberToObject(l, "in", layers[i]->in_dim);
        cJSON_AddNumberToObject(l, "out", layers[i]->out_dim);
        cJSON_AddItemToArray(a, l);
    }
    return a;
}

static cJSON *json_network(const Veer__Bundle__Network *net)
{
    cJSON *o = cJSON_CreateObject();
    int bilinear = net->merge == VEER__BUNDLE__MERGE_KIND__MERGE_BILINEAR;
    cJSON_AddStringToObject(o, "merge", bilinear ? "bilinear" : "concat");
    cJSON_AddNumberToObject(o, "parameters", (double)network_params(net));
    cJSON *branches = cJSON_AddArrayToObject(o, "branches");
    for (size_t b = 0; b < net->n_branches; b++) {
        const Veer__Bundle__Branch *br = net->branches[b];
        cJSON *jb = cJSON_CreateObject();
        cJSON_AddStringToObject(jb, "name", br->name);
        cJSON *inputs = cJSON_AddArrayToObject(jb, "inputs");
        for (size_t i = 0; i < br->n_inputs; i++) {
            cJSON *ji = cJSON_CreateObject();
            cJSON_AddStringToObject(ji, "kind", input_kind_name(br->inputs[i]->kind));
            cJSON *feats = cJSON_AddArrayToObject(ji, "features");
            for (size_t j = 0; j < br->inputs[i]->n_features; j++)
                cJSON_AddItemToArray(feats, cJSON_CreateNumber(br->inputs[i]->features[j]));
            cJSON_AddBoolToObject(ji, "as_index", br->inputs[i]->as_index);
            cJSON_AddItemToArray(inputs, ji);
        }
        cJSON_AddItemToObject(jb, "layers", json_layers(br->layers, br->n_layers));
        cJSON_AddItemToArray(branches, jb);
    }
    cJSON_AddItemToObject(o, "head", json_layers(net->head, net->n_head));
    if (bilinear) {
        cJSON *bl = cJSON_AddObjectToObject(o, "bilinear");
        cJSON_AddNumberToObject(bl, "k", net->bilinear_k);
        cJSON_AddNumberToObject(bl, "matrix_branch", net->matrix_branch);
        cJSON_AddBoolToObject(bl, "bias", net->bilinear_bias);
    }
    return o;
}

static cJSON *json_summary(const char *path, const veer_model_info *info, const inspect_file *f,
                           size_t memory)
{
    const Veer__Bundle__Model *m = f->model;
    char hex[2 * VEER_DIGEST_BYTES + 1];
    for (int i = 0; i < VEER_DIGEST_BYTES; i++)
        snprintf(hex + 2 * i, 3, "%02x", info->digest[i]);
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "file", path);
    cJSON_AddNumberToObject(o, "format_version", f->frame->format_version);
    cJSON_AddStringToObject(o, "digest", hex);
    cJSON_AddStringToObject(o, "model_version", info->model_version);
    cJSON_AddNumberToObject(o, "state_dim", info->state_dim);
    cJSON_AddNumberToObject(o, "z_dim", info->z_dim);
    json_add_f32(o, "discount", info->discount);
    json_add_f32(o, "decision_step_s", info->decision_step_s);
    cJSON_AddNumberToObject(o, "memory_bytes", (double)memory);

    cJSON *feats = cJSON_AddArrayToObject(o, "features");
    for (uint32_t i = 0; i < info->state_dim; i++) {
        cJSON *jf = cJSON_CreateObject();
        cJSON_AddNumberToObject(jf, "index", i);
        cJSON_AddStringToObject(jf, "name", info->feature_names[i]);
        cJSON_AddBoolToObject(jf, "read_by_b", reads_b(info, i));
        if (info->has_stats) {
            json_add_f32(jf, "mean", info->state_mean[i]);
            json_add_f32(jf, "std", feature_std(info, i));
        }
        cJSON_AddItemToArray(feats, jf);
    }
    cJSON *bf = cJSON_AddArrayToObject(o, "b_features");
    for (uint32_t i = 0; i < info->b_feature_count; i++)
        cJSON_AddItemToArray(bf, cJSON_CreateNumber(info->b_features[i]));

    int continuous = info->action_kind == VEER_ACTION_CONTINUOUS;
    cJSON *act = cJSON_AddObjectToObject(o, "action");
    cJSON_AddStringToObject(act, "kind", continuous ? "continuous" : "discrete");
    cJSON_AddNumberToObject(act, "dim", info->action_dim);
    cJSON_AddNumberToObject(act, "count", info->action_count);
    cJSON_AddItemToObject(act, "low",
                          json_floats(info->action_low, continuous ? info->action_dim : 0));
    cJSON_AddItemToObject(act, "high",
                          json_floats(info->action_high, continuous ? info->action_dim : 0));
    cJSON *names = cJSON_AddArrayToObject(act, "names");
    for (size_t i = 0; i < m->action->n_names; i++)
        cJSON_AddItemToArray(names, cJSON_CreateString(m->action->names[i]));
    cJSON_AddItemToObject(o, "fallback_action",
                          json_floats(info->fallback_action, info->action_dim));
    cJSON_AddBoolToObject(o, "actor_normalized", m->actor_normalized);

    cJSON *td = cJSON_AddObjectToObject(o, "task_defaults");
    cJSON_AddBoolToObject(td, "rescale", info->rescale);
    json_add_f32(td, "rescale_norm", info->rescale_norm);
    cJSON_AddBoolToObject(td, "center_rewards", info->center_rewards);
    json_add_f32(td, "ridge", info->ridge);

    cJSON *nets = cJSON_AddObjectToObject(o, "networks");
    size_t total = network_params(m->forward) + network_params(m->backward);
    cJSON_AddItemToObject(nets, "forward", json_network(m->forward));
    cJSON_AddItemToObject(nets, "backward", json_network(m->backward));
    if (m->actor) {
        cJSON_AddItemToObject(nets, "actor", json_network(m->actor));
        total += network_params(m->actor);
    }
    cJSON_AddNumberToObject(o, "parameters", (double)total);

    cJSON *st = cJSON_AddObjectToObject(o, "stats");
    cJSON_AddBoolToObject(st, "present", info->has_stats);
    if (info->has_stats) {
        cJSON_AddNumberToObject(st, "count", (double)info->stats_count);
        cJSON_AddNumberToObject(st, "bins", info->bins);
        json_add_f32(st, "cov_ridge", info->cov_ridge);
        json_add_f32(st, "mahalanobis_p99", info->mahalanobis_p99);
        json_add_f32(st, "mahalanobis_p999", info->mahalanobis_p999);
    }
    cJSON_AddNumberToObject(o, "reference_count", info->reference_count);
    cJSON_AddBoolToObject(o, "cov_b", info->cov_b != NULL);

    cJSON *pv = cJSON_AddObjectToObject(o, "provenance");
    cJSON_AddStringToObject(pv, "producer", info->producer);
    cJSON_AddStringToObject(pv, "created", info->created);
    cJSON_AddStringToObject(pv, "source_digest", info->source_digest);
    cJSON_AddStringToObject(pv, "settings", info->settings);
    cJSON_AddStringToObject(pv, "notes", info->notes);
    return o;
}

static int print_json(cJSON *o)
{
    char *s = o ? cJSON_Print(o) : NULL;
    cJSON_Delete(o);
    if (s == NULL) {
        fprintf(stderr, "veer inspect: out of memory\n");
        return VEER_CLI_REFUSED;
    }
    printf("%s\n", s);
    cJSON_free(s);
    return VEER_CLI_OK;
}

/* A bundle libveer refused: the code's name, the field and the message, on stderr, and as a
 * JSON object on stdout with --json so a script never has to parse the sentence. */
static int refuse(const char *path, int rc, const veer_error *err, int json)
{
    fprintf(stderr, "veer inspect: %s: %s in field '%s': %s\n", path, veer_errname(rc), err->field,
            err->message[0] ? err->message : veer_strerror(rc));
    if (json) {
        cJSON *o = cJSON_CreateObject();
        cJSON *e = cJSON_AddObjectToObject(o, "error");
        cJSON_AddStringToObject(o, "file", path);
        cJSON_AddNumberToObject(e, "code", rc);
        cJSON_AddStringToObject(e, "name", veer_errname(rc));
        cJSON_AddStringToObject(e, "field", err->field);
        cJSON_AddStringToObject(e, "message", err->message[0] ? err->message : veer_strerror(rc));
        print_json(o);
    }
    return VEER_CLI_INPUT;
}

static void usage(FILE *to)
{
    fprintf(to,
            "usage: veer inspect BUNDLE [--json]\n"
            "Validates a model bundle with libveer and describes it: dimensions, actions and\n"
            "bounds, fallback, features (and which ones B reads), networks with layer shapes,\n"
            "task defaults, drift statistics, reference set, provenance.\n"
            "  --json   one JSON object instead of text\n"
            "Exit 3 when the file is not a valid bundle (the error code and field are printed).\n");
}

static int run(int argc, char **argv)
{
    const char *path = NULL;
    int json = 0;
    for (int i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--json") == 0) {
            json = 1;
        } else if (strcmp(argv[i], "--help") == 0 || strcmp(argv[i], "-h") == 0) {
            usage(stdout);
            return VEER_CLI_OK;
        } else if (argv[i][0] == '-' || path != NULL) {
            fprintf(stderr, "veer inspect: unexpected argument '%s'\n", argv[i]);
            usage(stderr);
            return VEER_CLI_USAGE;
        } else {
            path = argv[i];
        }
    }
    if (path == NULL) {
        usage(stderr);
        return VEER_CLI_USAGE;
    }

    veer_bundle *bundle = NULL;
    veer_error err;
    veer_error_clear(&err);
    int rc = veer_bundle_open(path, &bundle, &err);
    if (rc != 0)
        return refuse(path, rc, &err, json);
    const veer_model_info *info = veer_bundle_info(bundle);
    inspect_file f;
    int status = VEER_CLI_INPUT;
    if (inspect_file_read(path, info, &f) == 0) {
        size_t memory = veer_bundle_memory(bundle);
        if (json) {
            status = print_json(json_summary(path, info, &f, memory));
        } else {
            print_text(path, info, &f, memory);
            status = VEER_CLI_OK;
        }
    }
    inspect_file_free(&f);
    veer_bundle_close(bundle);
    return status;
}

const veer_cli_command veer_cli_cmd_inspect = {"inspect", "describe a model bundle", run};
