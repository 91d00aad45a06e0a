/*
 * cmd_demo.c - `oddsky demo`: the whole job on one machine, nothing else
 * installed: an in-memory Kafka cluster, the simulated survey feeding it,
 * the daemon scoring it and the status page showing it.
 */
#include <errno.h>
#include <jansson.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sysexits.h>
#include <unistd.h>

#include "commands.h"
#include "config.h"
#include "demo_assets.h"
#include "embedded.h"
#include "log.h"
#include "service.h"
#include "sim.h"

#define MAX_SETS 256
#define DEMO_IN "oddsky-demo-packets"
#define DEMO_OUT "oddsky-results"
#define DEMO_FLAGGED "oddsky-flagged"
#define DEMO_DEAD "oddsky-dead-letters"

static void help(FILE *out)
{
    fprintf(out,
            "usage: oddsky demo [--port N] [--rate N] [--count N] [--seed N]\n"
            "                   [--rare-rate F] [--set key=value]...\n"
            "\n"
            "Start an in-memory Kafka cluster (librdkafka's mock cluster: for\n"
            "trying oddsky only, nothing is kept), feed it simulated alert packets\n"
            "of an invented survey, run the daemon on them and serve the status\n"
            "page.  Ctrl-C stops everything.\n"
            "\n"
            "  --port N        status page port (default 8787; 0 = any free port)\n"
            "  --rate N        simulated packets per second (default 2000)\n"
            "  --count N       stop feeding after N packets (default 0 = never)\n"
            "  --seed N        simulator seed (default 1)\n"
            "  --rare-rate F   share of each rare population (default 0.002)\n"
            "  --set key=value any daemon option (see oddsky check-config --defaults)\n"
            "  --help          this text\n");
}

typedef struct demo {
    embedded *e;
    const char *bootstraps;
} demo;

static void started(void *arg, int port)
{
    demo *d = arg;
    fprintf(stderr,
            "\n"
            "  oddsky demo is running (embedded in-memory Kafka: for trying the tool only)\n"
            "\n"
            "  status page   http://127.0.0.1:%d/\n"
            "  status JSON   curl -s http://127.0.0.1:%d/status\n"
            "  bootstrap     %s\n"
            "  watch results kcat -b %s -C -t " DEMO_OUT " -o end\n"
            "  flagged only  kcat -b %s -C -t " DEMO_FLAGGED " -o end\n"
            "\n"
            "  Flags are candidates for a person to look at, not classifications.\n"
            "  Press Ctrl-C to stop.\n\n",
            port, port, d->bootstraps, d->bootstraps, d->bootstraps);
}

