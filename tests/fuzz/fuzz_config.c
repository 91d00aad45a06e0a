// fuzz-sources: daemon/config.c daemon/featmap.c daemon/log.c core/model.c core/calib.c core/decay.c core/density.c core/err.c core/kmeans.c core/reservoir.c core/rng.c core/scaler.c core/select.c core/series.c core/sketch.c core/snapshot.c core/vec.c
// fuzz-libs: -lavro -lz -ljansson -lm
/*
 * fuzz_config.c - libFuzzer target for the configuration parser: the
 * input's first line as a `--set key=value` override (config_apply_set),
 * the rest as a commented JSON config file (config_load_text), then what
 * check-config does with a loaded config: config_validate_for(),
 * config_to_json() and config_to_model_params().
 *
 * The base directory holds the demo feature map as fm.json, so
 * "featmap": "fm.json" loads a file.  Inputs naming /dev, /proc or /sys
 * are skipped: a featmap path there could block on a device read, which
 * is the operator's business, not the parser's.
 *
 * Invariants checked besides the sanitizers: a call that returns -1 added
 * an error and one that returns 0 added none; every stored error has a
 * terminated path and a non-empty rule; strings are never NULL after a
 * load (config.h); config_to_json() gives an object.
 */
#include <stdint.h>
#include <string.h>

#include <jansson.h>

#include "daemon/config.h"
#include "fuzz_util.h"

static char dir[PATH_MAX];

static void cleanup(void)
{
    char p[PATH_MAX];
    snprintf(p, sizeof p, "%s/fm.json", dir);
    unlink(p);
    rmdir(dir);
}

int LLVMFuzzerInitialize(int *argc, char ***argv)
{
    (void)argc;
    (void)argv;
    char p[PATH_MAX];
    snprintf(p, sizeof p, "%s/config/demo-featmap.json", fuzz_top());
    size_t len;
    char *fm = fuzz_slurp(p, &len);
    snprintf(dir, sizeof dir, "%s", fuzz_tmpdir("config"));
    fuzz_write(dir, "fm.json", fm, len);
    free(fm);
    atexit(cleanup);
    return 0;
}

static void check_errs(const config_errs *e, unsigned before, int rc)
{
    unsigned now = config_errs_count(e);
    fuzz_check(rc == 0 || rc == -1, "returns 0 or -1");
    fuzz_check(rc == 0 ? now == before : now > before,
               "-1 exactly when an error was added");
    fuzz_check(e->n <= CONFIG_ERRS_MAX, "stored errors within capacity");
    for (unsigned i = 0; i < e->n; i++) {
        fuzz_check(memchr(e->e[i].path, '\0', CONFIG_PATH_MAX) != NULL &&
                       memchr(e->e[i].rule, '\0', CONFIG_RULE_MAX) != NULL,
                   "error texts terminated");
        fuzz_check(e->e[i].rule[0] != '\0', "an error has a rule");
    }
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    if (size > 65536 || memchr(data, '\0', size))
        return 0;
    char *text = malloc(size + 1);
    fuzz_check(text != NULL, "input copy");
    memcpy(text, data, size);
    text[size] = '\0';
    if (strstr(text, "/dev") || strstr(text, "/proc") || strstr(text, "/sys")) {
        free(text);
        return 0;
    }
    char *nl = strchr(text, '\n');
    const char *body = "";
    if (nl) {
        *nl = '\0';
        body = nl + 1;
    }

    static config_errs errs;
    struct oddsky_config cfg;
    config_errs_init(&errs);
    fuzz_check(config_init_defaults(&cfg) == 0, "defaults");
    int rc = config_load_text(&cfg, body, "fuzz.json", dir, &errs);
    check_errs(&errs, 0, rc);
    unsigned before = config_errs_count(&errs);
    rc = config_apply_set(&cfg, text, &errs);
    check_errs(&errs, before, rc);

    fuzz_check(cfg.kafka.brokers && cfg.kafka.group_id && cfg.input.schema_dir &&
                   cfg.input.writer_schema && cfg.output.avro_schema &&
                   cfg.state.dir && cfg.status.listen && cfg.status.token,
               "strings never NULL");
    before = config_errs_count(&errs);
    rc = config_validate_for(&cfg, (data[0] & 1) ? CONFIG_FOR_DEMO : CONFIG_FOR_RUN,
                             &errs);
    check_errs(&errs, before, rc);
    json_t *j = config_to_json(&cfg);
    fuzz_check(j != NULL && json_is_object(j), "config_to_json gives an object");
    char *dump = json_dumps(j, JSON_COMPACT);
    fuzz_check(dump != NULL, "the JSON dumps");
    free(dump);
    json_decref(j);
    model_params mp;
    (void)config_to_model_params(&cfg, 1 + (data[0] % MODEL_MAX_DIM), &mp);
    FILE *devnull = fopen("/dev/null", "w");
    if (devnull) {
        config_errs_print(&errs, devnull);
        fclose(devnull);
    }
    config_free(&cfg);
    free(text);
    return 0;
}
