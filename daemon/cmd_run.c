/*
 * cmd_run.c - `oddsky run`: the daemon beside the alert stream.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sysexits.h>

#include "commands.h"
#include "config.h"
#include "log.h"
#include "service.h"

#define MAX_SETS 256

static void help(FILE *out)
{
    fprintf(out,
            "usage: oddsky run --config FILE [--set key=value]...\n"
            "\n"
            "Consume the configured input topics, score every alert packet and\n"
            "publish a result per packet to kafka.output_topic (flagged ones also\n"
            "to kafka.flagged_topic when set); undecodable packets go to\n"
            "kafka.dead_letter_topic with the reason in a header.  The model is\n"
            "checkpointed under state.dir every state.checkpoint_interval_s and on\n"
            "shutdown, and restored at start.\n"
            "\n"
            "  --config FILE      the JSON config (see config/oddsky.example.json;\n"
            "                     `oddsky check-config --defaults` lists every option)\n"
            "  --set key=value    override one option (repeatable)\n"
            "  --help             this text\n"
            "\n"
            "signals: SIGTERM/SIGINT drain and stop, SIGHUP reloads live options,\n"
            "         SIGUSR1 writes a checkpoint now\n"
            "exit status: 0 stopped cleanly, 64 bad arguments, 65 unusable\n"
            "checkpoint, 69 Kafka delivery failed for good, 73 cannot create\n"
            "state.dir, 78 bad config\n");
}

int cmd_run(int argc, char **argv)
{
    const char *file = NULL;
    const char *sets[MAX_SETS];
    size_t n_sets = 0;
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i];
        if (!strcmp(a, "--help") || !strcmp(a, "-h")) {
            help(stdout);
            return 0;
        } else if (!strcmp(a, "--config") || !strcmp(a, "-c")) {
            if (i + 1 >= argc) {
                fprintf(stderr, "oddsky run: --config needs a file\n");
                return EX_USAGE;
            }
            file = argv[++i];
        } else if (!strncmp(a, "--config=", 9)) {
            file = a + 9;
        } else if (!strcmp(a, "--set") || !strncmp(a, "--set=", 6)) {
            const char *v = a[5] == '=' ? a + 6 : (i + 1 < argc ? argv[++i] : NULL);
            if (!v || n_sets == MAX_SETS) {
                fprintf(stderr, "oddsky run: --set needs key=value\n");
                return EX_USAGE;
            }
            sets[n_sets++] = v;
        } else {
            fprintf(stderr, "oddsky run: unknown argument '%s' (see oddsky run --help)\n", a);
            return EX_USAGE;
        }
    }
    if (!file) {
        fprintf(stderr, "oddsky run: --config FILE is required (see oddsky run --help)\n");
        return EX_USAGE;
    }
    struct oddsky_config cfg;
    config_errs *errs = malloc(sizeof *errs);
    if (!errs || config_init_defaults(&cfg) != 0) {
        fprintf(stderr, "oddsky run: out of memory\n");
        free(errs);
        return EX_OSERR;
    }
    config_errs_init(errs);
    config_load_file(&cfg, file, errs);
    for (size_t i = 0; i < n_sets; i++)
        config_apply_set(&cfg, sets[i], errs);
    if (config_errs_count(errs) == 0)
        config_validate(&cfg, errs);
    if (config_errs_count(errs) > 0) {
        fprintf(stderr, "oddsky run: %s is not a usable config:\n", file);
        config_errs_print(errs, stderr);
        config_free(&cfg);
        free(errs);
        return EX_CONFIG;
    }
    free(errs);
    log_sink sink;
    log_sink_init(&sink);
    log_sink_set_level(&sink, (log_level)cfg.log.level);
    log_sink_set_format(&sink, (log_format)cfg.log.format);
    service_opts so = {.config_path = file, .sets = sets, .n_sets = n_sets};
    int rc = service_run(&cfg, &sink, &so);
    log_sink_destroy(&sink);
    config_free(&cfg);
    return rc;
}
