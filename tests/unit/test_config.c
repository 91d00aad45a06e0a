/*
 * test_config.c - the option table: defaults, typed parsing and bounds,
 * error paths and rules, --set, comments with line numbers, secret
 * masking, reload rules, the example file.
 *
 * Expected defaults come from outside config.c: the model defaults are
 * the values written beside each field of struct model_params in
 * core/model.h (source: core/model.h comments) and, when core/model.c is
 * linked, model_params_default() itself; the daemon defaults are the
 * values of the option list in the team brief (source: team brief).
 * Kafka's topic-name rule is from the Kafka documentation (source: Kafka
 * docs, "topic names may contain [a-zA-Z0-9._-], at most 249
 * characters").  JSON parse positions are jansson's (line:column).
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cmocka.h>

#include "daemon/config.h"

/* Weak: present only when core/model.c is in libodcore.a. */
extern void model_params_default(model_params *p, uint32_t dim)
    __attribute__((weak));

#define assert_near(a, b, eps)                                              \
    do {                                                                    \
        double a_ = (a), b_ = (b);                                          \
        if (!(fabs(a_ - b_) <= (eps)))                                      \
            fail_msg("%s = %.17g, expected %.17g", #a, a_, b_);             \
    } while (0)

typedef struct fixture {
    struct oddsky_config cfg;
    config_errs errs;
} fixture;

static int setup(void **state)
{
    fixture *f = calloc(1, sizeof *f);
    if (f == NULL || config_init_defaults(&f->cfg) != 0)
        return -1;
    config_errs_init(&f->errs);
    *state = f;
    return 0;
}

static int teardown(void **state)
{
    fixture *f = *state;
    config_free(&f->cfg);
    free(f);
    return 0;
}

/* Fail with the whole error list when errs does not hold exactly this
 * "path: rule" line. */
static void expect_error(const config_errs *errs, const char *path, const char *rule)
{
    char all[4096] = "";
    for (unsigned i = 0; i < errs->n; i++) {
        if (strcmp(errs->e[i].path, path) == 0 &&
            (rule == NULL || strcmp(errs->e[i].rule, rule) == 0))
            return;
        size_t len = strlen(all);
        snprintf(all + len, sizeof all - len, "\n  %s: %s", errs->e[i].path, errs->e[i].rule);
    }
    fail_msg("expected \"%s: %s\" among:%s", path, rule ? rule : "*", all);
}

static void expect_no_errors(const config_errs *errs)
{
    if (config_errs_count(errs) == 0)
        return;
    char all[4096] = "";
    for (unsigned i = 0; i < errs->n; i++) {
        size_t len = strlen(all);
        snprintf(all + len, sizeof all - len, "\n  %s: %s", errs->e[i].path, errs->e[i].rule);
    }
    fail_msg("expected no errors, got %u:%s", config_errs_count(errs), all);
}

static int load(fixture *f, const char *text)
{
    config_errs_init(&f->errs);
    return config_load_text(&f->cfg, text, "t.json", ".", &f->errs);
}

static int set(fixture *f, const char *a)
{
    config_errs_init(&f->errs);
    return config_apply_set(&f->cfg, a, &f->errs);
}

static const char *minimal_featmap =
    "{\"id\": \"packet_id\", \"time\": \"obs.mjd\","
    " \"features\": [{\"name\": \"mag\", \"field\": \"obs.mag\"}]}";

static void make_runnable(fixture *f)
{
    char buf[512];
    assert_int_equal(set(f, "kafka.brokers=127.0.0.1:9092"), 0);
    assert_int_equal(set(f, "kafka.input_topics=packets"), 0);
    snprintf(buf, sizeof buf, "featmap=%s", minimal_featmap);
    assert_int_equal(set(f, buf), 0);
}

/* ---- defaults --------------------------------------------------------- */

static void test_model_defaults_match_model_h(void **state)
{
    fixture *f = *state;
    const model_params *m = &f->cfg.model;
    /* source: core/model.h field comments */
    assert_int_equal(m->k, 32);
    assert_int_equal(m->warm_n, 2048);
    assert_int_equal(m->lloyd_passes, 3);
    assert_int_equal(m->seed_restarts, 3);
    assert_near(m->scale_half_life_days, 30, 0);
    assert_near(m->kmeans_half_life_days, 7, 0);
    assert_near(m->sketch_half_life_days, 7, 0);
    assert_near(m->calib_half_life_days, 3, 0);
    assert_near(m->sd_floor, 1e-6, 0);
    assert_near(m->z_clip, 8, 0);
    assert_near(m->retire_weight, 0.5, 0);
    assert_int_equal(m->mix_nearest, 4);
    assert_int_equal(m->hist_bins, 24);
    assert_near(m->hist_range, 6, 0);
    assert_near(m->hist_pseudo, 20, 0);
    assert_int_equal(m->space_dims, 16);
    assert_int_equal(m->space_chains, 16);
    assert_int_equal(m->space_depth, 12);
    assert_int_equal(m->space_width, 1024);
    assert_int_equal(m->space_rows, 1);
    assert_int_equal(m->reservoir_n, 4096);
    assert_int_equal(m->calib_bins, 2048);
    assert_int_equal(m->score, MODEL_SCORE_DENSITY);
    assert_int_equal(m->policy, MODEL_FLAG_BUDGET);
    assert_near(m->alpha, 1e-3, 0);
    assert_near(m->budget_per_hour, 10, 0);
    assert_near(m->stream_rate_per_hour, 1e5, 0);
    assert_int_equal(m->select_k_min, 2);
    assert_int_equal(m->select_k_max, 64);
    assert_int_equal(m->seed, 1);
}

static void test_model_defaults_match_model_c(void **state)
{
    fixture *f = *state;
    model_params want;
    model_params got;
    if (model_params_default == NULL)
        skip(); /* core/model.c not linked into this build */
    model_params_default(&want, 8);
    assert_int_equal(config_to_model_params(&f->cfg, 8, &got), 0);
    assert_int_equal(got.k, want.k);
    assert_int_equal(got.warm_n, want.warm_n);
    assert_int_equal(got.lloyd_passes, want.lloyd_passes);
    assert_int_equal(got.seed_restarts, want.seed_restarts);
    assert_near(got.scale_half_life_days, want.scale_half_life_days, 0);
    assert_near(got.kmeans_half_life_days, want.kmeans_half_life_days, 0);
    assert_near(got.sketch_half_life_days, want.sketch_half_life_days, 0);
    assert_near(got.calib_half_life_days, want.calib_half_life_days, 0);
    assert_near(got.sd_floor, want.sd_floor, 0);
    assert_int_equal(got.robust, want.robust);
    assert_near(got.z_clip, want.z_clip, 0);
    assert_near(got.retire_weight, want.retire_weight, 0);
    assert_int_equal(got.mix_nearest, want.mix_nearest);
    assert_int_equal(got.hist_bins, want.hist_bins);
    assert_near(got.hist_range, want.hist_range, 0);
    assert_near(got.hist_pseudo, want.hist_pseudo, 0);
    assert_int_equal(got.space_dims, want.space_dims);
    assert_int_equal(got.space_chains, want.space_chains);
    assert_int_equal(got.space_depth, want.space_depth);
    assert_int_equal(got.space_width, want.space_width);
    assert_int_equal(got.space_rows, want.space_rows);
    assert_int_equal(got.reservoir_n, want.reservoir_n);
    assert_int_equal(got.calib_bins, want.calib_bins);
    assert_int_equal(got.score, want.score);
    assert_int_equal(got.policy, want.policy);
    assert_near(got.alpha, want.alpha, 0);
    assert_near(got.budget_per_hour, want.budget_per_hour, 0);
    assert_near(got.stream_rate_per_hour, want.stream_rate_per_hour, 0);
    assert_int_equal(got.select_k_min, want.select_k_min);
    assert_int_equal(got.select_k_max, want.select_k_max);
    assert_int_equal(got.seed, want.seed);
}

static void test_daemon_defaults_match_brief(void **state)
{
    fixture *f = *state;
    const struct oddsky_config *c = &f->cfg;
    /* source: team brief option list */
    assert_string_equal(c->kafka.brokers, "");
    assert_string_equal(c->kafka.group_id, "oddsky");
    assert_int_equal(c->kafka.input_topics.n, 0);
    assert_string_equal(c->kafka.output_topic, "oddsky-results");
    assert_string_equal(c->kafka.flagged_topic, "");
    assert_string_equal(c->kafka.dead_letter_topic, "oddsky-dead-letters");
    assert_int_equal(c->kafka.consumer.n, 0);
    assert_int_equal(c->kafka.poll_batch, 1024);
    assert_int_equal(c->kafka.poll_interval_ms, 100);
    assert_int_equal(c->kafka.max_in_flight, 100000);
    assert_int_equal(c->input.max_message_bytes, 1u << 20);
    assert_null(c->featmap);
    assert_int_equal(c->output.format, CONFIG_OUTPUT_JSON);
    assert_non_null(strstr(c->output.avro_schema, "oddsky-result.avsc"));
    assert_string_equal(c->state.dir, "./state");
    assert_int_equal(c->state.checkpoint_interval_s, 60);
    assert_int_equal(c->state.fresh_start_on_bad_checkpoint, 0);
    assert_string_equal(c->status.listen, "127.0.0.1");
    assert_int_equal(c->status.port, 8787);
    assert_string_equal(c->status.token, "");
    assert_int_equal(c->status.allow_remote_without_token, 0);
    assert_int_equal(c->status.max_connections, 64);
    assert_int_equal(c->status.idle_timeout_ms, 10000);
    assert_int_equal(c->status.max_header_bytes, 8192);
    assert_int_equal(c->status.max_body_bytes, 4096);
    assert_int_equal(c->run.drain_deadline_ms, 10000);
    assert_int_equal(c->run.select_interval_s, 600);
    assert_int_equal(c->run.auto_resize, 0);
    assert_near(c->run.night_hours, 10, 0);
    assert_int_equal(c->log.level, 2);  /* info */
    assert_int_equal(c->log.format, 0); /* text */
}

static void test_defaults_validate(void **state)
{
    fixture *f = *state;
    /* Every default obeys its own rules and the cross-field rules... */
    assert_int_equal(config_validate_for(&f->cfg, CONFIG_FOR_DEMO, &f->errs), 0);
    expect_no_errors(&f->errs);
    /* ...and `run` asks for exactly the three options that have none. */
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), -1);
    assert_int_equal(config_errs_count(&f->errs), 3);
    expect_error(&f->errs, "kafka.brokers", "required");
    expect_error(&f->errs, "kafka.input_topics", "required (at least one topic)");
    expect_error(&f->errs, "featmap", "required");
    /* With them the defaults run. */
    make_runnable(f);
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), 0);
    expect_no_errors(&f->errs);
}

