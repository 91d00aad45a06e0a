/*
 * featmap.c - feature map: validation, per-schema compilation, extraction.
 *
 * The spec is parsed once into slots: every dotted path the map reads at
 * the packet's top level (id, source, time, current detection, each field
 * feature and its error) is a root slot; the four paths inside a history
 * element are element slots.  A plan maps each slot to Avro field indexes
 * for one writer schema; JSON reads the same slots through pre-split keys.
 *
 * Extraction runs in two steps so the feature arithmetic exists once:
 * gather (backend specific: fill raw slot values and the point list) and
 * compute (common: transforms, series statistics over the time-sorted
 * points, colors, diffs and ratios).  All buffers live in featmap_scratch,
 * sized from history.max_points when it is created.
 *
 * Bands are interned to small indexes: the bands the map names get
 * 0..n_bands-1 when it is built; any other band text met in a packet gets
 * the next free index after those, in a per-packet table in the scratch
 * (so band-pooled statistics and the colour gradient can tell unnamed
 * bands apart).  Every index stays below SERIES_POOL_MAX_BANDS.
 */
#include "featmap.h"

#include <ctype.h>
#include <errno.h>
#include <inttypes.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "../core/series.h"

#define FM_PATH_TEXT_MAX 256u
#define FM_BAND_MAX 32u
/* Per-packet bands beyond those the map names (see the opening note). */
#define FM_XBANDS (SERIES_POOL_MAX_BANDS - FEATMAP_MAX_BANDS)

_Static_assert(FEATMAP_MAX_BANDS < SERIES_POOL_MAX_BANDS,
               "band indexes must fit series_pooled_slope");

enum { K_FIELD, K_SERIES, K_COLOR, K_DIFF, K_RATIO };
enum { TR_NONE, TR_LOG10, TR_ASINH, TR_NEGATE };
enum {
    SLOT_ID,
    SLOT_SOURCE,
    SLOT_TIME,
    SLOT_CUR_T,
    SLOT_CUR_V,
    SLOT_CUR_E,
    SLOT_CUR_B,
    SLOT_HIST,
    SLOT_FIXED_
};
enum { EL_T, EL_V, EL_E, EL_B, EL_COUNT_ };
/* Each feature j owns three root slots from SLOT_FIXED_ + 3j: the field,
 * its error and its "minus" path. */
#define FM_SLOTS (SLOT_FIXED_ + 3u * MODEL_MAX_DIM)

/* Status of one raw read. */
enum { RAW_MISSING = 0, RAW_OK = 1, RAW_TYPE = 2 };

typedef struct fm_path {
    uint32_t n;                       /* 0 = not configured */
    char *comp[FEATMAP_MAX_DEPTH];    /* point into buf */
    size_t len[FEATMAP_MAX_DEPTH];
    char buf[FM_PATH_TEXT_MAX];
} fm_path;

typedef struct fm_feature {
    char name[FEATMAP_NAME_MAX];
    int kind;
    int transform;
    int slot, err_slot;       /* K_FIELD: root slots, err_slot -1 = none */
    int minus_slot;           /* K_FIELD: root slot of "minus", -1 = none */
    int stat;                 /* K_SERIES */
    int band;                 /* K_SERIES: band index, -1 = all */
    int pool_bands;           /* K_SERIES: centre each band on its mean */
    int include_current;      /* K_SERIES, K_COLOR */
    uint32_t min_points;      /* K_SERIES */
    int band_a, band_b;       /* K_COLOR pair */
    int mode_mean;            /* K_COLOR pair */
    int gradient;             /* K_COLOR: "color": "gradient" */
    double window_days;       /* K_COLOR mean and gradient */
    /* K_COLOR gradient: microns by band index, NaN = not in the map */
    double wavelength_um[FEATMAP_MAX_BANDS];
    int ref_a, ref_b;         /* K_DIFF, K_RATIO: earlier feature indexes */
} fm_feature;

struct featmap {
    uint32_t dim;
    uint32_t max_points;
    uint32_t n_bands;
    int needs_points;
    fm_feature feat[MODEL_MAX_DIM];
    const char *names[MODEL_MAX_DIM];
    char bands[FEATMAP_MAX_BANDS][FM_BAND_MAX];
    fm_path slot[FM_SLOTS];
    fm_path elem[EL_COUNT_];
    /* Numeric root slots reading the same path share one read: canon[i]
     * is the lowest slot with slot i's path (i itself when first). */
    uint16_t canon[FM_SLOTS];
    uint32_t n_slots;  /* slots in use: SLOT_FIXED_ + 3 per feature */
};

typedef struct av_step {
    int32_t branch; /* expected union discriminant before the record, -1 */
    int32_t field;  /* field index in that record */
} av_step;

typedef struct av_path {
    uint32_t n;     /* steps; meaningful only when ok */
    int ok;         /* 0: not configured or absent from the schema */
    av_step st[FEATMAP_MAX_DEPTH];
} av_path;

struct featmap_plan {
    avro_schema_t schema;
    uint32_t resolved;
    int32_t item_branch; /* union branch of the history item record, -1 */
    av_path slot[FM_SLOTS];
    av_path elem[EL_COUNT_];
};

typedef struct fm_point {
    double t, v, e;
    int32_t band;  /* interned band (opening note), -1 = none / no room */
    int32_t cur;   /* 1 = the current detection */
} fm_point;

struct featmap_scratch {
    size_t cap;           /* points: max_points + 1 */
    size_t n;
    fm_point *pts, *tmp;
    double *t, *v, *e, *work;
    int *b;               /* band of each selected point (pool_bands) */
    double raw[FM_SLOTS];
    uint8_t raw_st[FM_SLOTS];
    uint32_t type_errors;
    int truncated;
    uint32_t n_xbands;    /* this packet's bands the map does not name */
    char xbands[FM_XBANDS][FM_BAND_MAX];
};

/* ------------------------------------------------------------------ */
/* validation                                                          */

typedef struct vctx {
    void (*err)(void *ctx, const char *path, const char *rule);
    void *ctx;
    int n;
} vctx;

static void verr(vctx *v, const char *path, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));

static void verr(vctx *v, const char *path, const char *fmt, ...)
{
    char rule[256];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(rule, sizeof rule, fmt, ap);
    va_end(ap);
    v->n++;
    if (v->err)
        v->err(v->ctx, path, rule);
}

static int dotted_path_ok(const char *s, const char **why)
{
    size_t len = strlen(s);
    if (len == 0) {
        *why = "must be a non-empty dotted path";
        return 0;
    }
    if (len >= FM_PATH_TEXT_MAX) {
        *why = "must be shorter than 256 bytes";
        return 0;
    }
    uint32_t comps = 1;
    for (size_t i = 0; i < len; i++) {
        if (s[i] == '.') {
            if (i == 0 || i + 1 == len || s[i + 1] == '.') {
                *why = "must not have an empty component (\"a..b\", "
                       "leading or trailing dot)";
                return 0;
            }
            comps++;
        }
    }
    if (comps > FEATMAP_MAX_DEPTH) {
        *why = "must have at most 16 components";
        return 0;
    }
    return 1;
}

/* Check an optional (required when req) dotted-path string member. */
static int vpath(vctx *v, const json_t *obj, const char *key,
                 const char *base, int req)
{
    char path[160];
    snprintf(path, sizeof path, "%s.%s", base, key);
    const json_t *x = json_object_get(obj, key);
    if (!x) {
        if (req)
            verr(v, path, "required");
        return 0;
    }
    if (!json_is_string(x)) {
        verr(v, path, "must be a string (a dotted path)");
        return 0;
    }
    const char *why;
    if (!dotted_path_ok(json_string_value(x), &why)) {
        verr(v, path, "%s", why);
        return 0;
    }
    return 1;
}

