/*
 * test_featmap.c - feature map validation (paths and rules) and feature
 * extraction from JSON packets: transforms, series, colors, diff/ratio,
 * missing handling, truncation; the additions (band-pooled series, the
 * colour gradient, field differences) from JSON and from Avro values,
 * nullable unions included.
 *
 * Expected values are worked by hand from the definitions named beside
 * each check (series.c formulas, common practice for transforms).
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "daemon/featmap.h"

#define assert_near(a, b, tol)                                               \
    do {                                                                     \
        double a_ = (a), b_ = (b);                                           \
        if (!(fabs(a_ - b_) <= (tol) * (1.0 + fabs(b_)))) {                  \
            print_error("%s = %.17g, expected %.17g\n", #a, a_, b_);         \
            fail();                                                          \
        }                                                                    \
    } while (0)

static json_t *js(const char *text)
{
    json_error_t e;
    json_t *j = json_loads(text, 0, &e);
    if (!j)
        print_error("bad test JSON: %s (line %d)\n", e.text, e.line);
    assert_non_null(j);
    return j;
}

/* ---- validation ---------------------------------------------------- */

typedef struct errlist {
    int n;
    char path[32][128];
    char rule[32][256];
} errlist;

static void collect(void *ctx, const char *path, const char *rule)
{
    errlist *l = ctx;
    if (l->n < 32) {
        snprintf(l->path[l->n], sizeof l->path[0], "%s", path);
        snprintf(l->rule[l->n], sizeof l->rule[0], "%s", rule);
    }
    l->n++;
}

static int has_err(const errlist *l, const char *path, const char *rule_part)
{
    for (int i = 0; i < l->n && i < 32; i++)
        if (!strcmp(l->path[i], path) && strstr(l->rule[i], rule_part))
            return 1;
    return 0;
}

static void dump(const errlist *l)
{
    for (int i = 0; i < l->n && i < 32; i++)
        print_message("  %s: %s\n", l->path[i], l->rule[i]);
}

#define expect_err(l, path, rule)                                            \
    do {                                                                     \
        if (!has_err(l, path, rule)) {                                       \
            dump(l);                                                         \
            print_error("no error \"%s: ...%s...\"\n", path, rule);          \
            fail();                                                          \
        }                                                                    \
    } while (0)

static void test_validate_names_paths_and_rules(void **state)
{
    (void)state;
    json_t *spec = js(
        "{\"id\": \"packet_id\", \"tme\": \"x\","
        " \"history\": {\"path\": \"h\", \"time\": \"t\", \"value\": \"v\","
        "               \"max_points\": 0},"
        " \"features\": ["
        "  {\"name\": \"a\", \"field\": \"obs..mag\"},"
        "  {\"name\": \"b\", \"field\": \"x\", \"transform\": \"sqrt\"},"
        "  {\"name\": \"c\", \"series\": \"median\"},"
        "  {\"name\": \"d\", \"series\": \"std\", \"band\": \"r\"},"
        "  {\"name\": \"a\", \"ratio\": [\"a\", \"zz\"]},"
        "  {\"name\": \"f\", \"field\": \"x\", \"series\": \"std\"},"
        "  {\"name\": \"g\", \"color\": [\"g\", \"g\"]},"
        "  {\"name\": \"h i\", \"field\": \"x\", \"colour\": 1},"
        "  {\"name\": \"k\", \"series\": \"skew\", \"min_points\": 2}"
        " ]}");
    errlist l = {0};
    int n = featmap_validate(spec, collect, &l);
    assert_int_equal(n, l.n);
    expect_err(&l, "featmap.tme", "unknown key");
    expect_err(&l, "featmap.history.max_points", "between 1 and");
    expect_err(&l, "featmap.features[0].field", "empty component");
    expect_err(&l, "featmap.features[1].transform", "none log10 asinh negate");
    expect_err(&l, "featmap.features[2].series", "must be one of");
    expect_err(&l, "featmap.features[3].band", "history.band");
    expect_err(&l, "featmap.features[4].name", "duplicate");
    expect_err(&l, "featmap.features[4].ratio[1]", "earlier feature");
    expect_err(&l, "featmap.features[5]", "exactly one of");
    expect_err(&l, "featmap.features[6].color", "two different bands");
    expect_err(&l, "featmap.features[7].name", "letters, digits");
    expect_err(&l, "featmap.features[7].colour", "unknown key");
    /* skew needs 3 points (scipy.stats.skew bias=False divides by n-2) */
    expect_err(&l, "featmap.features[8].min_points", "between 3 and");
    char err[256] = "";
    assert_null(featmap_new(spec, err, sizeof err));
    assert_non_null(strstr(err, "featmap."));
    json_decref(spec);

    errlist l2 = {0};
    json_t *bad = js("[1]");
    assert_int_equal(featmap_validate(bad, collect, &l2), 1);
    expect_err(&l2, "featmap", "must be an object");
    json_decref(bad);

    errlist l3 = {0};
    json_t *nofeat = js("{\"id\": \"i\", \"features\": []}");
    assert_true(featmap_validate(nofeat, collect, &l3) >= 1);
    expect_err(&l3, "featmap.features", "non-empty");
    json_decref(nofeat);

    errlist l4 = {0};
    json_t *noid = js("{\"features\": [{\"name\": \"a\", \"field\": \"x\"}]}");
    assert_int_equal(featmap_validate(noid, collect, &l4), 1);
    expect_err(&l4, "featmap.id", "required");
    json_decref(noid);
}