static void test_every_option_has_a_valid_default_text(void **state)
{
    (void)state;
    /* Reapplying each default through --set must succeed (the default is
     * in --set syntax and inside its own bounds). */
    for (size_t i = 0; i < config_option_count(); i++) {
        const config_option *o = config_option_at(i);
        struct oddsky_config c;
        config_errs errs;
        char a[512];
        assert_non_null(o->help);
        assert_true(strlen(o->help) > 10);
        if (o->def == NULL)
            continue;
        assert_int_equal(config_init_defaults(&c), 0);
        config_errs_init(&errs);
        snprintf(a, sizeof a, "%s=%s", o->name, o->def);
        if (config_apply_set(&c, a, &errs) != 0)
            fail_msg("default of %s rejected: %s", o->name, errs.e[0].rule);
        config_free(&c);
    }
    assert_null(config_option_at(config_option_count()));
    assert_non_null(config_option_find("model.k"));
    assert_null(config_option_find("model.dim")); /* dim is from the feature map */
}

/* ---- per-type rules --------------------------------------------------- */

static void test_uint_bounds(void **state)
{
    fixture *f = *state;
    assert_int_equal(load(f, "{\"model\": {\"k\": 0}}"), -1);
    expect_error(&f->errs, "model.k", "must be between 1 and 1024 (got 0)");
    assert_int_equal(f->cfg.model.k, 32); /* unchanged */
    assert_int_equal(load(f, "{\"model\": {\"k\": 1025}}"), -1);
    expect_error(&f->errs, "model.k", "must be between 1 and 1024 (got 1025)");
    assert_int_equal(load(f, "{\"model\": {\"k\": -3}}"), -1);
    expect_error(&f->errs, "model.k", "must be between 1 and 1024 (got -3)");
    assert_int_equal(load(f, "{\"model\": {\"k\": 1.5}}"), -1);
    expect_error(&f->errs, "model.k", "must be an integer (got 1.5)");
    assert_int_equal(load(f, "{\"model\": {\"k\": \"32\"}}"), -1);
    expect_error(&f->errs, "model.k", "must be an integer (got \"32\")");
    assert_int_equal(load(f, "{\"status\": {\"port\": 65536}}"), -1);
    expect_error(&f->errs, "status.port", "must be between 0 and 65535 (got 65536)");
    assert_int_equal(load(f, "{\"model\": {\"k\": 1024}, \"status\": {\"port\": 0}}"), 0);
    assert_int_equal(f->cfg.model.k, 1024);
    assert_int_equal(f->cfg.status.port, 0);
    /* 64-bit field */
    assert_int_equal(load(f, "{\"model\": {\"seed\": 9007199254740993}}"), 0);
    assert_true(f->cfg.model.seed == 9007199254740993ull);
}