static void vunknown(vctx *v, const json_t *obj, const char *base,
                     const char *const *allowed)
{
    const char *key;
    const json_t *val;
    json_object_foreach((json_t *)obj, key, val) {
        int known = 0;
        for (size_t i = 0; allowed[i]; i++)
            if (strcmp(allowed[i], key) == 0)
                known = 1;
        if (!known) {
            char path[200];
            snprintf(path, sizeof path, "%s.%.64s", base, key);
            verr(v, path, "unknown key");
        }
    }
}

static int name_ok(const char *s)
{
    size_t len = strlen(s);
    if (len == 0 || len >= FEATMAP_NAME_MAX)
        return 0;
    for (size_t i = 0; i < len; i++) {
        unsigned char c = (unsigned char)s[i];
        if (!(isalnum(c) || c == '_' || c == '-' || c == '.'))
            return 0;
    }
    return 1;
}

static int band_ok(const json_t *b)
{
    return json_is_string(b) && json_string_length(b) > 0 &&
           json_string_length(b) < FM_BAND_MAX;
}

static const char *const transform_names[] = {"none", "log10", "asinh",
                                              "negate", NULL};

static int transform_from_name(const char *s)
{
    for (int i = 0; transform_names[i]; i++)
        if (strcmp(transform_names[i], s) == 0)
            return i;
    return -1;
}

/* Index of an earlier feature named s among features[0..j-1], or -1. */
static int earlier_feature(const json_t *features, size_t j, const char *s)
{
    for (size_t i = 0; i < j; i++) {
        const json_t *nm = json_object_get(json_array_get(features, i), "name");
        if (json_is_string(nm) && strcmp(json_string_value(nm), s) == 0)
            return (int)i;
    }
    return -1;
}

/* What the map's history and current detection provide, for the
 * feature checks. */
typedef struct vshape {
    int have_points;    /* history with path, time and value */
    int have_bands;     /* history.band or current.band */
    int have_hist_band; /* history.band */
    int have_cur_band;  /* current.band */
    int have_current;   /* current with time and value */
    uint32_t max_points;
} vshape;

/* The colour gradient's own rules ("color": "gradient"). */
static void vgradient(vctx *v, const json_t *f, const char *base,
                      const vshape *sh)
{
    char path[128];
    snprintf(path, sizeof path, "%s.color", base);
    if (!sh->have_current || !sh->have_cur_band)
        verr(v, path, "\"gradient\" needs featmap.current with current.band "
                      "to be configured");
    if (!sh->have_points || !sh->have_hist_band)
        verr(v, path, "\"gradient\" needs featmap.history with history.band "
                      "to be configured");
    snprintf(path, sizeof path, "%s.mode", base);
    if (json_object_get(f, "mode"))
        verr(v, path, "applies only to the two-band form (\"color\": [a, b])");
    const json_t *ic = json_object_get(f, "include_current");
    snprintf(path, sizeof path, "%s.include_current", base);
    if (ic && !json_is_true(ic))
        verr(v, path, "must be true for \"gradient\" (it always uses the "
                      "current detection)");
    const json_t *wl = json_object_get(f, "wavelength_um");
    snprintf(path, sizeof path, "%s.wavelength_um", base);
    if (!wl) {
        verr(v, path, "required for \"gradient\"");
        return;
    }
    if (!json_is_object(wl) || json_object_size(wl) == 0) {
        verr(v, path, "must be a non-empty object of band: microns");
        return;
    }
    const char *key;
    const json_t *val;
    json_object_foreach((json_t *)wl, key, val) {
        char p2[200];
        snprintf(p2, sizeof p2, "%s.%.64s", path, key);
        size_t len = strlen(key);
        if (len == 0 || len >= FM_BAND_MAX || !strcmp(key, "all"))
            verr(v, p2, "must be a band name (1-31 bytes, not \"all\")");
        if (!json_is_number(val) || !(json_number_value(val) > 0.0) ||
            !isfinite(json_number_value(val)))
            verr(v, p2, "must be a finite number > 0 (microns)");
    }
}

static void vfeature(vctx *v, const json_t *features, size_t j,
                     const vshape *sh)
{
    int have_points = sh->have_points, have_bands = sh->have_bands;
    int have_current = sh->have_current;
    uint32_t max_points = sh->max_points;
    char base[64], path[128];
    const json_t *f = json_array_get(features, j);
    snprintf(base, sizeof base, "featmap.features[%zu]", j);
    if (!json_is_object(f)) {
        verr(v, base, "must be an object");
        return;
    }
    const json_t *nm = json_object_get(f, "name");
    snprintf(path, sizeof path, "%s.name", base);
    if (!nm)
        verr(v, path, "required");
    else if (!json_is_string(nm) || !name_ok(json_string_value(nm)))
        verr(v, path, "must be a string of 1-63 letters, digits, '_', '-' "
                      "or '.'");
    else if (earlier_feature(features, j, json_string_value(nm)) >= 0)
        verr(v, path, "duplicate feature name \"%s\"", json_string_value(nm));

    static const char *const kinds[] = {"field", "series", "color", "diff",
                                        "ratio"};
    int kind = -1, nkinds = 0;
    for (int k = 0; k < 5; k++)
        if (json_object_get(f, kinds[k])) {
            kind = k;
            nkinds++;
        }
    if (nkinds != 1) {
        verr(v, base, "must have exactly one of field, series, color, diff, "
                      "ratio (has %d)", nkinds);
        return;
    }

    if (kind == K_FIELD) {
        static const char *const allowed[] = {"name", "field", "err",
                                              "minus", "transform", NULL};
        vunknown(v, f, base, allowed);
        vpath(v, f, "field", base, 1);
        vpath(v, f, "err", base, 0);
        vpath(v, f, "minus", base, 0);
        const json_t *tr = json_object_get(f, "transform");
        snprintf(path, sizeof path, "%s.transform", base);
        if (tr && (!json_is_string(tr) ||
                   transform_from_name(json_string_value(tr)) < 0))
            verr(v, path, "must be one of: none log10 asinh negate");
    } else if (kind == K_SERIES) {
        static const char *const allowed[] = {"name", "series", "band",
                                              "include_current",
                                              "min_points", "pool_bands",
                                              NULL};
        vunknown(v, f, base, allowed);
        const json_t *st = json_object_get(f, "series");
        snprintf(path, sizeof path, "%s.series", base);
        int stat = -1;
        if (!json_is_string(st) ||
            (stat = series_stat_from_name(json_string_value(st))) < 0) {
            char names[512] = "";
            for (int k = 0; k < SERIES_STAT_COUNT_; k++) {
                strcat(names, " ");
                strcat(names, series_stat_name(k));
            }
            verr(v, path, "must be one of:%s", names);
        }
        const json_t *band = json_object_get(f, "band");
        snprintf(path, sizeof path, "%s.band", base);
        if (band && !band_ok(band))
            verr(v, path, "must be a band name (1-31 bytes) or \"all\"");
        else if (band && strcmp(json_string_value(band), "all") != 0 &&
                 !have_bands)
            verr(v, path, "a single band needs history.band (or "
                          "current.band) to be configured");
        const json_t *pool = json_object_get(f, "pool_bands");
        snprintf(path, sizeof path, "%s.pool_bands", base);
        if (pool && !json_is_boolean(pool))
            verr(v, path, "must be true or false");
        else if (json_is_true(pool) && band_ok(band) &&
                 strcmp(json_string_value(band), "all") != 0)
            verr(v, path, "pool_bands needs band \"all\"");
        else if (json_is_true(pool) && !have_bands)
            verr(v, path, "needs history.band (or current.band) to be "
                          "configured");
        const json_t *ic = json_object_get(f, "include_current");
        snprintf(path, sizeof path, "%s.include_current", base);
        if (ic && !json_is_boolean(ic))
            verr(v, path, "must be true or false");
        int use_cur = json_is_true(ic);
        if (use_cur && !have_current)
            verr(v, path, "needs featmap.current to be configured");
        if (!have_points && !use_cur)
            verr(v, base, "a series needs featmap.history (or "
                          "include_current with featmap.current)");
        const json_t *mp = json_object_get(f, "min_points");
        snprintf(path, sizeof path, "%s.min_points", base);
        if (mp) {
            json_int_t lo = stat >= 0 ? (json_int_t)series_min_points(stat) : 0;
            if (lo < 1)
                lo = 1;
            if (!json_is_integer(mp) || json_integer_value(mp) < lo ||
                json_integer_value(mp) > (json_int_t)max_points + 1)
                verr(v, path, "must be an integer between %lld and %lld",
                     (long long)lo, (long long)max_points + 1);
        }
    } else if (kind == K_COLOR) {
        static const char *const allowed[] = {"name", "color", "mode",
                                              "window_days",
                                              "include_current",
                                              "wavelength_um", NULL};
        vunknown(v, f, base, allowed);
        const json_t *c = json_object_get(f, "color");
        const json_t *w = json_object_get(f, "window_days");
        if (json_is_string(c) && !strcmp(json_string_value(c), "gradient")) {
            vgradient(v, f, base, sh);
            snprintf(path, sizeof path, "%s.window_days", base);
            if (w && (!json_is_number(w) || !(json_number_value(w) > 0.0) ||
                      !isfinite(json_number_value(w))))
                verr(v, path, "must be a number > 0");
            return;
        }
        snprintf(path, sizeof path, "%s.wavelength_um", base);
        if (json_object_get(f, "wavelength_um"))
            verr(v, path, "only for \"color\": \"gradient\"");
        snprintf(path, sizeof path, "%s.color", base);
        if (!json_is_array(c) || json_array_size(c) != 2 ||
            !band_ok(json_array_get(c, 0)) || !band_ok(json_array_get(c, 1)))
            verr(v, path, "must be an array of two band names, or "
                          "\"gradient\"");
        else if (strcmp(json_string_value(json_array_get(c, 0)),
                        json_string_value(json_array_get(c, 1))) == 0)
            verr(v, path, "must name two different bands");
        else if (!strcmp(json_string_value(json_array_get(c, 0)), "all") ||
                 !strcmp(json_string_value(json_array_get(c, 1)), "all"))
            verr(v, path, "\"all\" is not a band here");
        if (!have_bands)
            verr(v, path, "needs history.band (or current.band) to be "
                          "configured");
        const json_t *mode = json_object_get(f, "mode");
        snprintf(path, sizeof path, "%s.mode", base);
        if (mode && (!json_is_string(mode) ||
                     (strcmp(json_string_value(mode), "latest") &&
                      strcmp(json_string_value(mode), "mean"))))
            verr(v, path, "must be one of: latest mean");
        snprintf(path, sizeof path, "%s.window_days", base);
        if (w && (!json_is_number(w) || !(json_number_value(w) > 0.0) ||
                  !isfinite(json_number_value(w))))
            verr(v, path, "must be a number > 0");
        const json_t *ic = json_object_get(f, "include_current");
        snprintf(path, sizeof path, "%s.include_current", base);
        if (ic && !json_is_boolean(ic))
            verr(v, path, "must be true or false");
        if (json_is_true(ic) && !have_current)
            verr(v, path, "needs featmap.current to be configured");
        if (!have_points && !json_is_true(ic))
            verr(v, base, "a color needs featmap.history (or "
                          "include_current with featmap.current)");
    } else {
        static const char *const allowed[] = {"name", "diff", "ratio", NULL};
        vunknown(v, f, base, allowed);
        const char *key = kind == K_DIFF ? "diff" : "ratio";
        const json_t *r = json_object_get(f, key);
        snprintf(path, sizeof path, "%s.%s", base, key);
        if (!json_is_array(r) || json_array_size(r) != 2 ||
            !json_is_string(json_array_get(r, 0)) ||
            !json_is_string(json_array_get(r, 1))) {
            verr(v, path, "must be an array of two feature names");
            return;
        }
        for (size_t i = 0; i < 2; i++) {
            const char *ref = json_string_value(json_array_get(r, i));
            if (earlier_feature(features, j, ref) < 0) {
                char p2[160];
                snprintf(p2, sizeof p2, "%s[%zu]", path, i);
                verr(v, p2, "must name an earlier feature (\"%.64s\" is not "
                            "defined before this one)", ref);
            }
        }
    }
}

