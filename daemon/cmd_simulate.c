/*
 * cmd_simulate.c - `oddsky simulate`: packets of the invented demo survey
 * (daemon/sim.h) to a file or a Kafka topic.
 *
 * A file gets JSON lines or one Avro object container holding every
 * packet (blocks of up to 4096 packets); a topic gets one message per
 * packet in the chosen framing, keyed by the source id, from an idempotent
 * librdkafka producer.  Packets are produced in event-time order; --rate
 * paces them in wall-clock time (0 = as fast as possible).  SIGINT and
 * SIGTERM stop the generation; what was produced is flushed and counted.
 */
#include <errno.h>
#include <getopt.h>
#include <inttypes.h>
#include <librdkafka/rdkafka.h>
#include <math.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sysexits.h>
#include <time.h>
#include <unistd.h>

#include "commands.h"
#include "sim.h"

typedef enum sim_format {
    FMT_JSON,
    FMT_CONTAINER,
    FMT_SCHEMA_ID,
    FMT_BARE
} sim_format;

static const char *const format_names[] = {"json", "avro-container",
                                           "avro-schema-id", "avro-bare"};

typedef struct sim_opts {
    sim_params params;
    uint64_t count;
    double rate_per_s;
    sim_format format;
    const char *output;
    const char *brokers;
    const char *topic;
    uint32_t schema_id;
} sim_opts;

typedef struct kafka_out {
    rd_kafka_t *rk;
    volatile int quiet;  /* while probing: our own message says it all */
    uint64_t delivered, failed;
    char first_error[256];
} kafka_out;

static volatile sig_atomic_t simulate_stop;

static void on_signal(int sig)
{
    (void)sig;
    simulate_stop = 1;
}

static void usage(FILE *out)
{
    sim_params d;
    sim_params_default(&d);
    fprintf(out,
        "usage: oddsky simulate [options]\n"
        "\n"
        "Writes packets of the invented oddsky demo survey, in event-time order,\n"
        "to a file or a Kafka topic.  The schema is\n"
        "config/schemas/oddsky-demo-packet.avsc (record oddsky.demo.Packet); the\n"
        "feature map for it is config/demo-featmap.json.  Each packet carries up to\n"
        "%u earlier detections of its source from the last %.0f days and, for\n"
        "evaluation only, the population it was drawn from (field `truth`).\n"
        "\n"
        "options:\n"
        "  --seed N          generator seed (default %" PRIu64 "); same seed, same bytes\n"
        "  --count N         packets to write (default 10000; 0 = until interrupted)\n"
        "  --rate PER_S      packets per second of wall-clock time (default 0 = as\n"
        "                    fast as possible)\n"
        "  --burst N         source slots per field, about the packets per visit\n"
        "                    (default %u)\n"
        "  --fields N        fields on the sky (default %u); a field is visited twice\n"
        "                    a night every 2-4 nights\n"
        "  --history N       most past detections per packet, 1..64 (default %u)\n"
        "  --rare-rate F     fraction of packets from EACH of the three rare\n"
        "                    populations (fast blue, fast red, slow riser; default %g)\n"
        "  --start-mjd X     evening of the first night written, MJD (default %.1f)\n"
        "  --burn-in-nights N  nights the survey runs, unwritten, before that\n"
        "                    (default %u, the history horizon), so the first packets\n"
        "                    already carry full histories and prior limits; 0 = the\n"
        "                    survey starts with the first packet\n"
        "  --format F        json | avro-container | avro-schema-id | avro-bare\n"
        "                    (default json)\n"
        "  --output FILE     write to FILE ('-' = stdout, the default): JSON lines, or\n"
        "                    with avro-container one container file of all packets\n"
        "  --brokers H:P     Kafka bootstrap servers (instead of --output)\n"
        "  --topic NAME      Kafka topic (with --brokers); one message per packet,\n"
        "                    key = source id, in the chosen framing\n"
        "  --schema-id N     id written by avro-schema-id framing (default 1)\n"
        "  -h, --help        this text\n"
        "\n"
        "Framings on a topic: json = one JSON object; avro-container = a complete\n"
        "Avro object container holding one packet; avro-schema-id = byte 0, the\n"
        "4-byte big-endian schema id, then the bare Avro datum; avro-bare = the\n"
        "datum alone (the daemon then needs the writer schema named in its config).\n"
        "For avro-schema-id, copy config/schemas/oddsky-demo-packet.avsc into the\n"
        "daemon's schema_dir as <id>.avsc (1.avsc with the default --schema-id).\n"
        "\n"
        "A summary line (packets per population) goes to stderr at the end, with\n"
        "progress while stderr is a terminal.  Exit status: 0 done, 64 bad usage,\n"
        "73 cannot create the output, 74 write error, 69 Kafka unreachable or a\n"
        "message not delivered.\n"
        "\n"
        "examples:\n"
        "  oddsky simulate --count 100000 --output night.jsonl\n"
        "  oddsky simulate --count 1000000 --format avro-container --output n.avro\n"
        "  oddsky simulate --brokers 127.0.0.1:9092 --topic demo-in --rate 2000\n",
        d.history_max, d.history_days, d.seed, d.burst, d.n_fields,
        d.history_max, d.rare_rate[0], d.start_mjd, d.burn_in_nights);
}