static void test_double_bounds(void **state)
{
    fixture *f = *state;
    assert_int_equal(load(f, "{\"model\": {\"alpha\": 2}}"), -1);
    expect_error(&f->errs, "model.alpha", "must be between 1e-12 and 1 (got 2)");
    assert_int_equal(load(f, "{\"model\": {\"alpha\": 0}}"), -1);
    expect_error(&f->errs, "model.alpha", "must be between 1e-12 and 1 (got 0)");
    assert_int_equal(load(f, "{\"run\": {\"night_hours\": true}}"), -1);
    expect_error(&f->errs, "run.night_hours", "must be a number (got true)");
    assert_int_equal(load(f, "{\"model\": {\"alpha\": 0.05, \"z_clip\": 4}}"), 0);
    assert_near(f->cfg.model.alpha, 0.05, 0);
    assert_near(f->cfg.model.z_clip, 4, 0); /* integer JSON for a double */
}

static void test_bool_enum_string_types(void **state)
{
    fixture *f = *state;
    assert_int_equal(load(f, "{\"model\": {\"robust\": 1}}"), -1);
    expect_error(&f->errs, "model.robust", "must be true or false (got 1)");
    assert_int_equal(load(f, "{\"model\": {\"score\": \"dense\"}}"), -1);
    expect_error(&f->errs, "model.score", "must be one of density, space, combined (got \"dense\")");
    assert_int_equal(load(f, "{\"model\": {\"flag_policy\": 1}}"), -1);
    expect_error(&f->errs, "model.flag_policy", "must be one of alpha, budget (got 1)");
    assert_int_equal(load(f, "{\"kafka\": {\"brokers\": 9092}}"), -1);
    expect_error(&f->errs, "kafka.brokers", "must be a string (got 9092)");
    assert_int_equal(load(f, "{\"output\": {\"format\": \"avro\"}, \"log\": {\"level\": \"debug\","
                             " \"format\": \"json\"}, \"model\": {\"robust\": true, \"score\": \"combined\"}}"), 0);
    assert_int_equal(f->cfg.output.format, CONFIG_OUTPUT_AVRO);
    assert_int_equal(f->cfg.log.level, 3);
    assert_int_equal(f->cfg.log.format, 1);
    assert_int_equal(f->cfg.model.robust, 1);
    assert_int_equal(f->cfg.model.score, MODEL_SCORE_COMBINED);
}