/* ---- extraction ---------------------------------------------------- */

static const char *SPEC =
    "{\"id\": \"packet_id\", \"source\": \"source.id\", \"time\": \"obs.mjd\","
    " \"history\": {\"path\": \"history\", \"time\": \"mjd\", \"value\": \"mag\","
    "               \"err\": \"mag_err\", \"band\": \"band\", \"max_points\": 8},"
    " \"current\": {\"time\": \"obs.mjd\", \"value\": \"obs.mag\","
    "               \"err\": \"obs.mag_err\", \"band\": \"obs.band\"},"
    " \"features\": ["
    "  {\"name\": \"mag\", \"field\": \"obs.mag\", \"err\": \"obs.mag_err\"},"
    "  {\"name\": \"lmag\", \"field\": \"obs.mag\", \"err\": \"obs.mag_err\","
    "   \"transform\": \"log10\"},"
    "  {\"name\": \"amag\", \"field\": \"obs.mag\", \"transform\": \"asinh\"},"
    "  {\"name\": \"nmag\", \"field\": \"obs.mag\", \"transform\": \"negate\"},"
    "  {\"name\": \"r_amp\", \"series\": \"amplitude\", \"band\": \"r\","
    "   \"include_current\": true},"
    "  {\"name\": \"g_amp\", \"series\": \"amplitude\", \"band\": \"g\"},"
    "  {\"name\": \"r_mean\", \"series\": \"wmean\", \"band\": \"r\"},"
    "  {\"name\": \"all_n\", \"series\": \"count\", \"band\": \"all\","
    "   \"include_current\": true},"
    "  {\"name\": \"r_rise\", \"series\": \"rise_rate\", \"band\": \"r\","
    "   \"include_current\": true},"
    "  {\"name\": \"g_r\", \"color\": [\"g\", \"r\"], \"mode\": \"latest\"},"
    "  {\"name\": \"g_r_mean\", \"color\": [\"g\", \"r\"], \"mode\": \"mean\","
    "   \"window_days\": 2.5},"
    "  {\"name\": \"amp_ratio\", \"ratio\": [\"r_amp\", \"g_amp\"]},"
    "  {\"name\": \"mag_diff\", \"diff\": [\"mag\", \"r_mean\"]},"
    "  {\"name\": \"g_skew\", \"series\": \"skew\", \"band\": \"g\"}"
    " ]}";

enum { F_MAG, F_LMAG, F_AMAG, F_NMAG, F_RAMP, F_GAMP, F_RMEAN, F_ALLN,
       F_RRISE, F_GR, F_GRM, F_RATIO, F_DIFF, F_GSKEW, F_DIM };

/* History sent newest first to check the time sort. */
static const char *PACKET =
    "{\"packet_id\": 123456789012, \"source\": {\"id\": \"src-7\"},"
    " \"obs\": {\"mjd\": 60005.0, \"mag\": 16.5, \"mag_err\": 0.1, \"band\": \"r\"},"
    " \"history\": ["
    "  {\"mjd\": 60004.0, \"mag\": 17.0, \"mag_err\": 0.05, \"band\": \"r\"},"
    "  {\"mjd\": 60003.0, \"mag\": 17.9, \"mag_err\": 0.1, \"band\": \"r\"},"
    "  {\"mjd\": 60002.0, \"mag\": 18.4, \"mag_err\": 0.2, \"band\": \"g\"},"
    "  {\"mjd\": 60001.0, \"mag\": 17.5, \"mag_err\": 0.1, \"band\": \"r\"},"
    "  {\"mjd\": 60000.0, \"mag\": 18.0, \"mag_err\": 0.1, \"band\": \"g\"}"
    " ]}";

typedef struct fx {
    featmap *fm;
    featmap_scratch *s;
    packet_features pf;
} fx;

/* A fixture for the feature map in spec_text. */
static int setup_spec(void **state, const char *spec_text)
{
    fx *f = calloc(1, sizeof *f);
    json_t *spec = js(spec_text);
    char err[256] = "";
    f->fm = featmap_new(spec, err, sizeof err);
    json_decref(spec);
    if (!f->fm) {
        print_error("featmap_new: %s\n", err);
        free(f);
        return -1;
    }
    f->s = featmap_scratch_new(f->fm);
    *state = f;
    return f->s ? 0 : -1;
}

static int setup(void **state)
{
    return setup_spec(state, SPEC);
}

static int teardown(void **state)
{
    fx *f = *state;
    featmap_scratch_free(f->s);
    featmap_free(f->fm);
    free(f);
    return 0;
}

static int extract(fx *f, const char *text)
{
    json_t *p = js(text);
    memset(&f->pf, 0xa5, sizeof f->pf);
    int rc = featmap_extract_json(f->fm, p, f->s, &f->pf);
    json_decref(p);
    return rc;
}

static void test_names_and_dim(void **state)
{
    fx *f = *state;
    assert_int_equal(featmap_dim(f->fm), F_DIM);
    assert_string_equal(featmap_name(f->fm, F_GR), "g_r");
    assert_null(featmap_name(f->fm, F_DIM));
    assert_string_equal(featmap_names(f->fm)[F_DIFF], "mag_diff");
    assert_int_equal(featmap_max_points(f->fm), 8);
}