static int bad_value(const char *opt, const char *val, const char *what)
{
    fprintf(stderr, "oddsky simulate: %s '%s': %s (see --help)\n", opt, val, what);
    return EX_USAGE;
}

static int parse_u64(const char *s, uint64_t max, uint64_t *out)
{
    char *end;
    if (!*s || *s == '-' || *s == '+')
        return -1;
    errno = 0;
    unsigned long long v = strtoull(s, &end, 10);
    if (errno || *end || v > max)
        return -1;
    *out = v;
    return 0;
}

static int parse_dbl(const char *s, double lo, double hi, double *out)
{
    char *end;
    errno = 0;
    double v = strtod(s, &end);
    if (!*s || errno || *end || !isfinite(v) || v < lo || v > hi)
        return -1;
    *out = v;
    return 0;
}

static int parse_args(int argc, char **argv, sim_opts *o, int *done)
{
    enum { O_SEED = 1000, O_COUNT, O_RATE, O_BURST, O_FIELDS, O_HISTORY,
           O_RARE, O_START, O_FORMAT, O_OUTPUT, O_BROKERS, O_TOPIC, O_SCHEMA,
           O_BURN_IN };
    static const struct option longopts[] = {
        {"seed", required_argument, 0, O_SEED},
        {"count", required_argument, 0, O_COUNT},
        {"rate", required_argument, 0, O_RATE},
        {"burst", required_argument, 0, O_BURST},
        {"fields", required_argument, 0, O_FIELDS},
        {"history", required_argument, 0, O_HISTORY},
        {"rare-rate", required_argument, 0, O_RARE},
        {"start-mjd", required_argument, 0, O_START},
        {"format", required_argument, 0, O_FORMAT},
        {"output", required_argument, 0, O_OUTPUT},
        {"brokers", required_argument, 0, O_BROKERS},
        {"topic", required_argument, 0, O_TOPIC},
        {"schema-id", required_argument, 0, O_SCHEMA},
        {"burn-in-nights", required_argument, 0, O_BURN_IN},
        {"help", no_argument, 0, 'h'},
        {0, 0, 0, 0}};
    uint64_t u;
    double x;
    *done = 0;
    optind = 1;
    opterr = 0;
    for (;;) {
        int li = 0;
        int c = getopt_long(argc, argv, ":h", longopts, &li);
        if (c == -1)
            break;
        const char *name = c >= O_SEED ? longopts[c - O_SEED].name : "";
        char flag[48];
        snprintf(flag, sizeof flag, "--%s", name);
        switch (c) {
        case 'h':
            usage(stdout);
            *done = 1;
            return 0;
        case O_SEED:
            if (parse_u64(optarg, UINT64_MAX, &u))
                return bad_value(flag, optarg, "not a non-negative integer");
            o->params.seed = u;
            break;
        case O_COUNT:
            if (parse_u64(optarg, UINT64_MAX, &u))
                return bad_value(flag, optarg, "not a non-negative integer");
            o->count = u;
            break;
        case O_RATE:
            if (parse_dbl(optarg, 0.0, 1e9, &x))
                return bad_value(flag, optarg, "not a rate in [0, 1e9] per second");
            o->rate_per_s = x;
            break;
        case O_BURST:
            if (parse_u64(optarg, 10000, &u) || u < 1)
                return bad_value(flag, optarg, "not an integer in [1, 10000]");
            o->params.burst = (unsigned)u;
            break;
        case O_FIELDS:
            if (parse_u64(optarg, 100000, &u) || u < 1)
                return bad_value(flag, optarg, "not an integer in [1, 100000]");
            o->params.n_fields = (unsigned)u;
            break;
        case O_HISTORY:
            if (parse_u64(optarg, SIM_HISTORY_CAP, &u) || u < 1)
                return bad_value(flag, optarg, "not an integer in [1, 64]");
            o->params.history_max = (unsigned)u;
            break;
        case O_RARE:
            if (parse_dbl(optarg, 0.0, 0.3, &x))
                return bad_value(flag, optarg, "not a fraction in [0, 0.3]");
            for (unsigned i = 0; i < SIM_N_RARE; i++)
                o->params.rare_rate[i] = x;
            break;
        case O_START:
            if (parse_dbl(optarg, 0.0, 999999.0, &x))
                return bad_value(flag, optarg, "not an MJD in [0, 999999]");
            o->params.start_mjd = x;
            break;
        case O_BURN_IN:
            if (parse_u64(optarg, 1000, &u))
                return bad_value(flag, optarg, "not an integer in [0, 1000]");
            o->params.burn_in_nights = (unsigned)u;
            break;
        case O_FORMAT: {
            int found = -1;
            for (int i = 0; i < 4; i++)
                if (strcmp(optarg, format_names[i]) == 0)
                    found = i;
            if (found < 0)
                return bad_value(flag, optarg,
                                 "expected json, avro-container, avro-schema-id or avro-bare");
            o->format = (sim_format)found;
            break;
        }
        case O_OUTPUT: o->output = optarg; break;
        case O_BROKERS: o->brokers = optarg; break;
        case O_TOPIC: o->topic = optarg; break;
        case O_SCHEMA:
            if (parse_u64(optarg, UINT32_MAX, &u))
                return bad_value(flag, optarg, "not an integer in [0, 4294967295]");
            o->schema_id = (uint32_t)u;
            break;
        case ':':
            fprintf(stderr, "oddsky simulate: %s needs a value (see --help)\n",
                    argv[optind - 1]);
            return EX_USAGE;
        default:
            fprintf(stderr, "oddsky simulate: unknown option '%s' (see --help)\n",
                    argv[optind - 1]);
            return EX_USAGE;
        }
    }
    if (optind < argc) {
        fprintf(stderr, "oddsky simulate: unexpected argument '%s' (see --help)\n",
                argv[optind]);
        return EX_USAGE;
    }
    if (o->brokers && o->output) {
        fprintf(stderr, "oddsky simulate: give --output or --brokers, not both\n");
        return EX_USAGE;
    }
    if (!!o->brokers != !!o->topic) {
        fprintf(stderr, "oddsky simulate: --brokers and --topic go together\n");
        return EX_USAGE;
    }
    if (!o->brokers && (o->format == FMT_SCHEMA_ID || o->format == FMT_BARE)) {
        fprintf(stderr,
                "oddsky simulate: --format %s frames Kafka messages; a file takes "
                "json or avro-container\n", format_names[o->format]);
        return EX_USAGE;
    }
    char err[160];
    if (sim_params_check(&o->params, err, sizeof err) != 0) {
        fprintf(stderr, "oddsky simulate: %s\n", err);
        return EX_USAGE;
    }
    return 0;
}

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