static void test_list_object_featmap_types(void **state)
{
    fixture *f = *state;
    assert_int_equal(load(f, "{\"kafka\": {\"input_topics\": \"a\"}}"), -1);
    expect_error(&f->errs, "kafka.input_topics", "must be an array of strings (got \"a\")");
    assert_int_equal(load(f, "{\"kafka\": {\"input_topics\": [\"a\", 3, \"\"]}}"), -1);
    expect_error(&f->errs, "kafka.input_topics[1]", "must be a non-empty string (got 3)");
    expect_error(&f->errs, "kafka.input_topics[2]", "must be a non-empty string (got \"\")");
    assert_int_equal(f->cfg.kafka.input_topics.n, 0);
    assert_int_equal(load(f, "{\"kafka\": {\"consumer\": {\"a\": [1], \"b\": null}}}"), -1);
    expect_error(&f->errs, "kafka.consumer.a", "must be a string, number or boolean (got [1])");
    expect_error(&f->errs, "kafka.consumer.b", "must be a string, number or boolean (got null)");
    assert_int_equal(load(f, "{\"kafka\": {\"producer\": [\"linger.ms\"]}}"), -1);
    expect_error(&f->errs, "kafka.producer", NULL);
    assert_int_equal(load(f, "{\"featmap\": 3}"), -1);
    expect_error(&f->errs, "featmap", "must be an object or a path to a JSON file (got 3)");
    assert_int_equal(load(f, "{\"model\": 3}"), -1);
    expect_error(&f->errs, "model", "must be an object (a section of options)");

    /* librdkafka values become strings; the text must read back exactly. */
    assert_int_equal(load(f, "{\"kafka\": {\"consumer\": {\"session.timeout.ms\": 45000,"
                             " \"check.crcs\": true, \"x.ratio\": 0.1, \"client.id\": \"o\"}}}"), 0);
    assert_int_equal(f->cfg.kafka.consumer.n, 4);
    assert_string_equal(f->cfg.kafka.consumer.items[0].key, "session.timeout.ms");
    assert_string_equal(f->cfg.kafka.consumer.items[0].value, "45000");
    assert_string_equal(f->cfg.kafka.consumer.items[1].value, "true");
    assert_string_equal(f->cfg.kafka.consumer.items[2].value, "0.1");
    assert_string_equal(f->cfg.kafka.consumer.items[3].value, "o");
}

static void test_error_collector(void **state)
{
    (void)state;
    config_errs e;
    char buf[8192];
    FILE *out;
    config_errs_init(&e);
    for (int i = 0; i < 70; i++)
        config_errs_add(&e, "model.k", "rule %d", i);
    assert_int_equal(e.n, CONFIG_ERRS_MAX);
    assert_int_equal(e.dropped, 70 - CONFIG_ERRS_MAX);
    assert_int_equal(config_errs_count(&e), 70);
    out = fmemopen(buf, sizeof buf, "w");
    assert_non_null(out);
    config_errs_print(&e, out);
    fclose(out);
    assert_true(strncmp(buf, "model.k: rule 0\nmodel.k: rule 1\n", 32) == 0);
    assert_non_null(strstr(buf, "... and 6 more\n"));
}

/* ---- unknown keys ------------------------------------------------------- */

static void test_unknown_key_hint(void **state)
{
    fixture *f = *state;
    assert_int_equal(load(f, "{\"model\": {\"kk\": 3}}"), -1);
    expect_error(&f->errs, "model.kk", "unknown option (did you mean \"model.k\"?)");
    assert_int_equal(load(f, "{\"brokers\": \"h:1\"}"), -1);
    expect_error(&f->errs, "brokers", "unknown option (did you mean \"kafka.brokers\"?)");
    assert_int_equal(load(f, "{\"kafka\": {\"input_topic\": [\"a\"]}}"), -1);
    expect_error(&f->errs, "kafka.input_topic", "unknown option (did you mean \"kafka.input_topics\"?)");
    assert_int_equal(load(f, "{\"status\": {\"tokn\": \"x\"}}"), -1);
    expect_error(&f->errs, "status.tokn", "unknown option (did you mean \"status.token\"?)");
    assert_int_equal(load(f, "{\"kafka\": {\"topics\": [\"a\"]}}"), -1);
    expect_error(&f->errs, "kafka.topics", "unknown option (did you mean \"kafka.input_topics\"?)");
    assert_int_equal(load(f, "{\"x\": {\"y\": 1}}"), -1);
    expect_error(&f->errs, "x", "unknown option (see oddsky check-config --defaults)");
    assert_int_equal(load(f, "{\"zzzqqqxxx\": 1}"), -1);
    expect_error(&f->errs, "zzzqqqxxx", "unknown option (see oddsky check-config --defaults)");
    /* Every error of a file is listed, not just the first. */
    assert_int_equal(load(f, "{\"model\": {\"kk\": 3, \"k\": 0}, \"log\": {\"level\": \"x\"}}"), -1);
    assert_int_equal(config_errs_count(&f->errs), 3);
    /* Duplicate keys are refused by the parser. */
    assert_int_equal(load(f, "{\"model\": {\"k\": 3, \"k\": 4}}"), -1);
    assert_int_equal(f->errs.n, 1);
    assert_non_null(strstr(f->errs.e[0].rule, "duplicate"));
}

/* ---- --set ---------------------------------------------------------------- */

