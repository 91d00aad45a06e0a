/*
 * demo_assets.h - the demo's embedded files (see demo_assets.c).
 */
#ifndef ODDSKY_DAEMON_DEMO_ASSETS_H
#define ODDSKY_DAEMON_DEMO_ASSETS_H

/* config/demo-featmap.json, NUL-terminated. */
extern const char demo_featmap_json[];

#endif