static void test_json_features(void **state)
{
    fx *f = *state;
    assert_int_equal(extract(f, PACKET), 0);
    packet_features *p = &f->pf;
    assert_string_equal(p->packet_id, "123456789012");
    assert_string_equal(p->source_id, "src-7");
    assert_int_equal(p->time_from_packet, 1);
    assert_near(p->time_days, 60005.0, 0);
    assert_int_equal(p->dim, F_DIM);
    assert_int_equal(p->history_points, 5);
    assert_int_equal(p->type_errors, 0);
    assert_int_equal(p->history_truncated, 0);
    /* field and transforms; errors by first-order propagation
     * (common practice): d log10 x = dx / (x ln 10), d asinh x =
     * dx / sqrt(1 + x^2) */
    assert_near(p->x[F_MAG], 16.5, 1e-15);
    assert_near(p->err[F_MAG], 0.1, 1e-15);
    assert_near(p->x[F_LMAG], log10(16.5), 1e-15);
    assert_near(p->err[F_LMAG], 0.1 / (16.5 * log(10.0)), 1e-12);
    assert_near(p->x[F_AMAG], asinh(16.5), 1e-15);
    assert_near(p->x[F_NMAG], -16.5, 1e-15);
    /* amplitude (max - min) of r with the current point: 17.9 - 16.5 */
    assert_near(p->x[F_RAMP], 1.4, 1e-12);
    assert_near(p->x[F_GAMP], 0.4, 1e-12);
    /* inverse-variance weighted mean of r history:
     * (17.5*100 + 17.9*100 + 17.0*400) / 600 */
    assert_near(p->x[F_RMEAN], 10340.0 / 600.0, 1e-12);
    assert_near(p->err[F_RMEAN], 1.0 / sqrt(600.0), 1e-12);
    assert_near(p->x[F_ALLN], 6.0, 0);
    /* steepest brightening among time-sorted r points 60001:17.5,
     * 60003:17.9, 60004:17.0, 60005:16.5 -> 0.9 mag/day (60003->60004) */
    assert_near(p->x[F_RRISE], 0.9, 1e-12);
    /* latest g (60002: 18.4) minus latest r in the history (60004: 17.0) */
    assert_near(p->x[F_GR], 1.4, 1e-12);
    assert_near(p->err[F_GR], sqrt(0.2 * 0.2 + 0.05 * 0.05), 1e-12);
    /* mean over [60004 - 2.5, 60004]: g {18.4}, r {17.9, 17.0} */
    assert_near(p->x[F_GRM], 18.4 - (17.9 + 17.0) / 2.0, 1e-12);
    assert_near(p->x[F_RATIO], 1.4 / 0.4, 1e-12);
    assert_near(p->x[F_DIFF], 16.5 - 10340.0 / 600.0, 1e-12);
    /* skew needs 3 points; g has 2 */
    assert_int_equal(p->missing[F_GSKEW], 1);
    assert_true(isnan(p->x[F_GSKEW]));
    assert_int_equal(p->n_missing, 1);
    for (int j = 0; j < F_DIM; j++)
        if (j != F_GSKEW)
            assert_int_equal(p->missing[j], 0);
}

static void test_missing_values(void **state)
{
    fx *f = *state;
    /* mag null: field features, the diff and the current point go */
    assert_int_equal(
        extract(f, "{\"packet_id\": \"p1\", \"source\": {\"id\": \"s\"},"
                   " \"obs\": {\"mjd\": 60005.0, \"mag\": null, \"band\": \"r\"},"
                   " \"history\": ["
                   "  {\"mjd\": 60003.0, \"mag\": 17.9, \"mag_err\": 0.1, \"band\": \"r\"},"
                   "  {\"mjd\": 60004.0, \"mag\": 17.0, \"mag_err\": 0.05, \"band\": \"r\"}]}"),
        0);
    packet_features *p = &f->pf;
    assert_int_equal(p->missing[F_MAG], 1);
    assert_int_equal(p->missing[F_LMAG], 1);
    assert_int_equal(p->missing[F_DIFF], 1);
    assert_true(isnan(p->x[F_MAG]));
    assert_near(p->x[F_RAMP], 0.9, 1e-12);   /* history r only */
    assert_int_equal(p->missing[F_GAMP], 1); /* no g points */
    assert_int_equal(p->missing[F_GR], 1);
    assert_int_equal(p->missing[F_RATIO], 1);
    assert_near(p->x[F_ALLN], 2.0, 0);
    assert_int_equal(p->type_errors, 0);

    /* wrong types count as type errors and read as missing; a negative
     * value has no log10 */
    assert_int_equal(
        extract(f, "{\"packet_id\": \"p2\", \"source\": {\"id\": \"s\"},"
                   " \"obs\": {\"mjd\": \"yesterday\", \"mag\": -2.0, \"mag_err\": \"x\"},"
                   " \"history\": [7, {\"mjd\": 1.0, \"mag\": \"bright\"}, null]}"),
        0);
    assert_int_equal(p->time_from_packet, 0);
    assert_true(isnan(p->time_days));
    assert_near(p->x[F_MAG], -2.0, 0);
    assert_near(p->err[F_MAG], 0.0, 0); /* error unknown */
    assert_int_equal(p->missing[F_LMAG], 1);
    assert_near(p->x[F_NMAG], 2.0, 0);
    /* "yesterday", "x", 7, "bright" */
    assert_int_equal(p->type_errors, 4);
    assert_int_equal(p->history_points, 0);

    /* huge but finite values stay; log10(1e308) = 308 */
    assert_int_equal(extract(f, "{\"packet_id\": \"p3\", \"source\": {\"id\": \"s\"},"
                                " \"obs\": {\"mag\": 1e308}}"),
                     0);
    assert_near(p->x[F_LMAG], 308.0, 1e-12);
    /* the sum overflows to inf in the ratio path only if used: here
     * amplitude has no points -> missing, never inf */
    assert_int_equal(p->missing[F_RAMP], 1);
}