int featmap_validate(const json_t *spec,
                     void (*err)(void *ctx, const char *json_path,
                                 const char *rule),
                     void *ctx)
{
    vctx v = {err, ctx, 0};
    if (!json_is_object(spec)) {
        verr(&v, "featmap", "must be an object");
        return v.n;
    }
    static const char *const top[] = {"id", "source", "time", "history",
                                      "current", "features", NULL};
    vunknown(&v, spec, "featmap", top);
    vpath(&v, spec, "id", "featmap", 1);
    vpath(&v, spec, "source", "featmap", 0);
    vpath(&v, spec, "time", "featmap", 0);

    vshape sh = {0, 0, 0, 0, 0, FEATMAP_MAX_POINTS_DEFAULT};
    const json_t *h = json_object_get(spec, "history");
    if (h) {
        if (!json_is_object(h)) {
            verr(&v, "featmap.history", "must be an object");
        } else {
            static const char *const allowed[] = {"path", "time", "value",
                                                  "err", "band",
                                                  "max_points", NULL};
            vunknown(&v, h, "featmap.history", allowed);
            int ok = vpath(&v, h, "path", "featmap.history", 1);
            ok &= vpath(&v, h, "time", "featmap.history", 1);
            ok &= vpath(&v, h, "value", "featmap.history", 1);
            vpath(&v, h, "err", "featmap.history", 0);
            if (vpath(&v, h, "band", "featmap.history", 0))
                sh.have_bands = sh.have_hist_band = 1;
            sh.have_points = ok;
            const json_t *mp = json_object_get(h, "max_points");
            if (mp) {
                if (!json_is_integer(mp) || json_integer_value(mp) < 1 ||
                    json_integer_value(mp) > FEATMAP_MAX_POINTS_LIMIT)
                    verr(&v, "featmap.history.max_points",
                         "must be an integer between 1 and %u",
                         FEATMAP_MAX_POINTS_LIMIT);
                else
                    sh.max_points = (uint32_t)json_integer_value(mp);
            }
        }
    }
    const json_t *c = json_object_get(spec, "current");
    if (c) {
        if (!json_is_object(c)) {
            verr(&v, "featmap.current", "must be an object");
        } else {
            static const char *const allowed[] = {"time", "value", "err",
                                                  "band", NULL};
            vunknown(&v, c, "featmap.current", allowed);
            int ok = vpath(&v, c, "time", "featmap.current", 1);
            ok &= vpath(&v, c, "value", "featmap.current", 1);
            vpath(&v, c, "err", "featmap.current", 0);
            if (vpath(&v, c, "band", "featmap.current", 0))
                sh.have_bands = sh.have_cur_band = 1;
            sh.have_current = ok;
        }
    }

    const json_t *fs = json_object_get(spec, "features");
    if (!fs) {
        verr(&v, "featmap.features", "required");
    } else if (!json_is_array(fs) || json_array_size(fs) == 0) {
        verr(&v, "featmap.features", "must be a non-empty array");
    } else if (json_array_size(fs) > MODEL_MAX_DIM) {
        verr(&v, "featmap.features", "must have at most %u features (has %zu)",
             MODEL_MAX_DIM, json_array_size(fs));
    } else {
        for (size_t j = 0; j < json_array_size(fs); j++)
            vfeature(&v, fs, j, &sh);
        /* distinct bands: series bands, color pairs, gradient tables */
        char bands[FEATMAP_MAX_BANDS + 1][FM_BAND_MAX];
        uint32_t nb = 0;
        for (size_t j = 0; j < json_array_size(fs); j++) {
            const json_t *f = json_array_get(fs, j);
            const char *list[2 + FEATMAP_MAX_BANDS + 1];
            size_t nl = 0;
            const json_t *band = json_object_get(f, "band");
            if (band_ok(band))
                list[nl++] = json_string_value(band);
            const json_t *col = json_object_get(f, "color");
            for (size_t i = 0; json_is_array(col) && i < 2; i++)
                if (band_ok(json_array_get(col, i)))
                    list[nl++] = json_string_value(json_array_get(col, i));
            const json_t *wl = json_object_get(f, "wavelength_um");
            const char *key;
            const json_t *val;
            if (json_is_object(wl) && json_is_string(col)) {
                json_object_foreach((json_t *)wl, key, val) {
                    if (nl == sizeof list / sizeof list[0])
                        break;
                    if (strlen(key) > 0 && strlen(key) < FM_BAND_MAX)
                        list[nl++] = key;
                }
            }
            for (size_t i = 0; i < nl; i++) {
                if (!strcmp(list[i], "all"))
                    continue;
                uint32_t b;
                for (b = 0; b < nb; b++)
                    if (!strcmp(bands[b], list[i]))
                        break;
                if (b == nb && nb <= FEATMAP_MAX_BANDS)
                    snprintf(bands[nb++], FM_BAND_MAX, "%s", list[i]);
            }
        }
        if (nb > FEATMAP_MAX_BANDS)
            verr(&v, "featmap.features", "must name at most %u distinct "
                                         "bands", FEATMAP_MAX_BANDS);
    }
    return v.n;
}

