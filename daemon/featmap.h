/*
 * featmap.h - the feature map: config spec -> compiled accessors ->
 * feature vector.
 *
 * Three stages:
 *  1. featmap_validate() / featmap_new() read the "featmap" config object
 *     (format in the team brief and config/README): every error names its
 *     JSON path ("featmap.features[3].band") and the rule broken.
 *  2. featmap_plan_avro() compiles the map once per Avro writer schema
 *     into index paths: each dotted path becomes a list of record field
 *     indexes (resolved by name here, never per packet) with the union
 *     branch each step expects.  Paths absent from the schema compile to
 *     "always missing".  JSON packets use pre-split keys instead.
 *  3. featmap_extract_avro() / featmap_extract_json() gather the raw
 *     values and compute each feature into a packet_features, using only
 *     the scratch allocated by featmap_scratch_new().
 *
 * Additions to the brief's format (all optional):
 *  - history.max_points (default 1024, 1..65536): histories with more
 *    elements keep the LAST max_points elements of the array (streams send
 *    histories oldest first) and set packet_features.history_truncated.
 *  - "include_current" on color features (default false, as for series).
 *  - "min_points" on series (default: the statistic's own minimum).
 *  - "pool_bands": true on a series with band "all" (absent band = "all";
 *    a specific band is an error, "pool_bands needs band \"all\"", and
 *    history.band or current.band must be configured).  Each band is
 *    centred on its own mean so colour offsets between bands are not read
 *    as variability or trend.  Of the points the series would use (after
 *    include_current and, for error statistics, the err > 0 filter),
 *    points without a band are dropped, then bands with fewer than 2
 *    points; the rest keep their times and order and get the value
 *    v_i - vbar_band(i).  "slope" is the pooled within-band slope
 *    (series_pooled_slope, = OLS v ~ t + band dummies); every other
 *    statistic runs on the centred values, so "count" counts the kept
 *    points and "std" is the plain sample std (ddof 1) of the centred
 *    values over all kept points (not the pooled within-band estimate
 *    sqrt(SS / (n - bands)): it is that times sqrt((n-bands)/(n-1)))
 *    and "latest_minus_mean" is the latest point's offset from its band
 *    mean.  min_points applies to the kept points.  Bands are told apart
 *    by their text, also bands the map does not name (up to 32 such per
 *    packet; points in further ones count as having no band).
 *  - "color": "gradient" with "wavelength_um": {band: microns, ...}
 *    (required, each finite > 0; bands count toward FEATMAP_MAX_BANDS),
 *    "window_days" (default 1) and optional "include_current" (must be
 *    true if given; "mode" is refused).  Needs featmap.current with
 *    current.band and featmap.history with history.band.  The current
 *    detection against the history point nearest to it in time whose
 *    band differs from the current band, within window_days either side
 *    (ties: the later point, then the later in the history):
 *    x = (m_cur - m_other) / (lambda_cur - lambda_other), magnitudes per
 *    micron; err = sqrt(e_cur^2 + e_other^2) / |dlambda| when both errors
 *    are known, else 0.  Missing without a current detection, without
 *    such a point, when either band has no wavelength in the table (the
 *    nearest point is chosen first, so a nearer point in a band without a
 *    wavelength makes it missing), or when the two wavelengths are equal
 *    (dlambda 0; allowed in the table, as two names for one filter).
 *  - "minus": "<dotted path>" on field features: x = field - minus before
 *    the transform; missing when either is missing (absent, null, a null
 *    Avro union branch on the way); "err" stays the field's error.
 *
 * Semantics worth knowing:
 *  - History points with a missing or non-finite time or value are
 *    dropped; points are sorted by time (stable) before any statistic.
 *  - Statistics that need errors (wmean, stetson_j/k, chi2_red,
 *    beyond_1sigma) use only the points with a finite error > 0.
 *  - Missing inputs, NaN/inf, too few points and non-numeric types give a
 *    missing feature (x = NaN, missing = 1); a wrong type also counts in
 *    packet_features.type_errors.
 *  - Errors: field features carry their error path through the transform
 *    (first-order propagation); wmean carries 1/sqrt(sum w); color latest
 *    carries sqrt(eA^2 + eB^2), the gradient that over |dlambda|; diff and
 *    ratio propagate; everything else has err 0 (unknown).
 *  - The packet id is required (PACKET_E_MISSING_ID); the source id is
 *    required when a "source" path is configured, else it is the packet id.
 *
 * Ownership: a featmap is immutable after featmap_new and may be shared by
 * several decoders; plans and scratch belong to their caller and must not
 * outlive the featmap.  None of this is thread-safe per scratch.
 */