static void test_ids(void **state)
{
    fx *f = *state;
    assert_int_equal(extract(f, "{\"source\": {\"id\": \"s\"}}"),
                     PACKET_E_MISSING_ID);
    assert_int_equal(extract(f, "{\"packet_id\": null, \"source\": {\"id\": \"s\"}}"),
                     PACKET_E_MISSING_ID);
    assert_int_equal(extract(f, "{\"packet_id\": 1.5, \"source\": {\"id\": \"s\"}}"),
                     PACKET_E_MISSING_ID);
    assert_int_equal(extract(f, "{\"packet_id\": \"a\"}"), PACKET_E_MISSING_SOURCE);
    char big[400];
    memset(big, 'x', 200);
    big[200] = '\0';
    char text[600];
    snprintf(text, sizeof text, "{\"packet_id\": \"%s\", \"source\": {\"id\": \"s\"}}",
             big);
    assert_int_equal(extract(f, text), PACKET_E_ID_TOO_LONG);
    /* 127 bytes fit */
    big[PACKET_ID_MAX - 1] = '\0';
    snprintf(text, sizeof text, "{\"packet_id\": \"%s\", \"source\": {\"id\": 5}}",
             big);
    assert_int_equal(extract(f, text), 0);
    assert_int_equal(strlen(f->pf.packet_id), PACKET_ID_MAX - 1);
    assert_string_equal(f->pf.source_id, "5");
}

static void test_history_truncated_to_newest(void **state)
{
    fx *f = *state;
    /* max_points 8: 12 elements, oldest first; the last 8 are kept */
    char text[4096];
    size_t n = (size_t)snprintf(text, sizeof text,
                                "{\"packet_id\": \"t\", \"source\": {\"id\": \"s\"},"
                                " \"history\": [");
    for (int i = 0; i < 12; i++)
        n += (size_t)snprintf(text + n, sizeof text - n,
                              "%s{\"mjd\": %d, \"mag\": %d, \"mag_err\": 0.1, "
                              "\"band\": \"r\"}",
                              i ? "," : "", 60000 + i, 10 + i);
    snprintf(text + n, sizeof text - n, "]}");
    assert_int_equal(extract(f, text), 0);
    assert_int_equal(f->pf.history_truncated, 1);
    assert_int_equal(f->pf.history_points, 8);
    assert_near(f->pf.x[F_ALLN], 8.0, 0);
    /* kept mags 14..21 */
    assert_near(f->pf.x[F_RAMP], 7.0, 1e-12);
}

static void test_series_without_bands(void **state)
{
    (void)state;
    /* no band paths at all: "all" works, single bands are refused */
    json_t *spec = js("{\"id\": \"i\", \"history\": {\"path\": \"h\", \"time\": \"t\","
                      " \"value\": \"v\"}, \"features\": ["
                      " {\"name\": \"sd\", \"series\": \"std\"},"
                      " {\"name\": \"jj\", \"series\": \"stetson_j\"}]}");
    featmap *fm = featmap_new(spec, NULL, 0);
    json_decref(spec);
    assert_non_null(fm);
    featmap_scratch *s = featmap_scratch_new(fm);
    json_t *p = js("{\"i\": \"x\", \"h\": [{\"t\": 1, \"v\": 1.0}, {\"t\": 2, \"v\": 2.0},"
                   " {\"t\": 3, \"v\": 4.0}]}");
    packet_features pf;
    assert_int_equal(featmap_extract_json(fm, p, s, &pf), 0);
    /* numpy.std([1, 2, 4], ddof=1) = sqrt(7/3) */
    assert_near(pf.x[0], sqrt(7.0 / 3.0), 1e-14);
    /* no errors configured: Stetson J has no usable points -> missing */
    assert_int_equal(pf.missing[1], 1);
    assert_string_equal(pf.source_id, "x"); /* no source path: the id */
    json_decref(p);
    featmap_scratch_free(s);
    featmap_free(fm);
}


/* ---- additions: pool_bands, gradient, minus -------------------------- */

