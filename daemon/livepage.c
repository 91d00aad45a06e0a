/*
 * livepage.c - GENERATED from daemon/livepage.html by
 * daemon/livepage_gen.py; edit the HTML and rerun the script.
 */
#include "livepage.h"

const char livepage_html[] =
    "<!doctype html>\n"
    "<html><head><title>oddsky</title></head><body>oddsky ?\? \"x\"</body></html>\n";

const size_t livepage_html_len = sizeof livepage_html - 1;
