/*
 * cmd_demo.c - `oddsky demo` (not built yet).
 */
#include <stdio.h>
#include <sysexits.h>

#include "commands.h"

int cmd_demo(int argc, char **argv)
{
    (void)argc;
    (void)argv;
    fprintf(stderr, "oddsky: 'demo' is not built yet\n");
    return EX_UNAVAILABLE;
}