static void test_validate_additions(void **state)
{
    (void)state;
    json_t *spec = js(
        "{\"id\": \"i\","
        " \"history\": {\"path\": \"h\", \"time\": \"t\", \"value\": \"m\","
        "               \"band\": \"b\"},"
        " \"current\": {\"time\": \"c.t\", \"value\": \"c.m\"},"
        " \"features\": ["
        "  {\"name\": \"a\", \"series\": \"std\", \"band\": \"r\","
        "   \"pool_bands\": true},"
        "  {\"name\": \"b\", \"series\": \"std\", \"pool_bands\": 1},"
        "  {\"name\": \"c\", \"field\": \"x\", \"minus\": \"p..mjd\"},"
        "  {\"name\": \"d\", \"color\": \"gradient\"},"
        "  {\"name\": \"e\", \"color\": \"gradient\", \"mode\": \"mean\","
        "   \"include_current\": false,"
        "   \"wavelength_um\": {\"g\": -0.5, \"all\": 0.6, \"r\": \"x\"}},"
        "  {\"name\": \"f\", \"color\": [\"g\", \"r\"],"
        "   \"wavelength_um\": {\"g\": 0.48}},"
        "  {\"name\": \"g\", \"color\": \"slope\"},"
        "  {\"name\": \"h\", \"color\": \"gradient\", \"wavelength_um\": {}}"
        " ]}");
    errlist l = {0};
    int n = featmap_validate(spec, collect, &l);
    assert_int_equal(n, l.n);
    expect_err(&l, "featmap.features[0].pool_bands",
               "pool_bands needs band \"all\"");
    expect_err(&l, "featmap.features[1].pool_bands", "true or false");
    expect_err(&l, "featmap.features[2].minus", "empty component");
    expect_err(&l, "featmap.features[3].wavelength_um", "required");
    /* current.band is not configured: the gradient needs it */
    expect_err(&l, "featmap.features[3].color", "current.band");
    expect_err(&l, "featmap.features[4].mode", "two-band form");
    expect_err(&l, "featmap.features[4].include_current", "must be true");
    expect_err(&l, "featmap.features[4].wavelength_um.g", "> 0");
    expect_err(&l, "featmap.features[4].wavelength_um.all", "not \"all\"");
    expect_err(&l, "featmap.features[4].wavelength_um.r", "> 0");
    expect_err(&l, "featmap.features[5].wavelength_um", "only for");
    expect_err(&l, "featmap.features[6].color", "or \"gradient\"");
    expect_err(&l, "featmap.features[7].wavelength_um", "non-empty");
    json_decref(spec);

    /* pool_bands needs to know each point's band */
    errlist l2 = {0};
    json_t *nob = js("{\"id\": \"i\", \"history\": {\"path\": \"h\", \"time\": \"t\","
                     " \"value\": \"v\"}, \"features\": ["
                     " {\"name\": \"s\", \"series\": \"std\", \"pool_bands\": true}]}");
    assert_int_equal(featmap_validate(nob, collect, &l2), 1);
    expect_err(&l2, "featmap.features[0].pool_bands", "history.band");
    json_decref(nob);

    /* the gradient's bands count toward FEATMAP_MAX_BANDS */
    char text[4096];
    size_t at = (size_t)snprintf(
        text, sizeof text,
        "{\"id\": \"i\", \"history\": {\"path\": \"h\", \"time\": \"t\","
        " \"value\": \"v\", \"band\": \"b\"}, \"current\": {\"time\": \"t\","
        " \"value\": \"v\", \"band\": \"b\"}, \"features\": [{\"name\": \"g\","
        " \"color\": \"gradient\", \"wavelength_um\": {");
    for (int b = 0; b < 33; b++)
        at += (size_t)snprintf(text + at, sizeof text - at, "%s\"b%d\": %d",
                               b ? ", " : "", b, b + 1);
    snprintf(text + at, sizeof text - at, "}}]}");
    errlist l3 = {0};
    json_t *many = js(text);
    assert_int_equal(featmap_validate(many, collect, &l3), 1);
    expect_err(&l3, "featmap.features", "at most 32 distinct bands");
    json_decref(many);
}

static const char *SPEC_ADD =
    "{\"id\": \"id\","
    " \"history\": {\"path\": \"h\", \"time\": \"t\", \"value\": \"m\","
    "               \"err\": \"e\", \"band\": \"b\"},"
    " \"current\": {\"time\": \"obs.t\", \"value\": \"obs.m\","
    "               \"err\": \"obs.e\", \"band\": \"obs.b\"},"
    " \"features\": ["
    "  {\"name\": \"pslope\", \"series\": \"slope\", \"band\": \"all\","
    "   \"pool_bands\": true},"
    "  {\"name\": \"pcount\", \"series\": \"count\", \"pool_bands\": true},"
    "  {\"name\": \"pstd\", \"series\": \"std\", \"pool_bands\": true},"
    "  {\"name\": \"plmm\", \"series\": \"latest_minus_mean\","
    "   \"pool_bands\": true},"
    "  {\"name\": \"pcount6\", \"series\": \"count\", \"pool_bands\": true,"
    "   \"min_points\": 6},"
    "  {\"name\": \"slope\", \"series\": \"slope\"},"
    "  {\"name\": \"cgrad\", \"color\": \"gradient\", \"window_days\": 1,"
    "   \"include_current\": true, \"wavelength_um\": {\"u\": 0.367,"
    "   \"g\": 0.482, \"r\": 0.622, \"i\": 0.755, \"z\": 0.869, \"y\": 0.971,"
    "   \"r2\": 0.622}},"
    "  {\"name\": \"since\", \"field\": \"obs.t\", \"minus\": \"prior_limit.mjd\"},"
    "  {\"name\": \"nsince\", \"field\": \"obs.t\", \"minus\": \"prior_limit.mjd\","
    "   \"err\": \"obs.e\", \"transform\": \"negate\"}"
    " ]}";

enum { A_PSLOPE, A_PCOUNT, A_PSTD, A_PLMM, A_PCOUNT6, A_SLOPE, A_CGRAD,
       A_SINCE, A_NSINCE, A_DIM };