/* ------------------------------------------------------------------ */
/* construction                                                        */

static void path_set(fm_path *p, const json_t *s)
{
    memset(p, 0, sizeof *p);
    if (!json_is_string(s))
        return;
    snprintf(p->buf, sizeof p->buf, "%s", json_string_value(s));
    char *c = p->buf;
    p->n = 0;
    for (;;) {
        p->comp[p->n] = c;
        char *dot = strchr(c, '.');
        if (dot)
            *dot = '\0';
        p->len[p->n] = strlen(c);
        p->n++;
        if (!dot || p->n == FEATMAP_MAX_DEPTH)
            break;
        c = dot + 1;
    }
}

static int band_index(featmap *fm, const char *s)
{
    for (uint32_t b = 0; b < fm->n_bands; b++)
        if (!strcmp(fm->bands[b], s))
            return (int)b;
    snprintf(fm->bands[fm->n_bands], FM_BAND_MAX, "%s", s);
    return (int)fm->n_bands++;
}

struct first_err {
    char *buf;
    size_t len;
    int seen;
};

static void keep_first(void *ctx, const char *path, const char *rule)
{
    struct first_err *fe = ctx;
    if (fe->seen++ || !fe->buf || !fe->len)
        return;
    snprintf(fe->buf, fe->len, "%s: %s", path, rule);
}

featmap *featmap_new(const json_t *spec, char *err, size_t err_len)
{
    struct first_err fe = {err, err_len, 0};
    if (featmap_validate(spec, keep_first, &fe) != 0)
        return NULL;
    featmap *fm = calloc(1, sizeof *fm);
    if (!fm) {
        if (err && err_len)
            snprintf(err, err_len, "featmap: out of memory");
        return NULL;
    }
    path_set(&fm->slot[SLOT_ID], json_object_get(spec, "id"));
    path_set(&fm->slot[SLOT_SOURCE], json_object_get(spec, "source"));
    path_set(&fm->slot[SLOT_TIME], json_object_get(spec, "time"));
    fm->max_points = FEATMAP_MAX_POINTS_DEFAULT;
    const json_t *h = json_object_get(spec, "history");
    if (h) {
        path_set(&fm->slot[SLOT_HIST], json_object_get(h, "path"));
        path_set(&fm->elem[EL_T], json_object_get(h, "time"));
        path_set(&fm->elem[EL_V], json_object_get(h, "value"));
        path_set(&fm->elem[EL_E], json_object_get(h, "err"));
        path_set(&fm->elem[EL_B], json_object_get(h, "band"));
        if (json_is_integer(json_object_get(h, "max_points")))
            fm->max_points =
                (uint32_t)json_integer_value(json_object_get(h, "max_points"));
    }
    const json_t *c = json_object_get(spec, "current");
    if (c) {
        path_set(&fm->slot[SLOT_CUR_T], json_object_get(c, "time"));
        path_set(&fm->slot[SLOT_CUR_V], json_object_get(c, "value"));
        path_set(&fm->slot[SLOT_CUR_E], json_object_get(c, "err"));
        path_set(&fm->slot[SLOT_CUR_B], json_object_get(c, "band"));
    }
    const json_t *fs = json_object_get(spec, "features");
    fm->dim = (uint32_t)json_array_size(fs);
    fm->n_slots = SLOT_FIXED_ + 3u * fm->dim;
    for (uint32_t j = 0; j < fm->dim; j++) {
        const json_t *f = json_array_get(fs, j);
        fm_feature *ft = &fm->feat[j];
        snprintf(ft->name, sizeof ft->name, "%s",
                 json_string_value(json_object_get(f, "name")));
        fm->names[j] = ft->name;
        ft->slot = ft->err_slot = ft->minus_slot = -1;
        ft->band = ft->band_a = ft->band_b = -1;
        ft->ref_a = ft->ref_b = -1;
        ft->include_current = json_is_true(json_object_get(f, "include_current"));
        const json_t *x;
        if ((x = json_object_get(f, "field"))) {
            ft->kind = K_FIELD;
            ft->slot = (int)(SLOT_FIXED_ + 3 * j);
            path_set(&fm->slot[ft->slot], x);
            if (json_object_get(f, "err")) {
                ft->err_slot = ft->slot + 1;
                path_set(&fm->slot[ft->err_slot], json_object_get(f, "err"));
            }
            if (json_object_get(f, "minus")) {
                ft->minus_slot = ft->slot + 2;
                path_set(&fm->slot[ft->minus_slot], json_object_get(f, "minus"));
            }
            const json_t *tr = json_object_get(f, "transform");
            ft->transform = tr ? transform_from_name(json_string_value(tr))
                               : TR_NONE;
        } else if ((x = json_object_get(f, "series"))) {
            ft->kind = K_SERIES;
            fm->needs_points = 1;
            ft->stat = series_stat_from_name(json_string_value(x));
            const json_t *b = json_object_get(f, "band");
            if (b && strcmp(json_string_value(b), "all") != 0)
                ft->band = band_index(fm, json_string_value(b));
            ft->min_points = (uint32_t)series_min_points(ft->stat);
            const json_t *mp = json_object_get(f, "min_points");
            if (mp)
                ft->min_points = (uint32_t)json_integer_value(mp);
            ft->pool_bands = json_is_true(json_object_get(f, "pool_bands"));
        } else if ((x = json_object_get(f, "color")) && json_is_string(x)) {
            ft->kind = K_COLOR;
            ft->gradient = 1;
            fm->needs_points = 1;
            for (uint32_t b = 0; b < FEATMAP_MAX_BANDS; b++)
                ft->wavelength_um[b] = NAN;
            const char *key;
            const json_t *val;
            json_object_foreach(json_object_get(f, "wavelength_um"), key, val)
                ft->wavelength_um[band_index(fm, key)] = json_number_value(val);
            const json_t *w = json_object_get(f, "window_days");
            ft->window_days = w ? json_number_value(w) : 1.0;
        } else if (x) {
            ft->kind = K_COLOR;
            fm->needs_points = 1;
            ft->band_a = band_index(fm, json_string_value(json_array_get(x, 0)));
            ft->band_b = band_index(fm, json_string_value(json_array_get(x, 1)));
            const json_t *mode = json_object_get(f, "mode");
            ft->mode_mean = mode && !strcmp(json_string_value(mode), "mean");
            const json_t *w = json_object_get(f, "window_days");
            ft->window_days = w ? json_number_value(w) : 1.0;
        } else {
            x = json_object_get(f, "diff");
            ft->kind = K_DIFF;
            if (!x) {
                x = json_object_get(f, "ratio");
                ft->kind = K_RATIO;
            }
            ft->ref_a = earlier_feature(fs, j, json_string_value(json_array_get(x, 0)));
            ft->ref_b = earlier_feature(fs, j, json_string_value(json_array_get(x, 1)));
        }
    }
    for (uint32_t i = 0; i < FM_SLOTS; i++) {
        fm->canon[i] = (uint16_t)i;
        if (i < SLOT_TIME || i == SLOT_CUR_B || i == SLOT_HIST ||
            fm->slot[i].n == 0)
            continue;
        for (uint32_t k = SLOT_TIME; k < i; k++) {
            if (k == SLOT_CUR_B || k == SLOT_HIST || fm->slot[k].n == 0)
                continue;
            if (fm->slot[k].n == fm->slot[i].n &&
                !memcmp(fm->slot[k].buf, fm->slot[i].buf, sizeof fm->slot[k].buf)) {
                fm->canon[i] = (uint16_t)k;
                break;
            }
        }
    }
    return fm;
}

