/*
 * demo_assets.c - files the demo carries inside the binary, so `oddsky
 * demo` needs nothing else: the demo feature map (config/demo-featmap.json)
 * embedded byte for byte with the assembler's .incbin (the Makefile makes
 * this object depend on the file; a unit test compares the two).
 */
#include "demo_assets.h"

__asm__(".section .rodata\n"
        ".global demo_featmap_json\n"
        ".type demo_featmap_json, @object\n"
        "demo_featmap_json:\n"
        ".incbin \"config/demo-featmap.json\"\n"
        ".byte 0\n"
        ".size demo_featmap_json, . - demo_featmap_json\n"
        ".previous\n");