static void pace(double t0, uint64_t n, double rate)
{
    double due = t0 + (double)n / rate, wait = due - now_s();
    if (wait > 0) {
        struct timespec ts = {(time_t)wait, (long)((wait - floor(wait)) * 1e9)};
        nanosleep(&ts, NULL);
    }
}

/* ---- Kafka ---------------------------------------------------------------- */

static void on_delivery(rd_kafka_t *rk, const rd_kafka_message_t *m, void *opaque)
{
    (void)rk;
    kafka_out *k = opaque;
    if (m->err) {
        if (k->failed++ == 0)
            snprintf(k->first_error, sizeof k->first_error, "%s",
                     rd_kafka_err2str(m->err));
    } else {
        k->delivered++;
    }
}

static void on_log(const rd_kafka_t *rk, int level, const char *fac, const char *buf)
{
    kafka_out *k = rd_kafka_opaque(rk);
    if (level <= 4 && !(k && k->quiet))
        fprintf(stderr, "oddsky simulate: kafka %s: %s\n", fac, buf);
}

static int kafka_open(kafka_out *k, const sim_opts *o)
{
    char errstr[512];
    rd_kafka_conf_t *conf = rd_kafka_conf_new();
    struct { const char *key, *val; } props[] = {
        {"bootstrap.servers", o->brokers},
        {"enable.idempotence", "true"},
        {"linger.ms", "20"},
        {"message.timeout.ms", "60000"},
        {"client.id", "oddsky-simulate"},
    };
    for (size_t i = 0; i < sizeof props / sizeof props[0]; i++) {
        if (rd_kafka_conf_set(conf, props[i].key, props[i].val, errstr,
                              sizeof errstr) != RD_KAFKA_CONF_OK) {
            fprintf(stderr, "oddsky simulate: Kafka setting %s: %s\n",
                    props[i].key, errstr);
            rd_kafka_conf_destroy(conf);
            return EX_USAGE;
        }
    }
    rd_kafka_conf_set_dr_msg_cb(conf, on_delivery);
    rd_kafka_conf_set_opaque(conf, k);
    rd_kafka_conf_set_log_cb(conf, on_log);
    k->quiet = 1;
    k->rk = rd_kafka_new(RD_KAFKA_PRODUCER, conf, errstr, sizeof errstr);
    if (!k->rk) {
        fprintf(stderr, "oddsky simulate: cannot create a Kafka producer: %s\n", errstr);
        rd_kafka_conf_destroy(conf);
        return EX_SOFTWARE;
    }
    /* Fail early and clearly when no broker answers. */
    const struct rd_kafka_metadata *md = NULL;
    rd_kafka_resp_err_t err = rd_kafka_metadata(k->rk, 0, NULL, &md, 10000);
    if (err) {
        fprintf(stderr, "oddsky simulate: no Kafka broker answered at %s within "
                "10 s: %s\n", o->brokers, rd_kafka_err2str(err));
        rd_kafka_destroy(k->rk);
        k->rk = NULL;
        return EX_UNAVAILABLE;
    }
    rd_kafka_metadata_destroy(md);
    k->quiet = 0;
    return 0;
}

