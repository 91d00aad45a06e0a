/*
 * cmd_check_config.c - `oddsky check-config` (not built yet).
 */
#include <stdio.h>
#include <sysexits.h>

#include "commands.h"

int cmd_check_config(int argc, char **argv)
{
    (void)argc;
    (void)argv;
    fprintf(stderr, "oddsky: 'check-config' is not built yet\n");
    return EX_UNAVAILABLE;
}