static int setup_add(void **state)
{
    return setup_spec(state, SPEC_ADD);
}

static void test_pool_bands(void **state)
{
    fx *f = *state;
    assert_int_equal(featmap_dim(f->fm), A_DIM);
    /* r: t 0, 2, 4 -> 18.0 18.4 18.6; g: t 1, 3 -> 19.0 19.6 (a colour
     * offset of about +1); i: one point (dropped); one point without a
     * band (dropped).  None of the bands is named elsewhere in the map
     * except through the gradient, and "w" not at all. */
    assert_int_equal(
        extract(f, "{\"id\": \"p\", \"h\": ["
                   " {\"t\": 3, \"m\": 19.6, \"e\": 0.1, \"b\": \"g\"},"
                   " {\"t\": 0, \"m\": 18.0, \"e\": 0.1, \"b\": \"r\"},"
                   " {\"t\": 1, \"m\": 19.0, \"e\": 0.1, \"b\": \"g\"},"
                   " {\"t\": 2, \"m\": 18.4, \"e\": 0.1, \"b\": \"r\"},"
                   " {\"t\": 5, \"m\": 17.0, \"e\": 0.1, \"b\": \"w\"},"
                   " {\"t\": 4.5, \"m\": 30.0, \"e\": 0.1},"
                   " {\"t\": 4, \"m\": 18.6, \"e\": 0.1, \"b\": \"r\"}]}"),
        0);
    packet_features *p = &f->pf;
    /* pooled within-band slope (series.c formula): r: tbar 2, vbar 55/3,
     * S_tv = (-2)(-1/3) + 2(4/15) = 1.2, S_tt = 8; g: tbar 2, vbar 19.3,
     * S_tv = 0.6, S_tt = 2 -> (1.2 + 0.6) / (8 + 2) */
    assert_near(p->x[A_PSLOPE], 0.18, 1e-12);
    assert_near(p->x[A_PCOUNT], 5.0, 0);
    /* numpy.std(ddof=1) of the centred values
     * r: -1/3, 1/15, 4/15; g: -0.3, 0.3 -> sum of squares 11/30 over 4 */
    assert_near(p->x[A_PSTD], sqrt(11.0 / 120.0), 1e-12);
    /* latest kept point (r, t 4) against the mean of the residuals (0) */
    assert_near(p->x[A_PLMM], 4.0 / 15.0, 1e-12);
    /* min_points counts the 5 kept points, not the 7 read */
    assert_int_equal(p->missing[A_PCOUNT6], 1);
    assert_int_equal(p->history_points, 7);
    /* the plain slope over all 7 points differs (colour offsets, the
     * unbanded point) */
    assert_int_equal(p->missing[A_SLOPE], 0);
    assert_true(fabs(p->x[A_SLOPE] - 0.18) > 0.1);
    /* no current detection: no gradient, no field difference */
    assert_int_equal(p->missing[A_CGRAD], 1);
    assert_int_equal(p->missing[A_SINCE], 1);

    /* one band with 2 points at one time, one single point: the slope's
     * denominator is 0 -> missing; count keeps the 2 points */
    assert_int_equal(
        extract(f, "{\"id\": \"p\", \"h\": ["
                   " {\"t\": 1, \"m\": 19.0, \"b\": \"g\"},"
                   " {\"t\": 1, \"m\": 19.2, \"b\": \"g\"},"
                   " {\"t\": 2, \"m\": 18.0, \"b\": \"r\"}]}"),
        0);
    assert_int_equal(p->missing[A_PSLOPE], 1);
    assert_near(p->x[A_PCOUNT], 2.0, 0);
    assert_near(p->x[A_PSTD], sqrt(0.02), 1e-12); /* residuals -0.1, 0.1 */
}