#ifndef ODDSKY_DAEMON_FEATMAP_H
#define ODDSKY_DAEMON_FEATMAP_H

#include <stddef.h>
#include <stdint.h>

#include <avro.h>
#include <jansson.h>

#include "packet.h"

#define FEATMAP_MAX_DEPTH 16u         /* components of a dotted path */
#define FEATMAP_NAME_MAX 64u          /* bytes of a feature name, NUL incl. */
#define FEATMAP_MAX_POINTS_DEFAULT 1024u
#define FEATMAP_MAX_POINTS_LIMIT 65536u
#define FEATMAP_MAX_BANDS 32u         /* distinct bands named in the map */

typedef struct featmap featmap;
typedef struct featmap_plan featmap_plan;
typedef struct featmap_scratch featmap_scratch;

/* Check a feature map spec.  Calls err(ctx, json_path, rule) once per
 * problem (json_path like "featmap.features[3].band", rule a sentence
 * fragment like "must be one of: none log10 asinh negate"); err may be
 * NULL to only count.  Returns the number of problems (0 = valid). */
int featmap_validate(const json_t *spec,
                     void (*err)(void *ctx, const char *json_path,
                                 const char *rule),
                     void *ctx);

/* Validate and build.  On failure returns NULL with the first problem as
 * "path: rule" in err (err may be NULL).  The spec is not retained. */
featmap *featmap_new(const json_t *spec, char *err, size_t err_len);

void featmap_free(featmap *fm);

/* Number of features (the model's dim), 1..MODEL_MAX_DIM. */
uint32_t featmap_dim(const featmap *fm);

/* Name of feature j (NULL when j >= dim).  Valid while fm lives. */
const char *featmap_name(const featmap *fm, uint32_t j);

/* All names, dim entries, for encode.  Valid while fm lives. */
const char *const *featmap_names(const featmap *fm);

/* history.max_points. */
uint32_t featmap_max_points(const featmap *fm);

/* Compile fm against an Avro writer schema (a record).  Returns NULL with
 * a reason in err when the schema is not a record; a path that does not
 * exist in the schema is not an error (it reads as missing).  The plan
 * keeps a reference to the schema. */
featmap_plan *featmap_plan_avro(const featmap *fm, avro_schema_t writer,
                                char *err, size_t err_len);

void featmap_plan_free(featmap_plan *plan);

/* How many of the map's paths resolved in this schema (for diagnostics;
 * 0 usually means the wrong schema). */
uint32_t featmap_plan_resolved(const featmap_plan *plan);

/* Scratch for one extracting thread: point buffers for max_points + 1
 * points.  NULL on allocation failure. */
featmap_scratch *featmap_scratch_new(const featmap *fm);

void featmap_scratch_free(featmap_scratch *s);

/* Fill *out from a decoded Avro record whose schema was compiled into
 * plan.  Returns 0, or PACKET_E_MISSING_ID / PACKET_E_MISSING_SOURCE /
 * PACKET_E_ID_TOO_LONG.  out->framing is left as it was.  No allocation. */
int featmap_extract_avro(const featmap *fm, const featmap_plan *plan,
                         avro_value_t *root, featmap_scratch *s,
                         packet_features *out);

/* Same from a parsed JSON object. */
int featmap_extract_json(const featmap *fm, const json_t *root,
                         featmap_scratch *s, packet_features *out);

#endif
