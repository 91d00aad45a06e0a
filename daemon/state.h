/*
 * state.h - the checkpoint file: model snapshot + learned-offset ledger.
 *
 * A checkpoint lets a restarted daemon continue the model where it was and
 * learn every packet exactly once: the ledger stores, per input partition,
 * the highest offset the model has learned.  Packets at or below it are
 * scored and re-published after a restart, but not learned again.
 *
 * File layout (little-endian, see state.c): magic "ODSKYCK1", version,
 * wall-clock write time, feature names, ledger entries, the framed model
 * snapshot (which carries its own CRC), and a CRC-32C over the whole file.
 *
 * Writes are atomic: a temp file in the same folder, write, fsync, rename
 * over the old file, fsync the folder.  A failed write leaves the previous
 * checkpoint intact.  The I/O calls go through a small table so tests can
 * inject failures (full disk, read-only folder).
 */
#ifndef ODDSKY_DAEMON_STATE_H
#define ODDSKY_DAEMON_STATE_H

#include <stddef.h>
#include <stdint.h>
#include <sys/types.h>

#define STATE_FILE_NAME "oddsky.ckpt"
#define STATE_TOPIC_MAX 250

typedef struct state_ledger_entry {
    char topic[STATE_TOPIC_MAX];
    int32_t partition;
    int64_t learned; /* highest offset learned by the model, -1 = none */
} state_ledger_entry;

typedef struct state_ledger {
    uint32_t n, cap;
    state_ledger_entry *e;
} state_ledger;

/* Ledger operations.  state_ledger_set grows the table (checkpoint-time
 * allocation only; the daemon sizes it at assignment).  Return 0 or
 * -ENOMEM. */
int state_ledger_init(state_ledger *l, uint32_t cap);
void state_ledger_free(state_ledger *l);
int state_ledger_set(state_ledger *l, const char *topic, int32_t partition,
                     int64_t learned);
/* Highest learned offset for topic/partition, or -1 when unknown. */
int64_t state_ledger_get(const state_ledger *l, const char *topic,
                         int32_t partition);

/* What a checkpoint holds besides the ledger. */
typedef struct state_checkpoint {
    uint64_t written_unix_ms;
    uint32_t n_features;
    char **features;         /* n_features names (owned after state_read) */
    state_ledger ledger;
    uint8_t *model;          /* framed model snapshot (owned after read) */
    size_t model_len;
    size_t file_bytes;
} state_checkpoint;

/* I/O table for fault injection; state_io_default() is the real one. */
typedef struct state_io {
    int (*open_fn)(const char *path, int flags, mode_t mode);
    ssize_t (*write_fn)(int fd, const void *buf, size_t len);
    int (*fsync_fn)(int fd);
    int (*rename_fn)(const char *from, const char *to);
} state_io;

const state_io *state_io_default(void);

/* Write dir/STATE_FILE_NAME atomically.  features/ledger/model are read,
 * not kept.  Returns 0, or a negative errno with a message in err naming
 * the step that failed (the old checkpoint is then untouched). */
int state_write(const char *dir, const state_io *io, uint64_t now_unix_ms,
                char *const *features, uint32_t n_features,
                const state_ledger *ledger, const uint8_t *model,
                size_t model_len, char *err, size_t err_len);

/* Read and verify a checkpoint file.  Returns 0 with *out filled (free
 * with state_checkpoint_free), -ENOENT when there is none, or another
 * negative errno / -EBADMSG (corrupt: bad magic, length, CRC) /
 * -EPROTO (unknown version) with a message in err. */
int state_read(const char *path, state_checkpoint *out, char *err,
               size_t err_len);
void state_checkpoint_free(state_checkpoint *c);

/* Path of the checkpoint inside dir, into buf. Returns 0 or -ENAMETOOLONG. */
int state_path(const char *dir, char *buf, size_t len);

#endif