void featmap_free(featmap *fm)
{
    free(fm);
}

uint32_t featmap_dim(const featmap *fm)
{
    return fm->dim;
}

const char *featmap_name(const featmap *fm, uint32_t j)
{
    return j < fm->dim ? fm->feat[j].name : NULL;
}

const char *const *featmap_names(const featmap *fm)
{
    return fm->names;
}

uint32_t featmap_max_points(const featmap *fm)
{
    return fm->max_points;
}

/* ------------------------------------------------------------------ */
/* Avro compilation                                                    */

static avro_schema_t unlink_schema(avro_schema_t s)
{
    for (int guard = 0; s && is_avro_link(s) && guard < 64; guard++)
        s = avro_schema_link_target(s);
    return s;
}

/* Resolve p against the record schema s into out; the schema of the leaf
 * goes to *leaf.  Returns 1 when every component exists. */
static int av_compile(avro_schema_t s, const fm_path *p, av_path *out,
                      avro_schema_t *leaf)
{
    memset(out, 0, sizeof *out);
    if (p->n == 0)
        return 0;
    for (uint32_t i = 0; i < p->n; i++) {
        s = unlink_schema(s);
        int32_t branch = -1;
        if (is_avro_union(s)) {
            avro_schema_t rec = NULL;
            size_t nb = avro_schema_union_size(s);
            for (size_t b = 0; b < nb; b++) {
                avro_schema_t bs = unlink_schema(avro_schema_union_branch(s, (int)b));
                if (is_avro_record(bs) &&
                    avro_schema_record_field_get_index(bs, p->comp[i]) >= 0) {
                    branch = (int32_t)b;
                    rec = bs;
                    break;
                }
            }
            if (!rec)
                return 0;
            s = rec;
        }
        if (!is_avro_record(s))
            return 0;
        int idx = avro_schema_record_field_get_index(s, p->comp[i]);
        if (idx < 0)
            return 0;
        out->st[i].branch = branch;
        out->st[i].field = idx;
        s = avro_schema_record_field_get_by_index(s, idx);
    }
    out->n = p->n;
    out->ok = 1;
    if (leaf)
        *leaf = unlink_schema(s);
    return 1;
}

featmap_plan *featmap_plan_avro(const featmap *fm, avro_schema_t writer,
                                char *err, size_t err_len)
{
    avro_schema_t root = unlink_schema(writer);
    if (!is_avro_record(root)) {
        if (err && err_len)
            snprintf(err, err_len, "writer schema is not a record");
        return NULL;
    }
    featmap_plan *pl = calloc(1, sizeof *pl);
    if (!pl) {
        if (err && err_len)
            snprintf(err, err_len, "out of memory");
        return NULL;
    }
    pl->schema = avro_schema_incref(writer);
    pl->item_branch = -1;
    for (uint32_t i = 0; i < FM_SLOTS; i++) {
        if (fm->slot[i].n == 0)
            continue;
        avro_schema_t leaf = NULL;
        if (av_compile(root, &fm->slot[i], &pl->slot[i], &leaf))
            pl->resolved++;
        if (i == SLOT_HIST && pl->slot[i].ok) {
            /* leaf: array, or a union holding one */
            avro_schema_t arr = leaf;
            if (is_avro_union(arr)) {
                avro_schema_t found = NULL;
                for (size_t b = 0; b < avro_schema_union_size(arr); b++) {
                    avro_schema_t bs =
                        unlink_schema(avro_schema_union_branch(arr, (int)b));
                    if (is_avro_array(bs))
                        found = bs;
                }
                arr = found;
            }
            if (!is_avro_array(arr)) {
                pl->slot[i].ok = 0;
                pl->resolved--;
                continue;
            }
            avro_schema_t item = unlink_schema(avro_schema_array_items(arr));
            if (is_avro_union(item)) {
                avro_schema_t rec = NULL;
                for (size_t b = 0; b < avro_schema_union_size(item); b++) {
                    avro_schema_t bs =
                        unlink_schema(avro_schema_union_branch(item, (int)b));
                    if (is_avro_record(bs) && !rec) {
                        rec = bs;
                        pl->item_branch = (int32_t)b;
                    }
                }
                item = rec;
            }
            if (!is_avro_record(item)) {
                pl->slot[i].ok = 0;
                pl->resolved--;
                continue;
            }
            for (uint32_t e = 0; e < EL_COUNT_; e++)
                if (av_compile(item, &fm->elem[e], &pl->elem[e], NULL))
                    pl->resolved++;
        }
    }
    return pl;
}

void featmap_plan_free(featmap_plan *pl)
{
    if (!pl)
        return;
    avro_schema_decref(pl->schema);
    free(pl);
}

uint32_t featmap_plan_resolved(const featmap_plan *pl)
{
    return pl->resolved;
}

/* ------------------------------------------------------------------ */
/* scratch                                                             */

featmap_scratch *featmap_scratch_new(const featmap *fm)
{
    featmap_scratch *s = calloc(1, sizeof *s);
    if (!s)
        return NULL;
    s->cap = (size_t)fm->max_points + 1;
    s->pts = calloc(s->cap, sizeof *s->pts);
    s->tmp = calloc(s->cap, sizeof *s->tmp);
    s->t = calloc(s->cap, sizeof *s->t);
    s->v = calloc(s->cap, sizeof *s->v);
    s->e = calloc(s->cap, sizeof *s->e);
    s->work = calloc(s->cap, sizeof *s->work);
    s->b = calloc(s->cap, sizeof *s->b);
    if (!s->pts || !s->tmp || !s->t || !s->v || !s->e || !s->work || !s->b) {
        featmap_scratch_free(s);
        return NULL;
    }
    return s;
}

void featmap_scratch_free(featmap_scratch *s)
{
    if (!s)
        return;
    free(s->pts);
    free(s->tmp);
    free(s->t);
    free(s->v);
    free(s->e);
    free(s->work);
    free(s->b);
    free(s);
}

/* ------------------------------------------------------------------ */
/* Avro gathering                                                      */

static int av_walk(const avro_value_t *start, const av_path *p,
                   avro_value_t *out)
{
    if (!p->ok)
        return 0;
    avro_value_t cur = *start;
    for (uint32_t i = 0; i < p->n; i++) {
        if (p->st[i].branch >= 0) {
            int d;
            avro_value_t b;
            if (avro_value_get_type(&cur) != AVRO_UNION ||
                avro_value_get_discriminant(&cur, &d) || d != p->st[i].branch ||
                avro_value_get_current_branch(&cur, &b))
                return 0;
            cur = b;
        }
        avro_value_t child;
        if (avro_value_get_type(&cur) != AVRO_RECORD ||
            avro_value_get_by_index(&cur, (size_t)p->st[i].field, &child, NULL))
            return 0;
        cur = child;
    }
    *out = cur;
    return 1;
}

static int av_unwrap(avro_value_t *v)
{
    if (avro_value_get_type(v) == AVRO_UNION) {
        avro_value_t b;
        if (avro_value_get_current_branch(v, &b))
            return 0;
        *v = b;
    }
    return 1;
}

