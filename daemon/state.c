/*
 * state.c - checkpoint encoding, atomic write and verified read.
 *
 * The encoder reuses core/snapshot.h's byte writer so that the file is
 * byte-for-byte reproducible and endian-independent.  Reading is
 * all-or-nothing: the CRC is checked over the whole file before any field
 * is trusted, and every length is bounded by what is left.
 */
#include "state.h"

#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "../core/snapshot.h"

#define STATE_MAGIC "ODSKYCK1"
#define STATE_VERSION 1u
#define STATE_MAX_FILE_BYTES ((size_t)1 << 32)

static int real_open(const char *path, int flags, mode_t mode)
{
    return open(path, flags, mode);
}

static const state_io default_io = {
    .open_fn = real_open,
    .write_fn = write,
    .fsync_fn = fsync,
    .rename_fn = rename,
};

const state_io *state_io_default(void)
{
    return &default_io;
}

int state_ledger_init(state_ledger *l, uint32_t cap)
{
    l->n = 0;
    l->cap = 0;
    l->e = NULL;
    if (cap) {
        l->e = calloc(cap, sizeof *l->e);
        if (!l->e)
            return -ENOMEM;
        l->cap = cap;
    }
    return 0;
}

void state_ledger_free(state_ledger *l)
{
    free(l->e);
    l->e = NULL;
    l->n = l->cap = 0;
}

static state_ledger_entry *ledger_find(const state_ledger *l, const char *topic,
                                       int32_t partition)
{
    for (uint32_t i = 0; i < l->n; i++)
        if (l->e[i].partition == partition && strcmp(l->e[i].topic, topic) == 0)
            return &l->e[i];
    return NULL;
}

int state_ledger_set(state_ledger *l, const char *topic, int32_t partition,
                     int64_t learned)
{
    state_ledger_entry *e = ledger_find(l, topic, partition);
    if (!e) {
        if (strlen(topic) >= STATE_TOPIC_MAX)
            return -ENAMETOOLONG;
        if (l->n == l->cap) {
            uint32_t ncap = l->cap ? l->cap * 2 : 16;
            state_ledger_entry *ne = realloc(l->e, ncap * sizeof *ne);
            if (!ne)
                return -ENOMEM;
            l->e = ne;
            l->cap = ncap;
        }
        e = &l->e[l->n++];
        memset(e, 0, sizeof *e);
        strcpy(e->topic, topic);
        e->partition = partition;
        e->learned = -1;
    }
    if (learned > e->learned)
        e->learned = learned;
    return 0;
}

int64_t state_ledger_get(const state_ledger *l, const char *topic,
                         int32_t partition)
{
    const state_ledger_entry *e = ledger_find(l, topic, partition);
    return e ? e->learned : -1;
}

int state_path(const char *dir, char *buf, size_t len)
{
    int n = snprintf(buf, len, "%s/%s", dir, STATE_FILE_NAME);
    return (n < 0 || (size_t)n >= len) ? -ENAMETOOLONG : 0;
}

static void encode(snap_writer *w, uint64_t now_unix_ms, char *const *features,
                   uint32_t n_features, const state_ledger *ledger,
                   const uint8_t *model, size_t model_len)
{
    snap_put_bytes(w, STATE_MAGIC, 8);
    snap_put_u32(w, STATE_VERSION);
    snap_put_u32(w, 0);
    snap_put_u64(w, now_unix_ms);
    snap_put_u32(w, n_features);
    for (uint32_t i = 0; i < n_features; i++) {
        size_t n = strlen(features[i]);
        snap_put_u32(w, (uint32_t)n);
        snap_put_bytes(w, features[i], n);
    }
    snap_put_u32(w, ledger ? ledger->n : 0);
    for (uint32_t i = 0; ledger && i < ledger->n; i++) {
        size_t n = strlen(ledger->e[i].topic);
        snap_put_u32(w, (uint32_t)n);
        snap_put_bytes(w, ledger->e[i].topic, n);
        snap_put_u32(w, (uint32_t)ledger->e[i].partition);
        snap_put_u64(w, (uint64_t)ledger->e[i].learned);
    }
    snap_put_u64(w, model_len);
    snap_put_bytes(w, model, model_len);
}

