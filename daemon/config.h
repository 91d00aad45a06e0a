/*
 * config.h - the daemon's configuration: one declarative option table.
 *
 * Every option is declared once, in config.c's table: its dotted JSON path,
 * type, default, bounds or enum values, the field of struct oddsky_config
 * it fills, a help line and whether it may change on SIGHUP.  That one
 * table drives parsing the JSON file, `--set key=value`, validation,
 * `oddsky check-config --defaults`, config_to_json() for the status page
 * and reload checks (as redis' static_configs[] and nginx's ngx_command_t).
 *
 * The file is JSON with two extensions: `// line` and `/ * block * /`
 * comments (stripped before parsing; the text is replaced by spaces so
 * parse errors keep their line and column).  Duplicate keys and unknown
 * keys are errors; an unknown key gets a "did you mean" hint.
 *
 * Every error names the JSON path and the rule broken, one per line:
 *   model.k: must be between 1 and 1024 (got 0)
 *   kafka.brokers: required
 * Errors are collected (up to CONFIG_ERRS_MAX), never printed by the
 * parser itself, so check-config can list them all.
 *
 * Paths: "featmap" given as a string is a JSON file relative to the
 * directory of the config file.  Every other path option is used as given
 * (relative to the daemon's working directory).
 *
 * Ownership: struct oddsky_config owns its strings, lists and JSON values;
 * config_free() releases them.  Strings are never NULL after
 * config_init_defaults() ("" means unset).
 */
#ifndef ODDSKY_DAEMON_CONFIG_H
#define ODDSKY_DAEMON_CONFIG_H

#include <stddef.h>
#include <stdint.h>
#include <stdio.h>

#include <jansson.h>

#include "../core/model.h"

/* ---- errors collector ------------------------------------------------ */

#define CONFIG_ERRS_MAX 64u
#define CONFIG_PATH_MAX 160u
#define CONFIG_RULE_MAX 320u

typedef struct config_error {
    char path[CONFIG_PATH_MAX]; /* dotted JSON path, or the file name for
                                   parse errors ("oddsky.json:12:5") */
    char rule[CONFIG_RULE_MAX]; /* what is wrong, in words */
} config_error;

typedef struct config_errs {
    unsigned n;       /* errors stored, <= CONFIG_ERRS_MAX */
    unsigned dropped; /* errors beyond capacity (counted, not stored) */
    config_error e[CONFIG_ERRS_MAX];
} config_errs;

void config_errs_init(config_errs *errs);
/* Add "path: rule" (rule is printf-style).  Never fails: past capacity the
 * error is counted in ->dropped. */
void config_errs_add(config_errs *errs, const char *path, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));
/* Total errors seen (stored + dropped). */
unsigned config_errs_count(const config_errs *errs);
/* One "path: rule" per line, then "... and N more" if any were dropped. */
void config_errs_print(const config_errs *errs, FILE *out);

/* ---- the typed configuration ----------------------------------------- */

typedef struct config_strlist {
    char **items;
    size_t n;
} config_strlist;

typedef struct config_prop {
    char *key;   /* librdkafka property name */
    char *value; /* always a string (numbers and bools converted) */
} config_prop;

typedef struct config_props {
    config_prop *items;
    size_t n;
} config_props;

typedef enum config_output_format {
    CONFIG_OUTPUT_JSON = 0,
    CONFIG_OUTPUT_AVRO = 1
} config_output_format;

struct oddsky_config {
    /* model.*: one option per field of model_params except dim (from the
     * feature map).  Enum fields are stored as their int values. */
    model_params model;