static int kafka_send(kafka_out *k, const char *topic, const sim_packet *p,
                      const void *data, size_t len)
{
    char key[24];
    int kl = snprintf(key, sizeof key, "%" PRId64, p->source_id);
    for (;;) {
        rd_kafka_resp_err_t err = rd_kafka_producev(
            k->rk, RD_KAFKA_V_TOPIC(topic), RD_KAFKA_V_KEY(key, (size_t)kl),
            RD_KAFKA_V_VALUE((void *)data, len),
            RD_KAFKA_V_MSGFLAGS(RD_KAFKA_MSG_F_COPY), RD_KAFKA_V_END);
        if (!err)
            break;
        if (err != RD_KAFKA_RESP_ERR__QUEUE_FULL) {
            fprintf(stderr, "oddsky simulate: cannot produce to %s: %s\n", topic,
                    rd_kafka_err2str(err));
            return EX_UNAVAILABLE;
        }
        rd_kafka_poll(k->rk, 50);
    }
    rd_kafka_poll(k->rk, 0);
    return 0;
}

static int kafka_close(kafka_out *k, uint64_t produced)
{
    int rc = 0;
    rd_kafka_resp_err_t err = rd_kafka_flush(k->rk, 90000);
    if (err || rd_kafka_outq_len(k->rk) > 0) {
        fprintf(stderr, "oddsky simulate: %d messages still undelivered after 90 s\n",
                rd_kafka_outq_len(k->rk));
        rc = EX_UNAVAILABLE;
    }
    if (k->failed) {
        fprintf(stderr, "oddsky simulate: %" PRIu64 " of %" PRIu64
                " messages not delivered (first error: %s)\n",
                k->failed, produced, k->first_error);
        rc = EX_UNAVAILABLE;
    }
    rd_kafka_destroy(k->rk);
    k->rk = NULL;
    return rc;
}

