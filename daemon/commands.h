/*
 * commands.h - one entry point per subcommand, each in its own file
 * (daemon/cmd_<name>.c).  Each takes the arguments after the subcommand
 * name (argv[0] is the subcommand itself) and returns a sysexits.h code.
 */
#ifndef ODDSKY_DAEMON_COMMANDS_H
#define ODDSKY_DAEMON_COMMANDS_H

#define ODDSKY_VERSION "0.1.0"

int cmd_run(int argc, char **argv);
int cmd_demo(int argc, char **argv);
int cmd_replay(int argc, char **argv);
int cmd_simulate(int argc, char **argv);
int cmd_check_config(int argc, char **argv);
int cmd_inspect(int argc, char **argv);

#endif