static int av_number(avro_value_t v, double *out)
{
    if (!av_unwrap(&v))
        return RAW_MISSING;
    double x;
    switch (avro_value_get_type(&v)) {
    case AVRO_NULL:
        return RAW_MISSING;
    case AVRO_INT32: {
        int32_t i;
        if (avro_value_get_int(&v, &i))
            return RAW_TYPE;
        x = (double)i;
        break;
    }
    case AVRO_INT64: {
        int64_t i;
        if (avro_value_get_long(&v, &i))
            return RAW_TYPE;
        x = (double)i;
        break;
    }
    case AVRO_FLOAT: {
        float f;
        if (avro_value_get_float(&v, &f))
            return RAW_TYPE;
        x = (double)f;
        break;
    }
    case AVRO_DOUBLE:
        if (avro_value_get_double(&v, &x))
            return RAW_TYPE;
        break;
    default:
        return RAW_TYPE;
    }
    if (!isfinite(x))
        return RAW_MISSING;
    *out = x;
    return RAW_OK;
}

/* Text of a string, enum or integer value into buf.  Returns RAW_* or -1
 * when the text does not fit. */
static int av_text(avro_value_t v, char *buf, size_t cap)
{
    if (!av_unwrap(&v))
        return RAW_MISSING;
    switch (avro_value_get_type(&v)) {
    case AVRO_NULL:
        return RAW_MISSING;
    case AVRO_STRING: {
        const char *p;
        size_t size;
        if (avro_value_get_string(&v, &p, &size) || !p)
            return RAW_TYPE;
        size_t n = size ? strnlen(p, size) : 0; /* size counts the NUL */
        if (size && n < size - 1)
            return RAW_TYPE;  /* a NUL inside the text: not a usable id or band */
        if (n >= cap)
            return -1;
        memcpy(buf, p, n);
        buf[n] = '\0';
        return RAW_OK;
    }
    case AVRO_ENUM: {
        int idx;
        if (avro_value_get_enum(&v, &idx))
            return RAW_TYPE;
        const char *sym = avro_schema_enum_get(avro_value_get_schema(&v), idx);
        if (!sym)
            return RAW_TYPE;
        if (strlen(sym) >= cap)
            return -1;
        snprintf(buf, cap, "%s", sym);
        return RAW_OK;
    }
    case AVRO_INT32: {
        int32_t i;
        if (avro_value_get_int(&v, &i))
            return RAW_TYPE;
        snprintf(buf, cap, "%" PRId32, i);
        return RAW_OK;
    }
    case AVRO_INT64: {
        int64_t i;
        if (avro_value_get_long(&v, &i))
            return RAW_TYPE;
        snprintf(buf, cap, "%" PRId64, i);
        return RAW_OK;
    }
    default:
        return RAW_TYPE;
    }
}

/* ------------------------------------------------------------------ */
/* JSON gathering                                                      */

static const json_t *js_walk(const json_t *root, const fm_path *p)
{
    if (p->n == 0)
        return NULL;
    const json_t *cur = root;
    for (uint32_t i = 0; i < p->n && cur; i++) {
        if (!json_is_object(cur))
            return NULL;
        cur = json_object_getn(cur, p->comp[i], p->len[i]);
    }
    return cur;
}

static int js_number(const json_t *x, double *out)
{
    if (!x || json_is_null(x))
        return RAW_MISSING;
    if (!json_is_number(x))
        return RAW_TYPE;
    double v = json_number_value(x);
    if (!isfinite(v))
        return RAW_MISSING;
    *out = v;
    return RAW_OK;
}

static int js_text(const json_t *x, char *buf, size_t cap)
{
    if (!x || json_is_null(x))
        return RAW_MISSING;
    if (json_is_string(x)) {
        size_t n = json_string_length(x);
        if (n >= cap)
            return -1;
        memcpy(buf, json_string_value(x), n);
        buf[n] = '\0';
        if (strlen(buf) != n) /* embedded NUL */
            return RAW_TYPE;
        return RAW_OK;
    }
    if (json_is_integer(x)) {
        snprintf(buf, cap, "%" JSON_INTEGER_FORMAT, json_integer_value(x));
        return RAW_OK;
    }
    return RAW_TYPE;
}

/* ------------------------------------------------------------------ */
/* common                                                              */

/* Interned index of band text txt: the map's own bands first, then this
 * packet's table of other bands (grown here; -1 once it is full). */
static int band_lookup(const featmap *fm, featmap_scratch *s, const char *txt)
{
    for (uint32_t b = 0; b < fm->n_bands; b++)
        if (!strcmp(fm->bands[b], txt))
            return (int)b;
    for (uint32_t k = 0; k < s->n_xbands; k++)
        if (!strcmp(s->xbands[k], txt))
            return (int)(fm->n_bands + k);
    if (s->n_xbands == FM_XBANDS)
        return -1;
    snprintf(s->xbands[s->n_xbands], FM_BAND_MAX, "%s", txt);
    return (int)(fm->n_bands + s->n_xbands++);
}

static void note_raw(featmap_scratch *s, uint32_t slot, int st, double x)
{
    if (st == RAW_TYPE)
        s->type_errors++;
    s->raw_st[slot] = (uint8_t)(st == RAW_OK);
    s->raw[slot] = st == RAW_OK ? x : NAN;
}

/* Add a point; t and v must be present, err is NaN unless finite > 0. */
static void add_point(featmap_scratch *s, int st_t, double t, int st_v,
                      double v, int st_e, double e, int band, int cur)
{
    if (st_t == RAW_TYPE || st_v == RAW_TYPE || st_e == RAW_TYPE)
        s->type_errors++;
    if (st_t != RAW_OK || st_v != RAW_OK || s->n >= s->cap)
        return;
    fm_point *p = &s->pts[s->n++];
    p->t = t;
    p->v = v;
    p->e = (st_e == RAW_OK && e > 0.0) ? e : NAN;
    p->band = band;
    p->cur = cur;
}

static void begin(featmap_scratch *s)
{
    s->n = 0;
    s->type_errors = 0;
    s->truncated = 0;
    s->n_xbands = 0;
}

/* Stable bottom-up merge sort of pts by time. */
static void sort_points(featmap_scratch *s)
{
    size_t n = s->n;
    if (n < 2)
        return;
    fm_point *a = s->pts, *b = s->tmp;
    for (size_t w = 1; w < n; w *= 2) {
        for (size_t lo = 0; lo < n; lo += 2 * w) {
            size_t mid = lo + w < n ? lo + w : n;
            size_t hi = lo + 2 * w < n ? lo + 2 * w : n;
            size_t i = lo, j = mid, k = lo;
            while (i < mid && j < hi)
                b[k++] = (a[j].t < a[i].t) ? a[j++] : a[i++];
            while (i < mid)
                b[k++] = a[i++];
            while (j < hi)
                b[k++] = a[j++];
        }
        fm_point *t = a;
        a = b;
        b = t;
    }
    if (a != s->pts)
        memcpy(s->pts, a, n * sizeof *a);
}

/* Copy the points a series uses into s->t, v, e and b, in time order.
 * With pooling, points without a band are left out (they cannot be
 * centred on a band mean). */
static size_t select_points(featmap_scratch *s, int band, int with_cur,
                            int need_err, int pool)
{
    size_t m = 0;
    for (size_t i = 0; i < s->n; i++) {
        const fm_point *p = &s->pts[i];
        if (p->cur && !with_cur)
            continue;
        if (band >= 0 && p->band != band)
            continue;
        if (need_err && !(p->e > 0.0))
            continue;
        if (pool && p->band < 0)
            continue;
        s->t[m] = p->t;
        s->v[m] = p->v;
        s->e[m] = p->e;
        s->b[m] = p->band;
        m++;
    }
    return m;
}

/* pool_bands: replace each selected value by v_i - vbar_band(i) and keep
 * only the bands with at least 2 points, compacting in place (time order
 * and times unchanged).  Returns the points kept.  Band indexes are below
 * SERIES_POOL_MAX_BANDS by construction (opening note). */
