/*
 * test_offsets.c - the done-window per partition.
 *
 * The rule checked (librdkafka INTRODUCTION.md, "At-least-once"): only the
 * highest contiguous completed offset + 1 may be stored, whatever order the
 * delivery reports arrive in.  Also: how many offsets each track call
 * stepped over (input never received: retention, compaction, transaction
 * markers) is reported exactly once, whatever the window does.
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

/* Every way a call can step over offsets reports the count once. */
static void track_reports_the_offsets_it_skips(void **state)
{
    (void)state;
    offsets_tracker t;
    int64_t gap = -7;
    assert_int_equal(offsets_init(&t, 2, 8), 0);
    assert_int_equal(offsets_next(&t, 0), -1);
    assert_int_equal(offsets_next(&t, 5), -1); /* no such partition */
    /* The first offset of a partition has nothing to compare with. */
    assert_int_equal(offsets_track_gap(&t, 0, 100, &gap), 0);
    assert_int_equal(gap, 0);
    assert_int_equal(offsets_next(&t, 0), 101);
    assert_int_equal(offsets_track_gap(&t, 0, 101, &gap), 0);
    assert_int_equal(gap, 0);
    /* One transaction marker. */
    assert_int_equal(offsets_track_gap(&t, 0, 103, &gap), 0);
    assert_int_equal(gap, 1);
    /* A larger hole, within the window. */
    assert_int_equal(offsets_track_gap(&t, 0, 107, &gap), 0);
    assert_int_equal(gap, 3);
    assert_int_equal(offsets_next(&t, 0), 108);
    /* A redelivery below the window skips nothing. */
    gap = -7;
    assert_int_equal(offsets_track_gap(&t, 0, 102, &gap), -ERANGE);
    assert_int_equal(gap, 0);
    /* The other partition is untouched; a bad one reports 0. */
    assert_int_equal(offsets_next(&t, 1), -1);
    gap = -7;
    assert_int_equal(offsets_track_gap(&t, 9, 1, &gap), -ERANGE);
    assert_int_equal(gap, 0);
    /* The gaps are done: base passes them once the real ones are. */
    for (int64_t o = 100; o <= 107; o++)
        offsets_done(&t, 0, o);
    assert_int_equal(offsets_committable(&t, 0), 108);
    /* A jump far past the window (auto.offset.reset after retention):
     * the window is empty, so it restarts at the new offset. */
    assert_int_equal(offsets_track_gap(&t, 0, 5000, &gap), 0);
    assert_int_equal(gap, 5000 - 108);
    assert_int_equal(offsets_done(&t, 0, 5000), 1);
    assert_int_equal(offsets_committable(&t, 0), 5001);
    /* NULL is allowed, and offsets_track is the same call. */
    assert_int_equal(offsets_track_gap(&t, 0, 5002, NULL), 0);
    assert_int_equal(offsets_track(&t, 0, 5004), 0);
    assert_int_equal(offsets_next(&t, 0), 5005);
    /* A reset forgets the partition. */
    offsets_reset(&t, 0);
    assert_int_equal(offsets_next(&t, 0), -1);
    assert_int_equal(offsets_track_gap(&t, 0, 9000, &gap), 0);
    assert_int_equal(gap, 0);
    offsets_destroy(&t);
}

/* A jump refused because the window is full is reported when the retried
 * offset is taken, not when it was refused. */
static void refused_jump_is_counted_when_taken(void **state)
{
    (void)state;
    offsets_tracker t;
    int64_t gap = -7;
    assert_int_equal(offsets_init(&t, 1, 4), 0);
    assert_int_equal(offsets_track_gap(&t, 0, 0, &gap), 0);
    assert_int_equal(offsets_track_gap(&t, 0, 1, &gap), 0);
    /* 0 is still pending: offset 6 does not fit in [0, 4). */
    assert_int_equal(offsets_track_gap(&t, 0, 6, &gap), -EAGAIN);
    assert_int_equal(gap, 0);
    assert_int_equal(offsets_next(&t, 0), 2);
    assert_int_equal(offsets_track_gap(&t, 0, 6, &gap), -EAGAIN);
    assert_int_equal(gap, 0);
    assert_int_equal(offsets_done(&t, 0, 0), 1);
    assert_int_equal(offsets_done(&t, 0, 1), 1);
    /* Window empty: the retry is taken and reports 2..5 once. */
    assert_int_equal(offsets_track_gap(&t, 0, 6, &gap), 0);
    assert_int_equal(gap, 4);
    assert_int_equal(offsets_committable(&t, 0), 6);
    /* A hole after a pending offset is done once that offset is. */
    assert_int_equal(offsets_track_gap(&t, 0, 8, &gap), 0);
    assert_int_equal(gap, 1);
    assert_int_equal(offsets_done(&t, 0, 6), 1); /* past the gap 7, to 8 */
    assert_int_equal(offsets_committable(&t, 0), 8);
    assert_int_equal(offsets_done(&t, 0, 8), 1);
    assert_int_equal(offsets_track_gap(&t, 0, 12, &gap), 0);
    assert_int_equal(gap, 3);
    offsets_destroy(&t);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(out_of_order_reports_store_contiguous),
        cmocka_unit_test(gaps_count_as_done),
        cmocka_unit_test(full_window_refuses_and_recovers),
        cmocka_unit_test(redelivery_and_bad_done_are_rejected),
        cmocka_unit_test(track_reports_the_offsets_it_skips),
        cmocka_unit_test(refused_jump_is_counted_when_taken),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