static int write_all(const state_io *io, int fd, const uint8_t *p, size_t n)
{
    while (n > 0) {
        ssize_t k = io->write_fn(fd, p, n);
        if (k < 0) {
            if (errno == EINTR)
                continue;
            return -errno;
        }
        if (k == 0)
            return -EIO;
        p += k;
        n -= (size_t)k;
    }
    return 0;
}

int state_write(const char *dir, const state_io *io, uint64_t now_unix_ms,
                char *const *features, uint32_t n_features,
                const state_ledger *ledger, const uint8_t *model,
                size_t model_len, char *err, size_t err_len)
{
    char path[4096], tmp[4200];
    int rc;
    if (!io)
        io = &default_io;
    if ((rc = state_path(dir, path, sizeof path)) < 0) {
        snprintf(err, err_len, "checkpoint path too long: %s", dir);
        return rc;
    }
    snprintf(tmp, sizeof tmp, "%s.tmp", path);

    snap_writer w;
    snap_writer_init(&w, NULL, 0);
    encode(&w, now_unix_ms, features, n_features, ledger, model, model_len);
    size_t total = w.len + 4;
    uint8_t *buf = malloc(total);
    if (!buf) {
        snprintf(err, err_len, "no memory for a %zu-byte checkpoint", total);
        return -ENOMEM;
    }
    snap_writer_init(&w, buf, total);
    encode(&w, now_unix_ms, features, n_features, ledger, model, model_len);
    snap_put_u32(&w, snap_crc32c(0, buf, total - 4));

    int fd = io->open_fn(tmp, O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0640);
    if (fd < 0) {
        rc = -errno;
        snprintf(err, err_len, "open %s: %s", tmp, strerror(errno));
        goto fail_open;
    }
    if ((rc = write_all(io, fd, buf, total)) < 0) {
        snprintf(err, err_len, "write %s: %s", tmp, strerror(-rc));
        goto fail_write;
    }
    if (io->fsync_fn(fd) < 0) {
        rc = -errno;
        snprintf(err, err_len, "fsync %s: %s", tmp, strerror(errno));
        goto fail_write;
    }
    if (close(fd) < 0) {
        fd = -1;
        rc = -errno;
        snprintf(err, err_len, "close %s: %s", tmp, strerror(errno));
        goto fail_write;
    }
    fd = -1;
    if (io->rename_fn(tmp, path) < 0) {
        rc = -errno;
        snprintf(err, err_len, "rename %s -> %s: %s", tmp, path, strerror(errno));
        goto fail_write;
    }
    /* Make the rename itself durable. */
    int dfd = open(dir, O_RDONLY | O_DIRECTORY | O_CLOEXEC);
    if (dfd >= 0) {
        if (io->fsync_fn(dfd) < 0) {
            rc = -errno;
            snprintf(err, err_len, "fsync folder %s: %s", dir, strerror(errno));
            close(dfd);
            free(buf);
            return rc;
        }
        close(dfd);
    }
    free(buf);
    return 0;

fail_write:
    if (fd >= 0)
        close(fd);
    unlink(tmp);
fail_open:
    free(buf);
    return rc;
}

void state_checkpoint_free(state_checkpoint *c)
{
    if (c->features) {
        for (uint32_t i = 0; i < c->n_features; i++)
            free(c->features[i]);
        free(c->features);
    }
    free(c->model);
    state_ledger_free(&c->ledger);
    memset(c, 0, sizeof *c);
}

static char *get_string(snap_reader *r, size_t max)
{
    uint32_t n = snap_get_u32(r);
    if (r->err || n > max || n > r->len - r->pos) {
        r->err = -1;
        return NULL;
    }
    char *s = malloc((size_t)n + 1);
    if (!s) {
        r->err = -2;
        return NULL;
    }
    snap_get_bytes(r, s, n);
    s[n] = '\0';
    return s;
}