static void test_color_gradient(void **state)
{
    fx *f = *state;
    packet_features *p = &f->pf;
    /* current r at 5.2; g 0.7 before and i 0.7 after tie: the later (i)
     * wins; the r point is the same band; z is outside the window */
    const char *head = "{\"id\": \"p\","
                       " \"obs\": {\"t\": 5.2, \"m\": 18.0, \"e\": 0.03, \"b\": \"r\"},"
                       " \"h\": [";
    char text[1024];
    snprintf(text, sizeof text, "%s"
             " {\"t\": 3.0, \"m\": 17.0, \"e\": 0.1, \"b\": \"z\"},"
             " {\"t\": 4.5, \"m\": 18.5, \"e\": 0.04, \"b\": \"g\"},"
             " {\"t\": 5.1, \"m\": 18.1, \"e\": 0.02, \"b\": \"r\"},"
             " {\"t\": 5.9, \"m\": 17.8, \"e\": 0.05, \"b\": \"i\"}]}", head);
    assert_int_equal(extract(f, text), 0);
    /* (m_r - m_i) / (0.622 - 0.755) mag/micron;
     * err sqrt(0.03^2 + 0.05^2) / 0.133 */
    assert_near(p->x[A_CGRAD], (18.0 - 17.8) / (0.622 - 0.755), 1e-12);
    assert_near(p->err[A_CGRAD], sqrt(0.03 * 0.03 + 0.05 * 0.05) / 0.133, 1e-12);

    /* without i: g, and the g error unknown -> err 0 */
    snprintf(text, sizeof text, "%s"
             " {\"t\": 4.5, \"m\": 18.5, \"b\": \"g\"},"
             " {\"t\": 5.1, \"m\": 18.1, \"e\": 0.02, \"b\": \"r\"}]}", head);
    assert_int_equal(extract(f, text), 0);
    assert_near(p->x[A_CGRAD], (18.0 - 18.5) / (0.622 - 0.482), 1e-12);
    assert_near(p->err[A_CGRAD], 0.0, 0);

    /* the nearest other-band point is in a band without a wavelength */
    snprintf(text, sizeof text, "%s"
             " {\"t\": 4.5, \"m\": 18.5, \"b\": \"g\"},"
             " {\"t\": 5.3, \"m\": 18.1, \"b\": \"w\"}]}", head);
    assert_int_equal(extract(f, text), 0);
    assert_int_equal(p->missing[A_CGRAD], 1);

    /* a band at the same wavelength: dlambda 0 -> missing */
    snprintf(text, sizeof text, "%s {\"t\": 5.0, \"m\": 18.5, \"b\": \"r2\"}]}",
             head);
    assert_int_equal(extract(f, text), 0);
    assert_int_equal(p->missing[A_CGRAD], 1);

    /* only same-band or out-of-window points */
    snprintf(text, sizeof text, "%s"
             " {\"t\": 4.1, \"m\": 18.5, \"b\": \"g\"},"
             " {\"t\": 5.1, \"m\": 18.1, \"b\": \"r\"}]}", head);
    assert_int_equal(extract(f, text), 0);
    assert_int_equal(p->missing[A_CGRAD], 1);

    /* the current band has no wavelength */
    assert_int_equal(
        extract(f, "{\"id\": \"p\", \"obs\": {\"t\": 5.2, \"m\": 18.0, \"b\": \"w\"},"
                   " \"h\": [{\"t\": 5.0, \"m\": 18.5, \"b\": \"g\"}]}"),
        0);
    assert_int_equal(p->missing[A_CGRAD], 1);
}

static void test_field_minus_json(void **state)
{
    fx *f = *state;
    packet_features *p = &f->pf;
    assert_int_equal(
        extract(f, "{\"id\": \"p\", \"obs\": {\"t\": 60005.5, \"m\": 18.0,"
                   " \"e\": 0.03, \"b\": \"r\"}, \"prior_limit\": {\"mjd\": 60003.25}}"),
        0);
    assert_near(p->x[A_SINCE], 2.25, 1e-12);
    assert_near(p->err[A_SINCE], 0.0, 0);
    /* the transform applies after the difference; err is the field's */
    assert_near(p->x[A_NSINCE], -2.25, 1e-12);
    assert_near(p->err[A_NSINCE], 0.03, 1e-15);
    static const char *const gone[] = {
        "{\"id\": \"p\", \"obs\": {\"t\": 60005.5}, \"prior_limit\": null}",
        "{\"id\": \"p\", \"obs\": {\"t\": 60005.5}}",
        "{\"id\": \"p\", \"obs\": {\"t\": 60005.5}, \"prior_limit\": {\"mjd\": null}}",
        "{\"id\": \"p\", \"obs\": {\"t\": null}, \"prior_limit\": {\"mjd\": 1.0}}",
    };
    for (size_t i = 0; i < sizeof gone / sizeof gone[0]; i++) {
        assert_int_equal(extract(f, gone[i]), 0);
        assert_int_equal(p->missing[A_SINCE], 1);
        assert_int_equal(p->missing[A_NSINCE], 1);
        assert_int_equal(p->type_errors, 0);
    }
}

/* Avro: prior_limit is ["null", Limit] and obs.e a nullable double. */
static const char *SCHEMA_ADD =
    "{\"type\": \"record\", \"name\": \"Packet\", \"fields\": ["
    " {\"name\": \"id\", \"type\": \"string\"},"
    " {\"name\": \"obs\", \"type\": {\"type\": \"record\", \"name\": \"Obs\","
    "  \"fields\": [{\"name\": \"t\", \"type\": \"double\"},"
    "   {\"name\": \"m\", \"type\": \"double\"},"
    "   {\"name\": \"e\", \"type\": [\"null\", \"double\"], \"default\": null},"
    "   {\"name\": \"b\", \"type\": \"string\"}]}},"
    " {\"name\": \"prior_limit\", \"type\": [\"null\", {\"type\": \"record\","
    "  \"name\": \"Limit\", \"fields\": [{\"name\": \"mjd\", \"type\": \"double\"},"
    "   {\"name\": \"band\", \"type\": \"string\"},"
    "   {\"name\": \"mag\", \"type\": \"double\"}]}], \"default\": null},"
    " {\"name\": \"h\", \"type\": {\"type\": \"array\", \"items\": {"
    "  \"type\": \"record\", \"name\": \"Pt\", \"fields\": ["
    "   {\"name\": \"t\", \"type\": \"double\"},"
    "   {\"name\": \"m\", \"type\": \"double\"},"
    "   {\"name\": \"e\", \"type\": [\"null\", \"double\"]},"
    "   {\"name\": \"b\", \"type\": \"string\"}]}}}"
    "]}";

static void av_set(avro_value_t *rec, const char *name, avro_value_t *out)
{
    assert_int_equal(avro_value_get_by_name(rec, name, out, NULL), 0);
}

