/*
 * pipeline.c - decode -> features -> model -> record (see pipeline.h).
 */
#include "pipeline.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "decode.h"
#include "encode.h"

#define MJD_UNIX_EPOCH 40587.0

struct pipeline {
    featmap *fm;
    decoder *dec;
    model *m;
    int format;            /* config_output_format */
    uint32_t dim;
    char **names_own;      /* f0.. when there is no feature map */
    const char *const *names;
    packet_features pf;
    model_result res;
    char *out;
    pipeline_counters c;
    pipeline_flag_entry recent[PIPELINE_RECENT_FLAGS];
    uint32_t recent_head, recent_n;
};

static int make_model(pipeline *p, const struct oddsky_config *cfg, char *err,
                      size_t err_len)
{
    model_params mp;
    if (config_to_model_params(cfg, p->dim, &mp) != 0) {
        snprintf(err, err_len, "model: %u features is outside 1..%u", p->dim,
                 MODEL_MAX_DIM);
        return -1;
    }
    const char *field = NULL;
    char why[160];
    if (model_params_check(&mp, &field, why, sizeof why) != 0) {
        snprintf(err, err_len, "model.%s: %s", field, why);
        return -1;
    }
    int e = 0;
    p->m = model_new(&mp, &e);
    if (!p->m) {
        snprintf(err, err_len, "model: %s", core_strerror(e));
        return -1;
    }
    return 0;
}

static pipeline *alloc_pipeline(const struct oddsky_config *cfg)
{
    pipeline *p = calloc(1, sizeof *p);
    if (!p)
        return NULL;
    p->out = malloc(PIPELINE_OUT_BYTES);
    if (!p->out) {
        free(p);
        return NULL;
    }
    p->format = cfg->output.format;
    return p;
}

int pipeline_new(const struct oddsky_config *cfg, pipeline **out, char *err,
                 size_t err_len)
{
    *out = NULL;
    if (!cfg->featmap) {
        snprintf(err, err_len, "featmap: required");
        return -1;
    }
    pipeline *p = alloc_pipeline(cfg);
    if (!p) {
        snprintf(err, err_len, "out of memory");
        return -1;
    }
    p->fm = featmap_new(cfg->featmap, err, err_len);
    if (!p->fm)
        goto fail;
    p->dim = featmap_dim(p->fm);
    p->names = featmap_names(p->fm);
    decoder_opts o = {
        .schema_dir = cfg->input.schema_dir,
        .writer_schema_path = cfg->input.writer_schema,
        .max_message_bytes = cfg->input.max_message_bytes,
        .fm = p->fm,
    };
    p->dec = decoder_new(&o, err, err_len);
    if (!p->dec)
        goto fail;
    if (make_model(p, cfg, err, err_len) != 0)
        goto fail;
    *out = p;
    return 0;
fail:
    pipeline_free(p);
    return -1;
}

int pipeline_new_vectors(const struct oddsky_config *cfg, uint32_t dim,
                         pipeline **out, char *err, size_t err_len)
{
    *out = NULL;
    pipeline *p = alloc_pipeline(cfg);
    if (!p) {
        snprintf(err, err_len, "out of memory");
        return -1;
    }
    p->dim = dim;
    p->names_own = calloc(dim ? dim : 1, sizeof *p->names_own);
    if (!p->names_own)
        goto oom;
    for (uint32_t j = 0; j < dim; j++) {
        char nm[16];
        snprintf(nm, sizeof nm, "f%u", j);
        if (!(p->names_own[j] = strdup(nm)))
            goto oom;
    }
    p->names = (const char *const *)p->names_own;
    if (make_model(p, cfg, err, err_len) != 0)
        goto fail;
    *out = p;
    return 0;
oom:
    snprintf(err, err_len, "out of memory");
fail:
    pipeline_free(p);
    return -1;
}

void pipeline_free(pipeline *p)
{
    if (!p)
        return;
    decoder_free(p->dec);
    featmap_free(p->fm);
    model_free(p->m);
    if (p->names_own) {
        for (uint32_t j = 0; j < p->dim; j++)
            free(p->names_own[j]);
        free(p->names_own);
    }
    free(p->out);
    free(p);
}

int pipeline_set_model(pipeline *p, model *m, char *err, size_t err_len)
{
    if (model_get_params(m)->dim != p->dim) {
        snprintf(err, err_len,
                 "the model has %u features but the feature map has %u",
                 model_get_params(m)->dim, p->dim);
        return -1;
    }
    model_free(p->m);
    p->m = m;
    return 0;
}

model *pipeline_model(pipeline *p)
{
    return p->m;
}

const featmap *pipeline_featmap(const pipeline *p)
{
    return p->fm;
}

const char *const *pipeline_feature_names(const pipeline *p)
{
    return p->names;
}

uint32_t pipeline_dim(const pipeline *p)
{
    return p->dim;
}

const pipeline_counters *pipeline_get_counters(const pipeline *p)
{
    return &p->c;
}

static void remember_flag(pipeline *p, const packet_features *pf,
                          const model_result *r, double t)
{
    pipeline_flag_entry *e = &p->recent[p->recent_head];
    p->recent_head = (p->recent_head + 1) % PIPELINE_RECENT_FLAGS;
    if (p->recent_n < PIPELINE_RECENT_FLAGS)
        p->recent_n++;
    memcpy(e->packet_id, pf->packet_id, sizeof e->packet_id);
    memcpy(e->source_id, pf->source_id, sizeof e->source_id);
    e->novelty = r->novelty;
    e->tail_prob = r->tail_prob;
    e->event_time_days = t;
    e->n_drivers = r->n_drivers;
    memcpy(e->drivers, r->drivers, sizeof e->drivers);
}