static size_t pool_by_band(featmap_scratch *s, size_t n)
{
    size_t cnt[SERIES_POOL_MAX_BANDS] = {0};
    double mean[SERIES_POOL_MAX_BANDS] = {0};
    for (size_t i = 0; i < n; i++) {
        cnt[s->b[i]]++;
        mean[s->b[i]] += s->v[i];
    }
    for (int b = 0; b < SERIES_POOL_MAX_BANDS; b++)
        if (cnt[b])
            mean[b] /= (double)cnt[b];
    size_t m = 0;
    for (size_t i = 0; i < n; i++) {
        int b = s->b[i];
        if (cnt[b] < 2)
            continue;
        s->t[m] = s->t[i];
        s->v[m] = s->v[i] - mean[b];
        s->e[m] = s->e[i];
        s->b[m] = b;
        m++;
    }
    return m;
}

/* Colour gradient: the current detection against the history point
 * nearest to it in time, in another band, within window_days (ties: the
 * later point; points are time-sorted, so the last of equals wins):
 *   x = (m_cur - m_other) / (lambda_cur - lambda_other)  [mag / micron],
 *   e = sqrt(e_cur^2 + e_other^2) / |dlambda| when both errors are known.
 * Missing without a current detection, without such a point, when either
 * band has no wavelength in the map, or when dlambda is 0. */
static void color_gradient(const featmap *fm, const featmap_scratch *s,
                           const fm_feature *ft, double *x, double *e)
{
    const fm_point *cur = NULL, *best = NULL;
    for (size_t i = 0; i < s->n && !cur; i++)
        if (s->pts[i].cur)
            cur = &s->pts[i];
    if (!cur || cur->band < 0 || cur->band >= (int)fm->n_bands)
        return;
    double best_dt = INFINITY;
    for (size_t i = 0; i < s->n; i++) {
        const fm_point *p = &s->pts[i];
        if (p->cur || p->band < 0 || p->band == cur->band)
            continue;
        double dt = fabs(p->t - cur->t);
        if (dt <= ft->window_days && dt <= best_dt) {
            best = p;
            best_dt = dt;
        }
    }
    if (!best || best->band >= (int)fm->n_bands)
        return;
    double dl = ft->wavelength_um[cur->band] - ft->wavelength_um[best->band];
    if (!isfinite(dl) || dl == 0.0)
        return;
    *x = (cur->v - best->v) / dl;
    if (cur->e > 0.0 && best->e > 0.0)
        *e = sqrt(cur->e * cur->e + best->e * best->e) / fabs(dl);
}

static void color(const featmap_scratch *s, const fm_feature *ft, double *x,
                  double *e)
{
    *x = NAN;
    *e = 0.0;
    if (!ft->mode_mean) {
        const fm_point *pa = NULL, *pb = NULL;
        for (size_t i = 0; i < s->n; i++) {
            const fm_point *p = &s->pts[i];
            if (p->cur && !ft->include_current)
                continue;
            if (p->band == ft->band_a)
                pa = p;
            else if (p->band == ft->band_b)
                pb = p;
        }
        if (!pa || !pb)
            return;
        *x = pa->v - pb->v;
        if (pa->e > 0.0 && pb->e > 0.0)
            *e = sqrt(pa->e * pa->e + pb->e * pb->e);
        return;
    }
    double tl = -INFINITY;
    for (size_t i = 0; i < s->n; i++) {
        const fm_point *p = &s->pts[i];
        if (p->cur && !ft->include_current)
            continue;
        if ((p->band == ft->band_a || p->band == ft->band_b) && p->t > tl)
            tl = p->t;
    }
    if (!isfinite(tl))
        return;
    double sa = 0, sb = 0;
    size_t na = 0, nb = 0;
    for (size_t i = 0; i < s->n; i++) {
        const fm_point *p = &s->pts[i];
        if ((p->cur && !ft->include_current) || p->t < tl - ft->window_days)
            continue;
        if (p->band == ft->band_a) {
            sa += p->v;
            na++;
        } else if (p->band == ft->band_b) {
            sb += p->v;
            nb++;
        }
    }
    if (na && nb)
        *x = sa / (double)na - sb / (double)nb;
}

static void transform(int tr, double raw, double rerr, double *x, double *e)
{
    double ee = isfinite(rerr) ? fabs(rerr) : 0.0;
    switch (tr) {
    case TR_LOG10:
        if (!(raw > 0.0)) {
            *x = NAN;
            *e = 0.0;
            return;
        }
        *x = log10(raw);
        *e = ee / (raw * M_LN10);
        return;
    case TR_ASINH:
        *x = asinh(raw);
        *e = ee / sqrt(1.0 + raw * raw);
        return;
    case TR_NEGATE:
        *x = -raw;
        *e = ee;
        return;
    default:
        *x = raw;
        *e = ee;
        return;
    }
}

static int finish(const featmap *fm, featmap_scratch *s, packet_features *out)
{
    out->dim = fm->dim;
    out->n_missing = 0;
    out->type_errors = s->type_errors;
    out->history_truncated = s->truncated;
    out->time_from_packet = s->raw_st[SLOT_TIME];
    out->time_days = s->raw_st[SLOT_TIME] ? s->raw[SLOT_TIME] : NAN;
    size_t hist = 0;
    for (size_t i = 0; i < s->n; i++)
        hist += !s->pts[i].cur;
    out->history_points = (uint32_t)hist;

    if (fm->needs_points)
        sort_points(s);

    for (uint32_t j = 0; j < fm->dim; j++) {
        const fm_feature *ft = &fm->feat[j];
        double x = NAN, e = 0.0;
        switch (ft->kind) {
        case K_FIELD: {
            int have = s->raw_st[ft->slot] &&
                       (ft->minus_slot < 0 || s->raw_st[ft->minus_slot]);
            if (!have)
                break;
            double raw = s->raw[ft->slot];
            if (ft->minus_slot >= 0)
                raw -= s->raw[ft->minus_slot];
            transform(ft->transform, raw,
                      ft->err_slot >= 0 ? s->raw[ft->err_slot] : NAN, &x, &e);
            break;
        }
        case K_SERIES: {
            size_t n = select_points(s, ft->band, ft->include_current,
                                     series_needs_err(ft->stat),
                                     ft->pool_bands);
            if (ft->pool_bands)
                n = pool_by_band(s, n);
            if (n >= ft->min_points) {
                /* The pooled slope re-centres t per band; on values that
                 * are already centred it equals the slope on the raw ones. */
                if (ft->pool_bands && ft->stat == SERIES_SLOPE)
                    x = series_pooled_slope(s->t, s->v, s->b, n);
                else
                    x = series_compute(ft->stat, s->t, s->v, s->e, n, s->work);
                if (ft->stat == SERIES_WMEAN && isfinite(x)) {
                    double sw = 0.0;
                    for (size_t i = 0; i < n; i++)
                        sw += 1.0 / (s->e[i] * s->e[i]);
                    e = 1.0 / sqrt(sw);
                }
            }
            break;
        }
        case K_COLOR:
            if (ft->gradient)
                color_gradient(fm, s, ft, &x, &e);
            else
                color(s, ft, &x, &e);
            break;
        case K_DIFF:
        case K_RATIO: {
            int a = ft->ref_a, b = ft->ref_b;
            if (out->missing[a] || out->missing[b])
                break;
            double xa = out->x[a], xb = out->x[b];
            double ea = out->err[a], eb = out->err[b];
            if (ft->kind == K_DIFF) {
                x = xa - xb;
                e = sqrt(ea * ea + eb * eb);
            } else if (xb != 0.0) {
                x = xa / xb;
                e = (xa != 0.0)
                        ? fabs(x) * sqrt((ea / xa) * (ea / xa) +
                                         (eb / xb) * (eb / xb))
                        : fabs(ea / xb);
            }
            break;
        }
        }
        int miss = !isfinite(x);
        out->missing[j] = (uint8_t)miss;
        out->x[j] = miss ? NAN : x;
        out->err[j] = (miss || !isfinite(e)) ? 0.0 : e;
        out->n_missing += (uint32_t)miss;
    }
    return 0;
}

