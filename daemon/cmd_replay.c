/*
 * cmd_replay.c - `oddsky replay` (not built yet).
 */
#include <stdio.h>
#include <sysexits.h>

#include "commands.h"

int cmd_replay(int argc, char **argv)
{
    (void)argc;
    (void)argv;
    fprintf(stderr, "oddsky: 'replay' is not built yet\n");
    return EX_UNAVAILABLE;
}