static void test_set_typing(void **state)
{
    fixture *f = *state;
    assert_int_equal(set(f, "model.k=48"), 0);
    assert_int_equal(f->cfg.model.k, 48);
    assert_int_equal(set(f, "model.alpha=0.01"), 0);
    assert_near(f->cfg.model.alpha, 0.01, 0);
    assert_int_equal(set(f, "model.robust=yes"), 0);
    assert_int_equal(f->cfg.model.robust, 1);
    assert_int_equal(set(f, "model.robust=off"), 0);
    assert_int_equal(f->cfg.model.robust, 0);
    assert_int_equal(set(f, "model.score=space"), 0);
    assert_int_equal(f->cfg.model.score, MODEL_SCORE_SPACE);
    assert_int_equal(set(f, "kafka.input_topics=a, b ,c"), 0);
    assert_int_equal(f->cfg.kafka.input_topics.n, 3);
    assert_string_equal(f->cfg.kafka.input_topics.items[1], "b");
    assert_int_equal(set(f, "kafka.input_topics=[\"x\",\"y\"]"), 0);
    assert_int_equal(f->cfg.kafka.input_topics.n, 2);
    assert_string_equal(f->cfg.kafka.input_topics.items[0], "x");
    assert_int_equal(set(f, "kafka.consumer.fetch.max.bytes=1000"), 0);
    assert_int_equal(set(f, "kafka.consumer.fetch.max.bytes=2000"), 0);
    assert_int_equal(f->cfg.kafka.consumer.n, 1);
    assert_string_equal(f->cfg.kafka.consumer.items[0].key, "fetch.max.bytes");
    assert_string_equal(f->cfg.kafka.consumer.items[0].value, "2000");
    assert_int_equal(set(f, "kafka.producer={\"linger.ms\": 5}"), 0);
    assert_string_equal(f->cfg.kafka.producer.items[0].value, "5");
    assert_int_equal(set(f, "kafka.brokers=h1:9092,h2:9092"), 0);
    assert_string_equal(f->cfg.kafka.brokers, "h1:9092,h2:9092");
    assert_int_equal(set(f, "status.token=a=b"), 0); /* split at the first '=' */
    assert_string_equal(f->cfg.status.token, "a=b");

    assert_int_equal(set(f, "model.k=abc"), -1);
    expect_error(&f->errs, "model.k", "must be an integer (got \"abc\")");
    assert_int_equal(set(f, "model.k=4.5"), -1);
    expect_error(&f->errs, "model.k", "must be an integer (got \"4.5\")");
    assert_int_equal(set(f, "model.k=0"), -1);
    expect_error(&f->errs, "model.k", "must be between 1 and 1024 (got 0)");
    assert_int_equal(f->cfg.model.k, 48);
    assert_int_equal(set(f, "model.alpha=nan"), -1);
    expect_error(&f->errs, "model.alpha", "must be a number (got \"nan\")");
    assert_int_equal(set(f, "model.robust=maybe"), -1);
    expect_error(&f->errs, "model.robust", "must be true or false (got \"maybe\")");
    assert_int_equal(set(f, "model.k"), -1);
    expect_error(&f->errs, "model.k", "--set expects key=value");
    assert_int_equal(set(f, "model.kay=3"), -1);
    expect_error(&f->errs, "model.kay", "unknown option (did you mean \"model.k\"?)");
    assert_int_equal(set(f, "model=3"), -1);
    expect_error(&f->errs, "model", "is a section, not an option (set one of its options)");
}

/* ---- comments ------------------------------------------------------------- */

static void test_strip_comments_keeps_strings_and_lines(void **state)
{
    (void)state;
    char text[] = "{ // one\n"
                  "  \"a\": \"http://x/*y*/\", /* two\n"
                  "  three */ \"b\": \"q\\\"//\" // four\n"
                  "}\n";
    int bad = 0;
    json_t *j;
    size_t before = strlen(text);
    assert_int_equal(config_strip_comments(text, &bad), 0);
    assert_int_equal(strlen(text), before);
    assert_string_equal(text, "{       \n"
                              "  \"a\": \"http://x/*y*/\",       \n"
                              "           \"b\": \"q\\\"//\"        \n"
                              "}\n");
    j = json_loads(text, 0, NULL);
    assert_non_null(j);
    assert_string_equal(json_string_value(json_object_get(j, "a")), "http://x/*y*/");
    assert_string_equal(json_string_value(json_object_get(j, "b")), "q\"//");
    json_decref(j);

    char open[] = "{\n\n  /* never closed\n }";
    assert_int_equal(config_strip_comments(open, &bad), -1);
    assert_int_equal(bad, 3);
}

static void test_parse_error_line_numbers(void **state)
{
    fixture *f = *state;
    /* The error is on line 5, after a block comment spanning lines 2-3
     * and a line comment on line 4 (jansson reports line:column). */
    assert_int_equal(load(f, "{\n"
                             "  /* a block\n"
                             "     comment */\n"
                             "  \"model\": {\"k\": 3}, // fine\n"
                             "  \"log\": {\"level\": }\n"
                             "}\n"),
                     -1);
    assert_int_equal(f->errs.n, 1);
    assert_true(strncmp(f->errs.e[0].path, "t.json:5:", 9) == 0);
    assert_int_equal(load(f, "{\n\n /* open\n"), -1);
    expect_error(&f->errs, "t.json:3", "unterminated /* comment");
    assert_int_equal(load(f, "[1, 2]"), -1);
    expect_error(&f->errs, "t.json", "the top level must be a JSON object");
    assert_int_equal(load(f, "{// k\n\"model\": {\"k\": 5} /* x */}"), 0);
    assert_int_equal(f->cfg.model.k, 5);
}

/* ---- cross-field rules -------------------------------------------------------- */

