/*
 * main.c - argv -> subcommand; nothing else.
 *
 * The command table below is the one list of subcommands: it drives
 * dispatch, `oddsky --help` and `oddsky help <command>`.  Each command
 * parses its own options (see daemon/commands.h) and returns a sysexits.h
 * code, which becomes the process exit status.
 */
#include <stdio.h>
#include <string.h>
#include <sysexits.h>

#include "commands.h"

typedef struct command {
    const char *name;
    int (*fn)(int argc, char **argv);
    const char *summary;
} command;

static const command commands[] = {
    {"run", cmd_run, "run the daemon: Kafka in, scored results out, status endpoint"},
    {"demo", cmd_demo, "embedded test bus + simulator + daemon + live status page"},
    {"replay", cmd_replay, "score packets from files through the same pipeline"},
    {"simulate", cmd_simulate, "write invented demo packets to a topic or a file"},
    {"check-config", cmd_check_config, "validate a config file, or list every option (--defaults)"},
    {"inspect", cmd_inspect, "print what a checkpoint file holds"},
};

#define N_COMMANDS (sizeof commands / sizeof commands[0])

static void usage(FILE *out)
{
    fprintf(out,
            "usage: oddsky <command> [options]\n"
            "\n"
            "Scores every packet of an alert stream for novelty with single-pass\n"
            "models and publishes the results to Kafka.\n"
            "\n"
            "commands:\n");
    for (size_t i = 0; i < N_COMMANDS; i++)
        fprintf(out, "  %-14s %s\n", commands[i].name, commands[i].summary);
    fprintf(out,
            "\n"
            "  oddsky help <command>   options of one command (same as <command> --help)\n"
            "  oddsky --version        print the version\n");
}

static const command *find_command(const char *name)
{
    for (size_t i = 0; i < N_COMMANDS; i++)
        if (strcmp(commands[i].name, name) == 0)
            return &commands[i];
    return NULL;
}

static size_t edit_distance(const char *a, const char *b)
{
    size_t la = strlen(a), lb = strlen(b), row[64];
    if (la >= 64 || lb >= 64)
        return 64;
    for (size_t j = 0; j <= lb; j++)
        row[j] = j;
    for (size_t i = 1; i <= la; i++) {
        size_t diag = row[0];
        row[0] = i;
        for (size_t j = 1; j <= lb; j++) {
            size_t up = row[j], best = diag + (a[i - 1] != b[j - 1]);
            if (up + 1 < best)
                best = up + 1;
            if (row[j - 1] + 1 < best)
                best = row[j - 1] + 1;
            row[j] = best;
            diag = up;
        }
    }
    return row[lb];
}

/* The command closest to what was typed (at most two edits, or a
 * prefix of at least two letters), for the hint. */
static const command *close_command(const char *name)
{
    const command *best = NULL;
    size_t best_d = 3, n = strlen(name);
    for (size_t i = 0; i < N_COMMANDS; i++) {
        size_t d = edit_distance(name, commands[i].name);
        if (n >= 2 && strncmp(commands[i].name, name, n) == 0)
            d = 0;
        if (d < best_d) {
            best_d = d;
            best = &commands[i];
        }
    }
    return best;
}

static int unknown(const char *name)
{
    const command *hint = close_command(name);
    if (hint != NULL)
        fprintf(stderr, "oddsky: unknown command '%s' (did you mean '%s'?)\n", name, hint->name);
    else
        fprintf(stderr, "oddsky: unknown command '%s'\n", name);
    fprintf(stderr, "run 'oddsky --help' for the list of commands\n");
    return EX_USAGE;
}

int main(int argc, char **argv)
{
    const command *c;
    const char *name;

    if (argc < 2) {
        usage(stderr);
        return EX_USAGE;
    }
    name = argv[1];
    if (strcmp(name, "--version") == 0 || strcmp(name, "-V") == 0 ||
        strcmp(name, "version") == 0) {
        printf("oddsky %s\n", ODDSKY_VERSION);
        return 0;
    }
    if (strcmp(name, "--help") == 0 || strcmp(name, "-h") == 0) {
        usage(stdout);
        return 0;
    }
    if (strcmp(name, "help") == 0) {
        char help_flag[] = "--help";
        char *sub_argv[3];
        if (argc < 3) {
            usage(stdout);
            return 0;
        }
        c = find_command(argv[2]);
        if (c == NULL)
            return unknown(argv[2]);
        sub_argv[0] = argv[2];
        sub_argv[1] = help_flag;
        sub_argv[2] = NULL;
        return c->fn(2, sub_argv);
    }
    if (name[0] == '-') {
        fprintf(stderr, "oddsky: unknown option '%s' (options go after the command)\n", name);
        fprintf(stderr, "run 'oddsky --help' for the list of commands\n");
        return EX_USAGE;
    }
    c = find_command(name);
    if (c == NULL)
        return unknown(name);
    return c->fn(argc - 1, argv + 1);
}