static void av_point(avro_value_t *arr, double t, double m, double e,
                     const char *band)
{
    avro_value_t pt, x, br;
    assert_int_equal(avro_value_append(arr, &pt, NULL), 0);
    av_set(&pt, "t", &x);
    avro_value_set_double(&x, t);
    av_set(&pt, "m", &x);
    avro_value_set_double(&x, m);
    av_set(&pt, "e", &x);
    if (e > 0.0) {
        avro_value_set_branch(&x, 1, &br);
        avro_value_set_double(&br, e);
    } else {
        avro_value_set_branch(&x, 0, &br);
        avro_value_set_null(&br);
    }
    av_set(&pt, "b", &x);
    avro_value_set_string(&x, band);
}

static void test_additions_avro(void **state)
{
    fx *f = *state;
    avro_schema_t sc;
    assert_int_equal(avro_schema_from_json_length(SCHEMA_ADD, strlen(SCHEMA_ADD),
                                                  &sc), 0);
    char err[256] = "";
    featmap_plan *pl = featmap_plan_avro(f->fm, sc, err, sizeof err);
    assert_non_null(pl);
    avro_value_iface_t *iface = avro_generic_class_from_schema(sc);
    avro_value_t v, x, y, br;
    assert_int_equal(avro_generic_value_new(iface, &v), 0);
    av_set(&v, "id", &x);
    avro_value_set_string(&x, "p");
    av_set(&v, "obs", &y);
    av_set(&y, "t", &x);
    avro_value_set_double(&x, 5.2);
    av_set(&y, "m", &x);
    avro_value_set_double(&x, 18.0);
    av_set(&y, "e", &x);
    avro_value_set_branch(&x, 1, &br);
    avro_value_set_double(&br, 0.03);
    av_set(&y, "b", &x);
    avro_value_set_string(&x, "r");
    av_set(&v, "prior_limit", &x);
    avro_value_set_branch(&x, 1, &br);
    av_set(&br, "mjd", &y);
    avro_value_set_double(&y, 3.0);
    av_set(&br, "band", &y);
    avro_value_set_string(&y, "g");
    av_set(&v, "h", &x);
    /* the JSON pool_bands packet's r and g points, plus the gradient's i */
    av_point(&x, 0.0, 18.0, 0.1, "r");
    av_point(&x, 1.0, 19.0, 0.1, "g");
    av_point(&x, 2.0, 18.4, 0.1, "r");
    av_point(&x, 3.0, 19.6, 0.1, "g");
    av_point(&x, 4.0, 18.6, 0.1, "r");
    av_point(&x, 5.9, 17.8, 0.05, "i");

    packet_features *p = &f->pf;
    memset(p, 0xa5, sizeof *p);
    assert_int_equal(featmap_extract_avro(f->fm, pl, &v, f->s, p), 0);
    assert_int_equal(p->type_errors, 0);
    assert_near(p->x[A_PSLOPE], 0.18, 1e-12);
    assert_near(p->x[A_PCOUNT], 5.0, 0);
    assert_near(p->x[A_CGRAD], (18.0 - 17.8) / (0.622 - 0.755), 1e-12);
    assert_near(p->err[A_CGRAD], sqrt(0.03 * 0.03 + 0.05 * 0.05) / 0.133, 1e-12);
    /* through the record branch of ["null", Limit] */
    assert_near(p->x[A_SINCE], 2.2, 1e-12);
    assert_near(p->x[A_NSINCE], -2.2, 1e-12);
    assert_near(p->err[A_NSINCE], 0.03, 1e-15);

    /* prior_limit null: the difference is missing, not a type error; a
     * null obs.e leaves the error unknown */
    av_set(&v, "prior_limit", &x);
    avro_value_set_branch(&x, 0, &br);
    avro_value_set_null(&br);
    av_set(&v, "obs", &y);
    av_set(&y, "e", &x);
    avro_value_set_branch(&x, 0, &br);
    avro_value_set_null(&br);
    memset(p, 0xa5, sizeof *p);
    assert_int_equal(featmap_extract_avro(f->fm, pl, &v, f->s, p), 0);
    assert_int_equal(p->type_errors, 0);
    assert_int_equal(p->missing[A_SINCE], 1);
    assert_int_equal(p->missing[A_NSINCE], 1);
    assert_int_equal(p->missing[A_CGRAD], 0);
    assert_near(p->err[A_CGRAD], 0.0, 0);

    avro_value_decref(&v);
    avro_value_iface_decref(iface);
    featmap_plan_free(pl);
    avro_schema_decref(sc);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_validate_names_paths_and_rules),
        cmocka_unit_test_setup_teardown(test_names_and_dim, setup, teardown),
        cmocka_unit_test_setup_teardown(test_json_features, setup, teardown),
        cmocka_unit_test_setup_teardown(test_missing_values, setup, teardown),
        cmocka_unit_test_setup_teardown(test_ids, setup, teardown),
        cmocka_unit_test_setup_teardown(test_history_truncated_to_newest, setup,
                                        teardown),
        cmocka_unit_test(test_series_without_bands),
        cmocka_unit_test(test_validate_additions),
        cmocka_unit_test_setup_teardown(test_pool_bands, setup_add, teardown),
        cmocka_unit_test_setup_teardown(test_color_gradient, setup_add, teardown),
        cmocka_unit_test_setup_teardown(test_field_minus_json, setup_add,
                                        teardown),
        cmocka_unit_test_setup_teardown(test_additions_avro, setup_add, teardown),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