static void test_cross_field_rules(void **state)
{
    fixture *f = *state;
    make_runnable(f);
    assert_int_equal(set(f, "model.mix_nearest=40"), 0);
    assert_int_equal(set(f, "model.select_k_min=70"), 0);
    assert_int_equal(set(f, "model.warmup_vectors=10"), 0);
    assert_int_equal(set(f, "kafka.output_topic=packets"), 0);
    assert_int_equal(set(f, "kafka.dead_letter_topic="), 0);
    assert_int_equal(set(f, "kafka.flagged_topic=bad topic"), 0);
    assert_int_equal(set(f, "kafka.consumer.group.id=x"), 0);
    assert_int_equal(set(f, "kafka.producer.bootstrap.servers=x"), 0);
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), -1);
    expect_error(&f->errs, "model.mix_nearest", "must be at most model.k (32) (got 40)");
    expect_error(&f->errs, "model.select_k_min", "must be at most model.select_k_max (64) (got 70)");
    expect_error(&f->errs, "model.warmup_vectors", "must be at least model.k (32) (got 10)");
    expect_error(&f->errs, "kafka.output_topic",
                 "must differ from every kafka.input_topics entry (got \"packets\")");
    expect_error(&f->errs, "kafka.dead_letter_topic", "must not be empty");
    expect_error(&f->errs, "kafka.flagged_topic",
                 "must be a Kafka topic name: 1-249 of a-z A-Z 0-9 . _ - (got \"bad topic\")");
    expect_error(&f->errs, "kafka.consumer.group.id", "is set by oddsky (use kafka.group_id)");
    expect_error(&f->errs, "kafka.producer.bootstrap.servers", "is set by oddsky (use kafka.brokers)");
}

static void test_status_listen_needs_token(void **state)
{
    fixture *f = *state;
    make_runnable(f);
    assert_int_equal(set(f, "status.listen=0.0.0.0"), 0);
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), -1);
    assert_int_equal(f->errs.n, 1);
    assert_string_equal(f->errs.e[0].path, "status.listen");
    assert_non_null(strstr(f->errs.e[0].rule, "status.token"));
    assert_non_null(strstr(f->errs.e[0].rule, "status.allow_remote_without_token"));

    assert_int_equal(set(f, "status.allow_remote_without_token=true"), 0);
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), 0);

    assert_int_equal(set(f, "status.allow_remote_without_token=false"), 0);
    assert_int_equal(set(f, "status.token=0123456789abcdef"), 0);
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), 0);

    assert_int_equal(set(f, "status.token=short"), 0);
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), -1);
    expect_error(&f->errs, "status.token", "must be at least 16 characters (got 5)");

    assert_int_equal(set(f, "status.token="), 0);
    assert_int_equal(set(f, "status.listen=::1"), 0); /* IPv6 loopback */
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), 0);
    assert_int_equal(set(f, "status.listen=127.8.9.10"), 0); /* 127/8 is loopback */
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), 0);
    assert_int_equal(set(f, "status.listen=localhost"), 0);
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), -1);
    expect_error(&f->errs, "status.listen",
                 "must be a numeric IPv4 or IPv6 address (got \"localhost\")");
    /* Port 0 turns the endpoint off: the address no longer matters. */
    assert_int_equal(set(f, "status.port=0"), 0);
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), 0);
}

static void test_featmap_errors_carry_featmap_path(void **state)
{
    fixture *f = *state;
    make_runnable(f);
    assert_int_equal(set(f, "featmap={\"id\": 3, \"features\": 7}"), 0);
    config_errs_init(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), -1);
    for (unsigned i = 0; i < f->errs.n; i++)
        assert_true(strncmp(f->errs.e[i].path, "featmap", 7) == 0);
}

/* ---- output ------------------------------------------------------------------ */

static void test_secrets_masked(void **state)
{
    fixture *f = *state;
    json_t *j;
    char *text;
    assert_int_equal(set(f, "status.token=s3cr3t-t0ken-value-123"), 0);
    assert_int_equal(set(f, "kafka.producer.sasl.password=hunter2-pass"), 0);
    assert_int_equal(set(f, "kafka.consumer.ssl.key.password=keypass-99"), 0);
    assert_int_equal(set(f, "kafka.consumer.sasl.username=alice"), 0);
    j = config_to_json(&f->cfg);
    assert_non_null(j);
    text = json_dumps(j, JSON_COMPACT);
    assert_null(strstr(text, "s3cr3t"));
    assert_null(strstr(text, "hunter2"));
    assert_null(strstr(text, "keypass"));
    assert_string_equal(json_string_value(json_object_get(json_object_get(j, "status"), "token")), "***");
    assert_string_equal(json_string_value(json_object_get(
                            json_object_get(json_object_get(j, "kafka"), "producer"), "sasl.password")),
                        "***");
    assert_string_equal(json_string_value(json_object_get(
                            json_object_get(json_object_get(j, "kafka"), "consumer"), "sasl.username")),
                        "alice");
    /* Ordinary values come through with their types. */
    assert_int_equal(json_integer_value(json_object_get(json_object_get(j, "model"), "k")), 32);
    assert_true(json_is_false(json_object_get(json_object_get(j, "model"), "robust")));
    assert_string_equal(json_string_value(json_object_get(json_object_get(j, "model"), "score")), "density");
    free(text);
    json_decref(j);

    /* An empty secret shows as empty (nothing to hide, and it tells the
     * operator that no token is set). */
    assert_int_equal(set(f, "status.token="), 0);
    j = config_option_value(&f->cfg, config_option_find("status.token"), 0);
    assert_string_equal(json_string_value(j), "");
    json_decref(j);
}