int cmd_demo(int argc, char **argv)
{
    const char *sets[MAX_SETS];
    size_t n_sets = 0;
    long port = 8787;
    double rate = 2000, rare = 0.002;
    unsigned long long seed = 1, count = 0;
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i];
        const char *v = i + 1 < argc ? argv[i + 1] : NULL;
        char *end = NULL;
        if (!strcmp(a, "--help") || !strcmp(a, "-h")) {
            help(stdout);
            return 0;
        } else if (!strcmp(a, "--port") && v) {
            port = strtol(v, &end, 10);
            i++;
            if (*end || port < 0 || port > 65535) {
                fprintf(stderr, "oddsky demo: --port must be 0..65535\n");
                return EX_USAGE;
            }
        } else if (!strcmp(a, "--rate") && v) {
            rate = strtod(v, &end);
            i++;
            if (*end || !(rate >= 0)) {
                fprintf(stderr, "oddsky demo: --rate must be a number >= 0\n");
                return EX_USAGE;
            }
        } else if (!strcmp(a, "--rare-rate") && v) {
            rare = strtod(v, &end);
            i++;
            if (*end || !(rare >= 0 && rare <= 0.1)) {
                fprintf(stderr, "oddsky demo: --rare-rate must be between 0 and 0.1\n");
                return EX_USAGE;
            }
        } else if (!strcmp(a, "--count") && v) {
            count = strtoull(v, &end, 10);
            i++;
            if (*end) {
                fprintf(stderr, "oddsky demo: --count must be an integer\n");
                return EX_USAGE;
            }
        } else if (!strcmp(a, "--seed") && v) {
            seed = strtoull(v, &end, 10);
            i++;
            if (*end) {
                fprintf(stderr, "oddsky demo: --seed must be an integer\n");
                return EX_USAGE;
            }
        } else if ((!strcmp(a, "--set") && v) || !strncmp(a, "--set=", 6)) {
            if (n_sets == MAX_SETS)
                return EX_USAGE;
            sets[n_sets++] = a[5] == '=' ? a + 6 : argv[++i];
        } else {
            fprintf(stderr, "oddsky demo: unknown argument '%s' (see oddsky demo --help)\n", a);
            return EX_USAGE;
        }
    }

    embedded_topic topics[] = {
        {DEMO_IN, 4}, {DEMO_OUT, 4}, {DEMO_FLAGGED, 1}, {DEMO_DEAD, 1}};
    char err[512];
    embedded *e = embedded_start(1, topics, 4, err, sizeof err);
    if (!e) {
        fprintf(stderr, "oddsky demo: %s\n", err);
        return EX_SOFTWARE;
    }
    demo d = {.e = e, .bootstraps = embedded_bootstraps(e)};

    char state_dir[] = "/tmp/oddsky-demo-XXXXXX";
    if (!mkdtemp(state_dir)) {
        perror("oddsky demo: mkdtemp");
        embedded_stop(e);
        return EX_CANTCREAT;
    }
    /* The feeder frames packets with a schema id (byte 0, a 4-byte id,
     * bare Avro): a container per message would carry the schema text in
     * every message, and the in-memory bus keeps only a few megabytes per
     * partition.  The schema goes next to the checkpoint. */
    char schema_path[sizeof state_dir + 32];
    snprintf(schema_path, sizeof schema_path, "%s/%u.avsc", state_dir,
             (unsigned)EMBEDDED_SCHEMA_ID);
    FILE *sf = NULL;
    if (!(sf = fopen(schema_path, "w")) ||
        fputs(sim_schema_json(), sf) < 0 || fclose(sf) != 0) {
        fprintf(stderr, "oddsky demo: cannot write %s: %s\n", schema_path,
                strerror(errno));
        embedded_stop(e);
        return EX_CANTCREAT;
    }
    struct oddsky_config cfg;
    config_errs *errs = calloc(1, sizeof *errs);
    config_init_defaults(&cfg);
    config_errs_init(errs);
    char text[2048];
    snprintf(text, sizeof text,
             "{\"kafka\": {\"brokers\": \"%s\", \"input_topics\": [\"" DEMO_IN "\"],"
             " \"output_topic\": \"" DEMO_OUT "\", \"flagged_topic\": \"" DEMO_FLAGGED "\","
             " \"dead_letter_topic\": \"" DEMO_DEAD "\", \"group_id\": \"oddsky-demo\"},"
             " \"input\": {\"schema_dir\": \"%s\"},"
             " \"state\": {\"dir\": \"%s\", \"checkpoint_interval_s\": 30},"
             " \"status\": {\"port\": %ld}}",
             d.bootstraps, state_dir, state_dir, port);
    config_load_text(&cfg, text, "demo", NULL, errs);
    char fm[1 << 16];
    snprintf(fm, sizeof fm, "featmap=%s", demo_featmap_json);
    config_apply_set(&cfg, fm, errs);
    for (size_t i = 0; i < n_sets; i++)
        config_apply_set(&cfg, sets[i], errs);
    if (config_errs_count(errs) == 0)
        config_validate(&cfg, errs);
    if (config_errs_count(errs) > 0) {
        fprintf(stderr, "oddsky demo: the demo config is not usable:\n");
        config_errs_print(errs, stderr);
        free(errs);
        config_free(&cfg);
        embedded_stop(e);
        return EX_CONFIG;
    }
    free(errs);
    if (embedded_feed_start(e, DEMO_IN, rate, count, seed, rare, err, sizeof err) != 0) {
        fprintf(stderr, "oddsky demo: %s\n", err);
        config_free(&cfg);
        embedded_stop(e);
        return EX_SOFTWARE;
    }
    log_sink sink;
    log_sink_init(&sink);
    log_sink_set_level(&sink, (log_level)cfg.log.level);
    service_opts so = {.on_started = started, .arg = &d,
                       .status_any_port = port == 0};
    int rc = service_run(&cfg, &sink, &so);
    fprintf(stderr, "oddsky demo: fed %llu simulated packets; checkpoint left in %s\n",
            (unsigned long long)embedded_fed(e), state_dir);
    log_sink_destroy(&sink);
    config_free(&cfg);
    embedded_stop(e);
    return rc;
}
