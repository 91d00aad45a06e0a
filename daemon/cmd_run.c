/*
 * cmd_run.c - `oddsky run` (not built yet).
 */
#include <stdio.h>
#include <sysexits.h>

#include "commands.h"

int cmd_run(int argc, char **argv)
{
    (void)argc;
    (void)argv;
    fprintf(stderr, "oddsky: 'run' is not built yet\n");
    return EX_UNAVAILABLE;
}
