/*
 * livepage.h - the live status page served at GET /.
 *
 * One self-contained HTML document (inline CSS and JavaScript, charts drawn
 * by hand in SVG, no external assets) that polls /status every 2.5 s and
 * keeps short time series in the page.  The source is daemon/livepage.html;
 * daemon/livepage.c is generated from it by daemon/livepage_gen.py and
 * committed beside it (test_status checks that the two agree).
 */
#ifndef ODDSKY_DAEMON_LIVEPAGE_H
#define ODDSKY_DAEMON_LIVEPAGE_H

#include <stddef.h>

/* The page, NUL-terminated; livepage_html_len bytes before the NUL. */
extern const char livepage_html[];
extern const size_t livepage_html_len;

#endif
