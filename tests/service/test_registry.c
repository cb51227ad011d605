/* The task registry and canonical specifications: names, content sharing, conflicts, limits,
 * and the canonical form (-0.0 as 0.0, all-one goal weights as none) whose digest must equal
 * libsodium's BLAKE2b-256 (RFC 7693) of the canonical message's protobuf encoding. The bytes of
 * that encoding are written out by hand here from the protobuf encoding rules (tag = field << 3 |
 * wire type; packed repeated floats as one length-delimited field), not taken from protobuf-c. */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <sodium.h>
#include <string.h>

#include "service/registry.h"
#include "service/spec.h"

static Veer__Wire__TaskSpec *samples_spec(Veer__Wire__RewardSamples *s, Veer__Wire__TaskSpec *spec, float *states,
                                          size_t n_states, float *rewards, size_t n_rewards)
{
    veer__wire__reward_samples__init(s);
    s->states = states;
    s->n_states = n_states;
    s->rewards = rewards;
    s->n_rewards = n_rewards;
    veer__wire__task_spec__init(spec);
    spec->source_case = VEER__WIRE__TASK_SPEC__SOURCE_SAMPLES;
    spec->samples = s;
    return spec;
}

static void test_canonical_digest_by_hand(void **state)
{
    float states[2] = {-0.0f, 1.5f};
    float rewards[1] = {2.0f};
    Veer__Wire__RewardSamples s;
    Veer__Wire__TaskSpec spec;
    samples_spec(&s, &spec, states, 2, rewards, 1);
    uint8_t digest[32];
    assert_int_equal(veer__spec_canonical(&spec, digest, NULL), 0);
    /* TaskSpec{samples(1): RewardSamples{states(1): packed [0.0, 1.5], rewards(2): packed [2.0]}} */
    const uint8_t expected[] = {
        0x0a, 0x10,                                     /* field 1, length-delimited, 16 bytes */
        0x0a, 0x08, 0x00, 0x00, 0x00, 0x00,             /* states: 8 bytes, 0.0f */
        0x00, 0x00, 0xc0, 0x3f,                         /*         1.5f = 0x3fc00000 LE */
        0x12, 0x04, 0x00, 0x00, 0x00, 0x40,             /* rewards: 4 bytes, 2.0f */
    };
    uint8_t ref[32];
    assert_true(sodium_init() >= 0);
    crypto_generichash(ref, 32, expected, sizeof expected, NULL, 0);
    assert_memory_equal(digest, ref, 32);
}

static void test_goal_weights_of_one_are_no_weights(void **state)
{
    float goals[4] = {1, 2, 3, 4};
    float ones[2] = {1, 1};
    float twos[2] = {1, 2};
    Veer__Wire__GoalStates g;
    Veer__Wire__TaskSpec spec;
    uint8_t d_none[32], d_ones[32], d_twos[32];
    veer__wire__goal_states__init(&g);
    veer__wire__task_spec__init(&spec);
    spec.source_case = VEER__WIRE__TASK_SPEC__SOURCE_GOALS;
    spec.goals = &g;
    g.states = goals;
    g.n_states = 4;
    assert_int_equal(veer__spec_canonical(&spec, d_none, NULL), 0);
    g.weights = ones;
    g.n_weights = 2;
    assert_int_equal(veer__spec_canonical(&spec, d_ones, NULL), 0);
    assert_int_equal(g.n_weights, 0);
    g.weights = twos;
    g.n_weights = 2;
    assert_int_equal(veer__spec_canonical(&spec, d_twos, NULL), 0);
    assert_memory_equal(d_none, d_ones, 32);
    assert_memory_not_equal(d_none, d_twos, 32);
}

static void test_names_and_contents(void **state)
{
    veer__registry *r;
    assert_int_equal(veer__registry_create(3, &r), 0);
    float st[2] = {1, 2}, rw1[1] = {1}, rw2[1] = {2};
    Veer__Wire__RewardSamples s1, s2;
    Veer__Wire__TaskSpec a, b;
    samples_spec(&s1, &a, st, 2, rw1, 1);
    samples_spec(&s2, &b, st, 2, rw2, 1);
    uint8_t da[32], db[32];
    veer__spec_canonical(&a, da, NULL);
    veer__spec_canonical(&b, db, NULL);
    veer__task *t1, *t2, *t3, *tx;
    int created;
    veer_error err;
    assert_int_equal(veer__registry_put(r, "one", &a, da, &t1, &created, &err), 0);
    assert_int_equal(created, 1);
    assert_int_equal(t1->acknowledged, 0);
    assert_int_equal(t1->content->state, VEER__CONTENT_PENDING);
    /* Same name, same content: the same task. */
    assert_int_equal(veer__registry_put(r, "one", &a, da, &tx, &created, &err), 0);
    assert_int_equal(created, 0);
    assert_ptr_equal(tx, t1);
    /* Same name, other content: a conflict naming the name. */
    assert_int_equal(veer__registry_put(r, "one", &b, db, &tx, &created, &err), VEER_ENAMECONFLICT);
    assert_string_equal(err.field, "name");
    /* Another name, same content: shared, one copy. */
    assert_int_equal(veer__registry_put(r, "two", &a, da, &t2, &created, &err), 0);
    assert_ptr_equal(t2->content, t1->content);
    assert_int_equal(t1->content->refs, 2);
    float z[4] = {1, 2, 3, 4};
    assert_int_equal(veer__content_set_z(t1->content, z, 4, NULL), 0);
    assert_int_equal(t2->content->state, VEER__CONTENT_ENCODED);
    assert_int_equal(veer__registry_put(r, "three", &b, db, &t3, &created, &err), 0);
    assert_int_equal(veer__registry_put(r, "four", &b, db, &tx, &created, &err), VEER_ETOOMANY);
    assert_int_equal(veer__registry_put(r, "", &b, db, &tx, &created, &err), VEER_EFIELD);
    assert_int_equal(veer__registry_count(r), 3);
    /* The stored copy is the registry's own: changing the caller's message changes nothing. */
    st[0] = 99;
    assert_true(t1->content->spec->samples->states[0] == 1.0f);
    /* Removing one name keeps the shared content for the other. */
    veer__registry_remove(r, t1);
    assert_null(veer__registry_find(r, "one"));
    assert_ptr_equal(veer__registry_find(r, "two"), t2);
    assert_int_equal(t2->content->refs, 1);
    assert_memory_equal(t2->content->z, z, sizeof z);
    assert_string_equal(veer__registry_at(r, 0)->name, "two");
    assert_string_equal(veer__registry_at(r, 1)->name, "three");
    veer__registry_remove(r, t2);
    veer__registry_remove(r, t3);
    assert_int_equal(veer__registry_count(r), 0);
    veer__registry_destroy(r);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_canonical_digest_by_hand),
        cmocka_unit_test(test_goal_weights_of_one_are_no_weights),
        cmocka_unit_test(test_names_and_contents),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