/* ---- the loop ------------------------------------------------------------- */

#define BLOCK_CAP (1u << 20)
#define BLOCK_MAX_COUNT 4096

typedef struct file_out {
    FILE *f;
    int is_stdout;
    uint8_t *block, *framed;
    size_t block_len;
    long block_count;
} file_out;

static int flush_block(file_out *fo, const uint8_t sync[16])
{
    if (fo->block_count == 0)
        return 0;
    int n = sim_container_block(fo->block_count, fo->block, fo->block_len, sync,
                                fo->framed, BLOCK_CAP + 64);
    if (n < 0 || fwrite(fo->framed, 1, (size_t)n, fo->f) != (size_t)n)
        return -1;
    fo->block_len = 0;
    fo->block_count = 0;
    return 0;
}

static void summary(const sim_opts *o, const sim *s, const uint64_t *per_pop,
                    uint64_t n, double secs, int interrupted)
{
    char line[1024];
    size_t at = 0;
    at += (size_t)snprintf(line + at, sizeof line - at,
                           "simulate: %" PRIu64 " packets%s in %.2f s (%.0f/s), "
                           "%u nights from MJD %.1f, %s to %s%s:",
                           n, interrupted ? " (interrupted)" : "", secs,
                           secs > 0 ? n / secs : 0.0, sim_night(s) + 1,
                           o->params.start_mjd, format_names[o->format],
                           o->topic ? o->topic : (o->output ? o->output : "stdout"),
                           o->topic ? " (Kafka)" : "");
    for (int i = 0; i < (int)SIM_POP_COUNT_ && at < sizeof line; i++)
        at += (size_t)snprintf(line + at, sizeof line - at, " %s %" PRIu64,
                               sim_pop_name(i), per_pop[i]);
    fprintf(stderr, "%s\n", line);
}