uint32_t pipeline_recent_flags(const pipeline *p, pipeline_flag_entry *out,
                               uint32_t n)
{
    uint32_t k = 0;
    for (uint32_t i = 0; i < p->recent_n && k < n; i++) {
        uint32_t at = (p->recent_head + PIPELINE_RECENT_FLAGS - 1 - i) %
                      PIPELINE_RECENT_FLAGS;
        out[k++] = p->recent[at];
    }
    return k;
}

/* Score the vector in p->pf and encode the record. */
static int score_and_encode(pipeline *p, double t, int from_packet, int learn,
                            const char *topic, int32_t partition,
                            int64_t offset, const char *label,
                            pipeline_output *out)
{
    packet_features *pf = &p->pf;
    /* Without any measurement error the model takes its faster path. */
    int have_err = 0;
    for (uint32_t j = 0; j < p->dim && !have_err; j++)
        have_err = pf->err[j] > 0;
    model_input in = {.x = pf->x, .err = have_err ? pf->err : NULL,
                      .missing = pf->missing, .time_days = t, .learn = learn};
    model_observe(p->m, &in, &p->res);
    if (learn)
        p->c.learned++;
    else
        p->c.score_only++;
    if (p->res.flag) {
        p->c.flags++;
        remember_flag(p, pf, &p->res, t);
    }
    encode_record rec = {
        .packet_id = pf->packet_id,
        .source_id = pf->source_id,
        .event_time_days = t,
        .time_from_packet = from_packet,
        .res = &p->res,
        .feature_names = p->names,
        .dim = p->dim,
        .missing = pf->missing,
        .topic = topic ? topic : "",
        .partition = partition,
        .offset = offset,
        .label = label,
    };
    size_t len = 0;
    int rc = p->format == CONFIG_OUTPUT_AVRO
                 ? encode_avro(&rec, (uint8_t *)p->out, PIPELINE_OUT_BYTES, &len)
                 : encode_json(&rec, p->out, PIPELINE_OUT_BYTES, &len);
    out->res = &p->res;
    out->pf = pf;
    out->flag = p->res.flag;
    out->key = pf->source_id;
    out->key_len = strlen(pf->source_id);
    if (rc != 0) {
        p->c.encode_errors++;
        out->reason = PACKET_E_INTERNAL;
        return out->reason;
    }
    out->payload = p->out;
    out->len = len;
    out->reason = 0;
    p->c.results++;
    return 0;
}

/* p->pf holds a decoded packet: pick its time, score, encode. */
static int score_features(pipeline *p, int64_t kafka_ts_ms, int learn,
                          const char *topic, int32_t partition, int64_t offset,
                          const char *label, pipeline_output *out)
{
    p->c.type_errors += p->pf.type_errors;
    p->c.truncated += p->pf.history_truncated ? 1 : 0;
    double t = p->pf.time_days;
    int from_packet = p->pf.time_from_packet && isfinite(t);
    if (!from_packet) {
        p->c.kafka_time++;
        t = kafka_ts_ms >= 0 ? (double)kafka_ts_ms / 86400000.0 + MJD_UNIX_EPOCH
                             : NAN;
    }
    return score_and_encode(p, t, from_packet, learn, topic, partition, offset,
                            label, out);
}

int pipeline_process(pipeline *p, const pipeline_input *in, pipeline_output *out)
{
    memset(out, 0, sizeof *out);
    p->c.packets++;
    if (!p->dec) {
        out->reason = PACKET_E_INTERNAL;
        return out->reason;
    }
    int rc = decoder_extract(p->dec, in->buf, in->len, &p->pf);
    if (rc < 0) {
        int idx = packet_reason_index(rc);
        p->c.refused[idx >= 0 ? (unsigned)idx : PACKET_REASON_COUNT]++;
        out->reason = rc;
        out->pf = &p->pf;
        return rc;
    }
    return score_features(p, in->kafka_ts_ms, in->learn, in->topic,
                          in->partition, in->offset, in->label, out);
}

int pipeline_process_features(pipeline *p, const packet_features *pf,
                              int64_t kafka_ts_ms, int learn,
                              const char *topic, int32_t partition,
                              int64_t offset, const char *label,
                              pipeline_output *out)
{
    memset(out, 0, sizeof *out);
    p->c.packets++;
    if (pf != &p->pf)
        p->pf = *pf;
    return score_features(p, kafka_ts_ms, learn, topic, partition, offset,
                          label, out);
}

int pipeline_process_vector(pipeline *p, const char *id, double time_days,
                            const double *x, const double *err,
                            const uint8_t *missing, int learn,
                            const char *label, pipeline_output *out)
{
    memset(out, 0, sizeof *out);
    p->c.packets++;
    packet_features *pf = &p->pf;
    pf->dim = p->dim;
    pf->n_missing = 0;
    for (uint32_t j = 0; j < p->dim; j++) {
        int miss = (missing && missing[j]) || !isfinite(x[j]);
        pf->x[j] = miss ? NAN : x[j];
        pf->err[j] = err && isfinite(err[j]) && err[j] > 0 ? err[j] : 0;
        pf->missing[j] = (uint8_t)miss;
        pf->n_missing += (uint32_t)miss;
    }
    snprintf(pf->packet_id, sizeof pf->packet_id, "%s", id);
    snprintf(pf->source_id, sizeof pf->source_id, "%s", id);
    pf->time_days = time_days;
    pf->time_from_packet = isfinite(time_days);
    pf->framing = "vector";
    return score_and_encode(p, time_days, pf->time_from_packet, learn, NULL, -1,
                            -1, label, out);
}