    struct {
        char *brokers;           /* bootstrap servers, required for run */
        char *group_id;          /* consumer group, "oddsky" */
        config_strlist input_topics; /* required for run */
        char *output_topic;      /* "oddsky-results" */
        char *flagged_topic;     /* flagged results only; "" = off */
        char *dead_letter_topic; /* "oddsky-dead-letters" */
        config_props consumer;   /* librdkafka consumer properties */
        config_props producer;   /* librdkafka producer properties */
        uint32_t poll_batch;     /* max messages per poll batch, 1024 */
        uint32_t poll_interval_ms; /* poll timer period, 100 */
        uint32_t max_in_flight;  /* undelivered results before pausing */
    } kafka;

    struct {
        char *schema_dir;        /* directory of <id>.avsc; "" = none */
        char *writer_schema;     /* .avsc for bare Avro; "" = none */
        uint32_t max_message_bytes; /* larger messages go to dead letters */
    } input;

    json_t *featmap;             /* the feature map object, or NULL */
    char *featmap_file;          /* resolved path when given as a string */

    struct {
        int format;              /* config_output_format */
        char *avro_schema;       /* path of the result .avsc */
    } output;

    struct {
        char *dir;               /* checkpoint folder, "./state" */
        uint32_t checkpoint_interval_s; /* 60 */
        int fresh_start_on_bad_checkpoint; /* bool */
    } state;

    struct {
        char *listen;            /* address, "127.0.0.1" */
        uint32_t port;           /* 8787, 0 = off */
        char *token;             /* secret; "" = read-only, no token */
        int allow_remote_without_token; /* bool */
        uint32_t max_connections;
        uint32_t idle_timeout_ms;
        uint32_t max_header_bytes;
        uint32_t max_body_bytes;
    } status;

    struct {
        uint32_t drain_deadline_ms;
        uint32_t select_interval_s; /* 0 = off */
        int auto_resize;            /* bool */
        double night_hours;         /* night length for expected flags */
    } run;

    struct {
        int level;               /* log_level */
        int format;              /* log_format */
    } log;

    char *config_dir;            /* directory of the loaded file, or "." */
};

/* ---- the option table ------------------------------------------------ */

typedef enum config_type {
    CONFIG_BOOL = 0,    /* int field, 0/1 */
    CONFIG_INT,         /* int32_t field */
    CONFIG_UINT,        /* uint32_t or uint64_t field (by size) */
    CONFIG_DOUBLE,      /* double field */
    CONFIG_STRING,      /* char * field */
    CONFIG_ENUM,        /* int field; value is a name from enum_names */
    CONFIG_STRLIST,     /* config_strlist field */
    CONFIG_OBJECT,      /* config_props field: string -> string */
    CONFIG_FEATMAP      /* the feature map: object, or path to a file */
} config_type;

#define CONFIG_F_LIVE 0x1u     /* may change on SIGHUP */
#define CONFIG_F_SECRET 0x2u   /* masked in every output */
#define CONFIG_F_RUN_REQ 0x4u  /* required by `run` (not by `demo`) */
#define CONFIG_F_BOUNDS 0x8u   /* min/max apply (numbers) */
#define CONFIG_F_PATH 0x10u    /* a filesystem path (documentation) */

typedef struct config_option {
    const char *name;      /* dotted JSON path, e.g. "model.k" */
    config_type type;
    size_t offset;         /* of the field in struct oddsky_config */
    size_t size;           /* of that field */
    const char *field;     /* the C member, e.g. "model.k" (model_params_check) */
    const char *def;       /* default, in --set syntax */
    double min, max;       /* inclusive bounds (CONFIG_F_BOUNDS) */
    const char *const *enum_names; /* NULL-terminated (CONFIG_ENUM) */
    unsigned flags;        /* CONFIG_F_* */
    const char *unit;      /* "ms", "days", "bytes"... or NULL */
    const char *help;      /* one line */
} config_option;

size_t config_option_count(void);
/* The i-th option (table order), NULL past the end. */
const config_option *config_option_at(size_t i);
/* Exact name lookup; NULL if unknown. */
const config_option *config_option_find(const char *name);
/* Type name for display: "bool" "int" "uint" "double" "string" "enum"
 * "string-list" "object" "featmap". */
