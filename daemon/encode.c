/*
 * encode.c - result record -> JSON or Avro bytes (contract in encode.h).
 *
 * Both writers append through a cursor that keeps counting past the end
 * of the buffer, so a too-small buffer reports the exact size needed and
 * the caller can grow once and retry.  Field order is the schema's in
 * both encodings.  Assumes the "C" numeric locale (the daemon never calls
 * setlocale for LC_NUMERIC).
 */
#include "encode.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

typedef struct out {
    uint8_t *buf;
    size_t cap, len;
} out;

static void put(out *o, const void *p, size_t n)
{
    if (o->len < o->cap) {
        size_t room = o->cap - o->len;
        memcpy(o->buf + o->len, p, n < room ? n : room);
    }
    o->len += n;
}

static void puts_(out *o, const char *s)
{
    put(o, s, strlen(s));
}

int encode_double(double x, char *buf)
{
    if (!isfinite(x)) {
        memcpy(buf, "null", 5);
        return 4;
    }
    int n = 0;
    for (int prec = 15; prec <= 17; prec++) {
        n = snprintf(buf, 32, "%.*g", prec, x);
        if (strtod(buf, NULL) == x)
            break;
    }
    return n;
}

/* ---- JSON ------------------------------------------------------------ */

/* Length of the valid UTF-8 sequence at s (n bytes left), 0 if invalid
 * (RFC 3629: no overlongs, no surrogates, at most U+10FFFF). */
static size_t utf8_seq(const uint8_t *s, size_t n)
{
    uint8_t c = s[0];
    size_t len;
    uint32_t cp;
    if (c < 0x80)
        return 1;
    if ((c & 0xe0) == 0xc0) {
        len = 2;
        cp = c & 0x1f;
    } else if ((c & 0xf0) == 0xe0) {
        len = 3;
        cp = c & 0x0f;
    } else if ((c & 0xf8) == 0xf0) {
        len = 4;
        cp = c & 0x07;
    } else {
        return 0;
    }
    if (len > n)
        return 0;
    for (size_t i = 1; i < len; i++) {
        if ((s[i] & 0xc0) != 0x80)
            return 0;
        cp = (cp << 6) | (s[i] & 0x3f);
    }
    if ((len == 2 && cp < 0x80) || (len == 3 && cp < 0x800) ||
        (len == 4 && (cp < 0x10000 || cp > 0x10ffff)) ||
        (cp >= 0xd800 && cp <= 0xdfff))
        return 0;
    return len;
}

static void jstr(out *o, const char *s)
{
    const uint8_t *p = (const uint8_t *)(s ? s : "");
    size_t n = strlen((const char *)p);
    put(o, "\"", 1);
    size_t i = 0;
    while (i < n) {
        uint8_t c = p[i];
        const char *esc = NULL;
        char tmp[8];
        switch (c) {
        case '"': esc = "\\\""; break;
        case '\\': esc = "\\\\"; break;
        case '\b': esc = "\\b"; break;
        case '\f': esc = "\\f"; break;
        case '\n': esc = "\\n"; break;
        case '\r': esc = "\\r"; break;
        case '\t': esc = "\\t"; break;
        default:
            if (c < 0x20) {
                snprintf(tmp, sizeof tmp, "\\u%04x", c);
                esc = tmp;
            }
        }
        if (esc) {
            puts_(o, esc);
            i++;
            continue;
        }
        size_t len = utf8_seq(p + i, n - i);
        if (len == 0) {
            puts_(o, "\\ufffd");
            i++;
        } else {
            put(o, p + i, len);
            i += len;
        }
    }
    put(o, "\"", 1);
}

static void jkey(out *o, const char *k, int first)
{
    if (!first)
        put(o, ",", 1);
    put(o, "\"", 1);
    puts_(o, k);
    put(o, "\":", 2);
}

static void jnum(out *o, double x)
{
    char b[32];
    int n = encode_double(x, b);
    put(o, b, (size_t)n);
}

static void jint(out *o, long long v)
{
    char b[32];
    int n = snprintf(b, sizeof b, "%lld", v);
    put(o, b, (size_t)n);
}

static int check(const encode_record *r)
{
    if (!r || !r->res || (r->dim && !r->feature_names) ||
        r->res->n_drivers > MODEL_DRIVERS)
        return ENCODE_EINVAL;
    for (uint32_t i = 0; i < r->res->n_drivers; i++)
        if (r->res->drivers[i].feature < 0 ||
            (uint32_t)r->res->drivers[i].feature >= r->dim)
            return ENCODE_EINVAL;
    return 0;
}

