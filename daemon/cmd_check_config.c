/*
 * cmd_check_config.c - `oddsky check-config`: validate a config file the way
 * `run` would load it, listing every error (path: rule), or print every
 * option with its type, default, bounds and help (--defaults).
 *
 * Exit codes: 0 valid, EX_CONFIG (78) invalid, EX_USAGE bad arguments.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sysexits.h>

#include <jansson.h>

#include "commands.h"
#include "config.h"

#define MAX_SETS 256

static void help(FILE *out)
{
    fprintf(out,
            "usage: oddsky check-config [--demo] [--print] [--set key=value]... FILE\n"
            "       oddsky check-config --defaults\n"
            "\n"
            "Validate FILE (JSON; // and /* */ comments allowed) with the overrides,\n"
            "as `oddsky run` would, and list every error as `path: rule`.\n"
            "\n"
            "  --defaults         list every option: type, default, range, live or\n"
            "                     restart-only on SIGHUP, and what it does\n"
            "  --set key=value    override one option (repeatable); lists as a,b,c;\n"
            "                     librdkafka properties as kafka.consumer.<prop>=value\n"
            "  --demo             check as for `oddsky demo` (kafka.brokers,\n"
            "                     kafka.input_topics and featmap not required)\n"
            "  --print            on success, print the effective config as JSON\n"
            "                     (secrets masked)\n"
            "  --help             this text\n"
            "\n"
            "exit status: 0 valid, 78 (EX_CONFIG) invalid, 64 (EX_USAGE) bad arguments\n");
}

static int file_level_error(const config_errs *errs, const char *file)
{
    size_t n = strlen(file);
    for (unsigned i = 0; i < errs->n; i++)
        if (strncmp(errs->e[i].path, file, n) == 0 &&
            (errs->e[i].path[n] == '\0' || errs->e[i].path[n] == ':'))
            return 1;
    return 0;
}

int cmd_check_config(int argc, char **argv)
{
    const char *file = NULL;
    const char *sets[MAX_SETS];
    size_t n_sets = 0;
    int defaults = 0, demo = 0, print = 0;
    struct oddsky_config cfg;
    config_errs *errs;
    int rc;

    for (int i = 1; i < argc; i++) {
        const char *a = argv[i];
        if (strcmp(a, "--help") == 0 || strcmp(a, "-h") == 0) {
            help(stdout);
            return 0;
        } else if (strcmp(a, "--defaults") == 0) {
            defaults = 1;
        } else if (strcmp(a, "--demo") == 0) {
            demo = 1;
        } else if (strcmp(a, "--print") == 0) {
            print = 1;
        } else if (strcmp(a, "--set") == 0 || strncmp(a, "--set=", 6) == 0) {
            const char *v = a[5] == '=' ? a + 6 : (i + 1 < argc ? argv[++i] : NULL);
            if (v == NULL) {
                fprintf(stderr, "oddsky check-config: --set needs key=value\n");
                return EX_USAGE;
            }
            if (n_sets == MAX_SETS) {
                fprintf(stderr, "oddsky check-config: more than %d --set options\n", MAX_SETS);
                return EX_USAGE;
            }
            sets[n_sets++] = v;
        } else if (a[0] == '-' && a[1] != '\0') {
            fprintf(stderr, "oddsky check-config: unknown option '%s' (see --help)\n", a);
            return EX_USAGE;
        } else if (file == NULL) {
            file = a;
        } else {
            fprintf(stderr, "oddsky check-config: one FILE only (got '%s' and '%s')\n", file, a);
            return EX_USAGE;
        }
    }
    if (defaults) {
        if (file != NULL || n_sets > 0) {
            fprintf(stderr, "oddsky check-config: --defaults takes no FILE or --set\n");
            return EX_USAGE;
        }
        config_print_defaults(stdout);
        return 0;
    }
    if (file == NULL) {
        fprintf(stderr, "oddsky check-config: FILE expected (or --defaults; see --help)\n");
        return EX_USAGE;
    }

    errs = malloc(sizeof *errs);
    if (errs == NULL) {
        fprintf(stderr, "oddsky check-config: out of memory\n");
        return EX_OSERR;
    }
    config_errs_init(errs);
    if (config_init_defaults(&cfg) != 0) {
        config_free(&cfg);
        free(errs);
        fprintf(stderr, "oddsky check-config: out of memory\n");
        return EX_OSERR;
    }
    config_load_file(&cfg, file, errs);
    for (size_t i = 0; i < n_sets; i++)
        config_apply_set(&cfg, sets[i], errs);
    /* Cross-field rules run unless the file itself could not be read or
     * parsed (those errors carry the file name as their path); an option
     * that failed its own rule kept its previous value, so they stay fair. */
    if (!file_level_error(errs, file))
        config_validate_for(&cfg, demo ? CONFIG_FOR_DEMO : CONFIG_FOR_RUN, errs);

    if (config_errs_count(errs) > 0) {
        config_errs_print(errs, stderr);
        fprintf(stderr, "%s: %u error%s\n", file, config_errs_count(errs),
                config_errs_count(errs) == 1 ? "" : "s");
        rc = EX_CONFIG;
    } else {
        if (print) {
            json_t *j = config_to_json(&cfg);
            if (j != NULL) {
                json_dumpf(j, stdout, JSON_INDENT(2) | JSON_PRESERVE_ORDER);
                fputc('\n', stdout);
            }
            json_decref(j);
        } else {
            printf("%s: ok\n", file);
        }
        rc = 0;
    }
    config_free(&cfg);
    free(errs);
    return rc;
}
