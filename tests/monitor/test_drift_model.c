/* The bridge from a loaded model to a drift monitor, on the shipped parcel-arm example bundle:
 * the statistics reach the monitor unchanged, and the monitor's Mahalanobis distance of the
 * bundle's reference states equals the textbook sqrt((x − μ)ᵀ P (x − μ)) computed here with a
 * plain double loop over the bundle's own precision matrix. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <math.h>

#include "veer/drift.h"
#include "veer/runtime.h"

static void test_from_example_bundle(void **state)
{
    veer_bundle *b;
    veer_error err;
    assert_int_equal(veer_bundle_open(VEER_EXAMPLE_BUNDLE, &b, &err), 0);
    const veer_model_info *info = veer_bundle_info(b);
    assert_true(info->has_stats);

    veer_drift_training t;
    assert_int_equal(veer_drift_training_from_model(info, &t, &err), 0);
    assert_int_equal(t.state_dim, info->state_dim);
    assert_int_equal(t.bins, info->bins);
    assert_ptr_equal(t.precision, info->state_precision);
    assert_ptr_equal(t.quantile_edges, info->quantile_edges);
    assert_true(t.mahalanobis_p99 == info->mahalanobis_p99);

    veer_drift *d;
    assert_int_equal(veer_drift_create(&t, NULL, &d, &err), 0);
    uint32_t n = info->state_dim, m = info->reference_count;
    assert_true(m > 0);
    for (uint32_t r = 0; r < m; r++) {
        const float *x = info->reference_states + (size_t)r * n;
        double q = 0.0;
        for (uint32_t i = 0; i < n; i++)
            for (uint32_t j = 0; j < n; j++)
                q += ((double)x[i] - info->state_mean[i]) * info->state_precision[i * n + j] *
                     ((double)x[j] - info->state_mean[j]);
        double dist;
        int flag = veer_drift_check(d, x, &dist);
        assert_true(flag == 0 || flag == 1);
        assert_true(fabs(dist - sqrt(q)) <= 1e-5 * sqrt(q) + 1e-9);
        assert_int_equal(flag, sqrt(q) > info->mahalanobis_p999);
        assert_int_equal(veer_drift_add(d, x, NULL, &err), 0);
    }
    veer_drift_destroy(d); /* before or after the bundle: the monitor holds copies */
    veer_bundle_close(b);
}

static void test_model_without_stats(void **state)
{
    veer_model_info info = {0};
    veer_drift_training t;
    veer_error err;
    assert_int_equal(veer_drift_training_from_model(&info, &t, &err), VEER_EFIELD);
    assert_string_equal(err.field, "stats");
    assert_int_equal(veer_drift_training_from_model(NULL, &t, &err), VEER_EINVAL);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_from_example_bundle),
        cmocka_unit_test(test_model_without_stats),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