static int decode(const uint8_t *buf, size_t len, state_checkpoint *out,
                  char *err, size_t err_len)
{
    snap_reader r;
    snap_reader_init(&r, buf, len - 4);
    char magic[8];
    snap_get_bytes(&r, magic, 8);
    if (memcmp(magic, STATE_MAGIC, 8) != 0) {
        snprintf(err, err_len, "not an oddsky checkpoint (bad magic)");
        return -EBADMSG;
    }
    uint32_t version = snap_get_u32(&r);
    (void)snap_get_u32(&r);
    if (version != STATE_VERSION) {
        snprintf(err, err_len, "checkpoint version %u; this build reads %u",
                 version, STATE_VERSION);
        return -EPROTO;
    }
    out->written_unix_ms = snap_get_u64(&r);
    uint32_t nf = snap_get_u32(&r);
    if (r.err || nf > 65536) {
        snprintf(err, err_len, "corrupt checkpoint: feature count %u", nf);
        return -EBADMSG;
    }
    out->features = calloc(nf ? nf : 1, sizeof *out->features);
    if (!out->features)
        return -ENOMEM;
    out->n_features = nf;
    for (uint32_t i = 0; i < nf; i++) {
        out->features[i] = get_string(&r, 4096);
        if (!out->features[i]) {
            out->n_features = i;
            snprintf(err, err_len, "corrupt checkpoint: feature name %u", i);
            return r.err == -2 ? -ENOMEM : -EBADMSG;
        }
    }
    uint32_t nl = snap_get_u32(&r);
    if (r.err || nl > 1u << 20) {
        snprintf(err, err_len, "corrupt checkpoint: ledger size %u", nl);
        return -EBADMSG;
    }
    if (state_ledger_init(&out->ledger, nl) < 0)
        return -ENOMEM;
    for (uint32_t i = 0; i < nl; i++) {
        char *topic = get_string(&r, STATE_TOPIC_MAX - 1);
        if (!topic) {
            snprintf(err, err_len, "corrupt checkpoint: ledger entry %u", i);
            return r.err == -2 ? -ENOMEM : -EBADMSG;
        }
        int32_t part = (int32_t)snap_get_u32(&r);
        int64_t learned = (int64_t)snap_get_u64(&r);
        int rc = state_ledger_set(&out->ledger, topic, part, learned);
        free(topic);
        if (rc < 0)
            return rc;
    }
    uint64_t ml = snap_get_u64(&r);
    if (r.err || ml != r.len - r.pos) {
        snprintf(err, err_len, "corrupt checkpoint: model length");
        return -EBADMSG;
    }
    out->model = malloc(ml ? ml : 1);
    if (!out->model)
        return -ENOMEM;
    snap_get_bytes(&r, out->model, ml);
    out->model_len = ml;
    return r.err ? -EBADMSG : 0;
}

int state_read(const char *path, state_checkpoint *out, char *err,
               size_t err_len)
{
    memset(out, 0, sizeof *out);
    int fd = open(path, O_RDONLY | O_CLOEXEC);
    if (fd < 0) {
        int e = errno;
        snprintf(err, err_len, "open %s: %s", path, strerror(e));
        return -e;
    }
    struct stat st;
    if (fstat(fd, &st) < 0) {
        int e = errno;
        close(fd);
        snprintf(err, err_len, "stat %s: %s", path, strerror(e));
        return -e;
    }
    size_t len = (size_t)st.st_size;
    if (len < 8 + 4 + 4 + 8 + 4 + 4 + 8 + 4 || len > STATE_MAX_FILE_BYTES) {
        close(fd);
        snprintf(err, err_len, "%s: %zu bytes is not a checkpoint (truncated?)",
                 path, len);
        return -EBADMSG;
    }
    uint8_t *buf = malloc(len);
    if (!buf) {
        close(fd);
        return -ENOMEM;
    }
    size_t got = 0;
    while (got < len) {
        ssize_t k = read(fd, buf + got, len - got);
        if (k < 0 && errno == EINTR)
            continue;
        if (k <= 0)
            break;
        got += (size_t)k;
    }
    close(fd);
    if (got != len) {
        free(buf);
        snprintf(err, err_len, "%s: short read", path);
        return -EIO;
    }
    snap_reader r;
    snap_reader_init(&r, buf + len - 4, 4);
    uint32_t crc = snap_get_u32(&r);
    if (crc != snap_crc32c(0, buf, len - 4)) {
        free(buf);
        snprintf(err, err_len, "%s: checksum mismatch (corrupt or truncated)",
                 path);
        return -EBADMSG;
    }
    int rc = decode(buf, len, out, err, err_len);
    free(buf);
    if (rc < 0) {
        state_checkpoint_free(out);
        return rc;
    }
    out->file_bytes = len;
    return 0;
}