int cmd_simulate(int argc, char **argv)
{
    sim_opts o;
    memset(&o, 0, sizeof o);
    sim_params_default(&o.params);
    o.count = 10000;
    o.format = FMT_JSON;
    o.schema_id = 1;
    int done = 0;
    int rc = parse_args(argc, argv, &o, &done);
    if (rc || done)
        return rc;

    file_out fo = {0};
    kafka_out ko = {0};
    if (!o.brokers) {
        if (!o.output || strcmp(o.output, "-") == 0) {
            if (o.format != FMT_JSON && isatty(STDOUT_FILENO)) {
                fprintf(stderr, "oddsky simulate: not writing binary Avro to a "
                        "terminal; use --output FILE\n");
                return EX_USAGE;
            }
            fo.f = stdout;
            fo.is_stdout = 1;
        } else {
            fo.f = fopen(o.output, "wb");
            if (!fo.f) {
                fprintf(stderr, "oddsky simulate: cannot create %s: %s\n", o.output,
                        strerror(errno));
                return EX_CANTCREAT;
            }
        }
        setvbuf(fo.f, NULL, _IOFBF, 1u << 20);
    }

    char err[160];
    sim *s = sim_new(&o.params, err, sizeof err);
    uint8_t *buf = malloc(SIM_CONTAINER_MAX + SIM_JSON_MAX);
    if (o.format == FMT_CONTAINER && !o.brokers) {
        fo.block = malloc(BLOCK_CAP);
        fo.framed = malloc(BLOCK_CAP + 64);
    }
    if (!s || !buf || (o.format == FMT_CONTAINER && !o.brokers &&
                       (!fo.block || !fo.framed))) {
        fprintf(stderr, "oddsky simulate: %s\n", s ? "out of memory" : err);
        rc = EX_OSERR;
        goto out;
    }
    if (o.brokers && (rc = kafka_open(&ko, &o)) != 0)
        goto out;

    uint8_t sync[16];
    sim_sync_marker(o.params.seed, sync);
    if (o.format == FMT_CONTAINER && !o.brokers) {
        int n = sim_container_header(sync, buf, SIM_CONTAINER_MAX);
        if (n < 0 || fwrite(buf, 1, (size_t)n, fo.f) != (size_t)n)
            goto write_error;
    }

    struct sigaction sa;
    memset(&sa, 0, sizeof sa);
    sa.sa_handler = on_signal;
    sigemptyset(&sa.sa_mask);
    struct sigaction old_int, old_term;
    sigaction(SIGINT, &sa, &old_int);
    sigaction(SIGTERM, &sa, &old_term);
    simulate_stop = 0;

    int progress = isatty(STDERR_FILENO);
    uint64_t per_pop[SIM_POP_COUNT_] = {0};
    static sim_packet p;  /* 2 KB; kept off the stack */
    double t0 = now_s(), last_progress = t0;
    uint64_t n = 0;
    while ((o.count == 0 || n < o.count) && !simulate_stop) {
        if (o.rate_per_s > 0)
            pace(t0, n, o.rate_per_s);
        sim_next(s, &p);
        int len;
        switch (o.format) {
        case FMT_JSON:
            len = sim_encode_json(&p, (char *)buf, SIM_JSON_MAX);
            if (len >= 0 && !o.brokers)
                buf[len++] = '\n';
            break;
        case FMT_CONTAINER:
            if (o.brokers) {
                len = sim_encode_container(&p, sync, buf, SIM_CONTAINER_MAX);
                break;
            }
            if (fo.block_len + SIM_AVRO_MAX > BLOCK_CAP ||
                fo.block_count >= BLOCK_MAX_COUNT)
                if (flush_block(&fo, sync) != 0)
                    goto write_error_sig;
            len = sim_encode_avro(&p, fo.block + fo.block_len, SIM_AVRO_MAX);
            if (len >= 0) {
                fo.block_len += (size_t)len;
                fo.block_count++;
            }
            break;
        case FMT_SCHEMA_ID:
            len = sim_encode_schema_id(&p, o.schema_id, buf, SIM_AVRO_MAX + 5);
            break;
        default:
            len = sim_encode_avro(&p, buf, SIM_AVRO_MAX);
            break;
        }
        if (len < 0) {
            fprintf(stderr, "oddsky simulate: packet %" PRId64 " does not encode\n",
                    p.packet_id);
            rc = EX_SOFTWARE;
            goto restore;
        }
        if (o.brokers) {
            if ((rc = kafka_send(&ko, o.topic, &p, buf, (size_t)len)) != 0)
                goto restore;
        } else if (!(o.format == FMT_CONTAINER)) {
            if (fwrite(buf, 1, (size_t)len, fo.f) != (size_t)len)
                goto write_error_sig;
        }
        per_pop[p.truth]++;
        n++;
        if (progress && (n & 1023) == 0) {
            double t = now_s();
            if (t - last_progress >= 0.25) {
                last_progress = t;
                fprintf(stderr, "\rsimulate: %" PRIu64 " packets (%.0f/s), night %u   ",
                        n, n / (t - t0), sim_night(s) + 1);
            }
        }
    }
    if (o.format == FMT_CONTAINER && !o.brokers && flush_block(&fo, sync) != 0)
        goto write_error_sig;
    if (progress)
        fprintf(stderr, "\r%60s\r", "");
    if (o.brokers) {
        rc = kafka_close(&ko, n);
    } else if (fflush(fo.f) != 0) {
        goto write_error_sig;
    }
    summary(&o, s, per_pop, n, now_s() - t0, simulate_stop);
    goto restore;

write_error_sig:
    sigaction(SIGINT, &old_int, NULL);
    sigaction(SIGTERM, &old_term, NULL);
write_error:
    fprintf(stderr, "oddsky simulate: write to %s failed: %s\n",
            fo.is_stdout ? "stdout" : o.output, strerror(errno));
    rc = EX_IOERR;
    goto out;
restore:
    sigaction(SIGINT, &old_int, NULL);
    sigaction(SIGTERM, &old_term, NULL);
out:
    if (ko.rk)
        rd_kafka_destroy(ko.rk);
    if (fo.f && !fo.is_stdout && fclose(fo.f) != 0 && rc == 0) {
        fprintf(stderr, "oddsky simulate: closing %s failed: %s\n", o.output,
                strerror(errno));
        rc = EX_IOERR;
    }
    free(fo.block);
    free(fo.framed);
    free(buf);
    sim_free(s);
    return rc;
}
