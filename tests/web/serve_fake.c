/*
 * serve_fake.c - the status server with the fake provider, for the web
 * test (tests/web/run.sh builds and runs it; not part of the daemon).
 *
 *   serve_fake <dump-dir> <port-file>
 *
 * Listens on 127.0.0.1 on an ephemeral port, writes the port to
 * <port-file>, writes every served /status document into <dump-dir>, and
 * runs until SIGTERM or SIGINT.
 */
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>

#include "daemon/status.h"
#include "tests/web/fake_provider.h"

static status_server *srv;
static uv_signal_t sig_term, sig_int;

static void on_signal(uv_signal_t *s, int signum)
{
    (void)s;
    (void)signum;
    status_server_close(srv, NULL, NULL);
    uv_close((uv_handle_t *)&sig_term, NULL);
    uv_close((uv_handle_t *)&sig_int, NULL);
}

int main(int argc, char **argv)
{
    if (argc != 3) {
        fprintf(stderr, "usage: serve_fake <dump-dir> <port-file>\n");
        return 2;
    }
    fake_status fake;
    if (fake_status_init(&fake) != 0)
        return 1;
    fake.dump_dir = argv[1];
    /* Ten minutes of invented history before the first request, so that
     * rates and quantiles have windows to work on. */
    fake_status_advance(&fake, 600);
    status_provider prov = fake_status_provider(&fake);
    status_options opt;
    status_options_default(&opt);
    opt.token = "web-test-token";
    char err[256];
    uv_loop_t *loop = uv_default_loop();
    srv = status_server_start(loop, &opt, &prov, err, sizeof err);
    if (!srv) {
        fprintf(stderr, "%s\n", err);
        return 1;
    }
    FILE *fp = fopen(argv[2], "w");
    if (!fp)
        return 1;
    fprintf(fp, "%d\n", status_server_port(srv));
    fclose(fp);
    uv_signal_init(loop, &sig_term);
    uv_signal_start(&sig_term, on_signal, SIGTERM);
    uv_signal_init(loop, &sig_int);
    uv_signal_start(&sig_int, on_signal, SIGINT);
    uv_run(loop, UV_RUN_DEFAULT);
    uv_loop_close(loop);
    fake_status_free(&fake);
    return 0;
}