static void test_to_json_covers_every_option(void **state)
{
    fixture *f = *state;
    json_t *j;
    make_runnable(f);
    j = config_to_json(&f->cfg);
    assert_non_null(j);
    for (size_t i = 0; i < config_option_count(); i++) {
        const config_option *o = config_option_at(i);
        char name[160];
        char *seg = name, *dot;
        json_t *at = j;
        snprintf(name, sizeof name, "%s", o->name);
        while ((dot = strchr(seg, '.')) != NULL) {
            *dot = '\0';
            at = json_object_get(at, seg);
            seg = dot + 1;
        }
        if (json_object_get(at, seg) == NULL)
            fail_msg("%s missing from config_to_json", o->name);
    }
    json_decref(j);
}

static void test_print_defaults_lists_everything(void **state)
{
    (void)state;
    char *buf = NULL;
    size_t len = 0;
    FILE *out = open_memstream(&buf, &len);
    assert_non_null(out);
    config_print_defaults(out);
    fclose(out);
    for (size_t i = 0; i < config_option_count(); i++) {
        const config_option *o = config_option_at(i);
        char line_start[200];
        snprintf(line_start, sizeof line_start, "\n%s ", o->name);
        if (strstr(buf, line_start) == NULL)
            fail_msg("%s not listed by --defaults", o->name);
        if (strstr(buf, o->help) == NULL)
            fail_msg("help of %s not listed", o->name);
    }
    assert_non_null(strstr(buf, "1 .. 1024"));                    /* model.k bounds */
    assert_non_null(strstr(buf, "density, space, combined"));     /* enum values */
    free(buf);
}

static void test_model_params_export(void **state)
{
    fixture *f = *state;
    model_params p;
    assert_int_equal(config_to_model_params(&f->cfg, 0, &p), -1);
    assert_int_equal(config_to_model_params(&f->cfg, MODEL_MAX_DIM + 1, &p), -1);
    assert_int_equal(set(f, "model.k=7"), 0);
    assert_int_equal(config_to_model_params(&f->cfg, 5, &p), 0);
    assert_int_equal(p.dim, 5);
    assert_int_equal(p.k, 7);
}

/* ---- files: featmap path, reload, the example ----------------------------- */

static void write_file(const char *path, const char *text)
{
    FILE *fp = fopen(path, "w");
    assert_non_null(fp);
    fputs(text, fp);
    fclose(fp);
}

static void test_featmap_path_relative_to_config(void **state)
{
    fixture *f = *state;
    char dir[] = "/tmp/oddsky-cfg-XXXXXX";
    char cfgp[256], fmp[256];
    assert_non_null(mkdtemp(dir));
    snprintf(cfgp, sizeof cfgp, "%s/c.json", dir);
    snprintf(fmp, sizeof fmp, "%s/fm.json", dir);
    write_file(fmp, "// a feature map\n{\"id\": \"packet_id\", \"time\": \"t\",\n"
                    " \"features\": [{\"name\": \"m\", \"field\": \"m\"}]}\n");
    write_file(cfgp, "{\"featmap\": \"fm.json\"}");
    config_errs_init(&f->errs);
    assert_int_equal(config_load_file(&f->cfg, cfgp, &f->errs), 0);
    expect_no_errors(&f->errs);
    assert_non_null(f->cfg.featmap);
    assert_string_equal(f->cfg.featmap_file, fmp);
    assert_string_equal(f->cfg.config_dir, dir);
    assert_string_equal(json_string_value(json_object_get(f->cfg.featmap, "id")), "packet_id");

    write_file(cfgp, "{\"featmap\": \"nope.json\"}");
    config_errs_init(&f->errs);
    assert_int_equal(config_load_file(&f->cfg, cfgp, &f->errs), -1);
    assert_string_equal(f->errs.e[0].path, "featmap");
    assert_non_null(strstr(f->errs.e[0].rule, "nope.json"));

    write_file(fmp, "{\"id\": }");
    write_file(cfgp, "{\"featmap\": \"fm.json\"}");
    config_errs_init(&f->errs);
    assert_int_equal(config_load_file(&f->cfg, cfgp, &f->errs), -1);
    assert_true(strncmp(f->errs.e[0].path, fmp, strlen(fmp)) == 0); /* "dir/fm.json:1:8" */
    unlink(fmp);
    unlink(cfgp);
    rmdir(dir);
}