static int ids(const featmap *fm, int st_id, int st_src, packet_features *out)
{
    if (st_id < 0)
        return PACKET_E_ID_TOO_LONG;
    if (st_id != RAW_OK || !out->packet_id[0])
        return PACKET_E_MISSING_ID;
    if (fm->slot[SLOT_SOURCE].n) {
        if (st_src < 0)
            return PACKET_E_ID_TOO_LONG;
        if (st_src != RAW_OK || !out->source_id[0])
            return PACKET_E_MISSING_SOURCE;
    } else {
        memcpy(out->source_id, out->packet_id, sizeof out->source_id);
    }
    return 0;
}

int featmap_extract_avro(const featmap *fm, const featmap_plan *pl,
                         avro_value_t *root, featmap_scratch *s,
                         packet_features *out)
{
    avro_value_t v;
    begin(s);
    int st_id = av_walk(root, &pl->slot[SLOT_ID], &v)
                    ? av_text(v, out->packet_id, sizeof out->packet_id)
                    : RAW_MISSING;
    int st_src = av_walk(root, &pl->slot[SLOT_SOURCE], &v)
                     ? av_text(v, out->source_id, sizeof out->source_id)
                     : RAW_MISSING;
    int rc = ids(fm, st_id, st_src, out);
    if (rc)
        return rc;

    /* every numeric root slot: time, current detection, fields, errors */
    for (uint32_t i = SLOT_TIME; i < fm->n_slots; i++) {
        if (i == SLOT_CUR_B || i == SLOT_HIST)
            continue;
        if (fm->canon[i] != i) {
            s->raw[i] = s->raw[fm->canon[i]];
            s->raw_st[i] = s->raw_st[fm->canon[i]];
            continue;
        }
        double x = NAN;
        int st = RAW_MISSING;
        if (pl->slot[i].ok && av_walk(root, &pl->slot[i], &v))
            st = av_number(v, &x);
        note_raw(s, i, st, x);
    }
    if (fm->needs_points) {
        avro_value_t arr;
        size_t size = 0;
        if (av_walk(root, &pl->slot[SLOT_HIST], &arr) && av_unwrap(&arr) &&
            avro_value_get_type(&arr) == AVRO_ARRAY &&
            avro_value_get_size(&arr, &size) == 0) {
            size_t keep = s->cap - 1, first = 0;
            if (size > keep) {
                first = size - keep;
                s->truncated = 1;
            }
            for (size_t i = first; i < size; i++) {
                avro_value_t item;
                if (avro_value_get_by_index(&arr, i, &item, NULL))
                    continue;
                if (pl->item_branch >= 0) {
                    int d;
                    avro_value_t b;
                    if (avro_value_get_type(&item) != AVRO_UNION ||
                        avro_value_get_discriminant(&item, &d) ||
                        d != pl->item_branch ||
                        avro_value_get_current_branch(&item, &b))
                        continue;
                    item = b;
                }
                double t = NAN, x = NAN, e = NAN;
                int st_t = av_walk(&item, &pl->elem[EL_T], &v) ? av_number(v, &t) : RAW_MISSING;
                int st_v = av_walk(&item, &pl->elem[EL_V], &v) ? av_number(v, &x) : RAW_MISSING;
                int st_e = av_walk(&item, &pl->elem[EL_E], &v) ? av_number(v, &e) : RAW_MISSING;
                int band = -1;
                char btxt[FM_BAND_MAX];
                if (av_walk(&item, &pl->elem[EL_B], &v) &&
                    av_text(v, btxt, sizeof btxt) == RAW_OK)
                    band = band_lookup(fm, s, btxt);
                add_point(s, st_t, t, st_v, x, st_e, e, band, 0);
            }
        }
        if (s->raw_st[SLOT_CUR_T] && s->raw_st[SLOT_CUR_V]) {
            int band = -1;
            char btxt[FM_BAND_MAX];
            if (av_walk(root, &pl->slot[SLOT_CUR_B], &v) &&
                av_text(v, btxt, sizeof btxt) == RAW_OK)
                band = band_lookup(fm, s, btxt);
            s->n = s->n < s->cap ? s->n : s->cap - 1;
            add_point(s, RAW_OK, s->raw[SLOT_CUR_T], RAW_OK, s->raw[SLOT_CUR_V],
                      s->raw_st[SLOT_CUR_E] ? RAW_OK : RAW_MISSING,
                      s->raw[SLOT_CUR_E], band, 1);
        }
    }
    return finish(fm, s, out);
}

int featmap_extract_json(const featmap *fm, const json_t *root,
                         featmap_scratch *s, packet_features *out)
{
    begin(s);
    int st_id = js_text(js_walk(root, &fm->slot[SLOT_ID]), out->packet_id,
                        sizeof out->packet_id);
    int st_src = js_text(js_walk(root, &fm->slot[SLOT_SOURCE]), out->source_id,
                         sizeof out->source_id);
    int rc = ids(fm, st_id, st_src, out);
    if (rc)
        return rc;
    for (uint32_t i = SLOT_TIME; i < fm->n_slots; i++) {
        if (i == SLOT_CUR_B || i == SLOT_HIST)
            continue;
        if (fm->canon[i] != i) {
            s->raw[i] = s->raw[fm->canon[i]];
            s->raw_st[i] = s->raw_st[fm->canon[i]];
            continue;
        }
        double x = NAN;
        int st = fm->slot[i].n ? js_number(js_walk(root, &fm->slot[i]), &x)
                               : RAW_MISSING;
        note_raw(s, i, st, x);
    }
    if (fm->needs_points) {
        const json_t *arr = js_walk(root, &fm->slot[SLOT_HIST]);
        if (arr && !json_is_array(arr) && !json_is_null(arr))
            s->type_errors++;
        if (json_is_array(arr)) {
            size_t size = json_array_size(arr), keep = s->cap - 1, first = 0;
            if (size > keep) {
                first = size - keep;
                s->truncated = 1;
            }
            for (size_t i = first; i < size; i++) {
                const json_t *item = json_array_get(arr, i);
                if (!json_is_object(item)) {
                    if (!json_is_null(item))
                        s->type_errors++;
                    continue;
                }
                double t = NAN, x = NAN, e = NAN;
                int st_t = js_number(js_walk(item, &fm->elem[EL_T]), &t);
                int st_v = js_number(js_walk(item, &fm->elem[EL_V]), &x);
                int st_e = fm->elem[EL_E].n
                               ? js_number(js_walk(item, &fm->elem[EL_E]), &e)
                               : RAW_MISSING;
                int band = -1;
                char btxt[FM_BAND_MAX];
                if (fm->elem[EL_B].n &&
                    js_text(js_walk(item, &fm->elem[EL_B]), btxt,
                            sizeof btxt) == RAW_OK)
                    band = band_lookup(fm, s, btxt);
                add_point(s, st_t, t, st_v, x, st_e, e, band, 0);
            }
        }
        if (s->raw_st[SLOT_CUR_T] && s->raw_st[SLOT_CUR_V]) {
            int band = -1;
            char btxt[FM_BAND_MAX];
            if (fm->slot[SLOT_CUR_B].n &&
                js_text(js_walk(root, &fm->slot[SLOT_CUR_B]), btxt,
                        sizeof btxt) == RAW_OK)
                band = band_lookup(fm, s, btxt);
            s->n = s->n < s->cap ? s->n : s->cap - 1;
            add_point(s, RAW_OK, s->raw[SLOT_CUR_T], RAW_OK, s->raw[SLOT_CUR_V],
                      s->raw_st[SLOT_CUR_E] ? RAW_OK : RAW_MISSING,
                      s->raw[SLOT_CUR_E], band, 1);
        }
    }
    return finish(fm, s, out);
}
