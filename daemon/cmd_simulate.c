/*
 * cmd_simulate.c - `oddsky simulate` (not built yet).
 */
#include <stdio.h>
#include <sysexits.h>

#include "commands.h"

int cmd_simulate(int argc, char **argv)
{
    (void)argc;
    (void)argv;
    fprintf(stderr, "oddsky: 'simulate' is not built yet\n");
    return EX_UNAVAILABLE;
}