static void test_reload_refuses_non_live(void **state)
{
    fixture *f = *state;
    char path[] = "/tmp/oddsky-reload-XXXXXX";
    int fd = mkstemp(path);
    struct oddsky_config next;
    const char *sets_ok[] = {"log.level=debug", "run.drain_deadline_ms=5000"};
    const char *sets_bad[] = {"model.k=48", "kafka.brokers=other:1"};
    assert_true(fd >= 0);
    close(fd);
    write_file(path, "{\"kafka\": {\"brokers\": \"h:9092\", \"input_topics\": [\"p\"]},"
                     " \"featmap\": {\"id\": \"i\", \"time\": \"t\","
                     " \"features\": [{\"name\": \"m\", \"field\": \"m\"}]}}");
    assert_int_equal(config_load_file(&f->cfg, path, &f->errs), 0);

    /* The same file plus live changes: accepted. */
    config_errs_init(&f->errs);
    assert_int_equal(config_reload(&f->cfg, path, sets_ok, 2, &next, &f->errs), 0);
    expect_no_errors(&f->errs);
    assert_int_equal(next.log.level, 3);
    assert_int_equal(next.run.drain_deadline_ms, 5000);
    config_free(&next);

    /* Restart-only changes: refused, each named. */
    config_errs_init(&f->errs);
    assert_int_equal(config_reload(&f->cfg, path, sets_bad, 2, &next, &f->errs), -1);
    expect_error(&f->errs, "model.k", "cannot change on reload (restart needed; was 32, now 48)");
    expect_error(&f->errs, "kafka.brokers",
                 "cannot change on reload (restart needed; was \"h:9092\", now \"other:1\")");
    assert_int_equal(config_errs_count(&f->errs), 2);
    config_free(&next);

    /* A changed feature map is a restart too (it changes the model's dim). */
    write_file(path, "{\"kafka\": {\"brokers\": \"h:9092\", \"input_topics\": [\"p\"]},"
                     " \"featmap\": {\"id\": \"i\", \"time\": \"t\","
                     " \"features\": [{\"name\": \"m2\", \"field\": \"m\"}]}}");
    config_errs_init(&f->errs);
    assert_int_equal(config_reload(&f->cfg, path, NULL, 0, &next, &f->errs), -1);
    expect_error(&f->errs, "featmap", "cannot change on reload (restart needed)");
    config_free(&next);

    /* A reload whose file is broken reports it and changes nothing. */
    write_file(path, "{\"model\": {\"k\": 0}}");
    config_errs_init(&f->errs);
    assert_int_equal(config_reload(&f->cfg, path, NULL, 0, &next, &f->errs), -1);
    expect_error(&f->errs, "model.k", "must be between 1 and 1024 (got 0)");
    config_free(&next);
    assert_int_equal(f->cfg.model.k, 32);
    unlink(path);
}

static const char *example_path(char *buf, size_t n)
{
    const char *top = getenv("ODDSKY_TOP");
    snprintf(buf, n, "%s/config/oddsky.example.json", top != NULL ? top : ".");
    return buf;
}

static void test_example_config_valid(void **state)
{
    fixture *f = *state;
    char path[512];
    assert_int_equal(config_load_file(&f->cfg, example_path(path, sizeof path), &f->errs), 0);
    expect_no_errors(&f->errs);
    assert_int_equal(config_validate(&f->cfg, &f->errs), 0);
    expect_no_errors(&f->errs);
}

static void test_example_config_has_every_option(void **state)
{
    (void)state;
    char path[512];
    char *text;
    long len;
    FILE *fp = fopen(example_path(path, sizeof path), "rb");
    json_t *root;
    assert_non_null(fp);
    fseek(fp, 0, SEEK_END);
    len = ftell(fp);
    fseek(fp, 0, SEEK_SET);
    text = calloc((size_t)len + 1, 1);
    assert_int_equal(fread(text, 1, (size_t)len, fp), (size_t)len);
    fclose(fp);
    assert_int_equal(config_strip_comments(text, NULL), 0);
    root = json_loads(text, 0, NULL);
    assert_non_null(root);
    for (size_t i = 0; i < config_option_count(); i++) {
        const config_option *o = config_option_at(i);
        char name[160];
        char *seg = name, *dot;
        json_t *at = root;
        snprintf(name, sizeof name, "%s", o->name);
        while (at != NULL && (dot = strchr(seg, '.')) != NULL) {
            *dot = '\0';
            at = json_object_get(at, seg);
            seg = dot + 1;
        }
        if (at == NULL || json_object_get(at, seg) == NULL)
            fail_msg("option %s is missing from config/oddsky.example.json", o->name);
    }
    json_decref(root);
    free(text);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test_setup_teardown(test_model_defaults_match_model_h, setup, teardown),
        cmocka_unit_test_setup_teardown(test_model_defaults_match_model_c, setup, teardown),
        cmocka_unit_test_setup_teardown(test_daemon_defaults_match_brief, setup, teardown),
        cmocka_unit_test_setup_teardown(test_defaults_validate, setup, teardown),
        cmocka_unit_test(test_every_option_has_a_valid_default_text),
        cmocka_unit_test_setup_teardown(test_uint_bounds, setup, teardown),
        cmocka_unit_test_setup_teardown(test_double_bounds, setup, teardown),
        cmocka_unit_test_setup_teardown(test_bool_enum_string_types, setup, teardown),
        cmocka_unit_test_setup_teardown(test_list_object_featmap_types, setup, teardown),
        cmocka_unit_test(test_error_collector),
        cmocka_unit_test_setup_teardown(test_unknown_key_hint, setup, teardown),
        cmocka_unit_test_setup_teardown(test_set_typing, setup, teardown),
        cmocka_unit_test(test_strip_comments_keeps_strings_and_lines),
        cmocka_unit_test_setup_teardown(test_parse_error_line_numbers, setup, teardown),
        cmocka_unit_test_setup_teardown(test_cross_field_rules, setup, teardown),
        cmocka_unit_test_setup_teardown(test_status_listen_needs_token, setup, teardown),
        cmocka_unit_test_setup_teardown(test_featmap_errors_carry_featmap_path, setup, teardown),
        cmocka_unit_test_setup_teardown(test_secrets_masked, setup, teardown),
        cmocka_unit_test_setup_teardown(test_to_json_covers_every_option, setup, teardown),
        cmocka_unit_test(test_print_defaults_lists_everything),
        cmocka_unit_test_setup_teardown(test_model_params_export, setup, teardown),
        cmocka_unit_test_setup_teardown(test_featmap_path_relative_to_config, setup, teardown),
        cmocka_unit_test_setup_teardown(test_reload_refuses_non_live, setup, teardown),
        cmocka_unit_test_setup_teardown(test_example_config_valid, setup, teardown),
        cmocka_unit_test(test_example_config_has_every_option),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
