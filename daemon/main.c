/*
 * main.c - argv -> subcommand; nothing else.
 */
#include <stdio.h>
#include <string.h>
#include <sysexits.h>

#define ODDSKY_VERSION "0.1.0"

int main(int argc, char **argv)
{
    if (argc > 1 && strcmp(argv[1], "--version") == 0) {
        printf("oddsky %s\n", ODDSKY_VERSION);
        return 0;
    }
    fprintf(stderr, "usage: oddsky <command> [options]\n");
    return EX_USAGE;
}