const char *config_type_name(config_type t);

/* The option's current value as JSON (new reference).  Secrets are
 * replaced by "***" (or "" when empty) unless show_secrets is nonzero;
 * object options mask properties whose names look secret (password,
 * secret, key material). */
json_t *config_option_value(const struct oddsky_config *cfg,
                            const config_option *opt, int show_secrets);

/* ---- lifecycle ------------------------------------------------------- */

/* Fill cfg with every default.  Returns 0 or -1 (out of memory).  Always
 * call config_free() afterwards, even on failure. */
int config_init_defaults(struct oddsky_config *cfg);

void config_free(struct oddsky_config *cfg);

/* Parse the commented JSON file at path into cfg (over what is there).
 * Records the file's directory in cfg->config_dir.  Every problem goes to
 * errs; returns 0 when none was added, -1 otherwise (cfg stays usable and
 * must still be freed). */
int config_load_file(struct oddsky_config *cfg, const char *path,
                     config_errs *errs);

/* Same, from text already in memory; name is used in parse error paths
 * and base_dir resolves a featmap path (NULL = "."). */
int config_load_text(struct oddsky_config *cfg, const char *text,
                     const char *name, const char *base_dir,
                     config_errs *errs);

/* Apply one "key=value" override, typed by the table: bool
 * true|false|1|0|yes|no|on|off; numbers as in JSON (hex not accepted);
 * enum by name; string-list as "a,b,c" or a JSON array; object as
 * "kafka.consumer.<property>=value" (one property) or "kafka.consumer={json}";
 * featmap as a path or "{json}".  Same bounds as the file.  Returns 0 or -1
 * with the error in errs. */
int config_apply_set(struct oddsky_config *cfg, const char *assignment,
                     config_errs *errs);

/* Remove comments from JSON text in place: // to end of line and block
 * comments become spaces (newlines kept), strings are left alone.  Returns
 * 0, or -1 for an unterminated block comment with *bad_line set (1-based). */
int config_strip_comments(char *text, int *bad_line);

/* What config_validate checks beyond each option's own rules. */
#define CONFIG_FOR_RUN 0u  /* everything, including the bus options */
#define CONFIG_FOR_DEMO 1u /* skip kafka.brokers / input_topics / featmap */

/* Cross-field checks (status listen vs token, model ranges, topics, files
 * that must exist, the feature map via featmap_validate()).  Adds to errs;
 * returns 0 if it added nothing, -1 otherwise. */
int config_validate(const struct oddsky_config *cfg, config_errs *errs);
int config_validate_for(const struct oddsky_config *cfg, unsigned mode,
                        config_errs *errs);

/* Build a fresh config from path (NULL = defaults only) plus the --set
 * overrides, validate it, and compare with old: any difference in an
 * option without CONFIG_F_LIVE is an error naming it ("model.k: cannot
 * change on reload (restart needed)").  On 0 *cfg_new is ready to swap
 * in; on -1 *cfg_new must still be freed and old stays in force. */
int config_reload(const struct oddsky_config *old, const char *path,
                  const char *const *sets, size_t n_sets,
                  struct oddsky_config *cfg_new, config_errs *errs);

/* ---- output ---------------------------------------------------------- */

/* Every option: name, type, default, bounds or values, live marker and
 * help, aligned, for `check-config --defaults`. */
void config_print_defaults(FILE *out);

/* All options with their current values as one nested JSON object in the
 * file's shape (new reference; NULL on out of memory).  Secrets masked. */
json_t *config_to_json(const struct oddsky_config *cfg);

/* The model parameters for dim features: copies cfg->model and sets dim.
 * Returns 0, or -1 when dim is 0 or above MODEL_MAX_DIM. */
int config_to_model_params(const struct oddsky_config *cfg, uint32_t dim,
                           model_params *out);

#endif
