/*
 * cmd_inspect.c - `oddsky inspect` (not built yet).
 */
#include <stdio.h>
#include <sysexits.h>

#include "commands.h"

int cmd_inspect(int argc, char **argv)
{
    (void)argc;
    (void)argv;
    fprintf(stderr, "oddsky: 'inspect' is not built yet\n");
    return EX_UNAVAILABLE;
}
