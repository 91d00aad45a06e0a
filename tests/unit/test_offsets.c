/*
 * test_offsets.c - the done-window per partition.
 *
 * The rule checked (librdkafka INTRODUCTION.md, "At-least-once"): only the
 * highest contiguous completed offset + 1 may be stored, whatever order the
 * delivery reports arrive in.
 */
#include <errno.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include "daemon/offsets.h"

static void out_of_order_reports_store_contiguous(void **state)
{
    (void)state;
    offsets_tracker t;
    assert_int_equal(offsets_init(&t, 2, 8), 0);
    for (int64_t o = 10; o < 15; o++)
        assert_int_equal(offsets_track(&t, 1, o), 0);
    assert_int_equal(offsets_committable(&t, 1), 10);
    assert_int_equal(offsets_done(&t, 1, 12), 0);
    assert_int_equal(offsets_done(&t, 1, 11), 0);
    assert_int_equal(offsets_committable(&t, 1), 10);
    assert_int_equal(offsets_done(&t, 1, 10), 1);
    assert_int_equal(offsets_committable(&t, 1), 13);
    assert_int_equal(offsets_pending(&t, 1), 2);
    assert_int_equal(offsets_done(&t, 1, 14), 0);
    assert_int_equal(offsets_done(&t, 1, 13), 1);
    assert_int_equal(offsets_committable(&t, 1), 15);
    assert_int_equal(offsets_pending_total(&t), 0);
    /* The other partition is untouched. */
    assert_int_equal(offsets_committable(&t, 0), -1);
    offsets_destroy(&t);
}

static void gaps_count_as_done(void **state)
{
    (void)state;
    offsets_tracker t;
    assert_int_equal(offsets_init(&t, 1, 8), 0);
    assert_int_equal(offsets_track(&t, 0, 0), 0);
    assert_int_equal(offsets_track(&t, 0, 3), 0); /* 1, 2 never delivered */
    assert_int_equal(offsets_done(&t, 0, 0), 1);
    assert_int_equal(offsets_committable(&t, 0), 3);
    assert_int_equal(offsets_done(&t, 0, 3), 1);
    assert_int_equal(offsets_committable(&t, 0), 4);
    /* A gap far larger than the window, with nothing pending, is fine. */
    assert_int_equal(offsets_track(&t, 0, 1000), 0);
    assert_int_equal(offsets_done(&t, 0, 1000), 1);
    assert_int_equal(offsets_committable(&t, 0), 1001);
    offsets_destroy(&t);
}

static void full_window_refuses_and_recovers(void **state)
{
    (void)state;
    offsets_tracker t;
    assert_int_equal(offsets_init(&t, 1, 4), 0);
    for (int64_t o = 0; o < 4; o++)
        assert_int_equal(offsets_track(&t, 0, o), 0);
    assert_int_equal(offsets_track(&t, 0, 4), -EAGAIN);
    assert_int_equal(offsets_done(&t, 0, 0), 1);
    assert_int_equal(offsets_track(&t, 0, 4), 0);
    offsets_destroy(&t);
}

static void redelivery_and_bad_done_are_rejected(void **state)
{
    (void)state;
    offsets_tracker t;
    assert_int_equal(offsets_init(&t, 1, 8), 0);
    assert_int_equal(offsets_track(&t, 0, 5), 0);
    assert_int_equal(offsets_track(&t, 0, 5), -ERANGE);
    assert_int_equal(offsets_done(&t, 0, 6), -ERANGE);
    assert_int_equal(offsets_done(&t, 0, 5), 1);
    assert_int_equal(offsets_done(&t, 0, 5), -ERANGE);
    assert_int_equal(offsets_track(&t, 3, 0), -ERANGE);
    offsets_reset(&t, 0);
    assert_int_equal(offsets_committable(&t, 0), -1);
    offsets_destroy(&t);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(out_of_order_reports_store_contiguous),
        cmocka_unit_test(gaps_count_as_done),
        cmocka_unit_test(full_window_refuses_and_recovers),
        cmocka_unit_test(redelivery_and_bad_done_are_rejected),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