int encode_json(const encode_record *r, char *buf, size_t cap, size_t *len)
{
    if (check(r) || !len || (!buf && cap))
        return ENCODE_EINVAL;
    const model_result *m = r->res;
    out o = {(uint8_t *)buf, cap, 0};
    put(&o, "{", 1);
    jkey(&o, "packet_id", 1);
    jstr(&o, r->packet_id);
    jkey(&o, "source_id", 0);
    jstr(&o, r->source_id);
    jkey(&o, "event_time", 0);
    jnum(&o, r->event_time_days);
    jkey(&o, "time_source", 0);
    jstr(&o, r->time_from_packet ? "packet" : "kafka");
    jkey(&o, "cluster", 0);
    if (m->cluster < 0)
        puts_(&o, "null");
    else
        jint(&o, m->cluster);
    jkey(&o, "distance", 0);
    jnum(&o, m->distance);
    jkey(&o, "cluster_weight", 0);
    jnum(&o, m->cluster_weight);
    jkey(&o, "novelty", 0);
    jnum(&o, m->novelty);
    jkey(&o, "space_novelty", 0);
    jnum(&o, m->space_novelty);
    jkey(&o, "tail_prob", 0);
    jnum(&o, m->tail_prob);
    jkey(&o, "flag", 0);
    puts_(&o, m->flag ? "true" : "false");
    jkey(&o, "drivers", 0);
    put(&o, "[", 1);
    for (uint32_t i = 0; i < m->n_drivers; i++) {
        if (i)
            put(&o, ",", 1);
        put(&o, "{", 1);
        jkey(&o, "feature", 1);
        jstr(&o, r->feature_names[m->drivers[i].feature]);
        jkey(&o, "z", 0);
        jnum(&o, m->drivers[i].z);
        put(&o, "}", 1);
    }
    put(&o, "]", 1);
    jkey(&o, "missing", 0);
    put(&o, "[", 1);
    int first = 1;
    for (uint32_t j = 0; r->missing && j < r->dim; j++) {
        if (!r->missing[j])
            continue;
        if (!first)
            put(&o, ",", 1);
        first = 0;
        jstr(&o, r->feature_names[j]);
    }
    put(&o, "]", 1);
    jkey(&o, "warm", 0);
    puts_(&o, m->warm ? "true" : "false");
    jkey(&o, "model_seq", 0);
    jint(&o, (long long)m->seq);
    jkey(&o, "input", 0);
    put(&o, "{", 1);
    jkey(&o, "topic", 1);
    jstr(&o, r->topic);
    jkey(&o, "partition", 0);
    jint(&o, r->partition);
    jkey(&o, "offset", 0);
    jint(&o, (long long)r->offset);
    put(&o, "}", 1);
    if (r->label) {
        jkey(&o, "label", 0);
        jstr(&o, r->label);
    }
    put(&o, "}", 1);
    *len = o.len;
    if (o.len > cap)
        return ENCODE_ESHORT;
    if (o.len < cap)
        buf[o.len] = '\0';
    return 0;
}

/* ---- Avro ------------------------------------------------------------ */

static void along(out *o, int64_t v)
{
    uint64_t z = ((uint64_t)v << 1) ^ (uint64_t)(v >> 63);
    uint8_t b[10];
    size_t n = 0;
    do {
        uint8_t c = z & 0x7f;
        z >>= 7;
        b[n++] = (uint8_t)(c | (z ? 0x80 : 0));
    } while (z);
    put(o, b, n);
}

static void adouble(out *o, double x)
{
    uint64_t bits;
    memcpy(&bits, &x, sizeof bits);
    uint8_t b[8];
    for (int i = 0; i < 8; i++)
        b[i] = (uint8_t)(bits >> (8 * i));
    put(o, b, 8);
}

/* ["null","double"]: branch 0 = null, 1 = double. */
static void anull_double(out *o, double x)
{
    if (!isfinite(x)) {
        along(o, 0);
        return;
    }
    along(o, 1);
    adouble(o, x);
}

static void astr(out *o, const char *s)
{
    size_t n = s ? strlen(s) : 0;
    along(o, (int64_t)n);
    put(o, s ? s : "", n);
}

int encode_avro(const encode_record *r, uint8_t *buf, size_t cap, size_t *len)
{
    if (check(r) || !len || (!buf && cap))
        return ENCODE_EINVAL;
    const model_result *m = r->res;
    out o = {buf, cap, 0};
    astr(&o, r->packet_id);
    astr(&o, r->source_id);
    adouble(&o, r->event_time_days);
    along(&o, r->time_from_packet ? 0 : 1); /* enum: packet, kafka */
    if (m->cluster < 0) {
        along(&o, 0);
    } else {
        along(&o, 1);
        along(&o, m->cluster);
    }
    anull_double(&o, m->distance);
    anull_double(&o, m->cluster_weight);
    anull_double(&o, m->novelty);
    anull_double(&o, m->space_novelty);
    anull_double(&o, m->tail_prob);
    uint8_t flag = m->flag ? 1 : 0;
    put(&o, &flag, 1);
    if (m->n_drivers) {
        along(&o, m->n_drivers);
        for (uint32_t i = 0; i < m->n_drivers; i++) {
            astr(&o, r->feature_names[m->drivers[i].feature]);
            anull_double(&o, m->drivers[i].z);
        }
    }
    along(&o, 0);
    uint32_t nm = 0;
    for (uint32_t j = 0; r->missing && j < r->dim; j++)
        nm += r->missing[j] != 0;
    if (nm) {
        along(&o, nm);
        for (uint32_t j = 0; j < r->dim; j++)
            if (r->missing[j])
                astr(&o, r->feature_names[j]);
    }
    along(&o, 0);
    uint8_t warm = m->warm ? 1 : 0;
    put(&o, &warm, 1);
    along(&o, (int64_t)m->seq);
    astr(&o, r->topic);
    along(&o, r->partition);
    along(&o, r->offset);
    if (r->label) {
        along(&o, 1);
        astr(&o, r->label);
    } else {
        along(&o, 0);
    }
    *len = o.len;
    return o.len > cap ? ENCODE_ESHORT : 0;
}
