/* veer-arm-drift-probe: does the drift monitor fire when the demo's parcel becomes heavier, with
 * this model's training statistics? Runs the demo's schedule in-process, without sockets or
 * timing noise: the seven tasks in suite order, 5 s each, encoded from reward samples as the
 * supervisor sends them; the policy asked every 1 ms; the physics at 1 kHz; the heavy parcel on
 * the gripper from --heavy-at for --heavy-for seconds; every state fed to a drift monitor built
 * from the bundle's statistics with the defaults veerd uses (drift.h). For each mass given it
 * prints the largest share of window states beyond the training p99 distance before, during and
 * after the heavy parcel, and whether the exceedance alarm was raised while it was on.
 * The demo's default mass was chosen with this tool (clients/demo/README.md).
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "demo_fb.h"
#include "veer/drift.h"

static int probe(const veer_bundle *b, double mass, double heavy_at, double heavy_for)
{
    veer_error err = {0};
    veer_demo_fb_policy fb;
    veer_drift_training tr;
    veer_drift *d = NULL;
    veer_drift_report *rep = NULL;
    int rc = veer_demo_fb_policy_init(&fb, b, &err);
    if (rc)
        goto out;
    if ((rc = veer_drift_training_from_model(veer_bundle_info(b), &tr, &err)) != 0 ||
        (rc = veer_drift_create(&tr, NULL, &d, &err)) != 0 ||
        (rc = veer_drift_report_create(d, &rep)) != 0)
        goto out_fb;
    veer_arm_params p;
    veer_arm_params_default(&p);
    const double light = p.parcel_mass;
    const double start[4] = {-1.5707963267948966, 0.0, 0.0, 0.0};
    veer_arm arm;
    if ((rc = veer_arm_init(&arm, &p, start, start + 2, &err)) != 0)
        goto out_fb;
    long on = (long)(heavy_at * 1000 + 0.5), off = on + (long)(heavy_for * 1000 + 0.5);
    long total = 7 * 5000;
    double before = 0, during = 0, after = 0;
    int alarm = 0;
    float obs[VEER_ARM_OBS_DIM], act[VEER_ARM_ACT_DIM] = {0, 0};
    for (long t = 0; t < total && rc == 0; t++) {
        if (t % 5000 == 0) {
            veer_demo_task_spec spec;
            if ((rc = veer_demo_task_spec_build(b, &veer_arm_tasks[t / 5000], &p,
                                                VEER_DEMO_ENCODE_SAMPLES, 1, &spec, &err)) == 0)
                rc = veer_demo_fb_policy_set_task(&fb, &spec.spec, NULL, &err);
            veer_demo_task_spec_free(&spec);
        }
        if (t == on)
            veer_arm_set_parcel(&arm, mass, NULL);
        if (t == off)
            veer_arm_set_parcel(&arm, light, NULL);
        veer_arm_observe(&arm, obs);
        if (rc == 0 && (rc = veer_demo_fb_policy_act(&fb, obs, act)) == 0 &&
            (rc = veer_drift_add(d, obs, NULL, &err)) == 0) {
            double tau[2] = {act[0], act[1]};
            rc = veer_arm_step(&arm, tau, VEER_ARM_PHYSICS_DT);
        }
        if ((t + 1) % 100 == 0 && rc == 0) {
            veer_drift_publish(d);
            veer_drift_snapshot(d, rep);
            double *slot = t < on ? &before : (t < off + 1000 ? &during : &after);
            if (rep->exceed_rate > *slot)
                *slot = rep->exceed_rate;
            if (t >= on && t < off + 1000 && rep->exceed_level == VEER_DRIFT_ALARM)
                alarm = 1;
        }
    }
    if (rc == 0)
        printf("| %.1f | %.1f %% | %.1f %% | %.1f %% | %s |\n", mass, 100 * before, 100 * during,
               100 * after, alarm ? "yes" : "no");
out_fb:
    veer_drift_report_destroy(rep);
    veer_drift_destroy(d);
    veer_demo_fb_policy_free(&fb);
out:
    if (rc)
        fprintf(stderr, "veer-arm-drift-probe: %s (%s): %s\n", veer_errname(rc), err.field,
                err.message);
    return rc;
}

int main(int argc, char **argv)
{
    if (argc < 3 || strcmp(argv[1], "--help") == 0) {
        fprintf(argc < 3 ? stderr : stdout,
                "usage: veer-arm-drift-probe MODEL.veer MASS_KG... [--heavy-at S] [--heavy-for S]\n"
                "The demo's schedule in-process; per parcel mass, the largest share of drift-window\n"
                "states beyond the training p99 distance before, during (plus 1 s) and after the\n"
                "heavy parcel, and whether the exceedance alarm was raised while it was on.\n");
        return argc < 3 ? 2 : 0;
    }
    double heavy_at = 16, heavy_for = 6, masses[32];
    int n = 0;
    for (int i = 2; i < argc; i++) {
        char *end;
        double *slot = NULL;
        if (strcmp(argv[i], "--heavy-at") == 0 || strcmp(argv[i], "--heavy-for") == 0) {
            slot = argv[i][8] == 'a' ? &heavy_at : &heavy_for;
            if (++i == argc) {
                fprintf(stderr, "veer-arm-drift-probe: %s needs seconds\n", argv[i - 1]);
                return 2;
            }
        } else if (n == 32) {
            fprintf(stderr, "veer-arm-drift-probe: at most 32 masses\n");
            return 2;
        }
        double v = strtod(argv[i], &end);
        if (*end || !(v >= 0 && v <= 1000)) {
            fprintf(stderr, "veer-arm-drift-probe: '%s' is not a number from 0 to 1000\n", argv[i]);
            return 2;
        }
        if (slot)
            *slot = v;
        else
            masses[n++] = v;
    }
    if (heavy_at + heavy_for > 34) {
        fprintf(stderr, "veer-arm-drift-probe: the heavy parcel must be off by 34 s of the 35 s run\n");
        return 2;
    }
    veer_bundle *b;
    veer_error err = {0};
    if (veer_bundle_open(argv[1], &b, &err) != 0) {
        fprintf(stderr, "veer-arm-drift-probe: %s: %s\n", argv[1], err.message);
        return 1;
    }
    printf("Heavy parcel from %.0f s for %.0f s; share of the last 1,000 states beyond the "
           "training p99 distance (alarm at 3 %%):\n\n"
           "| parcel (kg) | before | during | after | alarm |\n|---:|---:|---:|---:|---|\n",
           heavy_at, heavy_for);
    int rc = 0;
    for (int i = 0; i < n && rc == 0; i++)
        rc = probe(b, masses[i], heavy_at, heavy_for);
    veer_bundle_close(b);
    return rc ? 1 : 0;
}
